"""The valuation core against outside references (source named beside each check)."""
from __future__ import annotations

import math

import pytest

import realopt
from realopt.appraisal import expanded_npv
from realopt.errors import ValuationError
from realopt.model import (Defer, Investment, LatticeSpec, Market, Project, Schedule,
                           Underlying)
from references import (abandon, bsm, defer, expand, perpetual_invest, perpetual_put,
                        pv_project, quantlib_binomial)

ql = pytest.importorskip("QuantLib")


def _p(project):
    return realopt.appraise(project).lattice.probability


# --- QuantLib's binomial engine with its branch probability pinned to ours: same tree, 1e-8 ----
@pytest.mark.parametrize("q", [0.0, 0.03])
@pytest.mark.parametrize("steps_per_year", [50, 400])
def test_abandonment_is_american_put_quantlib(q, steps_per_year):
    # Source: QuantLib BinomialVanillaEngine("crr"), American put on V with strike = salvage.
    proj = pv_project(abandon(t=2.0, salvage=95.0), q=q, sigma=0.3, r=0.05,
                      steps_per_year=steps_per_year)
    a = realopt.appraise(proj)
    ref = quantlib_binomial("put", 100.0, 95.0, 0.05, q, 0.3, 2.0, a.lattice.steps,
                            pin_p=a.lattice.probability)
    assert a.flexibility_value == pytest.approx(ref, abs=1e-8)


@pytest.mark.parametrize("q", [0.0, 0.04])
def test_expansion_is_american_call_on_scaled_value_quantlib(q):
    # Source: QuantLib BinomialVanillaEngine("crr"): expanding by a for cost c is an American call
    # on a*V with strike c, i.e. a * call(V, c / a).
    proj = pv_project(expand(t=3.0, scale=0.4, cost=45.0), q=q, sigma=0.25, r=0.04,
                      steps_per_year=100)
    a = realopt.appraise(proj)
    ref = 0.4 * quantlib_binomial("call", 100.0, 45.0 / 0.4, 0.04, q, 0.25, 3.0,
                                  a.lattice.steps, pin_p=a.lattice.probability)
    assert a.flexibility_value == pytest.approx(ref, abs=1e-8)


def test_deferral_is_american_call_quantlib():
    # Source: QuantLib BinomialVanillaEngine("crr"): the right to invest I in V is an American
    # call; the expanded NPV is the call value.
    proj = pv_project(defer(t=4.0), q=0.05, sigma=0.35, r=0.03, cost=110.0, steps_per_year=100)
    a = realopt.appraise(proj)
    ref = quantlib_binomial("call", 100.0, 110.0, 0.03, 0.05, 0.35, 4.0, a.lattice.steps,
                            pin_p=a.lattice.probability)
    assert a.expanded_npv == pytest.approx(ref, abs=1e-8)
    assert a.static_npv == pytest.approx(-10.0, abs=1e-12)


def test_same_limit_as_unpinned_quantlib():
    # Source: QuantLib's own CRR tree (first-order probability, not pinned). Both trees converge
    # to the same American put value: the gap shrinks as steps grow and is tiny at 4,000 steps.
    gaps = []
    for n in (250, 1000, 4000):
        ours = expanded_npv(pv_project(abandon(t=1.0, salvage=100.0), steps_per_year=n,
                                       sigma=0.3, r=0.06, q=0.02))
        theirs = quantlib_binomial("put", 100.0, 100.0, 0.06, 0.02, 0.3, 1.0, n)
        gaps.append(abs(ours - theirs))
    assert gaps[2] < gaps[0]
    assert gaps[2] < 2e-4 * 10.0


# --- Black-Scholes-Merton for European rights -------------------------------------------------
@pytest.mark.parametrize("kind", ["put", "call"])
def test_european_rights_converge_to_bsm(kind):
    # Source: Black-Scholes-Merton with continuous payout yield (Merton 1973), closed form.
    q, r, sigma, t = 0.025, 0.045, 0.3, 2.0
    if kind == "put":
        right = abandon(t=t, salvage=105.0, exercise="european")
        ref = bsm("put", 100.0, 105.0, r, q, sigma, t)
    else:
        right = expand(t=t, scale=1.0, cost=105.0, exercise="european")
        ref = bsm("call", 100.0, 105.0, r, q, sigma, t)
    errs = []
    for spy in (100, 1000):       # 2,000 steps at the finer grid
        a = realopt.appraise(pv_project(right, q=q, r=r, sigma=sigma, steps_per_year=spy))
        errs.append(abs(a.flexibility_value / ref - 1.0))
    assert errs[1] < 1e-3
    assert errs[1] < errs[0]


