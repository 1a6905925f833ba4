"""Exact expected cash flows and V0 on the drivers, and V0's standard error where it is simulated.

Sources, named beside each check:
* lognormal moments: for ln X ~ N(m, v), E[X^k] = exp(k m + k^2 v / 2), and for jointly normal logs
  E[prod X_i^{k_i}] = exp(k.m + k' S k / 2): the moment generating function of the (multivariate)
  normal distribution (common practice; any probability textbook);
* the law of geometric Brownian motion, E[X_t] = X_0 e^{drift t}, and of the Ornstein-Uhlenbeck
  process in logs, ln X_t ~ N(ln L + (ln X_0 - ln L) e^{-k t}, vol^2 (1 - e^{-2 k t}) / (2 k))
  (Dixit & Pindyck 1994, ch. 3; derived again in realopt.drivers);
* the covariance of two processes driven by correlated Brownian motions, by the Ito isometry:
  Cov(ln X_t, ln Y_t) = rho s_x s_y int_0^t e^{-(k_x + k_y)(t - u)} du, checked here by numerical
  quadrature and by an Euler simulation written in this file (no code shared with realopt);
* numpy-financial's ``npv`` for present values (annual compounding, first flow at year 1);
* the standard error of a mean of i.i.d. path values, sd / sqrt(n) (common practice), checked by
  the dispersion of V0 over many seeds.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

import realopt
from realopt.drivers import _Plan, _run, simulate_underlying
from realopt.formula import parse
from realopt.model import Driver, DriverModel, Market, Schedule, VolatilityEstimate

MARKET = Market(risk_free_rate=0.03, discount_rate=0.09, compounding="annual")


def est(paths=20000, seed=7):
    return VolatilityEstimate(method="simulation", paths=paths, seed=seed)


def gbm(name="price", start=50.0, drift=0.02, vol=0.25):
    return Driver(name, "gbm", start=start, drift=drift, volatility=vol)


def ou(name="cost", start=30.0, long_run=32.0, speed=0.4, vol=0.15):
    return Driver(name, "mean_reverting", start=start, long_run=long_run, speed=speed,
                  volatility=vol)


def flows(r):
    return np.array([c for _, c in r.cash_flows])


# --- the polynomial expander --------------------------------------------------------------------

def test_expansion_of_simple_polynomials():
    # Binomial theorem (common practice): (a + b)^2 = a^2 + 2ab + b^2; schedules (here s) and
    # constants go into the coefficients, division by them too.
    assert parse("(a + b) ** 2").expand(["a", "b"], {}) == {(2, 0): 1.0, (1, 1): 2.0,
                                                            (0, 2): 1.0}
    p = parse("(a - b / 4) * s - 3").expand(["a", "b"], {"s": np.array([2.0, 4.0])})
    np.testing.assert_allclose(p[(1, 0)], [2.0, 4.0])
    np.testing.assert_allclose(p[(0, 1)], [-0.5, -1.0])
    assert p[(0, 0)] == -3.0
    # deterministic parts may use anything the language allows, e.g. max of a schedule
    q = parse("max(s, 3) * a / s").expand(["a"], {"s": np.array([2.0, 6.0])})
    np.testing.assert_allclose(q[(1,)], [1.5, 1.0])
    assert parse("a ** 0").expand(["a"], {}) == {(0,): 1.0}


@pytest.mark.parametrize("text", ["max(a, 1)", "min(a, b)", "abs(a - b)", "b / a", "1 / (a + b)",
                                  "a ** 0.5", "a ** -1", "2 ** a", "a ** b", "a ** 13"])
def test_expansion_refuses_what_is_not_a_polynomial(text):
    # Not a polynomial in a, b (definition); a ** 13 is past MAX_POWER (12).
    assert parse(text).expand(["a", "b"], {}) is None


_LEAVES = st.sampled_from(["a", "b", "s", "2", "0.5", "3"])


def _combine(children):
    return st.one_of(
        st.tuples(children, children).map(lambda t: f"({t[0]} + {t[1]})"),
        st.tuples(children, children).map(lambda t: f"({t[0]} - {t[1]})"),
        st.tuples(children, children).map(lambda t: f"({t[0]} * {t[1]})"),
        st.tuples(children, st.integers(0, 3)).map(lambda t: f"({t[0]}) ** {t[1]}"),
        st.tuples(children, st.sampled_from(["4", "s", "(s + 1)"])).map(
            lambda t: f"({t[0]}) / {t[1]}"),
        children.map(lambda x: f"-({x})"),
    )


@settings(max_examples=150, deadline=None)
@given(st.recursive(_LEAVES, _combine, max_leaves=10),
       st.floats(0.3, 2.0), st.floats(0.3, 2.0))
def test_expansion_evaluates_to_the_formula(text, a, b):
    # Invariant: sum(coef * a^i b^j) equals the formula at any point; tolerance relative to the
    # sum of the absolute terms (rounding in long sums).
    f = parse(text)
    s = np.array([0.5, 1.5, 3.0])
    poly = f.expand(["a", "b"], {"s": s})
    assert poly is not None
    want = np.broadcast_to(f.evaluate({"a": a, "b": b, "s": s}), s.shape)
    terms = [np.broadcast_to(c * a ** i * b ** j, s.shape) for (i, j), c in poly.items()]
    got = np.sum(terms, axis=0)
    scale = np.sum(np.abs(terms), axis=0) + 1e-12
    assert np.all(np.abs(got - want) <= 1e-9 * scale)


# --- exact expected flows against closed forms --------------------------------------------------

def test_gbm_polynomial_flows_against_closed_form_and_numpy_financial():
    npf = pytest.importorskip("numpy_financial")
    # Lognormal moments: E[X_t] = X0 e^{mu t}, E[X_t^2] = X0^2 e^{(2 mu + s^2) t}.
    x0, mu, s = 40.0, 0.03, 0.3
    model = DriverModel(years=(1, 12), drivers=(gbm(start=x0, drift=mu, vol=s),),
                        cash_flow="price ** 2 / 100 + 2 * price - 10")
    r = simulate_underlying(model, None, MARKET)
    t = np.arange(1, 13)
    want = x0 ** 2 * np.exp((2 * mu + s * s) * t) / 100 + 2 * x0 * np.exp(mu * t) - 10
    np.testing.assert_allclose(flows(r), want, rtol=1e-12)
    assert r.present_value_stderr == 0.0 and r.flow_covariance is None
    assert "exact" in r.method
    # V0 is the DCF of the exact flows at the discount rate (numpy-financial, annual).
    assert r.present_value == pytest.approx(npf.npv(0.09, np.r_[0.0, want]), rel=1e-12)
    # The volatility estimate does not change V0 (same exact flows, no simulated mean).
    r2 = simulate_underlying(model, est(), MARKET)
    assert r2.present_value == r.present_value and r2.present_value_stderr == 0.0


def test_log_ou_flows_against_closed_form():
    npf = pytest.importorskip("numpy_financial")
    # OU in logs (Dixit & Pindyck 1994, ch. 3): ln X_t ~ N(m_t, v_t) with
    # m_t = ln L + (ln X0 - ln L) e^{-k t}, v_t = s^2 (1 - e^{-2kt}) / (2k); then
    # E[X] = e^{m + v/2}, E[X^3] = e^{3m + 9v/2} (lognormal moments).
    x0, lr, k, s = 30.0, 36.0, 0.6, 0.35
    model = DriverModel(years=(1, 10), drivers=(ou(start=x0, long_run=lr, speed=k, vol=s),),
                        cash_flow="cost ** 3 / 1000 - 0.5 * cost")
    r = simulate_underlying(model, None, MARKET)
    t = np.arange(1, 11)
    m = math.log(lr) + (math.log(x0) - math.log(lr)) * np.exp(-k * t)
    v = s * s * (1 - np.exp(-2 * k * t)) / (2 * k)
    want = np.exp(3 * m + 4.5 * v) / 1000 - 0.5 * np.exp(m + v / 2)
    np.testing.assert_allclose(flows(r), want, rtol=1e-12)
    assert r.present_value == pytest.approx(npf.npv(0.09, np.r_[0.0, want]), rel=1e-12)
    # speed 0: a driftless walk in logs, ln X_t ~ N(ln X0 - 0, s^2 t) (limit of the above).
    model = DriverModel(years=(1, 5), drivers=(ou(start=x0, long_run=lr, speed=0.0, vol=s),),
                        cash_flow="cost * cost")
    t = np.arange(1, 6)
    np.testing.assert_allclose(flows(simulate_underlying(model, None, MARKET)),
                               x0 ** 2 * np.exp(2 * s * s * t), rtol=1e-12)


@pytest.mark.parametrize("rho", [0.7, -0.4, 0.0])
def test_product_of_correlated_gbm_drivers(rho):
    npf = pytest.importorskip("numpy_financial")
    # Lognormal moments: E[XY] = E[X] E[Y] exp(rho s1 s2 t), E[X] = X0 e^{mu1 t}; a schedule
    # multiplies the product (volume 800 in year 1 to 1000 from year 3, linear between).
    s1, s2 = 0.25, 0.4
    vol = Driver("volume", "schedule", schedule=Schedule.from_points({1: 800, 3: 1000}))
    model = DriverModel(years=(1, 8), drivers=(gbm("price", 50.0, 0.02, s1),
                                               gbm("fuel", 20.0, -0.01, s2), vol),
                        correlation=(("price", "fuel", rho),),
                        cash_flow="price * fuel * volume / 1e5 - 3")
    r = simulate_underlying(model, None, MARKET)
    t = np.arange(1, 9)
    volume = np.minimum(800 + 100 * (t - 1), 1000)
    want = (50.0 * np.exp(0.02 * t) * 20.0 * np.exp(-0.01 * t) * np.exp(rho * s1 * s2 * t)
            * volume / 1e5 - 3)
    np.testing.assert_allclose(flows(r), want, rtol=1e-12)
    assert r.present_value == pytest.approx(npf.npv(0.09, np.r_[0.0, want]), rel=1e-12)


# --- the covariance of the logs of correlated mean-reverting drivers ----------------------------

def _three_drivers(rho_ab=0.8, rho_ac=0.5, rho_bc=0.3):
    return DriverModel(
        years=(1, 4),
        drivers=(ou("a", 20.0, 25.0, 0.5, 0.4), ou("b", 10.0, 8.0, 1.5, 0.5),
                 gbm("c", 5.0, 0.03, 0.3)),
        correlation=(("a", "b", rho_ab), ("a", "c", rho_ac), ("b", "c", rho_bc)),
        cash_flow="a * b / 10 + a * c / 5 + b * c ** 2 / 20")


def test_log_covariance_matches_the_ito_integral():
    # Ito isometry: Cov(ln X_i(t), ln X_j(t)) = rho s_i s_j int_0^t e^{-(k_i + k_j)(t - u)} du,
    # here by the trapezoid rule on 20,001 points (error ~1e-9), not the closed form.
    plan = _Plan(_three_drivers())
    s = plan.vol
    k = plan.speed
    for t in (0.5, 1.0, 3.0, 7.0):
        u = np.linspace(0.0, t, 20001)
        cov = plan.log_cov(t)[0]
        for i in range(3):
            for j in range(3):
                integral = np.trapezoid(np.exp(-(k[i] + k[j]) * (t - u)), u)
                want = plan.corr[i, j] * s[i] * s[j] * integral
                assert cov[i, j] == pytest.approx(want, rel=1e-7, abs=1e-12)


def test_correlated_mean_reverting_products_against_two_simulations():
    # (1) realopt's own simulation (exact yearly transitions), 400,000 paths: within 4 standard
    # errors; a plausible wrong covariance, rho sqrt(v_a v_b), is rejected by more than 4.
    model = _three_drivers()
    exact = simulate_underlying(model, None, MARKET)
    sim = _run(model, est(400_000, seed=3), MARKET, mean_route="simulation")
    se = np.sqrt(np.diag(np.asarray(sim.flow_covariance)))
    assert np.all(np.abs(flows(exact) - flows(sim)) < 4 * se)
    assert abs(exact.present_value - sim.present_value) < 4 * sim.present_value_stderr
    # The wrong covariance, on the product a * b alone (4 years, 400,000 paths).
    ab = DriverModel(years=(1, 4), drivers=model.drivers, correlation=model.correlation,
                     cash_flow="a * b")
    sim = _run(ab, est(400_000, seed=4), MARKET, mean_route="simulation")
    se = np.sqrt(np.diag(np.asarray(sim.flow_covariance)))
    right = flows(simulate_underlying(ab, None, MARKET))
    assert np.all(np.abs(right - flows(sim)) < 4 * se)
    plan = _Plan(ab)
    t = plan.years
    v = np.stack([plan.log_var(i, t) for i in range(2)])
    m = np.stack([plan.log_mean(i, plan.y0[i], t) for i in range(2)])
    wrong = np.exp(m[0] + m[1] + (v[0] + v[1]) / 2 + 0.8 * np.sqrt(v[0] * v[1]))
    assert np.all(np.abs(wrong - flows(sim))[1:] > 4 * se[1:])

    # (2) an Euler scheme written here (dt = 1/50, 100,000 paths): E[a b] at year 3.
    rng = np.random.default_rng(11)
    n, dt, steps = 100_000, 1 / 50, 150
    chol = np.linalg.cholesky(np.array([[1.0, 0.8], [0.8, 1.0]]))
    ya, yb = np.full(n, math.log(20.0)), np.full(n, math.log(10.0))
    for _ in range(steps):
        z = rng.standard_normal((n, 2)) @ chol.T
        ya = ya + 0.5 * (math.log(25.0) - ya) * dt + 0.4 * math.sqrt(dt) * z[:, 0]
        yb = yb + 1.5 * (math.log(8.0) - yb) * dt + 0.5 * math.sqrt(dt) * z[:, 1]
    prod = np.exp(ya + yb)
    one = DriverModel(years=(3, 3), drivers=model.drivers[:2],
                      correlation=(("a", "b", 0.8),), cash_flow="a * b")
    want = flows(simulate_underlying(one, None, MARKET))[0]
    assert abs(prod.mean() - want) < 4 * prod.std(ddof=1) / math.sqrt(n) + 2e-3 * want  # Euler bias


def test_exact_v0_against_a_large_simulation_with_every_kind_of_driver():
    # Lognormal moments for the whole formula; simulation of 300,000 paths: within 4 standard
    # errors of V0 (the standard error of the simulated V0, correlation across years included).
    volume = Driver("volume", "schedule", schedule=Schedule.from_points({1: 500, 6: 900}))
    model = DriverModel(years=(1, 15), drivers=(gbm(start=80.0, vol=0.2), ou(vol=0.3), volume),
                        correlation=(("price", "cost", 0.6),),
                        cash_flow="(price - cost) ** 2 / 50 + price * cost * volume / 1e5 + 2")
    exact = simulate_underlying(model, None, MARKET)
    sim = _run(model, est(300_000, seed=21), MARKET, mean_route="simulation")
    assert sim.present_value_stderr > 0
    assert abs(exact.present_value - sim.present_value) < 4 * sim.present_value_stderr


def test_year_one_mean_consistent_with_the_exact_v0_on_the_regression_route():
    # Law of iterated expectations: E[V1] = V0 G(1) (Smith 2005). For a product of drivers the
    # conditional expectation is fitted by regression; with the exact V0 the fit is centred on
    # the exact mean, so the mean of V1 is V0 G(1) within 4 standard errors of a mean of V1
    # (V0 G(1) sigma / sqrt(n)).
    model = DriverModel(years=(1, 10), drivers=(gbm(), ou()), correlation=(("price", "cost", 0.6),),
                        cash_flow="price * cost / 100 + 1")
    r = simulate_underlying(model, est(), MARKET)
    assert r.conditional == "regression" and r.present_value_stderr == 0.0
    se = r.present_value * 1.09 * r.volatility / math.sqrt(r.paths)
    assert abs(r.year_one_mean - 1.09 * r.present_value) < 4 * se
    # The same figures as the simulated V0 gives, within that V0's standard error.
    s = _run(model, est(), MARKET, mean_route="simulation")
    assert abs(s.present_value - r.present_value) < 4 * s.present_value_stderr
    assert abs(s.volatility - r.volatility) < 4 * math.hypot(s.volatility_stderr,
                                                             r.volatility_stderr)


# --- simulated V0 and its standard error --------------------------------------------------------

TAXED = DriverModel(years=(1, 10), drivers=(gbm(start=80.0), ou()),
                    correlation=(("price", "cost", 0.5),), cash_flow="price - 0.5 * cost - 5",
                    tax_rate=0.3)


@pytest.mark.parametrize("model", [
    TAXED,
    DriverModel(years=(1, 10), drivers=(gbm(), ou()), cash_flow="max(price - cost, 5)"),
    DriverModel(years=(1, 10), drivers=(gbm(), ou()), cash_flow="abs(price - cost) + 1"),
    DriverModel(years=(1, 10), drivers=(gbm(), ou()), cash_flow="price / cost * 10"),
], ids=["tax", "max", "abs", "division"])
def test_simulated_v0_has_a_standard_error_and_seeds_agree(model):
    # Not a polynomial (or taxed): V0 is a simulation mean with sd/sqrt(n) error; two seeds differ
    # by less than 4 combined standard errors; the same seed gives the same numbers.
    a = simulate_underlying(model, est(seed=1), MARKET)
    b = simulate_underlying(model, est(seed=2), MARKET)
    assert a.present_value_stderr > 0 and "simulation" in a.method
    assert a.present_value != b.present_value
    assert abs(a.present_value - b.present_value) < 4 * math.hypot(a.present_value_stderr,
                                                                   b.present_value_stderr)
    assert simulate_underlying(model, est(seed=1), MARKET) == a
    # The standard error is that of the mean of the paths' PVs: w' C w with w = 1 / 1.09^t.
    w = 1.09 ** -np.arange(1, 11)
    assert a.stderr_of(w) == pytest.approx(a.present_value_stderr, rel=1e-12)


def test_standard_error_matches_the_spread_over_seeds():
    # sd/sqrt(n) (common practice) checked by the dispersion of V0 over 60 seeds of 2,000 paths:
    # the sample sd of 60 values is within about 9% of the truth (chi-square, 59 degrees of
    # freedom), so [0.75, 1.3] holds. Ignoring the correlation of a path's flows across years
    # (the diagonal of the covariance only) gives a standard error less than 60% of that.
    values, errors, naive = [], [], []
    w = 1.09 ** -np.arange(1, 11)
    for seed in range(60):
        r = simulate_underlying(TAXED, est(2000, seed), MARKET)
        values.append(r.present_value)
        errors.append(r.present_value_stderr)
        naive.append(math.sqrt(float(np.sum(w * w * np.diag(np.asarray(r.flow_covariance))))))
    ratio = np.std(values, ddof=1) / np.mean(errors)
    assert 0.75 < ratio < 1.3
    assert np.mean(naive) < 0.6 * np.std(values, ddof=1)


# --- through the appraisal ----------------------------------------------------------------------

PROJECT = """\
project: {{name: Driver test, currency: EUR, unit: million}}
market: {{risk_free_rate: 0.03, compounding: annual, discount_rate: 0.09}}
underlying:
  years: [1, 10]
  flow_timing: {timing}
  drivers:
    price: {{process: gbm, start: 1.30, drift: 0.01, volatility: 0.15}}
    cost: {{process: mean_reverting, start: 0.40, long_run: 0.42, speed: 0.5, volatility: 0.18}}
    tonnes: {{schedule: {{1: 18000, 3: 30000}}}}
  correlation: [[price, cost, 0.7]]
  cash_flow: (price - cost / 0.78) * tonnes / 1000 - 3.6
  tax_rate: {tax}
  volatility: {{estimate: simulation, paths: 5000, seed: 7}}
