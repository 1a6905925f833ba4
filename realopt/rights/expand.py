"""Expand: multiply the operating project's scale by (1 + scale) once, for a cost."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import ClassVar

from ..model import Schedule
from .base import Action, BaseRight
from .raw import moved, schedule_raw


def parse_scaled(ld, path, item, cls, money, money_what, nonneg=False):
    """``scale`` (bounds and wording: ``cls.FIELD_RULES``) and one money schedule (expand:
    cost; contract: savings)."""
    scale = None
    if "scale" not in item:
        ld.missing(path + ("scale",), cls.FIELD_RULES["scale"]["expected"])
    else:
        scale = ld.field(path + ("scale",), item["scale"], cls, "scale")
    amount = Schedule.constant(0.0)
    if item.get(money) is not None:
        amount = ld.schedule(path + (money,), item[money], money_what, nonneg=nonneg)
    if scale is None or amount is None:
        return None
    return {"scale": scale, money: amount}


@dataclass(frozen=True, kw_only=True)
class Expand(BaseRight):
    """Multiply the scale of the operating project by (1 + scale) for ``cost``."""

    scale: float
    cost: Schedule = field(default_factory=lambda: Schedule.constant(0.0))
    kind: ClassVar[str] = "expand"
    KEYS: ClassVar[tuple[str, ...]] = ("scale", "cost")
    one_shot: ClassVar[bool] = True
    FIELD_RULES: ClassVar[dict] = {"scale": dict(
        expected="the added fraction of the current scale, above 0 (0.3 = 30% more)", gt=0.0)}
    NONNEG_SCHEDULES: ClassVar[dict] = {"cost": "the cost of the expansion"}

    @classmethod
    def parse(cls, ld, path, item):
        return parse_scaled(ld, path, item, cls, "cost", cls.NONNEG_SCHEDULES["cost"],
                            nonneg=True)

    def raw(self):
        return {"scale": self.scale, "cost": schedule_raw(self.cost)}

    @classmethod
    def example(cls):
        return cls(name="grow", window=(0.0, 3.0), scale=0.5, cost=Schedule.constant(40.0))

    def moves(self, used, modes, slot):
        if self.name in used:
            return []
        return [(used | {self.name}, modes, self.cost, -1, Action.EXPAND, "expand")]

    def scale_fixed(self, used, mode):
        return (1.0 + self.scale, 0.0) if self.name in used else (1.0, 0.0)

    def what(self, money):
        return f"expand scale by {self.scale:.0%} for {self.cost.describe(money)}"

    def input_rows(self, f, schedule_text):
        return [("Added scale", f.pct(self.scale)), ("Cost", schedule_text(self.cost, f))]

    def money_inputs(self, at):
        return [(f"{self.name}: cost", lambda k: {f"{at}.cost": moved(self.cost, k)})]

    def scale_inputs(self, at):
        return [(f"{self.name}: scale", self.scale, None,
                 lambda k: {f"{at}.scale": self.scale * k})]
