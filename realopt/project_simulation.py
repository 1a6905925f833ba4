"""Loader part for ``valuation: simulation`` (docs/file-format.md, "valuation: simulation").

Called from :class:`realopt.project._Builder` at a few points; every check records a located
problem through the builder (``b.bad``, ``b.missing``, ``b.warn``), as the rest of the loader does.

Keys handled here:

* top level ``valuation: lattice | simulation`` and the ``simulation:`` block (paths, seed,
  steps_per_year, basis, antithetic, upper_bound {paths, inner}, map_drivers [a, b]);
* a driver's ``risk_neutral:`` with one of ``forward: {year: F}``, ``drift: m`` (gbm only) or
  ``risk_premium: lambda``;
* a switch mode's ``cash_flow`` formula and money amounts (costs, salvage, savings) written as
  formulas over the drivers: both only under ``valuation: simulation``.
"""
from __future__ import annotations

import difflib
from math import comb

from . import model

SIMULATION_KEYS = ("paths", "seed", "steps_per_year", "basis", "antithetic", "upper_bound",
                   "map_drivers")
UPPER_BOUND_KEYS = ("paths", "inner")
RISK_NEUTRAL_HINT = ("risk_neutral: {forward: {1: 60, 5: 57}} (the forward curve), "
                     "{drift: 0.02} (gbm: the risk-neutral drift) or {risk_premium: 0.2} (the "
                     "market price of risk)")
PATHS_PER_TERM = 20            # fewest fitting paths per regression coefficient
MAX_BASIS = 6


def is_simulation(b) -> bool:
    return getattr(b, "valuation", "lattice") == "simulation"


def read_valuation(b, top: dict) -> None:
    """Set ``b.valuation`` and ``b.simulation_spec`` from the top-level keys."""
    b.valuation, b.simulation_spec = "lattice", None
    if top.get("valuation") is not None:
        v = b.choice(("valuation",), top["valuation"], model.VALUATION,
                     "how the rights are valued (lattice: a binomial lattice of project value; "
                     "simulation: least-squares Monte Carlo on the drivers)")
        if v is None:
            b.valuation = None
            return
        b.valuation = v
    block = top.get("simulation")
    if b.valuation != "simulation":
        if block is not None:
            b.bad(("simulation",), "a simulation block with valuation: lattice",
                  "simulation settings only with valuation: simulation",
                  "add valuation: simulation at the top of the file, or delete the block",
                  at="key")
        return
    path = ("simulation",)
    d = {} if block is None else b.mapping(path, block, SIMULATION_KEYS,
                                           "a mapping with paths, seed, steps_per_year, basis, "
                                           "antithetic, upper_bound and map_drivers")
    if d is None:
        return
    paths = b.integer(path + ("paths",), d.get("paths", 50000), "the number of paths that fit "
                      "the exercise policy (as many again value it), 100 to 5,000,000",
                      ge=100, le=5_000_000)
    seed = b.integer(path + ("seed",), d.get("seed", 1), "a whole-number seed, 0 or more", ge=0)
    spy = b.integer(path + ("steps_per_year",), d.get("steps_per_year", 12), "decision dates "
                    "a year inside american windows, 1 to 365 (12 = monthly)", ge=1, le=365)
    basis = b.integer(path + ("basis",), d.get("basis", 3), f"the degree of the regression "
                      f"polynomial in the drivers, 1 to {MAX_BASIS}", ge=1, le=MAX_BASIS)
    anti = d.get("antithetic", True)
    if not isinstance(anti, bool):
        b.bad(path + ("antithetic",), repr(anti), "true or false (antithetic pairs of paths)")
        anti = None
    ub_paths = ub_inner = 0
    if d.get("upper_bound") is not None:
        up = path + ("upper_bound",)
        u = b.mapping(up, d["upper_bound"], UPPER_BOUND_KEYS, "a mapping {paths: outer paths, "
                      "inner: inner draws per date}, e.g. {paths: 1000, inner: 100}")
        if u is not None:
            ub_paths = b.integer(up + ("paths",), u.get("paths", 1000), "outer paths of the "
                                 "upper bound, 10 to 1,000,000", ge=10, le=1_000_000)
            ub_inner = b.integer(up + ("inner",), u.get("inner", 100), "inner draws a date, 2 to "
                                 "100,000", ge=2, le=100_000)
    maps = ()
    if d.get("map_drivers") is not None:
        v = d["map_drivers"]
        if not (isinstance(v, list) and len(v) == 2 and all(isinstance(x, str) for x in v)
                and v[0] != v[1]):
            b.bad(path + ("map_drivers",), repr(v), "two different driver names, e.g. "
                  "[power, gas] (the plane of the decision maps)")
        else:
            maps = tuple(v)
    if None in (paths, seed, spy, basis, anti, ub_paths, ub_inner):
        return
    b.simulation_spec = model.SimulationSpec(
        paths=paths, seed=seed, steps_per_year=spy, basis=basis, antithetic=anti,
        upper_bound_paths=ub_paths or 0, upper_bound_inner=ub_inner or 0, map_drivers=maps)


