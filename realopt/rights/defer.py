"""Defer: wait before committing the investment (the one move out of "not yet invested")."""
from __future__ import annotations

from dataclasses import dataclass, replace
from typing import ClassVar

from ..model import Schedule
from .base import BaseRight
from .raw import moved, schedule_raw


@dataclass(frozen=True, kw_only=True)
class Defer(BaseRight):
    """Wait before committing. ``cost`` paid on exercise; None = the investment outlay plan
    shifted to the exercise date, valued there at the risk-free rate."""

    cost: Schedule | None = None
    kind: ClassVar[str] = "defer"
    KEYS: ClassVar[tuple[str, ...]] = ("cost",)
    commits: ClassVar[bool] = True
    NONNEG_SCHEDULES: ClassVar[dict] = {"cost": "the cost paid on committing"}

    @classmethod
    def parse(cls, ld, path, item):
        if item.get("cost") is None:
            return {"cost": None}
        cost = ld.schedule(path + ("cost",), item["cost"], cls.NONNEG_SCHEDULES["cost"],
                           nonneg=True)
        return {"cost": cost} if cost is not None else None

    def raw(self):
        return {} if self.cost is None else {"cost": schedule_raw(self.cost)}

    @classmethod
    def example(cls):
        return cls(name="wait", window=(0.0, 2.0))

    def is_used(self, invested, abandoned, used, modes, slot):
        return invested

    def what(self, money):
        if self.cost is None:             # before realopt.rights.prepared_rights
            return "commit the investment (cost: the investment plan, started then)"
        if self.cost.today is not None:
            return (f"commit the investment (cost {money.format(self.cost.today)} today, then "
                    f"{replace(self.cost, today=None).describe(money)})")
        return f"commit the investment (cost {self.cost.describe(money)})"

    def action_text(self, edge):
        """Using a defer right means investing: thresholds and maps name that, not "defer"."""
        return "invest"

    def input_rows(self, f, schedule_text):
        return [("Cost on exercise", schedule_text(self.cost, f))]

    def money_inputs(self, at):
        if self.cost is None:
            return []
        return [(f"{self.name}: cost", lambda k: {f"{at}.cost": moved(self.cost, k)})]

    def cost_overrides(self, at, k):
        return {} if self.cost is None else {f"{at}.cost": moved(self.cost, k)}

    def primary_states(self, graph, closure):
        return [graph.initial]
