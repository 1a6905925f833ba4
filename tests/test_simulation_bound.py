"""The dual upper bound of valuation: simulation (realopt/simulation/bound.py) against outside
references.

Andersen & Broadie (2004): for any martingale the mean of the pathwise maximum is an upper bound
on the value of the best exercise policy; built from the lower policy's own value process and
estimated by nested simulation, inner noise can only raise it. So on every project the lower
estimate (the fitted policy on independent paths) and the bound bracket the true value within
standard errors. The true value comes from the project's own fine lattice where the project is
one geometric Brownian motion (the same dates, exact model), from QuantLib for the American put
(QuantLib's finite-difference engine, PyPI package QuantLib), or from brute force.
"""
from __future__ import annotations

import math

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import realopt
from realopt.project import loads
from realopt.rights import build_state_graph, prepared_rights
from realopt.simulation import bound, lsm
from realopt.simulation.paths import dynamics, simulate
from sim_texts import SCHEDULES

from test_simulation import GRAPH, put_project

ql = pytest.importorskip("QuantLib")


def se(a, key="expanded_npv"):
    return a.standard_error[key]


def quantlib_american_put(s=36.0, k=40.0, r=0.06, sigma=0.2, t_days=365):
    """American put by QuantLib's FdBlackScholesVanillaEngine (800 x 800 grid)."""
    today = ql.Date(15, 1, 2026)
    ql.Settings.instance().evaluationDate = today
    dc = ql.Actual365Fixed()
    process = ql.BlackScholesMertonProcess(
        ql.QuoteHandle(ql.SimpleQuote(s)),
        ql.YieldTermStructureHandle(ql.FlatForward(today, 0.0, dc)),
        ql.YieldTermStructureHandle(ql.FlatForward(today, r, dc)),
        ql.BlackVolTermStructureHandle(ql.BlackConstantVol(today, ql.NullCalendar(), sigma, dc)))
    option = ql.VanillaOption(ql.PlainVanillaPayoff(ql.Option.Put, k),
                              ql.AmericanExercise(today, today + t_days))
    option.setPricingEngine(ql.FdBlackScholesVanillaEngine(process, 800, 800))
    return option.NPV()


# --- the Bermudan put of Longstaff & Schwartz (2001) ------------------------------------------

@pytest.fixture(scope="module")
def put_bounds():
    a = realopt.appraise(put_project(paths=20000, dates="bermudan",
                                     extra=", upper_bound: {paths: 500, inner: 60}"),
                         progress=False)
    # the same 50 exercise dates on the project's own lattice, 1,000 steps a year: the
    # Bermudan value of the model (exact up to the tree's error, well below 0.005 here)
    lat = realopt.appraise(put_project(valuation="lattice", dates="bermudan", lattice=1000))
    return a, lat


def test_bermudan_put_lower_estimate_and_bound_bracket_the_lattice(put_bounds):
    a, lat = put_bounds
    ub = a.upper_bound
    assert ub["paths"] == 500 and ub["inner"] == 60 and ub["standard_error"] > 0
    assert a.expanded_npv - 3 * se(a) <= lat.expanded_npv <= ub["value"] + 3 * ub["standard_error"]
    # Longstaff & Schwartz (2001), Table 1: finite-difference American value 4.478 (recalled
    # from memory); the sale right is the put on a project worth S = 36 today
    assert abs(lat.flexibility_value - 4.478) < 0.01
    # QuantLib's American value (finite differences) lies above the Bermudan one and the
    # lower estimate (American >= Bermudan: common practice)
    american = quantlib_american_put()
    assert lat.flexibility_value <= american + 0.002
    assert a.flexibility_value - 3 * se(a, "flexibility_value") <= american


def test_bermudan_put_bound_is_tight(put_bounds):
    a, lat = put_bounds
    ub = a.upper_bound
    # the bound of the fitted value function (one-step inner draws) was 2.7% of the option
    # value above the lower estimate with 1,000 x 100 draws; the policy's own martingale is far
    # tighter (0.4% measured with 1,000 x 100)
    assert ub["gap"] == pytest.approx(ub["value"] - a.expanded_npv, abs=1e-12)
    assert ub["gap_share"] == pytest.approx(ub["gap"] / a.flexibility_value, rel=1e-12)
    assert ub["gap_share"] < 0.015, ub
    assert ub["value"] - lat.expanded_npv < 0.05


