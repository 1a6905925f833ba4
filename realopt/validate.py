"""One declarative validator for the model (realopt.model).

The bounds and choices of every checked field are declared once, in :data:`RULES` (a small table
per dataclass, next to the wording of what is expected and how to fix it), and checked by one
function, :func:`issues`, which walks a model object and returns each problem with its key path.

* The YAML loader (realopt.project) reads each value through the same rules (``rule_for``) and the
  same value checks (``number_problem``, ``integer_problem``, ``choice_problem``), then runs
  :func:`issues` on the Project it built; it adds file, line and column to each problem.
* :func:`check` raises :class:`realopt.errors.ModelError` (a ProjectError and a ValuationError)
  for a project built in Python; ``realopt.appraise`` calls it first, so
  ``Contract(name="x", window=(0, 1), scale=1.5)`` gets the message a file gets, minus the place.

Key paths follow the file's layout, not the dataclasses': the drivers form's keys sit directly
under ``underlying``, drivers and modes are named by their name, rights by their index.
"""
from __future__ import annotations

import difflib
import math
from dataclasses import dataclass, is_dataclass
from typing import Callable

import numpy as np

from . import model
from .errors import ModelError, Problem
from .keypaths import Index, _float_text, describe, format_path
from .rights.registry import RIGHT_TYPES


# --------------------------------------------------------------------------------------------
# Checks of one value: (found, expected, fix) or None. The loader and issues() share them.


