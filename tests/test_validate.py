"""One validator for the model (realopt.validate): a file and a project built in Python get the
same message for the same bad value (key path, what was found, what was expected, the fix), the
file's with its line and column, the Python one raised by appraise() as a ModelError.

The bounds themselves are facts of the trade (common practice): rates above -100%, volatility
above 0, a contraction giving up less than the whole scale, correlations within [-1, 1] and
positive semi-definite together.
"""
from __future__ import annotations

import copy
import textwrap
from dataclasses import replace

import numpy as np
import pytest
import yaml

import realopt
from realopt import model, validate
from realopt.errors import ModelError, ProjectError, ValuationError
from realopt.project import loads

CASH = textwrap.dedent("""\
    project: {name: Checked}
    market: {risk_free_rate: 0.04, discount_rate: 0.09}
    underlying:
      cash_flows: {1: 10, 2: 11, 3: 12, 4: 12}
      volatility: 0.3
    investment: {cost: 30}
    lattice: {steps_per_year: 4}
    rights:
      - {name: Grow, type: expand, window: [1, 3], scale: 0.3, cost: 8}
      - {name: Shrink, type: contract, window: [1, 3], scale: 0.4, savings: 5}
      - {name: Sell, type: abandon, window: [0, 4], salvage: 12}
      - name: Idle
        type: switch
        window: [0, 4]
        modes: {run: {scale: 1.0}, idle: {scale: 0.0, fixed: -1}}
        costs: {run->idle: 0.5, idle->run: 1.0}
    """)

DRIVEN = textwrap.dedent("""\
    project: {name: Driven}
    market: {risk_free_rate: 0.04, discount_rate: 0.09}
    underlying:
      years: [1, 6]
      drivers:
        price: {process: gbm, start: 50, volatility: 0.25}
        cost: {process: mean_reverting, start: 30, long_run: 30, speed: 0.5, volatility: 0.2}
        fuel: {process: gbm, start: 10, volatility: 0.3}
      correlation: [[price, cost, 0.5]]
      cash_flow: (price - cost) * 2 - fuel
      tax_rate: 0.25
      volatility: {estimate: simulation, paths: 2000, seed: 3}
    investment: {cost: 30}
    """)


def _right(i, **kw):
    return lambda p: replace(p, rights=tuple(replace(r, **kw) if j == i else r
                                             for j, r in enumerate(p.rights)))


def _mode(i, name, **kw):
    def f(p):
        sw = p.rights[i]
        modes = tuple(replace(m, **kw) if m.name == name else m for m in sw.modes)
        return _right(i, modes=modes)(p)
    return f


def _part(section, **kw):
    return lambda p: replace(p, **{section: replace(getattr(p, section), **kw)})


def _drivers(**kw):
    return lambda p: replace(p, underlying=replace(p.underlying, drivers=replace(
        p.underlying.drivers, **kw)))


def _driver(name, **kw):
    def f(p):
        dm = p.underlying.drivers
        return _drivers(drivers=tuple(replace(d, **kw) if d.name == name else d
                                      for d in dm.drivers))(p)
    return f


def _estimate(**kw):
    return lambda p: replace(p, underlying=replace(p.underlying, volatility_estimate=replace(
        p.underlying.volatility_estimate, **kw)))


# (base, key path in the file, bad value, the same change on the model, key of the problem)
CASES = [
    (CASH, ("market", "risk_free_rate"), -1.5, _part("market", risk_free_rate=-1.5), None),
    (CASH, ("market", "discount_rate"), "9%", _part("market", discount_rate="9%"), None),
    (CASH, ("market", "compounding"), "anual", _part("market", compounding="anual"), None),
    (CASH, ("underlying", "volatility"), -0.2, _part("underlying", volatility=-0.2), None),
    (CASH, ("underlying", "volatility"), 0, _part("underlying", volatility=0), None),
    (CASH, ("underlying", "volatility"), "0.3", _part("underlying", volatility="0.3"), None),
    (CASH, ("underlying", "volatility"), float("nan"), _part("underlying", volatility=np.nan),
     None),
    (CASH, ("underlying", "flow_timing"), "spred", _part("underlying", flow_timing="spred"),
     None),
    (CASH, ("lattice", "steps_per_year"), 0, _part("lattice", steps_per_year=0), None),
    (CASH, ("lattice", "steps_per_year"), 2.5, _part("lattice", steps_per_year=2.5), None),
    (CASH, ("rights", 0, "scale"), -0.1, _right(0, scale=-0.1), "rights[0].scale"),
    (CASH, ("rights", 0, "scale"), 0, _right(0, scale=0), "rights[0].scale"),
    (CASH, ("rights", 1, "scale"), 1.5, _right(1, scale=1.5), "rights[1].scale"),
    (CASH, ("rights", 1, "scale"), True, _right(1, scale=True), "rights[1].scale"),
    (CASH, ("rights", 0, "cost"), -8, _right(0, cost=model.Schedule.constant(-8)),
     "rights[0].cost"),
    (CASH, ("rights", 0, "cost"), {"start": -8, "growth": 0.02},
     _right(0, cost=model.Schedule.compound(-8, 0.02)), "rights[0].cost.start"),
    (CASH, ("rights", 0, "cost"), {"start": 8, "growth": -1.5},
     _right(0, cost=model.Schedule.compound(8, -1.5)), "rights[0].cost.growth"),
    (CASH, ("rights", 0, "cost"), {1: 8, 3: -2},
     _right(0, cost=model.Schedule.from_points({1: 8, 3: -2})), "rights[0].cost.3"),
    (CASH, ("rights", 2, "exercise"), "amerikan", _right(2, exercise="amerikan"),
     "rights[2].exercise"),
    (CASH, ("rights", 2, "window"), [-1, 2], _right(2, window=(-1, 2)), "rights[2].window[0]"),
    (CASH, ("rights", 2, "window"), [3, 1], _right(2, window=(3, 1)), "rights[2].window"),
    (CASH, ("rights", 3, "modes", "idle", "scale"), -1, _mode(3, "idle", scale=-1),
     "rights[3].modes.idle.scale"),
    (DRIVEN, ("underlying", "drivers", "price", "start"), -1, _driver("price", start=-1),
     None),
    (DRIVEN, ("underlying", "drivers", "fuel", "volatility"), -0.3,
     _driver("fuel", volatility=-0.3), None),
    (DRIVEN, ("underlying", "drivers", "cost", "speed"), -2, _driver("cost", speed=-2), None),
    (DRIVEN, ("underlying", "tax_rate"), 1.0, _drivers(tax_rate=1.0), None),
    (DRIVEN, ("underlying", "years"), [0, 6], _drivers(years=(0, 6)), "underlying.years[0]"),
    (DRIVEN, ("underlying", "years"), [6, 2], _drivers(years=(6, 2)), "underlying.years"),
    (DRIVEN, ("underlying", "correlation"), [["price", "cost", 1.5]],
     _drivers(correlation=(("price", "cost", 1.5),)), "underlying.correlation[0][2]"),
    (DRIVEN, ("underlying", "correlation"),
     [["price", "cost", 0.95], ["price", "fuel", 0.95], ["cost", "fuel", -0.95]],
     _drivers(correlation=(("price", "cost", 0.95), ("price", "fuel", 0.95),
                           ("cost", "fuel", -0.95))), "underlying.correlation"),
    (DRIVEN, ("underlying", "volatility", "paths"), 10, _estimate(paths=10), None),
]


