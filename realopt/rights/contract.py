"""Contract: give up a fraction of the operating project's scale once, for one-off savings."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import ClassVar

from ..model import Schedule
from .base import Action, BaseRight
from .expand import parse_scaled
from .raw import moved, schedule_raw

CONTRACT_CAP = 0.99               # a moved contraction keeps some of the project


@dataclass(frozen=True, kw_only=True)
class Contract(BaseRight):
    """Multiply the scale by (1 - scale) and receive ``savings`` (one-off proceeds) on exercise."""

    scale: float
    savings: Schedule = field(default_factory=lambda: Schedule.constant(0.0))
    kind: ClassVar[str] = "contract"
    KEYS: ClassVar[tuple[str, ...]] = ("scale", "savings")
    one_shot: ClassVar[bool] = True
    proceeds: ClassVar[str | None] = "savings"
    FIELD_RULES: ClassVar[dict] = {"scale": dict(
        expected="the fraction of the current scale given up, above 0 and below 1 (0.4 = 40% "
        "smaller)", gt=0.0, lt=1.0, fix="to close entirely use an abandon right")}

    def terminal_share(self):
        return f"replaces its share ({self.scale:.0%}) of the terminal value"

    @classmethod
    def parse(cls, ld, path, item):
        return parse_scaled(ld, path, item, cls, "savings", "the one-off savings on "
                            "contracting")

    def raw(self):
        return {"scale": self.scale, "savings": schedule_raw(self.savings)}

    @classmethod
    def example(cls):
        return cls(name="shrink", window=(0.0, 3.0), scale=0.4, savings=Schedule.constant(30.0))

    def moves(self, used, modes, slot):
        if self.name in used:
            return []
        return [(used | {self.name}, modes, self.savings, +1, Action.CONTRACT, "contract")]

    def scale_fixed(self, used, mode):
        return (1.0 - self.scale, 0.0) if self.name in used else (1.0, 0.0)

    def what(self, money):
        return f"contract scale by {self.scale:.0%} receiving {self.savings.describe(money)}"

    def input_rows(self, f, schedule_text):
        return [("Scale given up", f.pct(self.scale)),
                ("Savings received", schedule_text(self.savings, f))]

    def money_inputs(self, at):
        return [(f"{self.name}: savings", lambda k: {f"{at}.savings": moved(self.savings, k)})]

    def scale_inputs(self, at):
        return [(f"{self.name}: scale", self.scale, CONTRACT_CAP,
                 lambda k: {f"{at}.scale": min(CONTRACT_CAP, self.scale * k)})]
