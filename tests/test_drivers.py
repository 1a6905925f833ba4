"""Cash flows from drivers and the project volatility, checked against analytic facts.

Sources, named beside each check:
* lognormal facts of geometric Brownian motion and the Ornstein-Uhlenbeck conditional law (standard
  results, e.g. Dixit & Pindyck 1994, ch. 3; derived again where used);
* the year-one definition of project volatility, V1 = CF1 + E[later flows | year one], and the
  warning that a path's own realised future overstates it (Smith 2005; Brandao, Dyer & Hahn 2005);
* numpy-financial's ``npv`` for present values;
* Gauss-Hermite quadrature (numpy.polynomial.hermite_e) for std(ln V1) when V1 is a known function
  of a normal year-one log value.
"""
from __future__ import annotations

import math
import sys

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from realopt import drivers
from realopt.drivers import (DriverResult, _run, correlation_matrix, history_volatility,
                             simulate_underlying)
from realopt.errors import ValuationError
from realopt.forecast import ForecastError
from realopt.formula import FormulaError
from realopt.model import Driver, DriverModel, Market, Schedule, VolatilityEstimate

MARKET = Market(risk_free_rate=0.03, discount_rate=0.09, compounding="annual")


def est(paths=20000, seed=7):
    return VolatilityEstimate(method="simulation", paths=paths, seed=seed)


def gbm(name="price", start=50.0, drift=0.02, vol=0.25):
    return Driver(name, "gbm", start=start, drift=drift, volatility=vol)


def ou(name="cost", start=30.0, long_run=32.0, speed=0.4, vol=0.15):
    return Driver(name, "mean_reverting", start=start, long_run=long_run, speed=speed,
                  volatility=vol)


def quadrature_sd(v1, mean, sd, nodes=200, cut=None):
    """std of ln v1(exp(Y)) for Y ~ N(mean, sd^2): Gauss-Hermite quadrature, or with ``cut``
    Gauss-Legendre over z in [-cut, cut] against the normal density (renormalised)."""
    if cut is None:
        z, w = np.polynomial.hermite_e.hermegauss(nodes)
    else:
        x, w = np.polynomial.legendre.leggauss(2 * nodes)
        z = cut * x
        w = w * np.exp(-z * z / 2)
    w = w / w.sum()
    values = v1(np.exp(mean + sd * z))
    assert (values > 0).all(), "reference V1 must stay positive over the quadrature nodes"
    lv = np.log(values)
    m = float(np.sum(w * lv))
    return math.sqrt(float(np.sum(w * (lv - m) ** 2)))


def norm_cdf(x):
    return 0.5 * (1.0 + np.vectorize(math.erf)(np.asarray(x) / math.sqrt(2.0)))


def ou_conditional(x1, long_run, speed, vol, tau):
    """OU in logs (derived here): ln X_{1+tau} | X_1 ~ N(ln L + (ln X_1 - ln L) e^{-k tau},
    vol^2 (1 - e^{-2 k tau}) / (2k)); returns the conditional lognormal mean."""
    lnl = math.log(long_run)
    m = lnl + (np.log(x1) - lnl) * math.exp(-speed * tau)
    v = vol ** 2 * (1 - math.exp(-2 * speed * tau)) / (2 * speed)
    return np.exp(m + v / 2)


# --- one GBM driver -----------------------------------------------------------------------------

def assert_tower(r, growth=1.09):
    """Law of iterated expectations: E[V1] = V0 G(1). Tolerance 4 standard errors of the mean of
    V1, about V0 sigma / sqrt(n) (plus the error of a simulated V0)."""
    se = r.present_value * growth * r.volatility / math.sqrt(r.paths)
    se = math.hypot(se, growth * r.present_value_stderr)
    assert abs(r.year_one_mean - growth * r.present_value) < 4 * se


