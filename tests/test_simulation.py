"""valuation: simulation (least-squares Monte Carlo on the drivers) against outside references.

Continuous rates throughout (compounding: continuous) so that the references' formulas apply as
written. A project "worth one driver S" pays S at year 2 (after every decision date) and S has the
risk-neutral drift r: its value at any t <= 2 is S_t, so a sale right for K is a put on S.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import realopt
from realopt.project import loads
from realopt.simulation import lsm
from realopt.simulation.paths import dynamics, simulate
from sim_texts import EXCHANGE, FORMULA, GRAPH, SCHEDULES, SPREAD

ql = pytest.importorskip("QuantLib")


def put_project(paths=50000, seed=3, dates="american", extra="", valuation="simulation",
                salvage=40.0, start=36.0, sigma=0.2, lattice=""):
    window = ("window: [0, 1]" if dates == "american" else
              "window: [0, 1], exercise: bermudan, dates: ["
              + ", ".join(f"{k / 50:g}" for k in range(1, 51)) + "]")
    sim = (f"valuation: simulation\nsimulation: {{paths: {paths}, seed: {seed}, "
           f"steps_per_year: 50, basis: 3{extra}}}\n" if valuation == "simulation" else
           f"lattice: {{steps_per_year: {lattice or 50}}}\n")
    vol = "" if valuation == "simulation" else f"  volatility: {sigma}\n"
    return loads(f"""
project: {{name: put}}
{sim}market: {{risk_free_rate: 0.06, compounding: continuous, discount_rate: 0.06}}
underlying:
  years: [2, 2]
  drivers:
    S: {{process: gbm, start: {start}, drift: 0.06, volatility: {sigma},
        risk_neutral: {{drift: 0.06}}}}
  cash_flow: S
{vol}investment: {{cost: 0}}
rights:
  - {{name: Sell, type: abandon, salvage: {salvage}, {window}}}
""")


def se(a, key="flexibility_value"):
    return a.standard_error[key]


# --- Longstaff & Schwartz (2001) ------------------------------------------------------------

def test_bermudan_put_longstaff_schwartz_table_1():
    # Longstaff & Schwartz (2001), Table 1: S = 36, sigma = 0.2, T = 1, K = 40, r = 6%, 50
    # exercise dates a year: finite-difference American value 4.478 (recalled from memory).
    a = realopt.appraise(put_project(dates="bermudan"))
    assert a.method == "simulation"
    assert abs(a.present_value - 36.0) <= 4 * se(a, "present_value") + 1e-9
    assert abs(a.flexibility_value - 4.478) < 4 * se(a) + 0.01      # 0.01: LSM's low bias
    assert 0.005 < se(a) < 0.05
    # the project's own fine lattice on the same 50 dates (Cox-Ross-Rubinstein, 1,000 a year)
    lat = realopt.appraise(put_project(dates="bermudan", valuation="lattice", lattice=1000))
    assert abs(a.flexibility_value - lat.flexibility_value) < 4 * se(a) + 0.01
    # the rule is a threshold in S that rises towards K at the end (common practice: the
    # exercise boundary of a put lies below the strike and ends at it)
    thr = [t for t in a.right("Sell").thresholds if not t.never]
    assert thr and all(t.upper is not None and t.upper <= 40.05 for t in thr)   # 0.05: fit noise
    assert thr[-1].upper > thr[0].upper and thr[-1].upper > 38.0


def test_bermudan_put_standalone_equals_shapley_with_one_right():
    a = realopt.appraise(put_project(paths=4000, dates="bermudan"))
    r = a.right("Sell")
    assert r.shapley_value == pytest.approx(a.flexibility_value, abs=1e-12)
    assert r.shapley_standard_error == pytest.approx(se(a), abs=1e-12)


# --- Margrabe (1978) exchange option ------------------------------------------------------------

def margrabe_quantlib(s_get, s_give, v_get, v_give, rho, r, t):
    """QuantLib's AnalyticEuropeanMargrabeEngine: payoff max(S_get - S_give, 0) at t."""
    today = ql.Date(15, 1, 2026)
    ql.Settings.instance().evaluationDate = today
    dc = ql.Actual365Fixed()
    maturity = today + int(round(365 * t))
    rts = ql.YieldTermStructureHandle(ql.FlatForward(today, r, dc))
    qts = ql.YieldTermStructureHandle(ql.FlatForward(today, 0.0, dc))

    def proc(s, v):
        return ql.BlackScholesMertonProcess(
            ql.QuoteHandle(ql.SimpleQuote(s)), qts, rts,
            ql.BlackVolTermStructureHandle(ql.BlackConstantVol(today, ql.NullCalendar(), v, dc)))

    opt = ql.MargrabeOption(1, 1, ql.EuropeanExercise(maturity))
    opt.setPricingEngine(ql.AnalyticEuropeanMargrabeEngine(proc(s_get, v_get),
                                                           proc(s_give, v_give), rho))
    return opt.NPV()