def number_problem(value, expected, *, gt=None, ge=None, lt=None, le=None, fix=""):
    """A finite number within the bounds, else (found, expected, fix)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return _not_a_number(value, expected, fix)
    v = float(value)
    if not math.isfinite(v):
        return describe(v), expected, "replace .inf / .nan with a figure"
    if ((gt is not None and not v > gt) or (ge is not None and not v >= ge)
            or (lt is not None and not v < lt) or (le is not None and not v <= le)):
        return describe(value), expected, fix
    return None


def _not_a_number(value, expected, fix):
    found = describe(value)
    if isinstance(value, str):
        s = value.strip().replace(" ", "")
        pct = _float_text(s[:-1]) if s.endswith("%") else None
        if pct is not None:
            found = f'"{value}" (a percentage)'
            fix = f"write a fraction without the percent sign: {pct / 100:g}"
        elif _float_text(s) is not None:
            found = f'the text "{value}" (a number in quotes)'
            fix = "remove the quotes so it reads as a number"
        elif "," in s and _float_text(s.replace(",", "")) is not None:
            fix = "write digits with a dot for decimals, without thousands separators"
        elif not fix:
            fix = "write a plain number, e.g. 0.25"
    elif isinstance(value, bool) and not fix:
        fix = "write a number; true/false (and yes/no/on/off) are yes/no values in YAML"
    elif value is None and not fix:
        fix = "give a number after the colon"
    return found, expected, fix


def integer_problem(value, expected, *, ge=None, le=None):
    """A whole number within the bounds, else (found, expected, fix)."""
    bad = number_problem(value, expected, ge=ge, le=le)
    if bad is not None:
        return bad
    v = float(value)
    if not v.is_integer():
        return describe(value), expected, f"use a whole number such as {round(v)}"
    return None


def choice_problem(value, choices, what):
    """One of ``choices`` (case and spaces ignored), else (found, expected, fix)."""
    expected = f"{what}: one of {', '.join(choices)}"
    if not isinstance(value, str):
        return describe(value), expected, ""
    v = value.strip().lower()
    if v in choices:
        return None
    hint = difflib.get_close_matches(v, list(choices), n=1, cutoff=0.5)
    return describe(value), expected, f"did you mean {hint[0]}?" if hint else ""


def correlation_problem(names, pairs):
    """Correlations (a, b, rho) among the stochastic drivers ``names`` that cannot hold together
    (the matrix is not positive semi-definite): (found, expected, fix) with the factor that
    makes the set consistent, else None. Pairs naming other drivers are ignored here."""
    idx = {n: i for i, n in enumerate(names)}
    m = np.eye(len(names))
    for a, b, r in pairs:
        if a in idx and b in idx and a != b:
            m[idx[a], idx[b]] = m[idx[b], idx[a]] = float(r)
    if len(names) < 2:
        return None
    vals, vecs = np.linalg.eigh(m)
    if not vals[0] < -1e-10:
        return None
    v = vecs[:, 0]
    heavy = [names[i] for i in np.argsort(-np.abs(v)) if abs(v[i]) > 0.2][:4]
    shrink = 1.0 / (1.0 - vals[0])      # eigenvalues of (1 - a) I + a R are 1 - a + a lambda
    return (f"correlations between {', '.join(names)} that cannot hold together (their matrix is "
            f"not positive semi-definite: smallest eigenvalue {vals[0]:.4g}, mostly along "
            f"{', '.join(heavy)})", "a consistent set of correlations",
            f"weaken the correlations among {', '.join(heavy)}; multiplying every correlation by "
            f"{shrink:.3f} or less makes the set consistent")


# --------------------------------------------------------------------------------------------
# The rules


@dataclass(frozen=True)
class Rule:
    """Bounds of one field: ``kind`` number | integer | choice; ``when(obj)`` limits the rule to
    objects it applies to; ``optional`` lets None through (the field is not used then)."""

    expected: str
    kind: str = "number"
    gt: float | None = None
    ge: float | None = None
    lt: float | None = None
    le: float | None = None
    fix: str = ""
    choices: tuple = ()
    when: Callable | None = None
    optional: bool = False

    @property
    def bounds(self) -> dict:
        names = ("ge", "le") if self.kind == "integer" else ("gt", "ge", "lt", "le")
        return {k: getattr(self, k) for k in names if getattr(self, k) is not None}

    def problem(self, value):
        if value is None and self.optional:
            return None
        if self.kind == "choice":
            return choice_problem(value, self.choices, self.expected)
        if self.kind == "integer":
            return integer_problem(value, self.expected, **self.bounds)
        return number_problem(value, self.expected, fix=self.fix, **self.bounds)


_RATE = "a fraction above -1 (0.035 for 3.5%)"
_STOCHASTIC = ("gbm", "mean_reverting")


def _is(*processes):
    return lambda d: d.process in processes


RULES: dict[type, dict[str, Rule]] = {
    model.Market: {
        "risk_free_rate": Rule(f"the yearly risk-free rate, {_RATE}", gt=-1.0),
        "discount_rate": Rule("the yearly risk-adjusted discount rate for the project's cash "
                              f"flows, {_RATE}", gt=-1.0),
        "compounding": Rule("how the rates compound", "choice", choices=model.COMPOUNDING),
    },
    model.Underlying: {
        "present_value": Rule("the present value of the operating project, above 0", gt=0.0,
                              optional=True),
        "payout_yield": Rule("a continuous yearly payout yield from 0 up to 1 (0.02 for 2%)",
                             ge=0.0, lt=1.0),
        "terminal_value": Rule("the value at the last cash-flow year of the flows beyond it "
                               "(a number)"),
        "flow_timing": Rule("when the yearly cash flows are received (at_dates: each at its "
                            "date; spread: evenly over the period before it)", "choice",
                            choices=model.FLOW_TIMING),
        "volatility": Rule("the yearly volatility of ln(project value), above 0 (0.28 for 28%)",
                           gt=0.0, optional=True, fix="volatility is a spread, never negative "
                           "or zero; write e.g. 0.28"),
    },
    model.VolatilityEstimate: {
        "method": Rule("how to estimate it", "choice", choices=("simulation", "history")),
        "paths": Rule("a number of simulation paths from 100 to 10,000,000", "integer", ge=100,
                      le=10_000_000, when=lambda e: e.method == "simulation"),
        "seed": Rule("a whole-number seed, 0 or more", "integer", ge=0,
                     when=lambda e: e.method == "simulation"),
        "periods_per_year": Rule("observations per year, above 0 (12 for monthly, 52 for "
                                 "weekly)", gt=0.0, when=lambda e: e.method == "history"),
    },
    model.DriverModel: {
        "tax_rate": Rule("a tax rate from 0 up to 1 (0.25 for 25%)", ge=0.0, lt=1.0),
    },
    model.Driver: {
        "start": Rule("today's value, above 0", gt=0.0, when=_is(*_STOCHASTIC)),
        "volatility": Rule("the yearly volatility of its log, 0 or more (0.25 for 25%)",
                           ge=0.0, when=_is(*_STOCHASTIC)),
        "drift": Rule("the yearly drift of its log (real-world, 0.02 for 2%)", when=_is("gbm")),
        "long_run": Rule("the long-run median it reverts to, above 0", gt=0.0,
                         when=_is("mean_reverting")),
        "speed": Rule("the yearly speed of mean reversion, 0 or more", ge=0.0,
                      when=_is("mean_reverting")),
    },
    model.LatticeSpec: {
        "steps_per_year": Rule("a whole number of steps per year, 1 or more (12 = monthly)",
                               "integer", ge=1, when=lambda s: not s.explicit),
        "up": Rule("the up factor per step, above 1", gt=1.0, optional=True),
        "down": Rule("the down factor per step, above 0 and below 1", gt=0.0, lt=1.0,
                     optional=True),
        "step_years": Rule("the length of one step in years, above 0", gt=0.0, optional=True),
    },
    model.Right: {
        "exercise": Rule("when the right can be used", "choice", choices=model.EXERCISE),
    },
    model.Mode: {
        "scale": Rule("the multiplier on the base cash flows in this mode, 0 or more", ge=0.0),
        "fixed": Rule("the fixed yearly flow in this mode (+ inflow, - running cost)"),
    },
}

# money schedules that must not go below 0: (what it is, in the loader's words)
SCHEDULES: dict[type, dict[str, str]] = {}
# each right type declares its own (realopt/rights/<type>.py: FIELD_RULES, NONNEG_SCHEDULES)
for _cls in RIGHT_TYPES.values():
    if _cls.__dict__.get("FIELD_RULES"):
        RULES[_cls] = {k: Rule(**v) for k, v in _cls.FIELD_RULES.items()}
    if _cls.__dict__.get("NONNEG_SCHEDULES"):
        SCHEDULES[_cls] = dict(_cls.NONNEG_SCHEDULES)
GROWTH = Rule("a yearly growth rate above -1 (0.02 for 2%)", gt=-1.0)

WINDOW_EXPECTED = "[start, end] in years from now, 0 <= start <= end (both inclusive)"
WINDOW_ENDS = (Rule("the window's start, a year 0 or later", ge=0.0),
               Rule("the window's end, a year 0 or later", ge=0.0))
DATE = Rule("an exercise date (years from now), 0 or later", ge=0.0)
YEARS = (Rule("the first cash-flow year, 1 or later", "integer", ge=1),
         Rule("the last cash-flow year", "integer", ge=1))
RHO = Rule("a correlation from -1 to 1", ge=-1.0, le=1.0)


def rule_for(cls: type, name: str) -> Rule:
    """The rule of field ``name`` of ``cls`` (looked up along its base classes)."""
    for c in cls.__mro__:
        if name in RULES.get(c, {}):
            return RULES[c][name]
    raise KeyError(f"no rule for {cls.__name__}.{name}")


# --------------------------------------------------------------------------------------------
# The one check of a model object


@dataclass(frozen=True)
class Issue:
    """One problem of a model object: its key path (as in the file), found, expected, fix."""

    path: tuple
    found: str
    expected: str
    fix: str = ""


def issues(obj, path: tuple = ()) -> list[Issue]:
    """Every problem of ``obj`` (a Project or any model dataclass inside one) against RULES and
    the few checks across fields (window order, dates inside the window, years order,
    correlations); ``path`` is where ``obj`` sits in the file's layout."""
    out: list[Issue] = []
    _walk(obj, tuple(path), out)
    return out