def test_gbm_linear_cash_flow_has_the_driver_volatility():
    # Analytic (lognormal fact): CF_t = 3 X_t gives V1 = c X_1, so ln(V1/V0) = ln X_1 + const and
    # sigma_project = sigma_driver; tolerance 3 standard errors of the estimate.
    model = DriverModel(years=(1, 15), drivers=(gbm(vol=0.25),), cash_flow="3 * price")
    r = simulate_underlying(model, est(), MARKET)
    assert isinstance(r, DriverResult)
    assert r.volatility_stderr > 0
    assert abs(r.volatility - 0.25) < 3 * r.volatility_stderr
    # Normal ln V1: the fourth-moment standard error is close to sigma / sqrt(2n) (normal theory).
    assert r.volatility_stderr == pytest.approx(r.volatility / math.sqrt(2 * 20000), rel=0.05)
    assert "analytic" in r.method and "20000 paths" in r.method and "seed 7" in r.method
    assert_tower(r)


def test_gbm_estimate_is_exactly_the_sample_std_of_the_year_one_draws():
    # The documented stream: year one's normals are Generator(PCG64(seed)).standard_normal((n, d)).
    # For a linear GBM flow, sigma is vol * std(z) of exactly those draws (ddof=1).
    model = DriverModel(years=(1, 10), drivers=(gbm(vol=0.3),), cash_flow="price - 0 * price")
    r = simulate_underlying(model, est(5000, seed=11), MARKET)
    z = np.random.Generator(np.random.PCG64(11)).standard_normal((5000, 1))[:, 0]
    assert r.volatility == pytest.approx(0.3 * np.std(z, ddof=1), rel=1e-12)


def test_expected_flows_and_present_value_against_numpy_financial():
    npf = pytest.importorskip("numpy_financial")
    # E[X_t] = X_0 e^{drift t} (lognormal mean); CF_t = 2 X_t - 10; PV with numpy-financial's npv
    # (values at t = 0, 1, 2, ...; our first flow is at t = 1).
    model = DriverModel(years=(1, 8), drivers=(gbm(start=40.0, drift=0.03),),
                        cash_flow="2 * price - 10")
    r = simulate_underlying(model, None, MARKET)
    want = [2 * 40.0 * math.exp(0.03 * t) - 10 for t in range(1, 9)]
    assert [t for t, _ in r.cash_flows] == list(range(1, 9))
    np.testing.assert_allclose([c for _, c in r.cash_flows], want, rtol=1e-12)
    assert r.present_value == pytest.approx(npf.npv(0.09, [0.0] + want), rel=1e-12)
    assert r.volatility is None and r.volatility_stderr is None


def test_continuous_compounding_discounts_with_exp():
    # Closed form: PV = sum CF_t e^{-r t} for continuous compounding (docs/design.md convention).
    model = DriverModel(years=(1, 5), drivers=(Driver("v", "schedule",
                                                     schedule=Schedule.constant(10.0)),),
                        cash_flow="v")
    r = simulate_underlying(model, None, Market(0.03, 0.09, "continuous"))
    assert r.present_value == pytest.approx(sum(10 * math.exp(-0.09 * t) for t in range(1, 6)))


def test_flows_starting_later_still_carry_the_driver_volatility():
    # Same lognormal fact with no year-one flow: V1 = E[later flows | X_1] = c X_1.
    model = DriverModel(years=(3, 12), drivers=(gbm(vol=0.2),), cash_flow="price")
    r = simulate_underlying(model, est(), MARKET)
    assert abs(r.volatility - 0.2) < 3 * r.volatility_stderr
    assert r.cash_flows[0][0] == 3.0


# --- mean reversion -----------------------------------------------------------------------------

def test_mean_reverting_one_year_volatility_is_the_ou_conditional_sd():
    # Analytic, derived here: for d ln X = k (ln L - ln X) dt + s dW, Var(ln X_1 | X_0) =
    # s^2 (1 - e^{-2k}) / (2k). With a single cash-flow year V1 = CF1 = X_1, so sigma is that sd.
    k, s = 0.8, 0.3
    model = DriverModel(years=(1, 1), drivers=(ou(speed=k, vol=s),), cash_flow="cost")
    r = simulate_underlying(model, est(), MARKET)
    want = s * math.sqrt((1 - math.exp(-2 * k)) / (2 * k))
    assert abs(r.volatility - want) < 3 * r.volatility_stderr
    assert want < s  # mean reversion damps a year's spread (common practice)