def test_one_time_switch_is_a_margrabe_exchange_option():
    text = EXCHANGE
    a = realopt.appraise(loads(text))
    # B's forward curve is 95 e^{0.05 t} at t = 1, 2 (so its risk-neutral drift is r too)
    # Margrabe (1978) via QuantLib's AnalyticEuropeanMargrabeEngine (PyPI package QuantLib)
    ref = margrabe_quantlib(95.0, 100.0, 0.2, 0.3, 0.4, 0.05, 1.0)
    assert abs(a.flexibility_value - ref) < 4 * se(a) + 0.02, (a.flexibility_value, ref, se(a))
    assert abs(a.present_value - 100.0) <= 4 * se(a, "present_value") + 1e-9


# --- against the lattice -------------------------------------------------------------------------

PROPORTIONAL = """
project: {{name: proportional}}
{valuation}
market: {{risk_free_rate: 0.05, compounding: continuous, discount_rate: 0.08}}
underlying:
  years: [1, 10]
  drivers:
    X: {{process: gbm, start: 10, drift: 0.08, volatility: 0.3, risk_neutral: {{drift: 0.05}}}}
  cash_flow: X
{vol}investment: {{cost: 85}}
rights:
  - {{name: Sell, type: abandon, salvage: 55, window: [1, 9], exercise: bermudan,
     dates: [1, 2, 3, 4, 5, 6, 7, 8, 9]}}
  - {{name: Grow, type: expand, scale: 0.5, cost: 40, window: [1, 9], exercise: bermudan,
     dates: [1, 2, 3, 4, 5, 6, 7, 8, 9]}}
"""


def test_proportional_flows_agree_with_the_lattice():
    # V_t = X_t x (flows left) when the real-world drift equals the discount rate and the
    # risk-neutral drift the risk-free rate: the lattice's geometric Brownian motion of V with
    # proportional payouts is exact, so the two methods value the same rights (independent
    # methods: agreement within 4 standard errors plus the tree's own error at 100 steps a year).
    sim = realopt.appraise(loads(PROPORTIONAL.format(
        valuation="valuation: simulation\nsimulation: {paths: 30000, seed: 2, basis: 3}",
        vol="")))
    lat = realopt.appraise(loads(PROPORTIONAL.format(
        valuation="lattice: {steps_per_year: 100}", vol="  volatility: 0.3\n")))
    assert lat.present_value == pytest.approx(100.0, rel=1e-9)
    assert abs(sim.present_value - 100.0) <= 4 * se(sim, "present_value") + 1e-9
    assert abs(sim.expanded_npv - lat.expanded_npv) < 4 * se(sim, "expanded_npv") + 0.05
    assert abs(sim.flexibility_value - lat.flexibility_value) < 4 * se(sim) + 0.05
    for name in ("Sell", "Grow"):
        s, l = sim.right(name), lat.right(name)
        assert abs(s.standalone_value - l.standalone_value) < \
            4 * s.standalone_standard_error + 0.05, name
        assert abs(s.shapley_value - l.shapley_value) < 4 * s.shapley_standard_error + 0.05
    # Shapley shares add up to the flexibility value exactly, path by path (common practice)
    assert sum(r.shapley_value for r in sim.rights) == pytest.approx(sim.flexibility_value,
                                                                     abs=1e-9)
    # affine base flows: their risk-neutral value is exact (E*[X_t] = X0 e^{rt}) and serves as a
    # control variate, so the present value carries no error
    assert sim.present_value == pytest.approx(100.0, rel=1e-12)
    assert se(sim, "present_value") == 0.0
    assert se(sim) <= se(sim, "expanded_npv") + 1e-12