def _set(data, path, value):
    node = data
    for k in path[:-1]:
        node = node[k]
    node[path[-1]] = value


def _key(path):
    return validate.format_path(tuple(validate.Index(k) if isinstance(k, int) else k
                                      for k in path))


@pytest.mark.parametrize("base, path, value, change, key", CASES,
                         ids=[f"{_key(c[1])}={c[2]!r}" for c in CASES])
def test_a_file_and_python_get_the_same_message(base, path, value, change, key):
    key = key or _key(path)
    data = yaml.safe_load(base)
    _set(data, path, copy.deepcopy(value))
    with pytest.raises(ProjectError) as err:
        loads(yaml.safe_dump(data, sort_keys=False), source="bad.yaml")
    in_file = [p for p in err.value.problems if p.key == key]
    assert len(in_file) == 1, err.value
    assert in_file[0].line is not None                   # the file's message is located

    good = loads(base)
    realopt_project = change(good)
    with pytest.raises(ModelError) as err:
        realopt.appraise(realopt_project)
    assert isinstance(err.value, ProjectError) and isinstance(err.value, ValuationError)
    in_python = [p for p in err.value.problems if p.key == key]
    assert len(in_python) == 1, err.value
    f, py = in_file[0], in_python[0]
    assert (py.key, py.found, py.expected, py.fix) == (f.key, f.found, f.expected, f.fix)
    assert py.line is None and str(py).startswith(f"{good.source}: {key}: found ")


def test_contract_built_in_python_names_the_field_and_the_fix():
    project = loads(CASH)
    bad = replace(project, rights=(model.Contract(name="x", window=(0, 1), scale=1.5),))
    with pytest.raises(ModelError) as err:
        realopt.appraise(bad)
    assert str(err.value) == (
        "1 problem in the project:\n  - <text>: rights[0].scale: found 1.5; expected the fraction "
        "of the current scale given up, above 0 and below 1 (0.4 = 40% smaller). Fix: to close "
        "entirely use an abandon right")


def test_the_correlation_fix_from_a_file_makes_the_set_consistent():
    """The shrink factor is reachable from a file: eigenvalues of (1 - a) I + a R are
    1 - a + a lambda (common practice), so multiplying every correlation by the factor named in
    the message gives a positive semi-definite matrix, which the loader then accepts."""
    data = yaml.safe_load(DRIVEN)
    bad = [["price", "cost", 0.95], ["price", "fuel", 0.95], ["cost", "fuel", -0.95]]
    data["underlying"]["correlation"] = bad
    with pytest.raises(ProjectError) as err:
        loads(yaml.safe_dump(data, sort_keys=False))
    (prob,) = err.value.problems
    lam = np.linalg.eigvalsh(np.array([[1, .95, .95], [.95, 1, -.95], [.95, -.95, 1]]))[0]
    assert f"smallest eigenvalue {lam:.4g}" in prob.found
    factor = float(prob.fix.split("multiplying every correlation by ")[1].split()[0])
    assert factor == pytest.approx(1 / (1 - lam), abs=1e-3)
    data["underlying"]["correlation"] = [[a, b, r * factor * 0.999] for a, b, r in bad]
    assert loads(yaml.safe_dump(data, sort_keys=False)).underlying.drivers.correlation


def test_every_problem_at_once_and_none_for_a_good_project():
    project = loads(CASH)
    assert validate.issues(project) == []
    bad = _right(1, scale=1.5)(_part("market", risk_free_rate=-2.0)(project))
    keys = [i.path for i in validate.issues(bad)]
    assert [validate.format_path(k) for k in keys] == ["market.risk_free_rate",
                                                       "rights[1].scale"]


@pytest.mark.parametrize("name", ["coating_line", "flake_line", "peaking_unit", "staged_field"])
def test_the_demos_break_no_rule(repo_root, name):
    assert validate.issues(realopt.load_project(repo_root / "projects" / f"{name}.yaml")) == []