def test_mean_reverting_project_volatility_matches_quadrature():
    # Analytic, derived here: V1(x) = x + sum_{t>=2} E[X_t | X_1 = x] / 1.09^(t-1) with the OU
    # conditional lognormal mean, ln X_1 ~ N(ln L + (ln X_0 - ln L) e^{-k}, s^2 (1-e^{-2k})/(2k));
    # std(ln V1) by Gauss-Hermite quadrature.
    x0, lr, k, s, T = 30.0, 32.0, 0.4, 0.15, 15
    model = DriverModel(years=(1, T), drivers=(ou(start=x0, long_run=lr, speed=k, vol=s),),
                        cash_flow="cost")
    r = simulate_underlying(model, est(), MARKET)

    def v1(x):
        return x + sum(ou_conditional(x, lr, k, s, t - 1) / 1.09 ** (t - 1)
                       for t in range(2, T + 1))

    m1 = math.log(lr) + (math.log(x0) - math.log(lr)) * math.exp(-k)
    sd1 = s * math.sqrt((1 - math.exp(-2 * k)) / (2 * k))
    want = quadrature_sd(v1, m1, sd1)
    assert abs(r.volatility - want) < 3 * r.volatility_stderr
    assert r.volatility < 0.5 * s   # far below the driver's own volatility
    assert_tower(r)
    # Expected flows: the OU lognormal mean exp(m_t + v_t / 2), m_t and v_t from X_0 (as above).
    for t, cf in r.cash_flows:
        m = math.log(lr) + (math.log(x0) - math.log(lr)) * math.exp(-k * t)
        v = s * s * (1 - math.exp(-2 * k * t)) / (2 * k)
        assert cf == pytest.approx(math.exp(m + v / 2), rel=1e-12)


def test_naive_realised_path_estimate_overstates_volatility_for_mean_reversion():
    # Smith (2005); Brandao, Dyer & Hahn (2005): using a path's own realised later flows instead of
    # their conditional expectation adds the later years' noise. Naive estimate computed here with
    # an independent exact OU simulation.
    x0, lr, k, s, T = 30.0, 32.0, 0.4, 0.15, 15
    model = DriverModel(years=(1, T), drivers=(ou(start=x0, long_run=lr, speed=k, vol=s),),
                        cash_flow="cost")
    ours = simulate_underlying(model, est(), MARKET).volatility
    rng = np.random.default_rng(2024)
    n = 20000
    lnl, b = math.log(lr), math.exp(-k)
    step_sd = s * math.sqrt((1 - math.exp(-2 * k)) / (2 * k))
    y = np.full(n, math.log(x0))
    v1 = np.zeros(n)
    for t in range(1, T + 1):
        y = lnl + (y - lnl) * b + step_sd * rng.standard_normal(n)
        v1 += np.exp(y) / 1.09 ** (t - 1)
    naive = float(np.std(np.log(v1), ddof=1))
    assert naive > 1.5 * ours


# --- correlation --------------------------------------------------------------------------------

def test_perfectly_hedged_pair_has_near_zero_volatility():
    # Analytic: with correlation 1, equal volatility and drift, 2a - b cancels exactly when
    # b_0 = 2 a_0 (b_t = 2 a_t on every path), so V1 is the same on every path.
    model = DriverModel(years=(1, 10), drivers=(gbm("a", start=10.0, vol=0.3),
                                                gbm("b", start=20.0, vol=0.3)),
                        correlation=(("a", "b", 1.0),), cash_flow="2 * a - b + 5")
    r = simulate_underlying(model, est(), MARKET)
    assert r.volatility < 1e-9
    # ... and the same pair uncorrelated is far from hedged (sanity check that the test can fail).
    loose = DriverModel(years=(1, 10), drivers=model.drivers, cash_flow=model.cash_flow)
    with pytest.raises(ValuationError, match="zero or negative"):
        simulate_underlying(loose, est(), MARKET)