def test_dual_upper_bound_brackets_the_lattice_american_put():
    # Andersen & Broadie (2004): the dual value is an upper bound, the policy's value on
    # independent paths a lower bound; the fine lattice's American value (50 dates a year, the
    # same dates) lies between them, within standard errors.
    a = realopt.appraise(put_project(paths=20000, extra=", upper_bound: {paths: 1000, inner: 50}"))
    lat = realopt.appraise(put_project(valuation="lattice", lattice=50))
    ub = a.upper_bound
    assert ub is not None and ub["standard_error"] > 0
    assert a.expanded_npv - 3 * se(a, "expanded_npv") <= lat.expanded_npv + 0.01
    assert ub["value"] + 3 * ub["standard_error"] >= lat.expanded_npv
    assert ub["value"] - a.expanded_npv < 0.2 * a.flexibility_value      # a useful bound


# --- exact dynamic programming --------------------------------------------------------------------

def test_deterministic_drivers_give_exact_dynamic_programming():
    text = SCHEDULES
    a = realopt.appraise(loads(text))
    assert a.standard_error == {"present_value": 0.0, "expanded_npv": 0.0,
                                "flexibility_value": 0.0}
    assert a.simulation.paths == 1
    r = 0.04
    flows = {y: (40 + 30 * y / 12) - (50 - 5 * y / 12) for y in range(1, 13)}
    # brute force over the commitment year (decisions yearly; commit at t buys the flows after t)
    best = max(sum(flows[y] * math.exp(-r * y) for y in flows if y > t) - 30 * math.exp(-r * t)
               for t in range(0, 7))
    assert a.expanded_npv == pytest.approx(best, abs=1e-9)
    static = sum(f * math.exp(-r * y) for y, f in flows.items()) - 30
    assert a.static_npv == pytest.approx(static, abs=1e-9)


# --- properties ---------------------------------------------------------------------------------

def test_same_seed_same_numbers():
    a = realopt.appraise(put_project(paths=3000)).to_dict()
    b = realopt.appraise(put_project(paths=3000)).to_dict()
    a["simulation"].pop("seconds")
    b["simulation"].pop("seconds")
    assert a == b
    c = realopt.appraise(put_project(paths=3000, seed=4)).to_dict()
    assert c["expanded_npv"] != a["expanded_npv"]


def test_four_times_the_paths_halves_the_standard_error():
    # 1/sqrt(n) (common practice); within 20%
    small = realopt.appraise(put_project(paths=4000, seed=8))
    large = realopt.appraise(put_project(paths=16000, seed=8))
    ratio = se(small) / se(large)
    assert 2.0 * 0.8 < ratio < 2.0 * 1.2, ratio


@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(start=st.floats(25.0, 55.0), sigma=st.floats(0.05, 0.6), salvage=st.floats(10.0, 60.0))
def test_flexibility_is_never_significantly_negative(start, sigma, salvage):
    # an option's value is never negative (common practice): the low-biased estimate may dip
    # below zero only by noise
    a = realopt.appraise(put_project(paths=1000, start=start, sigma=sigma, salvage=salvage))
    assert a.flexibility_value >= -3 * se(a) - 1e-12


def test_a_right_never_exercised_adds_exactly_zero():
    # common random numbers: the subsets with and without the right follow the same paths and
    # the same decisions, so its share is 0 path by path (not merely within noise)
    p = loads(PROPORTIONAL.format(valuation="valuation: simulation\nsimulation: {paths: 4000}",
                                  vol="").replace("cost: 40", "cost: 1.0e9"))
    a = realopt.appraise(p)
    g = a.right("Grow")
    assert g.shapley_value == 0.0 and g.standalone_value == 0.0
    assert g.shapley_standard_error == 0.0
    assert a.right("Sell").shapley_value == pytest.approx(a.flexibility_value, abs=1e-12)


# --- paths ----------------------------------------------------------------------------------------