investment: {{cost: 60.0}}
lattice: {{steps_per_year: 4}}
rights:
  - {{name: Wait, type: defer, window: [0, 2]}}
"""


@pytest.mark.parametrize("timing", ["at_dates", "spread"])
def test_appraisal_carries_the_standard_error_of_v0(write_project, cli, timing):
    from realopt.underlying import resolve

    taxed = realopt.load_project(write_project(PROJECT.format(timing=timing, tax=0.25)))
    res = resolve(taxed)
    d = realopt.appraise(taxed).to_dict()
    assert d["present_value_stderr"] == res.present_value_stderr > 0
    # V0 is linear in the mean flows: weights are the PV of a unit flow; paid at year t that is
    # 1.09^-t, spread evenly over year t it is (e^{-r (t-1)} - e^{-r t}) / r, r = ln 1.09.
    t = np.arange(1, 11)
    r = math.log(1.09)
    w = (np.exp(-r * (t - 1)) - np.exp(-r * t)) / r if timing == "spread" else 1.09 ** -t
    cov = np.asarray(simulate_underlying(taxed.underlying.drivers, taxed.underlying
                                         .volatility_estimate, taxed.market).flow_covariance)
    assert res.present_value_stderr == pytest.approx(math.sqrt(w @ cov @ w), rel=1e-10)
    out = cli("appraise", write_project(PROJECT.format(timing=timing, tax=0.25))).out
    assert f"± {res.present_value_stderr:,.2f}" in out

    untaxed = realopt.load_project(write_project(PROJECT.format(timing=timing, tax=0.0), "b.yaml"))
    assert resolve(untaxed).present_value_stderr is None
    assert realopt.appraise(untaxed).to_dict()["present_value_stderr"] == 0.0
    assert "±" not in cli("appraise", write_project(PROJECT.format(timing=timing, tax=0.0),
                                                    "b.yaml")).out