def test_correlated_product_volatility_regression_route():
    # Analytic, derived here: for correlated GBMs p, q, E[p_t q_t | year one] = p_1 q_1
    # exp((mu_p + mu_q + rho s_p s_q)(t - 1)), so V1 is proportional to p_1 q_1 and
    # sigma = sqrt(s_p^2 + s_q^2 + 2 rho s_p s_q). The product is not affine: regression route.
    sp, sq, rho = 0.3, 0.2, -0.4
    model = DriverModel(years=(1, 12), drivers=(gbm("p", 20.0, 0.02, sp), gbm("q", 5.0, 0.0, sq)),
                        correlation=(("p", "q", rho),), cash_flow="p * q")
    r = simulate_underlying(model, est(seed=3), MARKET)
    assert r.conditional == "regression" and "control variates" in r.method
    want = math.sqrt(sp ** 2 + sq ** 2 + 2 * rho * sp * sq)
    assert abs(r.volatility - want) < 3 * r.volatility_stderr
    assert_tower(r)


def test_psd_check_names_the_eigenvalue_and_the_fix_works():
    # A correlation matrix must be positive semi-definite (common practice); [[1,.9,.9],[.9,1,-.9],
    # [.9,-.9,1]] is not. The suggested factor makes it so (eigenvalues of (1-a) I + a R).
    drv = (gbm("a"), gbm("b"), gbm("c"))
    bad = (("a", "b", 0.9), ("a", "c", 0.9), ("b", "c", -0.9))
    model = DriverModel(years=(1, 5), drivers=drv, correlation=bad, cash_flow="a + b + c")
    with pytest.raises(ValuationError) as err:
        simulate_underlying(model, est(), MARKET)
    text = str(err.value)
    lam = np.linalg.eigvalsh(np.array([[1, .9, .9], [.9, 1, -.9], [.9, -.9, 1]]))[0]
    assert f"smallest eigenvalue {lam:.4g}" in text and "positive semi-definite" in text
    factor = float(text.split("multiplying every correlation by ")[1].split()[0])
    fixed = DriverModel(years=(1, 5), drivers=drv, cash_flow="a + b + c",
                        correlation=tuple((x, y, r * factor * 0.999) for x, y, r in bad))
    names, m = correlation_matrix(fixed)
    assert names == ("a", "b", "c") and np.linalg.eigvalsh(m)[0] >= -1e-12


@pytest.mark.parametrize("corr, words", [
    ((("price", "volume", 0.5),), "'volume', a schedule"),
    ((("price", "nope", 0.5),), "'nope', which is not a driver"),
    ((("price", "cost", 1.5),), r"correlation\[0\]\[2\]: found 1\.5; expected a correlation from "
                               "-1 to 1"),
    ((("price", "cost", 0.5), ("cost", "price", 0.4)), "given twice"),
])
def test_correlation_entries_are_checked(corr, words):
    model = DriverModel(years=(1, 5), drivers=(gbm(), ou(), Driver("volume", "schedule",
                                                                  schedule=Schedule.constant(1))),
                        correlation=corr, cash_flow="price - cost")
    with pytest.raises(ValuationError, match=words):
        simulate_underlying(model, est(), MARKET)


# --- nonlinear formulas: regression route against closed forms ---------------------------------

def _call_v1(x, k, mu, s, T, rate, tax=0.0):
    """E[(X_t - K)^+ | X_1 = x] = x e^{mu tau} N(d1) - K N(d2), d1 = (ln(x/K) + (mu + s^2/2) tau)
    / (s sqrt(tau)) (lognormal partial expectation, the Black-Scholes formula with the real-world
    drift and no discounting; derived here). With tax on positive flow, CF = (X - K) - tax (X - K)^+
    for the flow X - K."""
    v = np.maximum(x - k, 0.0) if tax == 0 else (x - k) - tax * np.maximum(x - k, 0.0)
    for t in range(2, T + 1):
        tau = t - 1
        d1 = (np.log(x / k) + (mu + s * s / 2) * tau) / (s * math.sqrt(tau))
        call = x * math.exp(mu * tau) * norm_cdf(d1) - k * norm_cdf(d1 - s * math.sqrt(tau))
        flow = call if tax == 0 else (x * math.exp(mu * tau) - k) - tax * call
        v = v + flow / (1 + rate) ** tau
    return v


