"""Section rights: the list, each right's common keys (name, type, window, exercise, dates,
requires, excludes) and the type-specific keys (``right_<type>`` methods). Needs the lattice
(dates on an explicit tree's grid); links between rights are checked in crosschecks.py."""
from __future__ import annotations

import difflib
import re

from .. import model, validate
from .. import project_simulation as simulation_keys
from .keys import COMMON_RIGHT_KEYS, RIGHT_KEYS
from .paths import Index, describe
from .primitives import _ABSENT

_MOVE = re.compile(r"^\s*(.+?)\s*->\s*(.+?)\s*$")


class RightsSection:
    def rights(self, value, lattice):
        path = ("rights",)
        if value is None or value is _ABSENT:
            return ()
        if not isinstance(value, list):
            fix = ""
            if isinstance(value, dict):
                fix = "start each right with '- name: ...' so that rights is a list"
            self.bad(path, describe(value), "a list of rights, each starting with '- name:'", fix)
            return None
        out, ok, seen, at = [], True, {}, []
        for i, item in enumerate(value):
            r = self.right(path + (Index(i),), item)
            if r is None:
                ok = False
                continue
            if r.name in seen:
                self.bad(path + (Index(i), "name"), f'the name "{r.name}" a second time (first '
                         f"at rights[{seen[r.name]}])", "a unique name for each right",
                         "rename one of them; requires/excludes and reports use the names")
                ok = False
                continue
            seen[r.name] = i
            out.append(r)
            at.append(i)
        if not ok:
            # names in requires/excludes are checked now too, so that every problem is
            # reported in one pass; names of rights that failed to build count as known
            known = [str(item["name"]).strip() for item in value
                     if isinstance(item, dict) and isinstance(item.get("name"), (str, int, float))
                     and not isinstance(item.get("name"), bool)]
            self.links(path, out, at, known)
            return None
        defers = [i for i, r in enumerate(out) if isinstance(r, model.Defer)]
        for i in defers[1:]:
            self.bad(path + (Index(i), "type"), "a second defer right", "at most one defer "
                     "right (one decision to commit)", "merge the waiting periods into one "
                     "window, or use bermudan dates")
        self.links(path, out, at)
        if lattice is not None and lattice.explicit:
            self.on_grid(path, out, lattice.step_years)
        return tuple(out)

    def right(self, path, item):
        if not isinstance(item, dict):
            self.bad(path, describe(item), "a right: a mapping with name, type and window")
            return None
        kind = None
        if "type" not in item:
            self.missing(path + ("type",), "type: " + " | ".join(RIGHT_KEYS))
        else:
            kind = self.choice(path + ("type",), item["type"], tuple(RIGHT_KEYS),
                               "the kind of right")
        keys = COMMON_RIGHT_KEYS + (RIGHT_KEYS[kind] if kind else
                                    tuple(k for ks in RIGHT_KEYS.values() for k in ks))
        elsewhere = {}
        if kind:
            for other, ks in RIGHT_KEYS.items():
                for k in ks:
                    if k not in keys:
                        article = "an" if kind[0] in "aeiou" else "a"
                        elsewhere.setdefault(k, f"{k} belongs to {other} rights; this is "
                                             f"{article} {kind} right")
        self.mapping(path, item, keys, "a right", elsewhere)
        name = None
        if "name" not in item:
            self.missing(path + ("name",), "a unique name for the right (text)")
        else:
            name = self.text(path + ("name",), item["name"], "a unique name for the right (text)")
        window = self.window(path + ("window",), item.get("window"), "window" in item)
        exercise = "american"
        if item.get("exercise") is not None:
            exercise = self.field(path + ("exercise",), item["exercise"], model.Right,
                                  "exercise")
        dates = self.dates(path + ("dates",), item.get("dates"), exercise, window, kind)
        requires = self.names(path + ("requires",), item.get("requires"))
        excludes = self.names(path + ("excludes",), item.get("excludes"))
        if kind is None:
            return None
        specific = getattr(self, f"right_{kind}")(path, item)
        if None in (name, window, exercise, dates, requires, excludes, specific):
            return None
        if kind == "defer" and window[0] != 0:
            fix = f"write window: [0, {window[1]:g}]"
            if exercise == "bermudan":
                fix += " and dates: [" + ", ".join(f"{d:g}" for d in sorted({0.0, *dates})) + "]"
            self.bad(path + ("window",), f"a window starting at year {window[0]:g}, but the "
                     "defer window must start at 0",
                     "a defer window starting at 0 (committing now is always one of the choices)",
                     fix)
            return None
        cls = model.RIGHT_TYPES[kind]
        return cls(name=name, window=window, exercise=exercise, dates=dates, requires=requires,
                   excludes=excludes, **specific)

    def window(self, path, value, given):
        expected = validate.WINDOW_EXPECTED
        if not given:
            self.missing(path, expected, "add e.g. window: [0, 5]")
            return None
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            self.bad(path, describe(value), expected, f"for a single date write [{value}, {value}]")
            return None
        if not isinstance(value, list) or len(value) != 2:
            self.bad(path, describe(value), expected)
            return None
        start, end = validate.WINDOW_ENDS
        a = self.number(path + (Index(0),), value[0], start.expected, **start.bounds)
        b = self.number(path + (Index(1),), value[1], end.expected, **end.bounds)
        if a is None or b is None:
            return None
        if a > b:
            self.bad(path, f"[{a:g}, {b:g}] (the start after the end)", expected,
                     f"write [{b:g}, {a:g}]")
            return None
        return (a, b)

    def dates(self, path, value, exercise, window, kind):
        if exercise != "bermudan":
            if value is not None:
                self.bad(path, describe(value), f"no dates with exercise: {exercise}",
                         "dates apply to exercise: bermudan; delete them or set exercise: bermudan",
                         at="key")
                return None
            return ()
        if value is None:
            self.bad(path, "exercise: bermudan without dates", "a list of exercise dates (years) "
                     "inside the window, e.g. dates: [0, 1, 2]", "add dates:, or use exercise: "
                     "american (any time in the window) or european (its end only)",
                     loc=path[:-1] + ("exercise",))
            return None
        if not isinstance(value, list) or not value:
            self.bad(path, describe(value), "a list of exercise dates (years) inside the window, "
                     "e.g. [0, 1, 2]")
            return None
        out, ok = [], True
        late_defer = kind == "defer" and window and window[0] != 0
        if late_defer:                 # the window's own problem says to start it at 0
            window = (0.0, window[1])
        for i, v in enumerate(value):
            d = self.number(path + (Index(i),), v, validate.DATE.expected, **validate.DATE.bounds)
            if d is None:
                ok = False
                continue
            if window and not window[0] <= d <= window[1]:
                self.bad(path + (Index(i),), f"{d:g}, outside the window [{window[0]:g}, "
                         f"{window[1]:g}]", "dates inside the window",
                         "widen the window or drop the date")
                ok = False
            out.append(d)
        if not ok:
            return None
        out = sorted(set(out))
        if kind == "defer" and out[0] != 0 and not late_defer:
            self.bad(path, describe(value), "defer dates that include 0 (committing now is "
                     "always one of the choices)", "add 0 to the dates")
            return None
        return tuple(out)

    def right_defer(self, path, item):
        if item.get("cost") is None:
            return {"cost": None}
        cost = self.schedule(path + ("cost",), item["cost"], "the cost paid on committing",
                             nonneg=True)
        return {"cost": cost} if cost is not None else None

    def right_expand(self, path, item):
        return self._scaled(path, item, "expand", "cost", "the cost of the expansion",
                            {"gt": 0.0}, "the added fraction of the current scale, above 0 "
                            "(0.3 = 30% more)", nonneg=True)

    def right_contract(self, path, item):
        return self._scaled(path, item, "contract", "savings", "the one-off savings on "
                            "contracting", {"gt": 0.0, "lt": 1.0}, "the fraction of the current "
                            "scale given up, above 0 and below 1 (0.4 = 40% smaller)")

    def _scaled(self, path, item, kind, money, money_what, bounds, scale_what, nonneg=False):
        scale = None
        if "scale" not in item:
            self.missing(path + ("scale",), scale_what)
        else:
            fix = "to close entirely use an abandon right" if kind == "contract" else ""
            scale = self.number(path + ("scale",), item["scale"], scale_what, fix=fix, **bounds)
        amount = model.Schedule.constant(0.0)
        if item.get(money) is not None:
            amount = self.schedule(path + (money,), item[money], money_what, nonneg=nonneg)
        if scale is None or amount is None:
            return None
        return {"scale": scale, money: amount}

    def right_abandon(self, path, item):
        if item.get("salvage") is None:
            return {"salvage": model.Schedule.constant(0.0)}
        s = self.schedule(path + ("salvage",), item["salvage"], "the salvage value (proceeds "
                          "on selling or closing; negative for a net closure cost)")
        return {"salvage": s} if s is not None else None

    def right_switch(self, path, item):
        modes_path = path + ("modes",)
        if "modes" not in item:
            self.missing(modes_path, "a mapping of operating modes, e.g. {run: {scale: 1.0}, "
                         "idle: {scale: 0.0, fixed: -1.2}}")
            return None
        raw = item["modes"]
        if not isinstance(raw, dict) or len(raw) < 2:
            self.bad(modes_path, describe(raw), "a mapping of at least two operating modes, e.g. "
                     "{run: {scale: 1.0}, idle: {scale: 0.0, fixed: -1.2}}")
            return None
        modes, ok = [], True
        for mname, spec in raw.items():
            mp = modes_path + (mname,)
            mname = str(mname)
            spec = {} if spec is None else spec
            if self.mapping(mp, spec, ("scale", "fixed", "cash_flow"), "a mode: {scale: "
                            "multiplier of the base cash flows, fixed: yearly flow in this "
                            "mode}") is None:
                ok = False
                continue
            mcf = None
            if spec.get("cash_flow") is not None:
                mcf = simulation_keys.mode_cash_flow(self, mp + ("cash_flow",), spec["cash_flow"])
                if mcf is None:
                    ok = False
                    continue
            sc = self.number(mp + ("scale",), spec.get("scale", 1.0), "the multiplier on the "
                             "base cash flows in this mode, 0 or more", ge=0.0)
            fx = self.number(mp + ("fixed",), spec.get("fixed", 0.0), "the fixed yearly flow in "
                             "this mode (+ inflow, - running cost)")
            if sc is None or fx is None:
                ok = False
            else:
                modes.append(model.Mode(name=mname, scale=sc, fixed=fx, cash_flow=mcf))
        known = [str(m) for m in raw]
        start = known[0]
        if item.get("start") is not None:
            start = self._mode_name(path + ("start",), item["start"], known, "the mode the "
                                    "project starts in")
        costs = self.switch_costs(path + ("costs",), item.get("costs"), known, "costs" in item)
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
                self.bad(modes_path + (m,), f"the mode {m}, which no move reaches from {start}",
                         "every mode reachable through costs", f"add a cost for "
                         f"{start}->{m}, or delete the mode", at="key")
                ok = False
        if not ok:
            return None
        return {"modes": tuple(modes), "start": start, "costs": costs}

    def _mode_name(self, path, value, known, what):
        if not isinstance(value, str) or value.strip() not in known:
            hint = difflib.get_close_matches(str(value), known, n=1)
            self.bad(path, describe(value), f"{what}: one of the modes {', '.join(known)}",
                     f"did you mean {hint[0]}?" if hint else "add the mode under modes, or "
                     "use one of those listed")
            return None
        return value.strip()

    def switch_costs(self, path, value, known, given):
        expected = "a mapping of moves to their costs, e.g. {run->idle: 0.5, idle->run: 2.0}"
        if not given:
            self.missing(path, expected)
            return None
        if not isinstance(value, dict) or not value:
            self.bad(path, describe(value), expected)
            return None
        out, ok = [], True
        for move, cost in value.items():
            p = path + (move,)
            m = _MOVE.match(str(move))
            if not m:
                self.bad(p, f"the key {move}", "a move written from->to, e.g. run->idle",
                         at="key")
                ok = False
                continue
            a, b = m.group(1), m.group(2)
            for name in (a, b):
                if name not in known:
                    hint = difflib.get_close_matches(name, known, n=1)
                    self.bad(p, f"the mode {name}, which is not under modes",
                             f"moves between the modes {', '.join(known)}",
                             f"did you mean {hint[0]}?" if hint else f"add {name} under modes",
                             at="key")
                    ok = False
            if a == b:
                self.bad(p, f"a move from {a} to itself", "a move between two different modes",
                         at="key")
                ok = False
            sched = self.schedule(p, cost, f"the cost of moving from {a} to {b}", nonneg=True)
            if sched is None:
                ok = False
            elif ok:
                out.append((a, b, sched))
        return tuple(out) if ok else None
