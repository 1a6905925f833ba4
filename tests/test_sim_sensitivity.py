"""Sensitivities of a simulation result (realopt.outputs.sim_sensitivity, realopt.simulation.quick).

What is checked, and against what:

* the copier writes back every key of ``valuation: simulation`` (the simulation block, each
  driver's risk_neutral, a mode's cash_flow, money formulas): a copy with no move equals the
  project field for field and gives the same expanded NPV exactly (==), through both routes
  (the file's raw tree, and a project built in Python written back by ``project_tree``), for the
  demo, the projects of tests/test_simulation.py (reproduced here) and generated projects
  (hypothesis). These are identities of the method (the same floats through the same code);
* a zero move gives every bar equal to the base exactly, with standard error 0;
* bars against closed forms: one gbm driver S, a project worth S (paid at year 2) and a sale at
  year 1 for K is a European put on S (Black-Scholes-Merton, tests/references.bsm: Black &
  Scholes 1973, Merton 1973); the bars for S's volatility, S's value today and the salvage equal
  the BSM differences within 4 standard errors of the pathwise differences;
* signs (common practice): a higher investment cost lowers the expanded NPV, a higher salvage
  raises it;
* the report draws the tornado (figure, tornado.csv, HTML and Markdown tables) from the one
  sensitivity run; ``--steps-per-year`` sets simulation.steps_per_year under simulation.
"""
from __future__ import annotations

import json
import re
import textwrap
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import realopt
from realopt.outputs import sensitivity as S
from realopt.outputs import sim_sensitivity as SS
from realopt.project import loads
from references import bsm
from sim_texts import at_paths
import sim_texts

# the projects of tests/test_simulation.py (tests/sim_texts.py) at fewer paths
EXCHANGE = at_paths(sim_texts.EXCHANGE, 600)
GRAPH = sim_texts.GRAPH.format(
    valuation="valuation: simulation\nsimulation: {paths: 800, seed: 4, basis: 2, "
              "steps_per_year: 2}", vol="")
FORMULA = at_paths(sim_texts.FORMULA, 600)
SPREAD = at_paths(sim_texts.SPREAD, 400)
SCHEDULES = sim_texts.SCHEDULES

ROOT = Path(__file__).resolve().parents[1]
ZERO = S.Moves(volatility=0.0, rates=0.0, relative=0.0, level=0.0, correlation=0.0)

# --------------------------------------------------------------------------------------------
# simulation projects: the demo, those of tests/test_simulation.py, generated ones

PUT = """
project: {{name: put}}
valuation: simulation
simulation: {{paths: {paths}, seed: 3, steps_per_year: 50, basis: 3{extra}}}
market: {{risk_free_rate: 0.06, compounding: continuous, discount_rate: 0.06}}
underlying:
  years: [2, 2]
  drivers:
    S: {{process: gbm, start: 36, drift: 0.06, volatility: 0.2, risk_neutral: {{drift: 0.06}}}}
  cash_flow: S
investment: {{cost: 0}}
rights:
  - {{name: Sell, type: abandon, salvage: 40, window: [0, 1], exercise: bermudan,
     dates: [0.2, 0.4, 0.6, 0.8, 1]}}
"""






KILN = """
valuation: simulation
simulation: {paths: 600, seed: 3, steps_per_year: 4, basis: 2, antithetic: false,
             upper_bound: {paths: 40, inner: 4}}
project: {name: Kiln on prices}
market: {risk_free_rate: 0.03, discount_rate: 0.08}
underlying:
  years: [1, 8]
  drivers:
    price: {process: gbm, start: 50, drift: 0.01, volatility: 0.3,
            risk_neutral: {risk_premium: 0.2}}
  cash_flow: 0.4 * price - 18
  tax_rate: 0.25
  terminal_value: 12
investment: {cost: 10}
rights:
  - {name: Shut the kiln, type: shutdown, cost: 0.5, restart_cost: 1.0, maintenance: 0.8,
     window: [0, 8]}
"""