@pytest.mark.parametrize("seed", [1, 2])
def test_option_like_flow_matches_partial_expectation(seed):
    x0, mu, s, k, T = 50.0, 0.03, 0.25, 30.0, 10
    model = DriverModel(years=(1, T), drivers=(gbm("price", x0, mu, s),),
                        cash_flow="max(price - 30, 0)")
    r = simulate_underlying(model, est(seed=seed), MARKET)
    want = quadrature_sd(lambda x: _call_v1(x, k, mu, s, T, 0.09), math.log(x0) + mu - s * s / 2, s)
    assert abs(r.volatility - want) < 3 * r.volatility_stderr


def test_tax_route_volatility_matches_partial_expectation():
    # Same derivation with tax on the positive part of CF = X - 10. V1 < 0 only for year-one
    # prices below about 6 (z < -10), so the reference integrates z over [-6, 6] (Gauss-Legendre
    # against the normal density; the mass left out is 2e-9).
    x0, mu, s, k, T, tax = 50.0, 0.02, 0.2, 10.0, 12, 0.3
    model = DriverModel(years=(1, T), drivers=(gbm("price", x0, mu, s),), cash_flow="price - 10",
                        tax_rate=tax)
    r = simulate_underlying(model, est(seed=5), MARKET)
    assert r.conditional == "regression"
    want = quadrature_sd(lambda x: _call_v1(x, k, mu, s, T, 0.09, tax),
                         math.log(x0) + mu - s * s / 2, s, cut=6.0)
    assert abs(r.volatility - want) < 3 * r.volatility_stderr
    assert_tower(r)


def test_expected_flows_after_tax_on_positive_part_match_closed_form():
    npf = pytest.importorskip("numpy_financial")
    # Analytic, derived here: E[CF_t] = E[X_t] - K - tax E[(X_t - K)^+], the last term the
    # lognormal partial expectation X_0 e^{mu t} N(d1) - K N(d2); PV by numpy-financial's npv.
    # A tax on negative flows too would give 0.6 (E[X_t] - K): far outside the tolerance.
    x0, mu, s, k, tax = 50.0, 0.03, 0.3, 50.0, 0.4
    model = DriverModel(years=(1, 6), drivers=(gbm("price", x0, mu, s),), cash_flow="price - 50",
                        tax_rate=tax)
    r = simulate_underlying(model, None, MARKET)
    t = np.arange(1, 7)
    fwd = x0 * np.exp(mu * t)
    d1 = (np.log(x0 / k) + (mu + s * s / 2) * t) / (s * np.sqrt(t))
    call = fwd * norm_cdf(d1) - k * norm_cdf(d1 - s * np.sqrt(t))
    want = fwd - k - tax * call
    pv = npf.npv(0.09, np.r_[0.0, want])
    assert abs(r.present_value - pv) < 4 * r.present_value_stderr
    assert abs(npf.npv(0.09, np.r_[0.0, (1 - tax) * (fwd - k)]) - pv) > 20 * r.present_value_stderr
    assert "simulation, 20000 paths, seed 1" in r.method


def test_tax_is_taken_from_positive_flows_only():
    # Definition (docs/file-format.md): tax_rate applies to positive cash flow; losses are not refunded.
    sched = Driver("margin", "schedule", schedule=Schedule.from_points({1: -10.0, 3: 10.0}))
    model = DriverModel(years=(1, 3), drivers=(sched,), cash_flow="margin", tax_rate=0.25)
    r = simulate_underlying(model, None, MARKET)
    assert [c for _, c in r.cash_flows] == [-10.0, 0.0, 7.5]