def check(obj, source: str | None = None) -> None:
    """Raise :class:`ModelError` listing every problem of ``obj`` (no-op when there is none)."""
    found = issues(obj, _root_path(obj))
    if found:
        where = source or getattr(obj, "source", None) or "project"
        raise ModelError([Problem(where, None, None, format_path(i.path), i.found, i.expected,
                                  i.fix) for i in found])


_ROOTS = {model.Market: ("market",), model.Underlying: ("underlying",),
          model.DriverModel: ("underlying",), model.LatticeSpec: ("lattice",),
          model.VolatilityEstimate: ("underlying", "volatility"),
          model.Investment: ("investment",)}


def _root_path(obj) -> tuple:
    return _ROOTS.get(type(obj), ())


def _schedule(s, what, path, out):
    """A schedule of 0 or more, with the loader's wording for each of its three forms."""
    if s is None or not isinstance(s, model.Schedule):
        return
    if s.start is not None:
        checks = [(path + ("start",), number_problem(s.start, f"{what} at year 0 of 0 or more",
                                                     ge=0.0)),
                  (path + ("growth",), GROWTH.problem(s.growth))]
    elif len(s.points) == 1:
        checks = [(path, number_problem(
            s.points[0][1], f"{what} of 0 or more: a number, a mapping {{year: amount}} (linear "
            "between the years, flat beyond), or {start: amount, growth: yearly rate}", ge=0.0))]
    else:
        checks = [(path + (f"{y:g}",), number_problem(v, f"{what} of 0 or more at year {y:g}",
                                                      ge=0.0)) for y, v in s.points]
    out.extend(Issue(p, *bad) for p, bad in checks if bad is not None)


def _fields_of(obj, path, out):
    for c in reversed(type(obj).__mro__):
        for name, rule in RULES.get(c, {}).items():
            if rule.when is not None and not rule.when(obj):
                continue
            bad = rule.problem(getattr(obj, name))
            if bad is not None:
                out.append(Issue(path + (name,), *bad))
        for name, what in SCHEDULES.get(c, {}).items():
            _schedule(getattr(obj, name), what, path + (name,), out)