def test_nested_bound_beats_the_fitted_value_bound_on_the_same_paths():
    p = put_project(paths=20000, dates="bermudan")
    prob = lsm.Problem(p)
    rights = prepared_rights(p)
    graph = build_state_graph(rights)
    open_by = {r.name: lsm.open_mask(r, prob.times, 50) for r in rights}
    dyn = dynamics(prob.model)
    x_fit = simulate(dyn, prob.times, 20000, 3, "fit", True)
    stats = [prob.basis.stats(x_fit[k]) for k in range(prob.T)]
    pol = lsm.fit(prob, graph, x_fit, stats, open_by, all_states=True)
    outer = simulate(dyn, prob.times, 400, 3, "upper", True)
    nested = bound.nested_upper_bound(prob, pol, dyn, outer, 40, 3)
    fitted = lsm.upper_bound(prob, pol, dyn, outer, 40, 3)
    lower = lsm.run(prob, pol, simulate(dyn, prob.times, 20000, 3, "value", True)).values
    diff = 0.5 * ((fitted - nested)[:200] + (fitted - nested)[200:])    # antithetic pairs
    assert diff.mean() > 3 * diff.std(ddof=1) / math.sqrt(diff.size)
    # both are upper bounds (within their noise) of the policy's value
    for z in (nested, fitted):
        pairs = 0.5 * (z[:200] + z[200:])
        assert pairs.mean() + 3 * pairs.std(ddof=1) / math.sqrt(200) >= lower.mean() - 0.05


def test_inner_estimates_of_the_policy_value_are_unbiased():
    # the inner paths' controls (closed-form flow values, polynomial martingale) must keep the
    # mean: at date 0 every outer path starts from the same drivers, so the inner estimates of
    # the policy's value average to the policy's value on independent paths (common practice)
    p = put_project(paths=20000, dates="bermudan")
    prob = lsm.Problem(p)
    rights = prepared_rights(p)
    graph = build_state_graph(rights)
    open_by = {r.name: lsm.open_mask(r, prob.times, 50) for r in rights}
    dyn = dynamics(prob.model)
    x_fit = simulate(dyn, prob.times, 20000, 3, "fit", True)
    pol = lsm.fit(prob, graph, x_fit, [prob.basis.stats(x) for x in x_fit], open_by)
    seen = {}
    bound.nested_upper_bound(prob, pol, dyn, simulate(dyn, prob.times, 600, 3, "upper", True),
                             20, 3, diagnostics=seen)
    c0 = seen["chat"][0, graph.initial]
    x_val = simulate(dyn, prob.times, 100000, 9, "value", True)
    mart = lsm.martingale_increments(prob, dyn, x_val)
    res = lsm.run(prob, pol, x_val, mart=mart)
    v = res.values - res.correction                    # a zero-mean control, coefficient 1
    v = 0.5 * (v[:50000] + v[50000:])
    se_diff = math.hypot(c0.std(ddof=1) / math.sqrt(c0.size), v.std(ddof=1) / math.sqrt(v.size))
    assert abs(c0.mean() - v.mean()) < 4 * se_diff, (c0.mean(), v.mean(), se_diff)
    assert c0.std() < 0.3 * (res.values.std())         # and the controls do reduce the noise


def test_same_seed_same_bound():
    def ub(seed):
        return realopt.appraise(put_project(paths=2000, seed=seed, extra=", upper_bound: "
                                            "{paths: 60, inner: 10}"), progress=False).upper_bound

    a, b = ub(3), ub(3)
    assert a == b
    assert ub(4)["value"] != a["value"]


# --- exact cases ----------------------------------------------------------------------------------

def test_deterministic_drivers_give_the_exact_value_with_no_error():
    # the schedules project of tests/test_simulation.py with a sale right and the bound
    text = SCHEDULES.replace("steps_per_year: 1}", "steps_per_year: 1, upper_bound: "
                             "{paths: 200, inner: 20}}") + (
        "  - {name: Sell, type: abandon, salvage: 20, window: [1, 12]}\n")
    a = realopt.appraise(loads(text), progress=False)
    r = 0.04
    flows = {y: (40 + 30 * y / 12) - (50 - 5 * y / 12) for y in range(1, 13)}

    def held(t, u):     # commit at t, sell at u (13: never), flows after t up to u
        return (sum(flows[y] * math.exp(-r * y) for y in flows if t < y <= min(u, 12))
                - 30 * math.exp(-r * t) + (20 * math.exp(-r * u) if u <= 12 else 0.0))

    # brute force over the commitment and sale years (decisions yearly, common practice)
    best = max(held(t, u) for t in range(0, 7) for u in list(range(max(t, 1), 13)) + [13])
    assert a.expanded_npv == pytest.approx(best, abs=1e-9)
    assert a.upper_bound["value"] == pytest.approx(best, abs=1e-9)
    assert a.upper_bound["standard_error"] == 0.0