def test_regression_route_reproduces_the_analytic_route_for_affine_flows():
    # Exact by construction: for an affine formula the regression basis holds the conditional
    # expectation itself, so forcing the regression gives the analytic figure on the same draws.
    model = DriverModel(years=(1, 15), drivers=(gbm(start=80, vol=0.2), ou(),
                                                Driver("volume", "schedule",
                                                       schedule=Schedule.from_points(
                                                           {1: 800, 5: 1000}))),
                        correlation=(("price", "cost", 0.6),),
                        cash_flow="(price - cost) * volume / 1000 - 4.5")
    a = _run(model, est(), MARKET)
    b = _run(model, est(), MARKET, conditional="regression", mean_route="simulation")
    assert a.conditional == "analytic" and b.conditional == "regression"
    assert b.volatility == pytest.approx(a.volatility, rel=1e-6)
    # Simulated expected flows agree with the analytic ones within 4 standard errors.
    assert abs(b.present_value - a.present_value) < 4 * b.present_value_stderr


# --- reproducibility ----------------------------------------------------------------------------

def test_same_seed_same_numbers_other_seed_other_numbers():
    model = DriverModel(years=(1, 10), drivers=(gbm(start=80), ou()),
                        cash_flow="max(price - cost, 5)", correlation=(("price", "cost", 0.5),),
                        tax_rate=0.2)
    a = simulate_underlying(model, est(seed=9), MARKET)
    b = simulate_underlying(model, est(seed=9), MARKET)
    c = simulate_underlying(model, est(seed=10), MARKET)
    assert a == b
    assert a.volatility != c.volatility and a.present_value != c.present_value


def test_chunk_size_does_not_change_the_numbers(monkeypatch):
    model = DriverModel(years=(1, 10), drivers=(gbm(start=80), ou()),
                        cash_flow="max(price - cost, 5)", correlation=(("price", "cost", 0.5),))
    whole = simulate_underlying(model, est(6000), MARKET)
    monkeypatch.setattr(drivers, "CHUNK_BYTES", 1)   # 1,024-path chunks (the floor)
    pieces = simulate_underlying(model, est(6000), MARKET)
    assert pieces.volatility == pytest.approx(whole.volatility, rel=1e-12)
    assert pieces.present_value == pytest.approx(whole.present_value, rel=1e-12)


@settings(max_examples=25, deadline=None)
@given(st.floats(0.05, 0.6), st.floats(-0.05, 0.1), st.floats(0.0, 0.2), st.floats(1.0, 500.0),
       st.floats(0.1, 10.0))
def test_volatility_ignores_scale_drift_and_rate_for_a_linear_gbm_flow(vol, drift, rate, start,
                                                                       scale):
    # Invariant (lognormal fact): V1 = c X_1 whatever the drift, discount rate, start or scale, so
    # sigma depends only on vol and the year-one draws; V0 is linear in the scale.
    m = Market(0.03, rate)
    base = DriverModel(years=(1, 6), drivers=(gbm(start=start, drift=drift, vol=vol),),
                       cash_flow="price")
    scaled = DriverModel(years=(1, 6), drivers=base.drivers, cash_flow=f"{scale!r} * price")
    a = simulate_underlying(base, est(500, seed=4), m)
    b = simulate_underlying(scaled, est(500, seed=4), m)
    z = np.random.Generator(np.random.PCG64(4)).standard_normal((500, 1))[:, 0]
    assert a.volatility == pytest.approx(vol * np.std(z, ddof=1), rel=1e-9)
    assert b.volatility == pytest.approx(a.volatility, rel=1e-9)
    assert b.present_value == pytest.approx(scale * a.present_value, rel=1e-12)


# --- clear errors -------------------------------------------------------------------------------

def test_negative_year_one_value_is_refused_with_counts():
    model = DriverModel(years=(1, 10), drivers=(gbm(start=50, vol=0.4), ou(start=45, long_run=45)),
                        cash_flow="price - cost")
    with pytest.raises(ValuationError) as err:
        simulate_underlying(model, est(), MARKET)
    text = str(err.value)
    assert "zero or negative on" in text and "of 20,000 simulated paths" in text
    assert "ln(V1/V0) is undefined" in text and "Fix:" in text


def test_non_positive_present_value_is_refused():
    model = DriverModel(years=(1, 5), drivers=(gbm(),), cash_flow="0.01 * price - 10")
    with pytest.raises(ValuationError, match="V0 at the discount rate"):
        simulate_underlying(model, est(), MARKET)