def _walk(obj, path, out):
    if isinstance(obj, model.Project):
        for key in ("market", "underlying", "investment", "lattice"):
            if getattr(obj, key) is not None:
                _walk(getattr(obj, key), (key,), out)
        for i, r in enumerate(obj.rights):
            _walk(r, ("rights", Index(i)), out)
        return
    if not is_dataclass(obj):
        return
    _fields_of(obj, path, out)
    if isinstance(obj, model.Underlying):
        if obj.volatility_estimate is not None:
            _walk(obj.volatility_estimate, path + ("volatility",), out)
        if obj.drivers is not None:
            _walk(obj.drivers, path, out)          # the drivers form's keys sit in underlying
    elif isinstance(obj, model.DriverModel):
        _driver_model(obj, path, out)
    elif isinstance(obj, model.Driver):
        _driver(obj, path, out)
    elif isinstance(obj, model.Investment):
        _investment(obj, path, out)
    elif isinstance(obj, model.Right):
        _right(obj, path, out)


def _items(rules, values, path, out) -> bool:
    ok = True
    for i, (rule, v) in enumerate(zip(rules, values)):
        bad = rule.problem(v)
        if bad is not None:
            out.append(Issue(path + (Index(i),), *bad))
            ok = False
    return ok


def _right(r, path, out):
    w = tuple(r.window)
    if len(w) != 2:
        out.append(Issue(path + ("window",), describe(list(w)), WINDOW_EXPECTED))
    elif _items(WINDOW_ENDS, w, path + ("window",), out) and w[0] > w[1]:
        out.append(Issue(path + ("window",), f"[{w[0]:g}, {w[1]:g}] (the start after the end)",
                         WINDOW_EXPECTED, f"write [{w[1]:g}, {w[0]:g}]"))
    if r.exercise == "bermudan":
        for i, d in enumerate(r.dates):
            p = path + ("dates", Index(i))
            bad = DATE.problem(d)
            if bad is not None:
                out.append(Issue(p, *bad))
            elif len(w) == 2 and not w[0] <= d <= w[1]:
                out.append(Issue(p, f"{d:g}, outside the window [{w[0]:g}, {w[1]:g}]",
                                 "dates inside the window", "widen the window or drop the date"))
    if r.modal:
        for m in r.modes:
            _walk(m, path + ("modes", m.name), out)


def _driver_model(dm, path, out):
    years = tuple(dm.years)
    if len(years) != 2:
        out.append(Issue(path + ("years",), describe(list(years)),
                         "[first, last] cash-flow years, e.g. [1, 15]"))
    elif _items(YEARS, years, path + ("years",), out) and years[0] > years[1]:
        a, b = int(years[0]), int(years[1])
        out.append(Issue(path + ("years",), f"[{a}, {b}]", "[first, last] with first <= last",
                         f"write [{b}, {a}]"))
    for d in dm.drivers:
        _walk(d, path + ("drivers", d.name), out)
    ok = True
    for i, item in enumerate(dm.correlation):
        bad = RHO.problem(item[2]) if len(item) == 3 else (describe(list(item)),
                                                           "[driver, driver, rho]", "")
        if bad is not None:
            out.append(Issue(path + ("correlation", Index(i)) + ((Index(2),) if len(item) == 3
                                                                 else ()), *bad))
            ok = False
    if ok:
        names = [d.name for d in dm.drivers if d.process != "schedule"]
        bad = correlation_problem(names, dm.correlation)
        if bad is not None:
            out.append(Issue(path + ("correlation",), *bad))


def _driver(d, path, out):
    if d.process == "schedule":
        if d.schedule is None:
            out.append(Issue(path + ("schedule",), "no value (the key is missing)",
                             f"the values of {d.name}"))
        return
    if d.process not in _STOCHASTIC:
        out.append(Issue(path + ("process",),
                         *choice_problem(d.process, _STOCHASTIC, "the driver's process")))


def _investment(inv, path, out):
    single = len(inv.outlays) == 1 and inv.outlays[0][0] == 0
    for y, a in inv.outlays:
        if single:
            bad = number_problem(a, "an outlay of 0 or more (paid now), or {year: amount}",
                                 ge=0.0, fix="an outlay is written positive; 0 for no investment")
            p = path + ("cost",)
        else:
            bad = number_problem(a, f"an outlay of 0 or more at year {y:g}", ge=0.0)
            p = path + ("cost", f"{y:g}")
        if bad is not None:
            out.append(Issue(p, *bad))


__all__ = ["Index", "Issue", "RULES", "Rule", "check", "choice_problem", "correlation_problem",
           "describe", "format_path", "integer_problem", "issues", "number_problem", "rule_for"]