# --- several states -------------------------------------------------------------------------------

def test_switch_with_costs_and_every_right_type_is_bracketed_by_the_bounds():
    # defer, an expansion requiring it, a repeatable switch with costs and a sale excluding the
    # expansion (tests/test_simulation.py GRAPH); the lattice values the same state graph
    # exactly up to its tree error (100 steps a year) since the flows are proportional to X
    sim = realopt.appraise(loads(GRAPH.format(
        valuation="valuation: simulation\nsimulation: {paths: 20000, seed: 4, basis: 3, "
                  "upper_bound: {paths: 400, inner: 40}}", vol="")), progress=False)
    lat = realopt.appraise(loads(GRAPH.format(valuation="lattice: {steps_per_year: 100}",
                                              vol="  volatility: 0.35\n")))
    ub = sim.upper_bound
    assert len(sim.state_graph.states) > 4
    assert ub["value"] >= sim.expanded_npv - 3 * se(sim)
    assert ub["value"] + 3 * ub["standard_error"] >= lat.expanded_npv - 0.1   # tree error
    assert ub["value"] - lat.expanded_npv < 0.02 * sim.flexibility_value


@settings(max_examples=4, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(start=st.floats(30, 44), sigma=st.floats(0.15, 0.4), salvage=st.floats(34, 46))
def test_the_bound_never_falls_below_the_lattice_value(start, sigma, salvage):
    # an upper bound in expectation for every put (Andersen & Broadie 2004): within 3 standard
    # errors of the bound, never below the lattice's Bermudan value on the same dates
    a = realopt.appraise(put_project(paths=4000, dates="bermudan", start=start, sigma=sigma,
                                     salvage=salvage,
                                     extra=", upper_bound: {paths: 100, inner: 20}"),
                         progress=False)
    lat = realopt.appraise(put_project(valuation="lattice", dates="bermudan", lattice=500,
                                       start=start, sigma=sigma, salvage=salvage))
    ub = a.upper_bound
    assert ub["value"] + 3 * ub["standard_error"] + 0.005 >= lat.expanded_npv


# --- size ---------------------------------------------------------------------------------------

def test_check_and_the_guard_count_the_bound():
    p = put_project(paths=2000, dates="bermudan", extra=", upper_bound: {paths: 1000, inner: 100}")
    pl = realopt.simulation.plan(p)
    assert pl.bound_seconds > 0 and pl.bound_memory_bytes > 0
    assert pl.seconds_estimate > pl.bound_seconds
    huge = put_project(paths=2000, dates="bermudan",
                       extra=", upper_bound: {paths: 1000000, inner: 1000}")
    from realopt.simulation.result import guard_message

    msg = guard_message(huge, realopt.simulation.plan(huge), 8e9)
    assert msg and "simulation.upper_bound.paths=" in msg and "--allow-large" in msg
    smaller = int(msg.split("simulation.upper_bound.paths=")[1].split()[0])
    assert 10 <= smaller < 1000000
    assert guard_message(p, pl, 8e9) is None


def test_bound_with_taxed_flows_between_payment_dates():
    # found at merge: a taxed formula (simulated on the inner paths) at a decision date with no
    # payment (yearly flows, quarterly decisions) broke the control fit; the bound must run and
    # lie above the lower estimate within three standard errors (duality: Andersen & Broadie 2004)
    p = loads("""
project: {name: Taxed kiln}
valuation: simulation
simulation: {paths: 2000, seed: 3, steps_per_year: 4, basis: 2, upper_bound: {paths: 200, inner: 8}}
market: {risk_free_rate: 0.03, discount_rate: 0.08}
underlying:
  years: [1, 6]
  drivers:
    price: {process: gbm, start: 50, drift: 0.01, volatility: 0.3, risk_neutral: {risk_premium: 0.2}}
  cash_flow: 0.4 * price - 18
  tax_rate: 0.25
investment: {cost: 10}
rights:
  - {name: Shut the kiln, type: shutdown, cost: 0.5, restart_cost: 1.0, maintenance: 0.8,
     window: [0, 6]}
""")
    a = realopt.appraise(p)
    ub = a.upper_bound
    assert ub["value"] >= a.expanded_npv - 3 * (ub["standard_error"] + a.standard_error[
        "expanded_npv"])
    assert ub["value"] < a.expanded_npv + 0.2 * a.flexibility_value + 3 * ub["standard_error"]
