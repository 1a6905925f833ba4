"""Switch: move between operating modes any number of times, each move at its own cost."""
from __future__ import annotations

import difflib
import re
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from ..keypaths import describe
from ..model import Schedule
from .base import Action, BaseRight
from .raw import formula_times, moved

_MOVE = re.compile(r"^\s*(.+?)\s*->\s*(.+?)\s*$")


@dataclass(frozen=True)
class Mode:
    """An operating mode: multiplier on the base cash flows and a fixed yearly flow (+ = inflow)."""

    name: str
    scale: float = 1.0
    fixed: float = 0.0
    cash_flow: str | None = None     # own yearly cash-flow formula (valuation: simulation)


def modes_raw(modes, k_fixed: float = 1.0, scaled: str | None = None, k_scale: float = 1.0,
              k_cash_flow: float = 1.0, flow_of: str | None = None):
    """The modes as the file writes them; ``k_fixed`` times every fixed flow, ``k_scale`` times
    the scale of mode ``scaled``, ``k_cash_flow`` times the own cash_flow formula of mode
    ``flow_of`` (valuation: simulation; every other mode's formula kept as written)."""
    out = {}
    for m in modes:
        out[m.name] = {"scale": m.scale * k_scale if m.name == scaled else m.scale,
                       "fixed": m.fixed * k_fixed}
        if m.cash_flow is not None:
            out[m.name]["cash_flow"] = (formula_times(m.cash_flow, k_cash_flow)
                                        if m.name == flow_of and k_cash_flow != 1.0
                                        else m.cash_flow)
    return out


def costs_raw(costs, k: float = 1.0):
    return {f"{a}->{b}": moved(c, k) for a, b, c in costs}


@dataclass(frozen=True, kw_only=True)
class Switch(BaseRight):
    """Move between operating ``modes`` any number of times; ``costs`` lists the allowed moves
    as (from mode, to mode, cost schedule)."""

    modes: tuple[Mode, ...]
    start: str
    costs: tuple[tuple[str, str, Schedule], ...]
    kind: ClassVar[str] = "switch"
    KEYS: ClassVar[tuple[str, ...]] = ("modes", "start", "costs")
    modal: ClassVar[bool] = True

    def mode(self, name: str) -> Mode:
        return next(m for m in self.modes if m.name == name)

    # ---- file --------------------------------------------------------------------------
    @classmethod
    def parse(cls, ld, path, item):
        modes_path = path + ("modes",)
        if "modes" not in item:
            ld.missing(modes_path, "a mapping of operating modes, e.g. {run: {scale: 1.0}, "
                       "idle: {scale: 0.0, fixed: -1.2}}")
            return None
        raw = item["modes"]
        if not isinstance(raw, dict) or len(raw) < 2:
            ld.bad(modes_path, describe(raw), "a mapping of at least two operating modes, e.g. "
                   "{run: {scale: 1.0}, idle: {scale: 0.0, fixed: -1.2}}")
            return None
        modes, ok = [], True
        for mname, spec in raw.items():
            mp = modes_path + (mname,)
            mname = str(mname)
            spec = {} if spec is None else spec
            if ld.mapping(mp, spec, ("scale", "fixed", "cash_flow"), "a mode: {scale: "
                          "multiplier of the base cash flows, fixed: yearly flow in this "
                          "mode}") is None:
                ok = False
                continue
            mcf = None
            if spec.get("cash_flow") is not None:      # valuation: simulation (the loader's)
                mcf = ld.mode_cash_flow(mp + ("cash_flow",), spec["cash_flow"])
                if mcf is None:
                    ok = False
                    continue
            sc = ld.field(mp + ("scale",), spec.get("scale", 1.0), Mode, "scale")
            fx = ld.field(mp + ("fixed",), spec.get("fixed", 0.0), Mode, "fixed")
            if sc is None or fx is None:
                ok = False
            else:
                modes.append(Mode(name=mname, scale=sc, fixed=fx, cash_flow=mcf))
        known = [str(m) for m in raw]
        start = known[0]
        if item.get("start") is not None:
            start = _mode_name(ld, path + ("start",), item["start"], known, "the mode the "
                               "project starts in")
        costs = _switch_costs(ld, path + ("costs",), item.get("costs"), known, "costs" in item)
        if not ok or start is None or costs is None:
            return None
        reach, frontier = {start}, [start]
        while frontier:
            m = frontier.pop()
            for a, b, _ in costs:
                if a == m and b not in reach:
                    reach.add(b)
                    frontier.append(b)
        for m in known:
            if m not in reach:
                ld.bad(modes_path + (m,), f"the mode {m}, which no move reaches from {start}",
                       "every mode reachable through costs", f"add a cost for "
                       f"{start}->{m}, or delete the mode", at="key")
                ok = False
        if not ok:
            return None
        return {"modes": tuple(modes), "start": start, "costs": costs}

    def raw(self):
        return {"modes": modes_raw(self.modes), "start": self.start,
                "costs": costs_raw(self.costs)}

    @classmethod
    def example(cls):
        return cls(name="idle", window=(0.0, 3.0),
                   modes=(Mode("run", 1.0, 0.0), Mode("idle", 0.0, -2.0)), start="run",
                   costs=(("run", "idle", Schedule.constant(3.0)),
                          ("idle", "run", Schedule.constant(4.0))))

    # ---- state graph -------------------------------------------------------------------
    def is_used(self, invested, abandoned, used, modes, slot):
        return modes[slot] != self.start

    def moves(self, used, modes, slot):
        out = []
        for a, b, cost in self.costs:
            if modes[slot] == a:
                new = modes[:slot] + (b,) + modes[slot + 1:]
                out.append((used, new, cost, -1, Action.SWITCH, f"{a} -> {b}"))
        return out

    def scale_fixed(self, used, mode):
        m = self.mode(mode)
        return m.scale, m.fixed

    # ---- wording -----------------------------------------------------------------------
    def what(self, money):
        return "switch between modes " + ", ".join(m.name for m in self.modes)

    def action_text(self, edge):
        return edge.label

    def input_rows(self, f, schedule_text):
        rows = [(f"Mode '{mode.name}'", f"scale {f.pct(mode.scale)}, fixed "
                 f"{f.money(mode.fixed)} a year" + (" (start)" if mode.name == self.start
                                                     else "")) for mode in self.modes]
        rows += [(f"Cost {a_} -> {b_}", schedule_text(c, f)) for a_, b_, c in self.costs]
        return rows

    def base_part(self):
        m = self.mode(self.start)
        if m.scale == 1.0 and m.fixed == 0.0:
            return None
        bits = ([f"scale {m.scale:g}"] if m.scale != 1.0 else []) + (
            [f"fixed {m.fixed:+g} a year"] if m.fixed != 0.0 else [])
        return f"'{self.name}' in its start mode '{self.start}' ({', '.join(bits)})"

    # ---- sensitivities -----------------------------------------------------------------
    def money_inputs(self, at):
        out = [(f"{self.name}: switching costs", lambda k: {
            f"{at}.costs": costs_raw(self.costs, k)})]
        if any(m.fixed for m in self.modes):
            out.append((f"{self.name}: fixed flows of the modes", lambda k: {
                f"{at}.modes": modes_raw(self.modes, k_fixed=k)}))
        for m in self.modes:                 # a mode's own cash flow (valuation: simulation)
            if m.cash_flow is not None:
                out.append((f"{self.name}: cash flow of mode '{m.name}'", lambda k, m=m: {
                    f"{at}.modes": modes_raw(self.modes, k_cash_flow=k, flow_of=m.name)}))
        return out

    def scale_inputs(self, at):
        # a mode with its own cash_flow formula has no scale to move (the formula replaces it)
        return [(f"{self.name}: scale of mode '{m.name}'", m.scale, None,
                 lambda k, m=m: {f"{at}.modes": modes_raw(self.modes, scaled=m.name, k_scale=k)})
                for m in self.modes if m.name != self.start and m.scale and m.cash_flow is None]

    # ---- results -----------------------------------------------------------------------
    def _primary(self, graph, used, modes, modals):
        k = modals.index(self)
        out = []
        for m in self.modes:
            mm = list(modes)
            mm[k] = m.name
            idx = graph.index(used=used, modes=tuple(mm))
            if idx is not None:
                out.append(idx)
        return out

    def chance_of_use(self, graph, edge_ids, occ, first_uses):
        """First moves out of the start mode (a forward pass that drops the paths once they
        move), and the share of paths in each mode at each sampled date."""
        first = first_uses(edge_ids)
        rn_use = np.cumsum(first[0][:, edge_ids].sum(axis=1))
        rw_use = np.cumsum(first[1][:, edge_ids].sum(axis=1))
        k = [s for s in graph.rights if s.modal].index(self)
        mode_shares = {}
        for m in self.modes:
            cols = [i for i, s in enumerate(graph.states)
                    if not s.abandoned and s.invested and s.modes[k] == m.name]
            mode_shares[m.name] = tuple(
                tuple(float(min(1.0, max(0.0, x))) for x in prob[:, cols].sum(axis=1))
                for prob in occ[0])
        measure = (f"chance of having switched out of '{self.start}' at least once by each date "
                   "(never falls); the mode shares are the chance of being in each mode at "
                   "each date (the project invested and not abandoned)")
        return rn_use, rw_use, measure, mode_shares