def risk_neutral(b, path, value, proc):
    """A driver's ``risk_neutral`` block -> RiskNeutral (None and a problem if wrong)."""
    expected = "one of " + RISK_NEUTRAL_HINT
    if not isinstance(value, dict) or len(value) != 1:
        b.bad(path, repr(value), expected, "give exactly one of forward, drift, risk_premium")
        return None
    b.mapping(path, value, model.RISK_NEUTRAL, expected)
    kind = next(iter(value))
    if kind not in model.RISK_NEUTRAL:
        return None
    p = path + (kind,)
    if kind == "drift":
        if proc != "gbm":
            b.bad(p, "drift for a mean_reverting driver", "forward or risk_premium for a "
                  "mean_reverting driver", "give the forward curve, or the market price of "
                  "risk as risk_premium", at="key")
            return None
        m = b.number(p, value[kind], "the risk-neutral drift of the driver, a yearly "
                     "continuous rate (e.g. the risk-free rate less a convenience yield)")
        return None if m is None else model.RiskNeutral(kind="drift", value=m)
    if kind == "risk_premium":
        lam = b.number(p, value[kind], "the market price of risk lambda (the drift of ln X "
                       "falls by lambda * volatility), a number such as 0.2")
        return None if lam is None else model.RiskNeutral(kind="risk_premium", value=lam)
    curve = value[kind]
    if not isinstance(curve, dict) or not curve:
        b.bad(p, repr(curve), "a forward curve {year: forward price}, e.g. {1: 60, 2: 59, 5: 57}")
        return None
    points, ok, seen = [], True, {}
    for k, v in curve.items():
        y = b.year_key(p + (k,), k, gt=0.0, ge=None,
                       fix="the forward at year 0 is the driver's start; list later years")
        f = b.number(p + (k,), v, f"the forward price for year {k}, above 0", gt=0.0,
                     fix="a forward price is positive (the driver moves in logs)")
        if y is None or f is None:
            ok = False
            continue
        if y in seen:
            b.bad(p + (k,), f"year {y:g} a second time (also written {seen[y]})",
                  "each year of the forward curve once", "delete one of the two", at="key")
            ok = False
            continue
        seen[y] = k
        points.append((y, f))
    if not ok:
        return None
    return model.RiskNeutral(kind="forward", forward=tuple(sorted(points)))


def formula(b, path, value, what):
    """A formula over the drivers (text) checked against the driver names; None if wrong."""
    from .formula import FormulaError, parse

    names = getattr(b, "driver_names", None) or {}
    try:
        parsed = parse(str(value))
    except FormulaError as err:
        b.bad(path, f"a formula that cannot be used: {err}", f"{what}: whitelisted arithmetic "
              "over the driver names (+ - * / ** parentheses, numbers, min, max)")
        return None
    if parsed.names and not names:       # the drivers themselves could not be read: say that
        b.bad(path, "a formula over " + ", ".join(sorted(set(parsed.names))) + " while no "
              "driver could be read", f"{what} over the names of underlying.drivers",
              "fix the problems reported under underlying.drivers first (a simulation "
              "project needs the drivers form)")
        return None
    ok = True
    for n in sorted(set(parsed.names) - set(names)):
        hint = difflib.get_close_matches(n, list(names), n=1)
        b.bad(path, f"the name {n}, which is not a driver", f"{what} over the names: "
              + (", ".join(names) or "(no drivers)"),
              f"did you mean {hint[0]}?" if hint else "define it under underlying.drivers")
        ok = False
    return str(value) if ok else None