ONE_DRIVER = """
project: {name: One-driver plant, currency: EUR, unit: million}
valuation: simulation
simulation: {paths: 600, seed: 2}
market: {risk_free_rate: 0.05, compounding: continuous, discount_rate: 0.08}
underlying:
  years: [1, 10]
  drivers:
    X: {process: gbm, start: 10, drift: 0.08, volatility: 0.3, risk_neutral: {drift: 0.05}}
  cash_flow: X - 12
investment: {cost: 85}
rights:
  - {name: Sell, type: abandon, salvage: 55, window: [1, 9], exercise: bermudan,
     dates: [1, 2, 3, 4, 5, 6, 7, 8, 9]}
"""

TEXTS = {"put": PUT.format(paths=800, extra=""),
         "put with upper bound": PUT.format(paths=800, extra=", upper_bound: {paths: 50, "
                                            "inner: 5}"),
         "exchange": EXCHANGE, "graph": GRAPH, "formula": FORMULA, "spread": SPREAD,
         "schedules": SCHEDULES, "kiln": KILN, "one driver": ONE_DRIVER}


def river(paths=1000, spy=2):
    return realopt.load_project(ROOT / "projects" / "river_ccgt.yaml",
                                {"simulation.paths": paths, "simulation.steps_per_year": spy})


def check_round_trip(p):
    """Both routes rebuild ``p`` field for field and value it to the same floats."""
    a = realopt.appraise(p, progress=False)
    for route, q in (("file", p), ("values", replace(p, origin=None))):
        copier = S.Copier(q)
        assert copier.route == route, copier.problem
        copy = copier(())
        assert S._same(copy, p), route
        b = realopt.appraise(copy, progress=False)
        assert b.expanded_npv == a.expanded_npv, route
        assert b.flexibility_value == a.flexibility_value, route
        assert b.standard_error == a.standard_error, route
    return a


def test_the_demo_and_the_test_projects_round_trip_exactly(tmp_path):
    # the projects of tests/test_simulation.py and tests/test_simulation_report.py (at fewer
    # paths), each loaded from a file
    projects = [river()]
    for k, text in TEXTS.items():
        f = tmp_path / f"{k.replace(' ', '_')}.yaml"
        f.write_text(text)
        projects.append(realopt.load_project(f))
    for p in projects:
        assert p.valuation == "simulation"
        check_round_trip(p)


def test_every_simulation_key_is_written_back():
    p = loads(KILN.replace("seed: 3, steps_per_year: 4", "seed: 3, steps_per_year: 4, "
                           "map_drivers: [price, other]")
              .replace("    price: {", "    other: {process: mean_reverting, start: 5, "
                       "long_run: 6, speed: 0.4, volatility: 0.1, risk_neutral: {forward: "
                       "{1: 5.5, 4: 6}}}\n    price: {"), source="kiln.yaml")
    tree = S.project_tree(replace(p, origin=None))
    assert tree["valuation"] == "simulation" and "lattice" not in tree
    assert tree["simulation"] == {"paths": 600, "seed": 3, "steps_per_year": 4, "basis": 2,
                                  "antithetic": False,
                                  "upper_bound": {"paths": 40, "inner": 4},
                                  "map_drivers": ["price", "other"]}
    d = tree["underlying"]["drivers"]
    assert d["price"]["risk_neutral"] == {"risk_premium": 0.2}
    assert d["other"]["risk_neutral"] == {"forward": {1.0: 5.5, 4.0: 6.0}}
    q = loads(EXCHANGE)
    modes = S.project_tree(replace(q, origin=None))["rights"][0]["modes"]
    assert modes["second"]["cash_flow"] == "B" and "cash_flow" not in modes["first"]
    f = loads(FORMULA)
    assert S.project_tree(replace(f, origin=None))["rights"][0]["salvage"] == "0.5 * S + 25"
    check_round_trip(p)


