"""Shutdown: close the project temporarily and restart it later, paying maintenance while shut.

A two-mode switch written in the trade's own terms: mode ``operating`` (scale 1, no fixed flow,
the start) and mode ``shut`` (scale 0, fixed flow -maintenance a year); ``cost`` is paid on each
shutdown and ``restart_cost`` on each restart, at the move's date. Everything else (moves, state
fields, rules, chance of use, mode shares) is the switch's.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import ClassVar

from ..model import Schedule
from .raw import moved, schedule_raw
from .switch import Mode, Switch

OPERATING, SHUT = "operating", "shut"


@dataclass(frozen=True, kw_only=True)
class Shutdown(Switch):
    """Shut down for ``cost``, restart for ``restart_cost`` (schedules of the move's date);
    ``maintenance`` is the yearly cost while shut (a positive number, paid as a fixed flow)."""

    cost: Schedule
    restart_cost: Schedule = field(default_factory=lambda: Schedule.constant(0.0))
    maintenance: float = 0.0
    modes: tuple[Mode, ...] = field(init=False, repr=False)
    start: str = field(init=False, default=OPERATING, repr=False)
    costs: tuple = field(init=False, repr=False)
    kind: ClassVar[str] = "shutdown"
    KEYS: ClassVar[tuple[str, ...]] = ("cost", "restart_cost", "maintenance")
    FIELD_RULES: ClassVar[dict] = {"maintenance": dict(
        expected="the yearly maintenance cost while shut, 0 or more", ge=0.0,
        fix="a cost is written positive; it is paid every year while shut")}
    NONNEG_SCHEDULES: ClassVar[dict] = {"cost": "the cost paid on each shutdown",
                                        "restart_cost": "the cost paid on each restart"}

    def __post_init__(self):
        set_ = object.__setattr__
        upkeep = -self.maintenance if self.maintenance else 0.0      # never -0.0
        set_(self, "modes", (Mode(OPERATING, 1.0, 0.0), Mode(SHUT, 0.0, upkeep)))
        set_(self, "start", OPERATING)
        set_(self, "costs", ((OPERATING, SHUT, self.cost), (SHUT, OPERATING, self.restart_cost)))

    @classmethod
    def parse(cls, ld, path, item):
        cost = None
        if "cost" not in item:
            ld.missing(path + ("cost",), "the cost paid on each shutdown (money, or "
                       "{year: amount})", "add e.g. cost: 1.5 (0 if shutting costs nothing)")
        else:
            cost = ld.schedule(path + ("cost",), item["cost"], cls.NONNEG_SCHEDULES["cost"],
                               nonneg=True)
        restart = Schedule.constant(0.0)
        if item.get("restart_cost") is not None:
            restart = ld.schedule(path + ("restart_cost",), item["restart_cost"],
                                  cls.NONNEG_SCHEDULES["restart_cost"], nonneg=True)
        upkeep = 0.0
        if item.get("maintenance") is not None:
            upkeep = ld.field(path + ("maintenance",), item["maintenance"], cls, "maintenance")
        if cost is None or restart is None or upkeep is None:
            return None
        return {"cost": cost, "restart_cost": restart, "maintenance": upkeep}

    def raw(self):
        return {"cost": schedule_raw(self.cost), "restart_cost": schedule_raw(self.restart_cost),
                "maintenance": self.maintenance}

    @classmethod
    def example(cls):
        return cls(name="mothball", window=(0.0, 3.0), cost=Schedule.constant(2.0),
                   restart_cost=Schedule.constant(3.0), maintenance=1.5)

    def what(self, money):
        return (f"shut down temporarily for {self.cost.describe(money)} (restart "
                f"{self.restart_cost.describe(money)}; maintenance "
                f"{money.format(self.maintenance)} a year while shut)")

    def input_rows(self, f, schedule_text):
        return [("Cost to shut down", schedule_text(self.cost, f)),
                ("Cost to restart", schedule_text(self.restart_cost, f)),
                ("Maintenance while shut", f"{f.money(self.maintenance)} a year")]

    def money_inputs(self, at):
        out = [(f"{self.name}: shutdown cost", lambda k: {f"{at}.cost": moved(self.cost, k)}),
               (f"{self.name}: restart cost", lambda k: {
                   f"{at}.restart_cost": moved(self.restart_cost, k)})]
        if self.maintenance:
            out.append((f"{self.name}: maintenance", lambda k: {
                f"{at}.maintenance": self.maintenance * k}))
        return out

    def scale_inputs(self, at):
        return []