def test_mean_reverting_forward_curve_is_matched_exactly_in_expectation():
    # Schwartz (1997) one-factor model: theta(t) chosen so that E*[X_t] = F(t); log-linear
    # between the curve's points (docs/design.md, section 10). 200,000 antithetic paths; 4 standard errors.
    p = loads("""
project: {name: mr}
valuation: simulation
market: {risk_free_rate: 0.03, discount_rate: 0.08}
underlying:
  years: [1, 5]
  drivers:
    power: {process: mean_reverting, start: 62, long_run: 58, speed: 0.8, volatility: 0.35,
            risk_neutral: {forward: {1: 60, 2: 59, 5: 57}}}
  cash_flow: power
investment: {cost: 0}
""")
    dyn = dynamics(p.underlying.drivers, "risk_neutral")
    times = np.array([0.0, 0.5, 1.0, 2.0, 3.5, 5.0, 7.0])
    x = simulate(dyn, times, 200000, 1, "fit", True)[:, 0, :]
    fwd = np.exp(np.interp(times, [0, 1, 2, 5], np.log([62, 60, 59, 57])))
    for k in range(1, len(times)):
        pairs = 0.5 * (x[k, :100000] + x[k, 100000:])
        err = pairs.std(ddof=1) / math.sqrt(100000)
        assert abs(pairs.mean() - fwd[k]) < 4 * err, (times[k], pairs.mean(), fwd[k])


def test_gbm_transition_is_exact_on_uneven_dates():
    # E*[X_t] = X0 e^{mu t} and Var ln X_t = sigma^2 t (lognormal, common practice)
    p = loads("""
project: {name: g}
valuation: simulation
market: {risk_free_rate: 0.03, discount_rate: 0.08}
underlying:
  years: [1, 3]
  drivers:
    gas: {process: gbm, start: 24, drift: 0.05, volatility: 0.3, risk_neutral: {risk_premium: 0.2}}
  cash_flow: gas
investment: {cost: 0}
""")
    dyn = dynamics(p.underlying.drivers, "risk_neutral")
    times = np.array([0.0, 0.1, 1.3, 3.0])
    x = simulate(dyn, times, 100000, 2, "fit", False)[:, 0, :]
    mu = 0.05 - 0.2 * 0.3            # the drift falls by lambda * sigma
    for k in range(1, 4):
        t = times[k]
        assert abs(np.log(x[k]).var() - 0.09 * t) < 0.02 * 0.09 * t + 1e-4
        err = x[k].std() / math.sqrt(x.shape[1])
        assert abs(x[k].mean() - 24 * math.exp(mu * t)) < 4 * err


def test_basis_counts_every_monomial():
    # C(d + k, k) monomials of degree <= k in d variables (common practice)
    assert len(lsm.exponents(3, 3)) == math.comb(6, 3)
    assert len(lsm.exponents(1, 4)) == 5


# --- command line ---------------------------------------------------------------------------------

def test_cli_check_and_appraise_json(tmp_path):
    import json
    import subprocess
    import sys

    f = tmp_path / "plant.yaml"
    f.write_text(PROPORTIONAL.format(
        valuation="valuation: simulation\nsimulation: {paths: 2000, seed: 2}", vol=""))
    env = {"PYTHONPATH": str(__import__("pathlib").Path(realopt.__file__).parents[1])}
    run = lambda *a: subprocess.run([sys.executable, "-m", "realopt", *a], capture_output=True,
                                    text=True, env=env)
    c = run("check", str(f))
    assert c.returncode == 0, c.stderr
    flat = " ".join(c.stdout.split())
    assert "least-squares Monte Carlo" in flat and "regression on 4 terms" in flat
    j = run("appraise", str(f), "--json")
    assert j.returncode == 0, j.stderr
    d = json.loads(j.stdout)
    assert d["method"] == "simulation"
    assert set(d["standard_error"]) == {"present_value", "expanded_npv", "flexibility_value"}
    assert {"standalone_standard_error", "shapley_standard_error"} <= set(d["rights"][0])
    assert d["simulation"]["paths"] == 2000 and d["simulation"]["basis"] == 3
    t = run("appraise", str(f))
    assert t.returncode == 0 and "+-" in t.stdout and "Caution" in t.stdout
    g = tmp_path / "big.yaml"
    bermudan = "exercise: bermudan,\n     dates: [1, 2, 3, 4, 5, 6, 7, 8, 9]"
    g.write_text(f.read_text().replace(bermudan, "exercise: american"))
    big = run("appraise", str(g), "--set", "simulation.paths=5000000", "--set",
              "simulation.steps_per_year=365")
    assert big.returncode == 1 and "--allow-large" in big.stderr and "Traceback" not in big.stderr
    rep = run("report", str(f), "-o", str(tmp_path / "out"))       # drawn since issue 10 item 5
    assert rep.returncode == 0 and (tmp_path / "out" / "report.html").is_file(), rep.stderr
    pf = run("portfolio", str(f), "-o", str(tmp_path / "pf"), "--workers", "1", "--quiet")
    assert pf.returncode == 0 and (tmp_path / "pf" / "portfolio.csv").is_file(), pf.stderr
    assert "commit_now_se" in (tmp_path / "pf" / "portfolio.csv").read_text()  # since issue 10