def test_certain_project_has_no_volatility_to_estimate():
    model = DriverModel(years=(1, 5), drivers=(gbm(vol=0.0), Driver("fee", "schedule",
                                                                  schedule=Schedule.constant(2))),
                        cash_flow="price + fee")
    with pytest.raises(ValuationError, match="no driver in the cash-flow formula is uncertain"):
        simulate_underlying(model, est(), MARKET)
    # Without an estimate the flows are simply the formula's.
    r = simulate_underlying(model, None, MARKET)
    assert r.cash_flows[0][1] == pytest.approx(50 * math.exp(0.02) + 2)


def test_unknown_name_and_division_by_zero():
    model = DriverModel(years=(1, 5), drivers=(gbm(),), cash_flow="price - unit_cost")
    with pytest.raises(FormulaError, match="'unit_cost', which is not defined"):
        simulate_underlying(model, est(), MARKET)
    zero = Driver("z", "schedule", schedule=Schedule.constant(0.0))
    model = DriverModel(years=(1, 5), drivers=(gbm(), zero), cash_flow="price / z")
    with pytest.raises(ValuationError, match="non-finite value"):
        simulate_underlying(model, est(), MARKET)


@pytest.mark.parametrize("driver, words", [
    # the model's rules (realopt.validate): the loader's wording, keyed as in a file
    (Driver("price", "gbm", start=-1.0, volatility=0.2),
     r"underlying\.drivers\.price\.start: found -1; expected today's value, above 0"),
    (Driver("price", "gbm", start=1.0, volatility=-0.2),
     r"underlying\.drivers\.price\.volatility: found -0\.2; expected the yearly volatility"),
    (Driver("price", "mean_reverting", start=1.0, long_run=0.0, speed=1, volatility=0.2),
     r"underlying\.drivers\.price\.long_run: found 0; expected the long-run median"),
    (Driver("price", "brownian", start=1.0),
     r'process: found the text "brownian"; expected the driver\'s process: one of gbm'),
])
def test_bad_driver_parameters_are_named(driver, words):
    model = DriverModel(years=(1, 5), drivers=(driver,), cash_flow="price")
    with pytest.raises(ValuationError, match=words):
        simulate_underlying(model, est(), MARKET)


def test_too_few_paths_and_bad_years():
    model = DriverModel(years=(1, 5), drivers=(gbm(),), cash_flow="price")
    with pytest.raises(ValuationError, match="paths: found 10; expected a number of simulation "
                       "paths from 100"):
        simulate_underlying(model, est(paths=10), MARKET)
    with pytest.raises(ValuationError, match=r"underlying\.years\[0\]: found 0; expected the "
                       "first cash-flow year, 1 or later"):
        simulate_underlying(DriverModel(years=(0, 5), drivers=(gbm(),), cash_flow="price"),
                            est(), MARKET)


# --- progress bar -------------------------------------------------------------------------------

def test_no_progress_output_when_stderr_is_not_a_terminal(capsys, monkeypatch):
    monkeypatch.setattr(drivers, "PROGRESS_AFTER", 0.0)
    model = DriverModel(years=(1, 5), drivers=(gbm(),), cash_flow="max(price, 1)")
    simulate_underlying(model, est(3000), MARKET)
    out, err = capsys.readouterr()
    assert out == "" and err == ""


def test_progress_bar_goes_to_a_terminal_stderr_only(monkeypatch, capsys):
    class FakeTTY:
        def __init__(self):
            self.text = ""

        def isatty(self):
            return True

        def write(self, s):
            self.text += s

        def flush(self):
            pass

    fake = FakeTTY()
    monkeypatch.setattr(sys, "stderr", fake)
    monkeypatch.setattr(drivers, "PROGRESS_AFTER", 0.0)
    monkeypatch.setattr(drivers, "CHUNK_BYTES", 1)
    model = DriverModel(years=(1, 5), drivers=(gbm(),), cash_flow="max(price, 1)")
    simulate_underlying(model, est(3000), MARKET)
    assert "simulating drivers" in fake.text and "3,000/3,000 paths" in fake.text
    assert fake.text.endswith("\n")
    assert capsys.readouterr().out == ""