# --- perpetual options: McDonald-Siegel and Merton -------------------------------------------
def test_long_deferral_approaches_mcdonald_siegel():
    # Source: McDonald & Siegel (1986); Dixit & Pindyck (1994) ch. 5: value A V^beta and
    # threshold V* = beta/(beta-1) I. A 100-year American window stands in for "perpetual".
    r, q, sigma, inv = 0.05, 0.04, 0.2, 100.0
    value, v_star = perpetual_invest(100.0, inv, r, q, sigma)
    a = realopt.appraise(pv_project(defer(t=100.0), q=q, r=r, sigma=sigma, cost=inv,
                                    steps_per_year=40))
    assert a.expanded_npv == pytest.approx(value, rel=0.01)
    year5 = [t for t in a.right("wait").thresholds if abs(t.year - 5.0) < 0.02 and not t.never]
    assert year5 and year5[0].lower == pytest.approx(v_star, rel=0.01)
    assert year5[0].upper is None


def test_long_abandonment_approaches_merton_perpetual_put():
    # Source: Merton (1973), perpetual American put: V* = gamma/(gamma-1) K,
    # value (K - V*) (V/V*)^gamma.
    r, q, sigma, k = 0.05, 0.03, 0.25, 100.0
    value, v_star = perpetual_put(150.0, k, r, q, sigma)
    a = realopt.appraise(pv_project(abandon(t=100.0, salvage=k), v0=150.0, q=q, r=r,
                                    sigma=sigma, steps_per_year=40))
    assert a.flexibility_value == pytest.approx(value, rel=0.01)
    year5 = [t for t in a.right("sell out").thresholds if abs(t.year - 5.0) < 0.02]
    assert year5[0].upper == pytest.approx(v_star, rel=0.01)
    assert year5[0].lower is None


# --- a hand-checkable one-step textbook case ----------------------------------------------------
def test_one_step_textbook_deferral():
    # Recalled from memory (Trigeorgis, Real Options, 1996, ch. 5 style example): V = 100,
    # u = 1.8, d = 0.6, r = 8% annual, so p = (1.08 - 0.6)/(1.8 - 0.6) = 0.4; investing costs 104
    # today or 104 * 1.08 = 112.32 in a year. By hand: waiting is worth
    # 0.4 * (180 - 112.32) / 1.08 = 25.0667; investing now is worth 100 - 104 = -4.
    proj = Project(
        name="one-step", market=Market(0.08, 0.20, "annual"),
        underlying=Underlying(present_value=100.0),
        investment=Investment(((0.0, 104.0),)),
        rights=(Defer(name="wait", window=(0.0, 1.0),
                      cost=Schedule.from_points({0: 104.0, 1: 112.32})),),
        lattice=LatticeSpec(up=1.8, down=0.6, step_years=1.0))
    a = realopt.appraise(proj)
    assert a.lattice.probability == pytest.approx(0.4, abs=1e-12)
    assert a.static_npv == pytest.approx(-4.0, abs=1e-12)
    assert a.expanded_npv == pytest.approx(0.4 * 67.68 / 1.08, abs=1e-9)
    assert a.flexibility_value == pytest.approx(25.0666667 + 4.0, abs=1e-6)
    assert a.decision_today.startswith("wait")
    # the threshold at year 1 is the cost itself (gain linear in V at the last date)
    last = [t for t in a.right("wait").thresholds if t.year == 1.0][0]
    assert last.lower == pytest.approx(112.32, abs=1e-9)


def test_one_step_textbook_abandonment():
    # Hand computation on the same one-step tree (u = 1.8, d = 0.6, r = 8%, p = 0.4): selling
    # out for 90 in a year pays max(90 - 60, 0) = 30 in the down state; worth 0.6 * 30 / 1.08.
    proj = Project(
        name="one-step", market=Market(0.08, 0.20, "annual"),
        underlying=Underlying(present_value=100.0),
        investment=Investment(((0.0, 104.0),)),
        rights=(realopt.model.Abandon(name="sell", window=(1.0, 1.0),
                                      salvage=Schedule.constant(90.0)),),
        lattice=LatticeSpec(up=1.8, down=0.6, step_years=1.0))
    a = realopt.appraise(proj)
    assert a.flexibility_value == pytest.approx(0.6 * 30.0 / 1.08, abs=1e-9)


# --- the DCF value against numpy-financial -------------------------------------------------
def test_present_value_matches_numpy_financial():
    # Source: numpy-financial npv (values[0] at t = 0, then yearly).
    npf = pytest.importorskip("numpy_financial")
    flows = {1: 6.0, 2: 9.5, 3: 11.0, 4: 12.5}
    proj = Project(
        name="dcf", market=Market(0.035, 0.09, "annual"),
        underlying=Underlying(cash_flows=tuple(flows.items()), terminal_value=80.0,
                              volatility=0.28),
        investment=Investment(((0.0, 60.0), (1.0, 40.0))),
        rights=(abandon(t=4.0, salvage=50.0),))
    a = realopt.appraise(proj)
    ref = npf.npv(0.09, [0.0, 6.0, 9.5, 11.0, 12.5 + 80.0])
    assert a.present_value == pytest.approx(ref, rel=1e-12)
    assert a.investment_pv == pytest.approx(npf.npv(0.035, [60.0, 40.0]), rel=1e-12)