def mode_cash_flow(b, path, value):
    """A switch mode's own cash_flow formula (simulation only)."""
    if not is_simulation(b):
        b.bad(path, "a mode cash_flow formula with valuation: lattice",
              "a mode given by scale and fixed on the lattice",
              "a mode's own cash_flow needs valuation: simulation (least-squares Monte Carlo on "
              "the drivers); add it at the top of the file, or use scale/fixed", at="key")
        return None
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        value = repr(float(value))
    if not isinstance(value, str):
        b.bad(path, repr(value), "a cash-flow formula over the driver names, e.g. "
              "\"-0.4\" or 0.35 * (power - 2.1 * gas)")
        return None
    return formula(b, path, value, "the mode's yearly cash flow")


def money_formula(b, path, value, what):
    """Money written as a formula text: a Schedule under simulation, else None (not handled)."""
    if not is_simulation(b) or not isinstance(value, str):
        return None
    text = formula(b, path, value, what)
    return None if text is None else model.Schedule.from_formula(text)


def check_underlying(b, d, form) -> None:
    """Under simulation: drivers form required; underlying.volatility not needed (a warning)."""
    if not is_simulation(b) or not isinstance(d, dict):
        return
    if form != "drivers":
        b.bad(("valuation",), f"valuation: simulation with the {form} form of the underlying",
              "cash flows from drivers (underlying: years, drivers, cash_flow) for the "
              "simulation", "describe the cash flows by their drivers, or use valuation: "
              "lattice", loc=("valuation",))
    if d.get("volatility") is not None:
        b.warn(("underlying", "volatility"), "ignored under valuation: simulation (the drivers' "
               "own volatilities drive the simulation)")


def basis_terms(drivers: int, degree: int) -> int:
    """Regression coefficients of a full polynomial of ``degree`` in ``drivers`` variables."""
    return comb(drivers + degree, degree)


def finish(b, underlying, rights) -> None:
    """Cross-checks: every simulated driver has risk_neutral; basis small enough for the paths;
    map_drivers name simulated drivers."""
    spec = getattr(b, "simulation_spec", None)
    if is_simulation(b) and isinstance(b.tree.data, dict) and "lattice" in b.tree.data:
        b.warn(("lattice",), "ignored under valuation: simulation (decision dates come from "
               "simulation.steps_per_year)")
    if not is_simulation(b) or underlying is None or underlying.drivers is None:
        return
    stochastic = [dr for dr in underlying.drivers.drivers if dr.process != "schedule"]
    for dr in stochastic:
        if dr.risk_neutral is None:
            b.missing(("underlying", "drivers", dr.name, "risk_neutral"),
                      "the driver's risk-neutral description under valuation: simulation: "
                      + RISK_NEUTRAL_HINT,
                      "add one of the three (real-world drift and long_run stay for the "
                      "real-world outputs)")
    if spec is None:
        return
    uncertain = [dr for dr in stochastic if dr.volatility > 0]
    terms = basis_terms(len(uncertain), spec.basis)
    need = PATHS_PER_TERM * terms
    if uncertain and spec.paths < need:
        b.bad(("simulation", "paths"), f"{spec.paths:,} paths for a basis of degree "
              f"{spec.basis} in {len(uncertain)} drivers ({terms} regression coefficients)",
              f"at least {PATHS_PER_TERM} fitting paths per coefficient",
              f"use paths: {need:,} or more, or a lower simulation.basis",
              loc=("simulation", "paths") if ("simulation", "paths") in b.tree.marks
              else ("simulation",))
    names = [dr.name for dr in stochastic]
    for k, n in enumerate(spec.map_drivers):
        if n not in names:
            hint = difflib.get_close_matches(n, names, n=1)
            b.bad(("simulation", "map_drivers"), f"{n}, which is not a simulated driver",
                  "two simulated drivers: " + ", ".join(names),
                  f"did you mean {hint[0]}?" if hint else "name two gbm or mean_reverting "
                  "drivers")