# --- the whole state graph against the lattice ------------------------------------------------



def test_every_right_type_with_requires_and_excludes_agrees_with_the_lattice():
    # the same state graph (defer, expand requiring it, a repeatable switch, abandonment
    # excluding the expansion) valued by the two independent methods; proportional flows make
    # the lattice exact up to its own tree error (100 steps a year)
    sim = realopt.appraise(loads(GRAPH.format(
        valuation="valuation: simulation\nsimulation: {paths: 20000, seed: 4, basis: 3}",
        vol="")))
    lat = realopt.appraise(loads(GRAPH.format(valuation="lattice: {steps_per_year: 100}",
                                              vol="  volatility: 0.35\n")))
    assert len(sim.state_graph.states) == len(lat.state_graph.states)
    assert abs(sim.expanded_npv - lat.expanded_npv) < 4 * se(sim, "expanded_npv") + 0.1
    for r in sim.rights:
        l = lat.right(r.name)
        assert abs(r.shapley_value - l.shapley_value) < 4 * r.shapley_standard_error + 0.1, \
            (r.name, r.shapley_value, l.shapley_value, r.shapley_standard_error)
        assert abs(r.standalone_value - l.standalone_value) < \
            4 * r.standalone_standard_error + 0.1, r.name


def test_money_formula_over_the_drivers():
    # salvage 0.5 S + 25 at year 1 only on a project worth S: the right pays
    # max(25 - 0.5 S_1, 0) = 0.5 max(50 - S_1, 0), half a European put struck at 50
    # (Black-Scholes-Merton, tests/references.bsm)
    from references import bsm

    text = FORMULA
    a = realopt.appraise(loads(text))
    assert a.project.rights[0].salvage.formula == "0.5 * S + 25"
    ref = 0.5 * bsm("put", 36.0, 50.0, 0.06, 0.0, 0.2, 1.0)
    assert abs(a.flexibility_value - ref) < 4 * se(a) + 0.005, (a.flexibility_value, ref)
    # salvage S + 1 today only: used at once on every path, worth exactly 1 more
    b = realopt.appraise(loads(text.replace("0.5 * S + 25, window: [1, 1], exercise: european",
                                            "S + 1, window: [0, 0]")))
    assert b.flexibility_value == pytest.approx(1.0, abs=1e-9)
    assert b.decision_today == "invest, and use 'Sell' at once"


def test_spread_timing_present_value_is_exact():
    # spread: each step pays the cash-flow rate at its start times the step's length inside the
    # cash-flow years (docs/design.md, section 10); E*[X_t] = X0 e^{r t} (gbm), discounted at r (continuous)
    text = SPREAD
    a = realopt.appraise(loads(text))
    ts = np.arange(0, 13) / 4
    ref = sum(math.exp(-0.04 * ts[k]) * 0.25 * 10 * math.exp(0.04 * ts[k - 1])
              for k in range(1, 13))
    assert a.present_value == pytest.approx(ref, rel=1e-12)
    assert a.flexibility_value >= -3 * se(a)


def test_real_world_paths_share_the_valuing_normals():
    from realopt.simulation.paths import change_measure

    p = loads(PROPORTIONAL.format(valuation="valuation: simulation", vol=""))
    rn, rw = dynamics(p.underlying.drivers, "risk_neutral"), dynamics(p.underlying.drivers,
                                                                      "real_world")
    times = np.array([0.0, 0.5, 1.0, 4.0])
    a = change_measure(simulate(rn, times, 1000, 7, "value", True), times, rn, rw)
    b = simulate(rw, times, 1000, 7, "value", True)
    assert np.allclose(a, b, rtol=1e-12, atol=0)