# generated projects: drivers of both processes and every risk-neutral kind, correlations,
# tax, terminal value, both timings, every right type with money formulas and mode formulas
@st.composite
def generated(draw):
    n = draw(st.integers(1, 3))
    lines, names = [], []
    for i in range(n):
        name = f"X{i}"
        names.append(name)
        proc = draw(st.sampled_from(["gbm", "mean_reverting"]))
        kinds = ["forward", "risk_premium"] + (["drift"] if proc == "gbm" else [])
        kind = draw(st.sampled_from(kinds))
        start = draw(st.floats(5.0, 50.0))
        vol = draw(st.floats(0.05, 0.6))
        rn = {"forward": f"{{forward: {{1: {start * 1.02!r}, 3: {start * 0.97!r}}}}}",
              "risk_premium": f"{{risk_premium: {draw(st.floats(-0.3, 0.5))!r}}}",
              "drift": f"{{drift: {draw(st.floats(-0.02, 0.08))!r}}}"}[kind]
        extra = (f"drift: {draw(st.floats(-0.02, 0.1))!r}" if proc == "gbm" else
                 f"long_run: {start * 1.1!r}, speed: {draw(st.floats(0.1, 1.5))!r}")
        lines.append(f"    {name}: {{process: {proc}, start: {start!r}, volatility: {vol!r}, "
                     f"{extra}, risk_neutral: {rn}}}")
    if draw(st.booleans()):
        lines.append("    V: {schedule: {0: 1.0, 4: 1.5}}")
        scale = " * V"
    else:
        scale = ""
    corr = ""
    if n >= 2:
        corr = f"  correlation: [[X0, X1, {draw(st.floats(-0.6, 0.6))!r}]]\n"
    formula = " + ".join(names) + scale + " - 12"
    tax = draw(st.sampled_from([0.0, 0.2]))
    tv = draw(st.sampled_from([0.0, 15.0]))
    timing = draw(st.sampled_from(["at_dates", "spread"]))
    rights = draw(st.lists(st.sampled_from(["defer", "expand", "contract", "abandon", "switch",
                                            "shutdown"]), min_size=0, max_size=3, unique=True))
    if "switch" in rights and "shutdown" in rights:
        rights.remove("shutdown")
    spec = {"defer": "{name: Wait, type: defer, window: [0, 1]}",
            "expand": "{name: Grow, type: expand, scale: 0.3, cost: {start: 8, growth: 0.02}, "
                      "window: [0.5, 3]}",
            "contract": "{name: Shrink, type: contract, scale: 0.25, savings: {0: 4, 4: 2}, "
                        "window: [1, 3], exercise: bermudan, dates: [1, 2, 3]}",
            "abandon": "{name: Exit, type: abandon, salvage: 0.5 * X0 + 10, window: [0.5, 4]}",
            "switch": "{name: Modes, type: switch, modes: {run: {}, low: {scale: 0.5, fixed: "
                      "-0.3}, off: {cash_flow: -0.8 - 0.01 * X0}}, costs: {run->low: 0.2, "
                      "low->run: 0.3, run->off: 0.5, off->run: X0 * 0.05}, window: [0, 4]}",
            "shutdown": "{name: Rest, type: shutdown, cost: 0.5, restart_cost: 0.7, "
                        "maintenance: 0.2, window: [0, 4]}"}
    paths = draw(st.sampled_from([400, 600]))
    basis = draw(st.integers(1, 2))
    anti = draw(st.booleans())
    maps = ", map_drivers: [X0, X1]" if n >= 2 and draw(st.booleans()) else ""
    ub = ", upper_bound: {paths: 20, inner: 3}" if draw(st.booleans()) else ""
    text = (f"project: {{name: Generated, currency: EUR, unit: million}}\n"
            f"valuation: simulation\n"
            f"simulation: {{paths: {paths}, seed: {draw(st.integers(0, 99))}, steps_per_year: "
            f"{draw(st.integers(1, 3))}, basis: {basis}, antithetic: {str(anti).lower()}"
            f"{maps}{ub}}}\n"
            f"market: {{risk_free_rate: {draw(st.floats(0.0, 0.06))!r}, discount_rate: 0.09, "
            f"compounding: {draw(st.sampled_from(['annual', 'continuous']))}}}\n"
            "underlying:\n  years: [1, 4]\n  drivers:\n" + "\n".join(lines) + "\n" + corr
            + f"  cash_flow: {formula}\n  tax_rate: {tax}\n  terminal_value: {tv}\n"
            + f"  flow_timing: {timing}\n"
            "investment:\n  cost: {0: 20.0, 1: 6.0}\n"
            + ("rights:\n" + "".join(f"  - {spec[r]}\n" for r in rights) if rights else ""))
    return text


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(text=generated())
def test_generated_simulation_projects_round_trip(text):
    p = loads(text, source="generated.yaml")
    copier = S.Copier(replace(p, origin=None))
    assert copier.route == "values", copier.problem
    assert S._same(copier(()), p)
    assert S._same(S.Copier(p)(()), p)


