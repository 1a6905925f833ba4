"""The builder's primitives: locating and recording problems, and the checked readers of one value
(mapping with "did you mean" for unknown keys, number, integer, text, choice, year key, schedule,
names, file path). Each returns the checked value, or None after recording a located Problem."""
from __future__ import annotations

import difflib
import importlib
import math
from pathlib import Path

from .. import model, validate
from .. import project_simulation as simulation_keys
from ..errors import Problem
from .paths import Index, _float_text, describe, format_path
from .reading import Tree


def _optional_module(name: str):
    """Import realopt.<name>, or None when this installation does not have it."""
    try:
        return importlib.import_module(f"realopt.{name}")
    except ModuleNotFoundError as err:
        if err.name == f"realopt.{name}":
            return None
        raise


_ABSENT = object()   # a section missing from the file (reported once, as missing)


class Primitives:
    def __init__(self, tree: Tree, base_dir: Path):
        self.tree = tree
        self.file = tree.file
        self.base_dir = base_dir
        self.problems: list[Problem] = list(tree.problems)
        self.warnings: list[str] = []
        self._reported = {p.key for p in tree.problems}   # refused by the reader already
        self._typos: set = set()                          # (mapping path, key it suggests)
        self.valuation, self.simulation_spec = "lattice", None   # see realopt.project_simulation
        self.driver_names: dict = {}

    # ---- reporting -------------------------------------------------------------------------

    def _where(self, path, at):
        """(line, column, note) for a path: its value, its key, or (missing) its parent."""
        if at == "missing":
            path = path[:-1]
            at = "key"
        for n in range(len(path), -1, -1):
            p = path[:n]
            if p in self.tree.overridden:
                return None, None, self.tree.overridden[p]
            table = self.tree.key_marks if (at == "key" and p in self.tree.key_marks) \
                else self.tree.marks
            if p in table:
                return (*table[p], None)
        return None, None, None

    def bad(self, path, found, expected, fix="", at="value", loc=None):
        """Record a problem at ``path``; ``loc`` (another key path) places it in the file."""
        if format_path(path) in self._reported:
            return
        line, col, note = self._where(path if loc is None else loc, at)
        if note:
            found += f" (from {note})"
        self.problems.append(Problem(self.file, line, col, format_path(path), found, expected,
                                     fix))

    def missing(self, path, expected, fix=""):
        if (path[:-1], path[-1]) in self._typos:
            return                  # the misspelt key's "did you mean" says it already
        self.bad(path, "no value (the key is missing)", expected, fix, at="missing")

    def warn(self, path, text):
        line, _, note = self._where(path, "value")
        where = f"{self.file}:{line}" if line else self.file
        name = self._right_name(path)
        if name and not text.startswith(name):
            text = f"{name}: {text}"           # a warning names the right it concerns
        self.warnings.append(f"{where}: {format_path(path)}: {text}"
                             + (f" (from {note})" if note else ""))

    def _right_name(self, path) -> str:
        """The name of the right at rights[i] that ``path`` lies in ('' if none)."""
        if len(path) < 2 or path[0] != "rights" or not isinstance(path[1], Index):
            return ""
        items = self.tree.data.get("rights") if isinstance(self.tree.data, dict) else None
        if not isinstance(items, list) or not 0 <= int(path[1]) < len(items):
            return ""
        item = items[int(path[1])]
        name = item.get("name") if isinstance(item, dict) else None
        return name.strip() if isinstance(name, str) else ""

    # ---- shapes ----------------------------------------------------------------------------

    def mapping(self, path, value, keys, what, elsewhere=None, empty_ok=False):
        """Check ``value`` is a mapping with only ``keys``; returns it, or None."""
        if value is None and empty_ok:
            return {}
        if not isinstance(value, dict):
            fix = ""
            if isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
                fix = "remove the '- ' in front of the keys: this is a mapping, not a list"
            self.bad(path, describe(value), what, fix)
            return None
        for k in value:
            if k not in keys:
                self.unknown(path + (k,), k, keys, elsewhere or {})
        return value

    def unknown(self, path, key, keys, elsewhere):
        listed = ", ".join(str(k) for k in keys)
        if key in elsewhere:
            self.bad(path, f"the key {key}", f"one of: {listed}", elsewhere[key], at="key")
            return
        hint = difflib.get_close_matches(str(key), [str(k) for k in keys], n=1, cutoff=0.6)
        fix = f"did you mean {hint[0]}?" if hint else "remove it, or use one of the keys listed"
        if hint:
            self._typos.add((path[:-1], hint[0]))
        self.bad(path, f"an unknown key {key}", f"one of: {listed}", fix, at="key")

    def number(self, path, value, expected, *, gt=None, ge=None, lt=None, le=None, fix=""):
        """A finite number within the given bounds (returns float), else None and a problem."""
        bad = validate.number_problem(value, expected, gt=gt, ge=ge, lt=lt, le=le, fix=fix)
        if bad is not None:
            self.bad(path, *bad)
            return None
        return float(value)

    def integer(self, path, value, expected, *, ge=None, le=None):
        bad = validate.integer_problem(value, expected, ge=ge, le=le)
        if bad is not None:
            self.bad(path, *bad)
            return None
        return int(value)

    def field(self, path, value, cls, name, **override):
        """Read ``value`` by the rule of ``cls.name`` in realopt.validate.RULES (the same bounds,
        wording and fix as a project built in Python gets)."""
        rule = validate.rule_for(cls, name)
        expected = override.pop("expected", rule.expected)
        if rule.kind == "choice":
            return self.choice(path, value, rule.choices, expected)
        if rule.kind == "integer":
            return self.integer(path, value, expected, **rule.bounds)
        return self.number(path, value, expected, fix=override.pop("fix", rule.fix),
                           **rule.bounds)

    def text(self, path, value, expected):
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return str(value)
        if not isinstance(value, str) or not value.strip():
            self.bad(path, describe(value), expected)
            return None
        return value.strip()

    def choice(self, path, value, choices, what):
        bad = validate.choice_problem(value, choices, what)
        if bad is not None:
            self.bad(path, *bad)
            return None
        return value.strip().lower()

    def year_key(self, path, key, *, gt=None, ge=0.0, fix=""):
        """A mapping key that is a year (number of years from now)."""
        k = key
        if isinstance(k, str) and _float_text(k.strip()) is not None:
            k = _float_text(k.strip())
        expected = "a year (years from now, " + (f"above {gt:g}" if gt is not None
                                                 else f"{ge:g} or later") + ")"
        if isinstance(k, bool) or not isinstance(k, (int, float)) or not math.isfinite(k) \
                or (gt is not None and not k > gt) or (ge is not None and not k >= ge):
            if isinstance(key, str):
                fix = "write the year as a number of years from now, such as 3, not a date"
            self.bad(path, f"the key {key}", expected, fix, at="key")
            return None
        return float(k)

    def schedule(self, path, value, what, *, nonneg=False):
        """number | {year: amount} (linear between, flat beyond) | {start, growth}."""
        sign = " of 0 or more" if nonneg else ""
        expected = (f"{what}{sign}: a number, a mapping {{year: amount}} (linear between the "
                    "years, flat beyond), or {start: amount, growth: yearly rate}")
        ge = 0.0 if nonneg else None
        if isinstance(value, str) and simulation_keys.is_simulation(self) \
                and _float_text(value.strip().replace(" ", "")) is None:
            return simulation_keys.money_formula(self, path, value, what)
        if isinstance(value, dict):
            if not value:
                self.bad(path, "an empty mapping", expected)
                return None
            if {"start", "growth"} & set(value):
                other = [k for k in value if k not in ("start", "growth")]
                if other:
                    self.bad(path, f"a mapping mixing start/growth with {other[0]}", expected,
                             "use either {start: X, growth: g} or {year: amount, ...}, not both")
                    return None
                if "start" not in value:
                    self.missing(path + ("start",), f"{what} at year 0")
                    return None
                s = self.number(path + ("start",), value["start"], f"{what} at year 0{sign}",
                                ge=ge)
                g = self.number(path + ("growth",), value.get("growth", 0.0),
                                "a yearly growth rate above -1 (0.02 for 2%)", gt=-1.0)
                return model.Schedule.compound(s, g) if s is not None and g is not None else None
            points, ok = {}, True
            for k, v in value.items():
                y = self.year_key(path + (k,), k)
                a = self.number(path + (k,), v, f"{what}{sign} at year {k}", ge=ge)
                if y is None or a is None:
                    ok = False
                else:
                    points[y] = a
            return model.Schedule.from_points(points) if ok else None
        if isinstance(value, list):
            self.bad(path, describe(value), expected,
                     "a schedule by year is a mapping like {0: 60, 8: 35}, not a list")
            return None
        a = self.number(path, value, expected, ge=ge)
        return model.Schedule.constant(a) if a is not None else None

    def names(self, path, value):
        """requires/excludes: a list of right names (one name alone is accepted too)."""
        if value is None:
            return ()
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list):
            self.bad(path, describe(value), "a list of right names, e.g. [Phase 1]")
            return None
        out = []
        for i, v in enumerate(value):
            t = self.text(path + (Index(i),), v, "the name of another right")
            if t is not None:
                out.append(t)
        return tuple(out)

    def resolve(self, path, value):
        """A path inside the file, resolved against the file's folder; must exist."""
        t = self.text(path, value, "a file path (relative to this project file)")
        if t is None:
            return None
        p = Path(t).expanduser()
        if not p.is_absolute():
            p = self.base_dir / p
        p = p.resolve()
        if not p.is_file():
            self.bad(path, f"no file at {p}", "an existing file (relative to this project file)",
                     "check the name; relative paths start from the project file's folder")
            return None
        return p

    # ---- sections --------------------------------------------------------------------------
