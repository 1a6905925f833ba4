"""Section rights: the list, each right's common keys (name, type, window, exercise, dates,
requires, excludes) and the type-specific keys (parsed by each type's own module,
realopt/rights/<type>.py). Needs the lattice (dates on an explicit tree's grid); links between
rights are checked in crosschecks.py."""
from __future__ import annotations

from .. import model, validate
from .. import project_simulation as simulation_keys
from ..rights.registry import right_type
from .keys import COMMON_RIGHT_KEYS, RIGHT_KEYS
from .paths import Index, describe
from .primitives import _ABSENT


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
        defers = [i for i, r in enumerate(out) if r.commits]
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
        specific = right_type(kind).parse(self, path, item)
        if None in (name, window, exercise, dates, requires, excludes, specific):
            return None
        if right_type(kind).commits and window[0] != 0:
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
        commits = kind is not None and right_type(kind).commits
        late_defer = commits and window and window[0] != 0
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
        if commits and out[0] != 0 and not late_defer:
            self.bad(path, describe(value), "defer dates that include 0 (committing now is "
                     "always one of the choices)", "add 0 to the dates")
            return None
        return tuple(out)

    # each right type parses its own keys (realopt/rights/<type>.py); messages are located here
    def right_defer(self, path, item):
        return right_type("defer").parse(self, path, item)

    def right_expand(self, path, item):
        return right_type("expand").parse(self, path, item)

    def right_contract(self, path, item):
        return right_type("contract").parse(self, path, item)

    def right_abandon(self, path, item):
        return right_type("abandon").parse(self, path, item)

    def right_switch(self, path, item):
        return right_type("switch").parse(self, path, item)

    def mode_cash_flow(self, path, value):
        """A switch mode's own cash-flow formula (valuation: simulation); None after a problem."""
        return simulation_keys.mode_cash_flow(self, path, value)