def _mode_name(ld, path, value, known, what):
    if not isinstance(value, str) or value.strip() not in known:
        hint = difflib.get_close_matches(str(value), known, n=1)
        ld.bad(path, describe(value), f"{what}: one of the modes {', '.join(known)}",
               f"did you mean {hint[0]}?" if hint else "add the mode under modes, or "
               "use one of those listed")
        return None
    return value.strip()


def _switch_costs(ld, path, value, known, given):
    expected = "a mapping of moves to their costs, e.g. {run->idle: 0.5, idle->run: 2.0}"
    if not given:
        ld.missing(path, expected)
        return None
    if not isinstance(value, dict) or not value:
        ld.bad(path, describe(value), expected)
        return None
    out, ok = [], True
    for move, cost in value.items():
        p = path + (move,)
        m = _MOVE.match(str(move))
        if not m:
            ld.bad(p, f"the key {move}", "a move written from->to, e.g. run->idle", at="key")
            ok = False
            continue
        a, b = m.group(1), m.group(2)
        for name in (a, b):
            if name not in known:
                hint = difflib.get_close_matches(name, known, n=1)
                ld.bad(p, f"the mode {name}, which is not under modes",
                       f"moves between the modes {', '.join(known)}",
                       f"did you mean {hint[0]}?" if hint else f"add {name} under modes",
                       at="key")
                ok = False
        if a == b:
            ld.bad(p, f"a move from {a} to itself", "a move between two different modes",
                   at="key")
            ok = False
        sched = ld.schedule(p, cost, f"the cost of moving from {a} to {b}", nonneg=True)
        if sched is None:
            ok = False
        elif ok:
            out.append((a, b, sched))
    return tuple(out) if ok else None