def test_simulation_demo_reads_in_prices(simulation_demos):
    assert simulation_demos, "a demo project with valuation: simulation"
    for path in simulation_demos:
        p = realopt.load_project(path, {"simulation.paths": 4000})
        a = realopt.appraise(p)
        assert a.warnings == ()
        assert {"defer", "switch"} <= {r.type for r in a.rights}
        assert a.driver_maps and {m.x_driver for m in a.driver_maps} <= set(
            d.name for d in p.underlying.drivers.drivers)
        assert all(0.0 <= u <= 1.0 for r in a.rights for u in r.use_real_world)
        for r in a.rights:
            if r.type == "switch":
                # first use never falls and is at least the share away from the start mode at
                # each date (common practice); the mode shares add up to the invested share
                u = np.array(r.use_real_world)
                assert np.all(np.diff(u) >= -1e-12)
                away = sum(np.array(v[1]) for m, v in r.mode_shares.items()
                           if m != a.project.right(r.name).start)
                assert np.all(u >= away - 1e-12)
        assert sum(r.shapley_value for r in a.rights) == pytest.approx(a.flexibility_value,
                                                                       abs=1e-9)


def test_sale_threshold_in_the_driver_follows_the_lattice_boundary():
    # the exercise boundary of the American put read off the simulation (in S) against the
    # project's own lattice (in project value, here equal to S): the fitted boundary carries
    # regression error, so within 1.0 (2.5% of the salvage) at every tenth date
    a = realopt.appraise(put_project(paths=50000))
    lat = realopt.appraise(put_project(valuation="lattice", lattice=50))
    ref = {round(t.year, 6): t.upper for t in lat.right("Sell").thresholds
           if not t.never and t.upper is not None}
    checked = 0
    for t in a.right("Sell").thresholds[5:-1:5]:
        assert t.driver == "S" and t.upper is not None
        assert abs(t.upper - ref[round(t.year, 6)]) < 1.0, (t.year, t.upper, ref[round(t.year, 6)])
        checked += 1
    assert checked >= 8


def test_a_right_with_no_exercise_date_adds_exactly_zero():
    # the project ends at its last cash-flow date (year 10): a right whose window opens after it
    # has no exercise date, so every subset with it follows the same paths and decisions as the
    # subset without it (common random numbers): its share is exactly 0 (common practice)
    p = loads(PROPORTIONAL.format(valuation="valuation: simulation\nsimulation: {paths: 4000}",
                                  vol="")
              + "  - {name: Late sale, type: abandon, salvage: 500, window: [11, 12]}\n")
    a = realopt.appraise(p)
    late = a.right("Late sale")
    assert late.shapley_value == 0.0 and late.standalone_value == 0.0
    assert late.shapley_standard_error == 0.0
    assert any("Late sale" in w for w in a.warnings)


def test_shutdown_rule_on_the_drivers_names_each_move(tmp_path):
    """A registered right type other than switch (shutdown: a two-mode switch) is valued and
    worded by its type under simulation too: the rule names both moves, shut and restart, on
    the sides they are used (shut when the price falls, restart when it rises: common
    practice for a plant whose margin rises with its output price)."""
    from realopt import appraise, load_project

    f = tmp_path / "kiln.yaml"
    f.write_text(
        "valuation: simulation\n"
        "simulation: {paths: 4000, seed: 3, steps_per_year: 4, basis: 2}\n"
        "project: {name: Kiln on prices}\n"
        "market: {risk_free_rate: 0.03, discount_rate: 0.08}\n"
        "underlying:\n  years: [1, 8]\n  drivers:\n"
        "    price: {process: gbm, start: 50, drift: 0.01, volatility: 0.3,"
        " risk_neutral: {risk_premium: 0.2}}\n"
        "  cash_flow: 0.4 * price - 18\n"
        "investment: {cost: 10}\n"
        "rights:\n  - {name: Shut the kiln, type: shutdown, cost: 0.5, restart_cost: 1.0,"
        " maintenance: 0.8, window: [0, 8]}\n")
    a = appraise(load_project(f))
    rule = a.rights[0].rule
    assert "operating -> shut if price falls below" in rule
    assert "shut -> operating once price exceeds" in rule
    assert a.flexibility_value > 3 * a.to_dict()["standard_error"]["flexibility_value"]