def test_cash_flow_form_put_parity_with_european_bsm_on_ex_flow_value():
    # Closed form (Black-Scholes-Merton): with proportional payouts, V at a date T after the
    # flows before it is lognormal with forward V0 * prod(1 - delta) * exp(rT), so a European
    # abandonment at T is a BSM put on V0 * prod(1 - delta) with no yield.
    flows = ((1.0, 8.0), (2.0, 8.0), (3.0, 8.0), (4.0, 8.0))
    proj = Project(
        name="flows", market=Market(0.04, 0.09, "continuous"),
        underlying=Underlying(cash_flows=flows, terminal_value=90.0, volatility=0.25),
        investment=Investment(((0.0, 80.0),)),
        rights=(realopt.model.Abandon(name="sell", window=(0.0, 3.0), exercise="european",
                                      salvage=Schedule.constant(70.0)),),
        lattice=LatticeSpec(steps_per_year=600))
    a = realopt.appraise(proj)
    # V0 * prod(1 - delta_k, k <= 3) = W_4 * exp(-4 k) = (8 + 90) exp(-0.09 * 4): the PV of the
    # flows after year 3, which the salvage right trades for 70 at year 3.
    s0 = (8.0 + 90.0) * math.exp(-0.09 * 4.0)
    ref = bsm("put", s0, 70.0, 0.04, 0.0, 0.25, 3.0)
    assert a.flexibility_value == pytest.approx(ref, rel=1e-3)


def test_probability_outside_unit_interval_is_refused():
    # p = (g - d)/(u - d) with g = 1.25 > u = 1.2: the tree admits arbitrage (common practice).
    proj = Project(
        name="bad tree", market=Market(0.25, 0.3, "annual"),
        underlying=Underlying(present_value=100.0),
        investment=Investment(((0.0, 90.0),)), rights=(abandon(t=2.0),),
        lattice=LatticeSpec(up=1.2, down=0.9, step_years=1.0))
    with pytest.raises(ValuationError) as err:
        realopt.appraise(proj)
    msg = str(err.value)
    assert "g = 1.25" in msg and "u = 1.2" in msg and "d = 0.9" in msg and "Fix" in msg


# --- flow_timing: spread (flows accrue evenly over the period before their date) -------------
def _spread_project(right=None, spy=12, compounding="annual"):
    flows = tuple((float(y), 5.0 + y) for y in range(1, 9))
    return Project(
        name="spread", market=Market(0.03, 0.095, compounding),
        underlying=Underlying(cash_flows=flows, terminal_value=30.0, volatility=0.3,
                              flow_timing="spread"),
        investment=Investment(((0.0, 50.0),)), rights=(right,) if right else (),
        lattice=LatticeSpec(steps_per_year=spy))


def test_spread_present_value_is_the_limit_of_numpy_financial_sub_period_npv():
    # Source: numpy-financial npv on m equal sub-period flows per year at the equivalent
    # sub-period rate; as m grows it tends to the continuous-accrual value we compute in closed
    # form (the gap shrinks like 1/m).
    npf = pytest.importorskip("numpy_financial")
    v0 = realopt.appraise(_spread_project(abandon(t=4.0, salvage=10.0))).present_value
    gaps = []
    for m in (12, 1200):
        vals = [0.0]
        for y in range(1, 9):
            vals += [(5.0 + y) / m] * m
        vals[-1] += 30.0
        gaps.append(abs(npf.npv(1.095 ** (1.0 / m) - 1.0, vals) / v0 - 1.0))
    assert gaps[1] < 1e-4 and gaps[1] < gaps[0] / 50


def test_spread_european_abandonment_is_bsm_put_on_remaining_value():
    # Black-Scholes-Merton closed form: with the accrued flows paid out step by step, V after
    # year 3 is lognormal with today's value of the flows after year 3 as its spot (no yield).
    right = realopt.model.Abandon(name="sell", window=(0.0, 3.0), exercise="european",
                                  salvage=Schedule.constant(45.0))
    p = _spread_project(right, spy=600, compounding="continuous")
    a = realopt.appraise(p)
    from realopt.underlying import resolve
    res = resolve(p)
    s0 = float(res.value_after(3.0)) * math.exp(-0.095 * 3.0)
    ref = bsm("put", s0, 45.0, 0.03, 0.0, 0.3, 3.0)
    assert a.flexibility_value == pytest.approx(ref, rel=1e-3)


def test_spread_lattice_without_rights_returns_present_value():
    # The payouts keep the tree a martingale at the risk-free rate (common practice for a
    # payout-protected asset): a right that is never used leaves exactly the static NPV.
    p = _spread_project(realopt.model.Abandon(name="never", window=(0.0, 5.0),
                                              salvage=Schedule.constant(0.0)), spy=24)
    a = realopt.appraise(p)
    assert a.expanded_npv == pytest.approx(a.static_npv, abs=1e-9)