# --- volatility from a price history ------------------------------------------------------------

def test_history_volatility_recovers_a_known_sigma(tmp_path):
    # Definition (common practice): annualised stdev of log returns; data simulated here from a
    # GBM with sigma = 0.3 sampled monthly, so the estimate must fall within 3 standard errors and
    # the error be near sigma / sqrt(2 n) (normal returns).
    rng = np.random.default_rng(5)
    n, sigma, ppy = 600, 0.3, 12
    logp = np.log(40.0) + np.cumsum(np.r_[0.0, 0.01 + sigma / math.sqrt(ppy)
                                          * rng.standard_normal(n)])
    path = tmp_path / "proxy.csv"
    path.write_text("month,close\n" + "".join(f"{i},{math.exp(v)!r}\n" for i, v in enumerate(logp)))
    est_sigma, se = history_volatility(path, "close", ppy)
    assert abs(est_sigma - sigma) < 3 * se
    assert se == pytest.approx(est_sigma / math.sqrt(2 * n), rel=0.15)


@pytest.mark.parametrize("text, ppy, err, words", [
    ("close\n10\n11\n", 12, ValuationError, "at least 3"),
    ("close\n10\n10\n10\n", 12, ValuationError, "never change"),
    ("close\n10\n-1\n12\n", 12, ForecastError, "row 3, column 'close': found -1"),
    ("close\n10\nabc\n12\n", 12, ForecastError, "found 'abc'"),
    ("price\n10\n11\n12\n", 12, ForecastError, "no price column 'close'"),
    ("close\n10\n11\n12\n", 0, ValuationError, "periods_per_year must be above 0"),
])
def test_history_volatility_errors(tmp_path, text, ppy, err, words):
    path = tmp_path / "px.csv"
    path.write_text(text)
    with pytest.raises(err, match=words):
        history_volatility(path, "close", ppy)


# --- the demo project ---------------------------------------------------------------------------

def test_flake_line_demo_loads_and_appraises(repo_root):
    # The demo driven by a price and a cost driver with correlation: it loads, the lead's
    # appraisal echoes our estimate, and V0 is the PV of the drivers' expected flows.
    import realopt

    project = realopt.load_project(repo_root / "projects" / "flake_line.yaml")
    model = project.underlying.drivers
    assert model is not None and model.correlation == (("flake_price", "bale_cost", 0.7),)
    ours = simulate_underlying(model, project.underlying.volatility_estimate, project.market)
    out = realopt.appraise(project).to_dict()
    if project.underlying.flow_timing == "spread":
        # the same expected flows, each accruing through its year (realopt.underlying): worth
        # more than paid at year ends, by at most the accrual factor (e^rho - 1)/rho of a
        # uniform stream over one year (closed form; the terminal value is not spread)
        from realopt.model import Underlying
        from realopt.underlying import resolve
        from dataclasses import replace
        spread = resolve(replace(project, underlying=Underlying(
            cash_flows=ours.cash_flows, volatility=0.3, flow_timing="spread"))).present_value
        assert out["present_value"] == pytest.approx(spread, rel=1e-9)
        accrual = 0.09 / math.log1p(0.09)
        assert ours.present_value < out["present_value"] <= ours.present_value * accrual * (
            1 + 1e-12)
        if project.underlying.terminal_value == 0:      # every flow spread: exactly the factor
            assert out["present_value"] == pytest.approx(ours.present_value * accrual, rel=1e-12)
    else:
        assert out["present_value"] == pytest.approx(ours.present_value, rel=1e-9)
    assert out["volatility"] == pytest.approx(ours.volatility, rel=1e-12)
    assert out["volatility_stderr"] == pytest.approx(ours.volatility_stderr, rel=1e-12)
    assert out["volatility_method"] == ours.method and "seed 7" in ours.method
    assert 0.05 < ours.volatility < 0.6 and ours.volatility_stderr < 0.01 * ours.volatility
    assert_tower(ours)