@settings(max_examples=6, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(text=generated())
def test_generated_simulation_projects_value_the_same_from_a_copy(text):
    check_round_trip(loads(text, source="generated.yaml"))


# --------------------------------------------------------------------------------------------
# the moves

def test_each_move_sets_what_it_names():
    p = river()
    copier = S.Copier(p)
    todo, notes = SS.cases(p, S.DEFAULT_MOVES)
    labels = [c.input for c in todo]
    assert labels[:2] == ["power: volatility", "power: level (today and the forward curve)"]
    assert {"carbon: today's value", "carbon: risk premium", "correlation power-gas",
            "Risk-free rate", "Investment cost", "Mothball the unit: switching costs",
            "Mothball the unit: cash flow of mode 'mothballed'"} <= set(labels)
    # a mode with its own cash-flow formula has no scale to move
    assert not any("scale of mode" in x for x in labels)
    assert any("discount rate" in n for n in notes)
    by = {c.input: c for c in todo}
    drivers = lambda q: {d.name: d for d in q.underlying.drivers.drivers}  # noqa: E731
    base = drivers(p)
    up = copier(by["power: level (today and the forward curve)"].high)
    pw = drivers(up)["power"]
    assert pw.start == base["power"].start * 1.1
    assert pw.risk_neutral.forward == tuple((y, f * 1.1)
                                            for y, f in base["power"].risk_neutral.forward)
    assert S._same(replace(up, underlying=p.underlying), p)
    rp = drivers(copier(by["carbon: risk premium"].low))["carbon"].risk_neutral
    # the risk premium moves so that the risk-neutral drift of ln X moves by the rates move
    assert rp.value * 0.25 == pytest.approx(0.1 * 0.25 - 0.01, abs=1e-15)
    corr = copier(by["correlation power-gas"].high).underlying.drivers.correlation
    assert corr == (("power", "gas", 0.9), ("power", "carbon", 0.4), ("gas", "carbon", 0.1))
    mode = copier(by["Mothball the unit: cash flow of mode 'mothballed'"].low).rights[1]
    assert mode.mode("mothballed").cash_flow == "(-2.5) * 0.8"
    assert mode.mode("run") == p.rights[1].mode("run")
    sale = loads(FORMULA)
    c = next(c for c in SS.cases(sale)[0] if c.input == "Sell: salvage")
    assert S.Copier(sale)(c.high).rights[0].salvage.formula == "(0.5 * S + 25) * 1.2"


@pytest.mark.parametrize("workers", [1, 2])
def test_zero_move_gives_the_base_exactly(workers):
    p = river()
    a = realopt.appraise(p, progress=False)
    copier = S.Copier(p)
    todo = SS.cases(p, ZERO)[0]
    for c in todo:                        # a zero move is the project itself, field for field
        assert S._same(copier(c.low), p) and S._same(copier(c.high), p), c.input
    s = SS.analyse(a, ZERO, workers=workers)
    assert s is not None and len(s.rows) == len(todo) >= 12
    for r in s.rows:
        assert r.expanded_low == r.expanded_high == s.base_expanded, r.input
        assert r.flexibility_low == r.flexibility_high == s.base_flexibility, r.input
        assert r.expanded_low_se == r.expanded_high_se == 0.0, r.input
    # the base is the project valued again with the full set of rights on the same paths
    from realopt.simulation.quick import path_values

    est = path_values(p).estimate()
    assert (s.base_expanded, s.base_expanded_se) == est["expanded_npv"]
    assert s.paths == a.simulation.paths         # small enough: the result's own paths
    assert abs(s.base_expanded - a.expanded_npv) < 2 * a.standard_error["expanded_npv"]


def test_workers_do_not_change_the_numbers():
    a = realopt.appraise(river(600), progress=False)
    one, two = SS.analyse(a, workers=1), SS.analyse(a, workers=2)
    assert one == two


SALE = """
project: {{name: sale on one driver}}
valuation: simulation
simulation: {{paths: {paths}, seed: 7, basis: 3}}
market: {{risk_free_rate: 0.05, compounding: continuous, discount_rate: 0.05}}
underlying:
  years: [2, 2]
  drivers:
    S: {{process: gbm, start: 40, volatility: 0.3, risk_neutral: {{drift: 0.05}}}}
  cash_flow: S
investment: {{cost: 0}}
rights:
  - {{name: Sell, type: abandon, salvage: 40, window: [1, 1], exercise: european}}
"""


def test_bars_against_black_scholes_merton():
    # S has the risk-neutral drift r, so the project (S paid at year 2) is worth S_t at t <= 2
    # and selling it at year 1 for K adds a European put on S struck at K, one year:
    # expanded NPV = S0 + put(S0, K, sigma) (Black-Scholes-Merton, tests/references.bsm)
    a = realopt.appraise(loads(SALE.format(paths=40000)), progress=False)
    s = SS.analyse(a, workers=1)
    assert s.paths == 40000
    r, T = 0.05, 1.0
    put = lambda s0, k, vol: bsm("put", s0, k, r, 0.0, vol, T)  # noqa: E731
    base = 40.0 + put(40.0, 40.0, 0.3)
    assert abs(s.base_expanded - base) < 4 * s.base_expanded_se + 0.01
    rows = {x.input: x for x in s.rows}
    refs = {"S: volatility": (40 + put(40, 40, 0.25), 40 + put(40, 40, 0.35)),
            "S: today's value": (36 + put(36, 40, 0.3), 44 + put(44, 40, 0.3)),
            "Sell: salvage": (40 + put(40, 32, 0.3), 40 + put(40, 48, 0.3))}
    for name, (lo, hi) in refs.items():
        row = rows[name]
        for got, se, ref in ((row.expanded_low, row.expanded_low_se, lo),
                             (row.expanded_high, row.expanded_high_se, hi)):
            # the difference to the base against the BSM difference; 0.002: the fitted
            # decision at the boundary (low-biased, about the same for base and copy)
            assert 0 < se < 0.02, name
            assert abs((got - s.base_expanded) - (ref - base)) < 4 * se + 0.002, \
                (name, got - s.base_expanded, ref - base, se)
    # the static NPV moves with today's value only (S0 exactly): the flexibility bar is the put
    row = rows["S: today's value"]
    assert abs((row.flexibility_high - s.base_flexibility)
               - (put(44, 40, 0.3) - put(40, 40, 0.3))) < 4 * row.expanded_high_se + 0.002


def test_signs_of_the_bars():
    # common practice: a higher investment cost lowers the expanded NPV, a higher salvage
    # raises it, a higher cost of restarting lowers it (weakly)
    a = realopt.appraise(river(2000), progress=False)
    s = SS.analyse(a)
    inv = next(r for r in s.rows if r.input == "Investment cost")
    assert inv.expanded_high < s.base_expanded - 3 * inv.expanded_high_se
    assert inv.expanded_low > s.base_expanded + 3 * inv.expanded_low_se
    g = realopt.appraise(loads(GRAPH), progress=False)
    t = SS.analyse(g)
    sell = next(r for r in t.rows if r.input == "Sell: salvage")
    assert sell.expanded_high > t.base_expanded + 3 * sell.expanded_high_se
    assert sell.expanded_low < t.base_expanded - 3 * sell.expanded_low_se
    idle = next(r for r in t.rows if r.input == "Idle: switching costs")
    assert idle.expanded_high <= t.base_expanded + 3 * idle.expanded_high_se


def test_tornado_paths_fit_the_work_budget():
    p = realopt.load_project(ROOT / "projects" / "river_ccgt.yaml")
    copies = 1 + 2 * len(SS.cases(p)[0])
    m = SS.tornado_paths(p, copies)
    n, dates, states, terms = SS._shape(p)
    assert m in {n // d // 2 * 2 for d in SS.PATH_DIVISORS} and m < n     # even: pairs
    assert copies * dates * m * (states + terms) <= SS.TORNADO_WORK
    assert copies * dates * 2 * m * (states + terms) > SS.TORNADO_WORK     # the largest
    assert SS.tornado_paths(loads(SCHEDULES), 5) == 1          # exact dynamic programming


# --------------------------------------------------------------------------------------------
# the report and the command line

@pytest.fixture(scope="module")
def sale_report(tmp_path_factory):
    from realopt.outputs.report import write_report

    text = SALE.format(paths=4000).replace("window: [1, 1], exercise: european",
                                           "window: [0, 1]")          # american, 12 a year
    a = realopt.appraise(loads(text, source="sale.yaml"), progress=False)
    out = tmp_path_factory.mktemp("rep") / "sale"
    write_report(a, out, dpi=72)
    return a, out


def test_report_draws_the_tornado_from_one_run(sale_report):
    a, out = sale_report
    s = SS.analyse(a, workers=1)                 # the same numbers (same seed and paths)
    csv = pd.read_csv(out / "tables" / "tornado.csv")
    assert csv["input"].tolist() == [r.input for r in s.rows]
    assert csv["expanded_npv_high"].tolist() == [r.expanded_high for r in s.rows]
    assert csv["expanded_npv_low_se_of_difference"].tolist() == [r.expanded_low_se
                                                                  for r in s.rows]
    assert set(csv["base_expanded_npv"]) == {s.base_expanded}
    md = (out / "report.md").read_text(encoding="utf-8")
    assert "figures/tornado.png" in md and "not drawn" not in md
    assert "Moves: volatility +-5 points" in md
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "not drawn" not in page
    cells = [float(v) for v in re.findall(r'data-value="([^"]+)"', page)]
    for r in s.rows:
        assert r.expanded_low in cells and r.flexibility_high_se in cells
    import matplotlib.image as mpimg

    img = mpimg.imread(out / "figures" / "tornado.png")
    assert img.shape[0] > 150 and np.unique(img.reshape(-1, img.shape[-1]), axis=0).shape[0] > 20
    manifest = json.loads((out / ".realopt-report").read_text())
    assert "tornado.png" in manifest["figures"] and "tornado.csv" in manifest["tables"]


def _json(cli, *args):
    res = cli("appraise", str(ROOT / "projects" / "river_ccgt.yaml"), "--set",
              "simulation.paths=600", *args, "--json")
    assert res.code == 0, res.err
    d = json.loads(res.out)
    d["simulation"].pop("seconds")               # wall-clock time of the run
    return d


def test_steps_per_year_sets_the_simulation_key(cli):
    via_option = _json(cli, "--steps-per-year", "6")
    via_set = _json(cli, "--set", "simulation.steps_per_year=6")
    assert via_option == via_set
    assert via_option["simulation"]["steps_per_year"] == 6
    assert via_option["warnings"] == []          # no lattice block was made up
    assert via_option != _json(cli)              # and it changed the run (12 a year in the file)
    chk = cli("check", str(ROOT / "projects" / "river_ccgt.yaml"), "--steps-per-year", "6")
    assert chk.code == 0 and "(6 a year inside american windows)" in " ".join(chk.out.split())


def test_steps_per_year_in_a_sweep_sets_the_simulation_key():
    from realopt.cli import build_parser
    from realopt.sweep import grid, parse_vary
    from realopt.sweep_command import validate_points

    args = build_parser().parse_args(["sweep", str(ROOT / "projects" / "river_ccgt.yaml"),
                                      "--vary", "simulation.seed=1,2", "--steps-per-year", "6"])
    varies = [parse_vary(t) for t in args.vary]
    projects = validate_points(args, varies, grid(varies), [])
    assert [q.simulation.steps_per_year for q in projects] == [6, 6]
    assert all(q.warnings == () for q in projects)


def test_a_project_no_file_can_state_gets_no_tornado_and_says_why(tmp_path):
    from realopt.model import Schedule
    from realopt.outputs.report import write_report

    p = loads(ONE_DRIVER, source="plant.yaml")
    sell = p.rights[0]
    odd = replace(p, rights=(replace(sell, salvage=Schedule(points=((0.0, 55.0),), today=50.0)),),
                  origin=None)                  # `today` is set by the valuation, never a file
    assert S.Copier(odd).route is None
    a = realopt.appraise(odd, progress=False)
    assert SS.analyse(a) is None
    write_report(a, tmp_path / "rep", dpi=72)
    md = (tmp_path / "rep" / "report.md").read_text(encoding="utf-8")
    assert "No sensitivity is computed: moved copies of the project are made by the project " \
           "loader" in md
    assert not (tmp_path / "rep" / "figures" / "tornado.png").exists()
    assert not (tmp_path / "rep" / "tables" / "tornado.csv").exists()
