"""Abandon: sell out or close for a salvage value; ends the project (absorbing state)."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import ClassVar

from ..model import Schedule
from .base import Action, BaseRight
from .raw import moved, schedule_raw


@dataclass(frozen=True, kw_only=True)
class Abandon(BaseRight):
    """Sell out or close for ``salvage`` (not scaled by expansions); ends the project."""

    salvage: Schedule = field(default_factory=lambda: Schedule.constant(0.0))
    kind: ClassVar[str] = "abandon"
    KEYS: ClassVar[tuple[str, ...]] = ("salvage",)
    ends: ClassVar[bool] = True
    proceeds: ClassVar[str | None] = "salvage"

    @classmethod
    def parse(cls, ld, path, item):
        if item.get("salvage") is None:
            return {"salvage": Schedule.constant(0.0)}
        s = ld.schedule(path + ("salvage",), item["salvage"], "the salvage value (proceeds "
                        "on selling or closing; negative for a net closure cost)")
        return {"salvage": s} if s is not None else None

    def raw(self):
        return {"salvage": schedule_raw(self.salvage)}

    @classmethod
    def example(cls):
        return cls(name="exit", window=(0.0, 3.0), salvage=Schedule.constant(60.0))

    def is_used(self, invested, abandoned, used, modes, slot):
        return abandoned

    def moves(self, used, modes, slot):
        return [(None, None, self.salvage, +1, Action.ABANDON, "abandon")]

    def what(self, money):
        return f"abandon for salvage {self.salvage.describe(money)}"

    def input_rows(self, f, schedule_text):
        return [("Salvage", schedule_text(self.salvage, f))]

    def money_inputs(self, at):
        return [(f"{self.name}: salvage", lambda k: {f"{at}.salvage": moved(self.salvage, k)})]
