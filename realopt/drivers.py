"""Cash flows from their drivers: expected flows, V0, and the project volatility with its error.

Drivers (real-world measure, yearly continuous parameters, t in years from today):

* ``gbm``: d ln X = (drift - vol^2/2) dt + vol dW, so E[X_t | X_s] = X_s exp(drift (t - s));
* ``mean_reverting`` (Ornstein-Uhlenbeck in logs): d ln X = speed (ln long_run - ln X) dt + vol dW,
  so ln X_t | X_s is normal with mean ln L + (ln X_s - ln L) e^{-speed (t-s)} and variance
  vol^2 (1 - e^{-2 speed (t-s)}) / (2 speed) (vol^2 (t-s) when speed = 0);
* ``schedule``: deterministic, linear between its year points, flat beyond them.

The cash flow of year t is ``cash_flow`` evaluated on the drivers' values at t, less
``tax_rate`` times its positive part; flows are paid at the integer years ``model.years``.

Expected flows: exact when there is no tax and the formula is a polynomial in the stochastic drivers
(:meth:`Formula.expand`; schedules and other deterministic parts go into the coefficients). The
logs of the drivers at year t are jointly normal with means m_i(t) (above, from today) and
covariances rho_ij vol_i vol_j (1 - e^{-(k_i + k_j) t}) / (k_i + k_j) (rho_ij vol_i vol_j t when
k_i + k_j = 0; k = speed, 0 for gbm), so each monomial prod X_i^{e_i} has the expectation
exp(e.m + e' Sigma e / 2) (lognormal moments). Otherwise (tax, min/max/abs, division by a driver)
the expected flows are the means over the simulated paths and V0 carries a standard error: that of
the mean of the paths' own present values, so the correlation of a path's flows across years counts.

Volatility (Smith 2005; Brandao, Dyer & Hahn 2005): with V0 the present value of the expected
flows at ``discount_rate`` and V1 = CF_1 + E[sum_{t>1} CF_t / G(t - 1) | year-one state] the value
at year one (G the discount-rate growth), sigma = std(ln(V1 / V0)). The expectation is conditional
on the drivers' year-one values: analytic when the formula is affine in the stochastic drivers and
there is no tax (the expectation of the formula is then the formula of the conditional means);
otherwise a least-squares regression of the simulated discounted later flows on functions of the
year-one driver values (a low-degree polynomial in their logs, the values themselves, and the
formula evaluated at the conditional means), with control variates (each driver's noise after year
one, zero mean given year one) that take most of the noise out of the fit. Using each path's own
realised future instead would overstate the volatility.

Simulation: exact yearly transitions of both processes (no discretisation error); the yearly
shocks of correlated drivers have the exact covariance rho_ij vol_i vol_j (1 - e^{-(k_i + k_j)}) /
(k_i + k_j) (k = speed, 0 for gbm). Year t's normals come from their own stream,
Generator(PCG64(seed).jumped(t - 1)) (year one: Generator(PCG64(seed))), drawn path-major, so the
numbers depend only on the seed and the path count, never on the chunk size or the horizon, and the
year-one state is the same whatever route (analytic or regression) is taken. Paths are processed in
chunks of bounded memory (CHUNK_BYTES); the regression needs one extra pass over year one only.
Results are identical run to run on one machine and agree to rounding (about 1e-12) across
machines (sums over paths use einsum in a fixed order, not threaded BLAS).

The standard error of sigma is the delta-method estimate from the sample fourth moment,
sqrt((m4 - m2^2) / n) / (2 sigma), which equals sigma / sqrt(2 n) for normal ln V1; on the
regression route the fitting error of the coefficients (least-squares covariance, propagated to
sigma by the delta method) is added in quadrature.
"""
from __future__ import annotations

import math
import sys
import time
from dataclasses import dataclass
from itertools import combinations_with_replacement

import numpy as np

from . import validate
from .errors import ModelError, Problem, ValuationError
from .formula import Formula, FormulaError, parse
from .model import DriverModel, Market, VolatilityEstimate

CHUNK_BYTES = 32 * 2**20   # working memory per chunk of paths, roughly
PROGRESS_AFTER = 1.0       # seconds before a progress bar appears (terminal only)
DEFAULT = VolatilityEstimate(method="simulation")  # paths and seed when the file gives none


@dataclass(frozen=True)
class DriverResult:
    """What the drivers imply for the operating project.

    ``cash_flows``: (year, expected cash flow) for each cash-flow year; ``present_value``: their PV
    at ``market.discount_rate`` (V0); ``volatility``: yearly sigma of ln(project value) and its
    standard error (None unless a simulation estimate was asked for); ``method``: how, in words.
    ``present_value_stderr`` is 0 when the expected flows are exact, else the standard error of
    the simulated V0 (paid at the dates); ``flow_covariance`` (None when exact) is the covariance
    matrix of the simulated mean flows (the sample covariance of a path's flows across years over
    the path count), from which :meth:`stderr_of` gives the standard error of any weighted sum of
    them, e.g. V0 under another flow timing. ``year_one_mean`` is a check: by iterated
    expectations E[V1] equals V0 grown one year at the discount rate.
    """

    cash_flows: tuple[tuple[float, float], ...]
    present_value: float
    volatility: float | None
    volatility_stderr: float | None
    method: str
    present_value_stderr: float = 0.0
    paths: int = 0
    seed: int | None = None
    conditional: str = ""          # "analytic", "regression" or "" (no estimate)
    year_one_mean: float | None = None   # mean of V1 over the paths; E[V1] = V0 G(1) in theory
    flow_covariance: tuple[tuple[float, ...], ...] | None = None

    def stderr_of(self, weights) -> float:
        """Standard error of sum_k weights[k] * (mean cash flow of year k): 0 when exact."""
        if self.flow_covariance is None:
            return 0.0
        w = np.asarray(weights, dtype=float)
        return math.sqrt(max(float(w @ np.asarray(self.flow_covariance) @ w), 0.0))


# --- public API ---------------------------------------------------------------------------------

def simulate_underlying(model: DriverModel, estimate: VolatilityEstimate | None,
                        market: Market) -> DriverResult:
    """Expected cash flows, V0 and (for ``estimate.method == "simulation"``) the volatility.

    Raises ValuationError when the model cannot be valued as given (message says what to change).
    """
    return _run(model, estimate, market)


def history_volatility(path, column: str, periods_per_year: float) -> tuple[float, float]:
    """Annualised standard deviation of the log returns of the prices in ``column`` of ``path``
    (CSV or .xlsx, one row per observation, in time order) and its standard error.

    sigma = std(ln(P_i / P_{i-1}), ddof=1) * sqrt(periods_per_year); the standard error is the
    delta-method estimate from the sample fourth moment (sigma / sqrt(2 n) for normal returns).
    """
    from .forecast import read_series

    ppy = float(periods_per_year) if periods_per_year is not None else float("nan")
    if not (math.isfinite(ppy) and ppy > 0):
        raise ValuationError(f"volatility estimate from history: periods_per_year must be above "
                             f"0 (12 for monthly, 52 for weekly, 252 for trading days), found "
                             f"{periods_per_year}")
    prices = np.asarray(read_series(path, column, positive=True), dtype=float)
    if prices.size < 3:
        raise ValuationError(f"{path}: column '{column}' has {prices.size} price(s); a volatility "
                             "estimate needs at least 3 (better several dozen)")
    returns = np.diff(np.log(prices))
    sd = float(np.std(returns, ddof=1))
    if sd == 0.0:
        raise ValuationError(f"{path}: the prices in column '{column}' never change, so their "
                             "volatility is zero; check the column, or state the volatility")
    sigma = sd * math.sqrt(ppy)
    stderr = _sd_stderr(returns - returns.mean(), sd) * math.sqrt(ppy)
    return sigma, stderr


def correlation_matrix(model: DriverModel) -> tuple[tuple[str, ...], np.ndarray]:
    """(names of the stochastic drivers, their correlation matrix), checked positive semi-definite.

    Pairs not listed are uncorrelated. Raises ValuationError naming the offending pair or the
    negative eigenvalue, with a fix.
    """
    names = tuple(d.name for d in model.drivers if d.process != "schedule")
    kinds = {d.name: d.process for d in model.drivers}
    idx = {n: i for i, n in enumerate(names)}
    m = np.eye(len(names))
    seen: dict[frozenset, float] = {}
    for a, b, rho in model.correlation:
        for n in (a, b):
            if n not in kinds:
                raise ValuationError(f"correlation names '{n}', which is not a driver (drivers: "
                                     f"{', '.join(kinds)})")
            if kinds[n] == "schedule":
                raise ValuationError(f"correlation names '{n}', a schedule (deterministic) "
                                     "driver; only gbm and mean_reverting drivers are correlated")
        rho = float(rho)             # in [-1, 1]: realopt.validate (called by _Plan) checks it
        if a == b:
            if rho != 1.0:
                raise ValuationError(f"correlation of {a} with itself is {rho:g}; it is 1 by "
                                     "definition: remove that entry")
            continue
        pair = frozenset((a, b))
        if pair in seen and seen[pair] != rho:
            raise ValuationError(f"correlation of {a} and {b} is given twice ({seen[pair]:g} and "
                                 f"{rho:g}); keep one")
        seen[pair] = rho
        m[idx[a], idx[b]] = m[idx[b], idx[a]] = rho
    bad = validate.correlation_problem(names, model.correlation)   # the loader's message too
    if bad is not None:
        raise ModelError([Problem("project", None, None, "underlying.correlation", *bad)])
    return names, m


def check_model(model: DriverModel) -> Formula:
    """Validate a driver model without simulating; returns the parsed formula."""
    return _Plan(model).formula


# --- the work -----------------------------------------------------------------------------------

class _Plan:
    """A checked driver model in array form."""

    def __init__(self, model: DriverModel):
        self.model = model
        validate.check(model)        # years, tax rate, drivers, correlations (ModelError)
        first, last = (int(model.years[0]), int(model.years[1]))
        self.years = np.arange(first, last + 1, dtype=float)   # cash-flow years
        self.horizon = last
        self.tax = float(model.tax_rate)
        names = [d.name for d in model.drivers]
        dup = {n for n in names if names.count(n) > 1}
        if dup:
            raise ValuationError(f"driver '{sorted(dup)[0]}' is defined twice")
        self.schedules = {d.name: d for d in model.drivers if d.process == "schedule"}
        self.stochastic = [d for d in model.drivers if d.process != "schedule"]
        self.names, self.corr = correlation_matrix(model)
        self.formula = model.cash_flow if isinstance(model.cash_flow, Formula) \
            else parse(model.cash_flow)
        self.formula.evaluate({n: 1.0 for n in names})   # unknown names -> located FormulaError
        d = len(self.stochastic)
        s = np.array([x.volatility for x in self.stochastic], dtype=float)
        k = np.array([x.speed if x.process == "mean_reverting" else 0.0
                      for x in self.stochastic], dtype=float)
        self.vol, self.speed = s, k
        # One-year exact transition y_t = a + b y_{t-1} + e, e ~ N(0, cov).
        self.b = np.exp(-k)
        self.a = np.array([(x.drift - x.volatility ** 2 / 2) if x.process == "gbm"
                           else math.log(x.long_run) * (1 - math.exp(-x.speed))
                           for x in self.stochastic], dtype=float)
        ksum = k[:, None] + k[None, :]
        h = np.where(ksum > 0, -np.expm1(-ksum) / np.where(ksum > 0, ksum, 1.0), 1.0)
        self.cov = self.corr * np.outer(s, s) * h
        self.chol = _cholesky_psd(self.cov)
        self.y0 = np.array([math.log(x.start) for x in self.stochastic], dtype=float)
        used = self.formula.names
        self.used = [i for i, x in enumerate(self.stochastic) if x.name in used]
        self.uncertain = [i for i in self.used if s[i] > 0]
        self.affine = self.tax == 0.0 and self.formula.is_affine(
            {x.name for x in self.stochastic})
        self.d = d
        # polynomial in the stochastic drivers, coefficients per cash-flow year (None: not one)
        self.poly = None if self.tax else self.formula.expand(
            [x.name for x in self.stochastic], self.schedule_env(self.years))

    # log-moments of ln X_{s+tau} given ln X_s = y (arrays broadcast over tau)
    def log_mean(self, i, y, tau):
        x = self.stochastic[i]
        if x.process == "gbm":
            return y + (x.drift - x.volatility ** 2 / 2) * tau
        lnl = math.log(x.long_run)
        return lnl + (y - lnl) * np.exp(-x.speed * tau)

    def log_var(self, i, tau):
        x = self.stochastic[i]
        tau = np.asarray(tau, dtype=float)
        if x.process == "gbm" or x.speed == 0:
            return x.volatility ** 2 * tau
        return x.volatility ** 2 * -np.expm1(-2 * x.speed * tau) / (2 * x.speed)

    def log_cov(self, tau) -> np.ndarray:
        """(len(tau), d, d) covariance of the drivers' logs tau years after a known state:
        rho_ij vol_i vol_j (1 - e^{-(k_i + k_j) tau}) / (k_i + k_j), or rho_ij vol_i vol_j tau."""
        tau = np.atleast_1d(np.asarray(tau, dtype=float))[:, None, None]
        ksum = (self.speed[:, None] + self.speed[None, :])[None]
        h = np.where(ksum > 0, -np.expm1(-ksum * tau) / np.where(ksum > 0, ksum, 1.0), tau)
        return self.corr[None] * np.outer(self.vol, self.vol)[None] * h

    def exact_flows(self) -> np.ndarray:
        """E[CF_t] for the cash-flow years from the polynomial (lognormal moments, see above)."""
        years = self.years
        m = np.stack([np.broadcast_to(self.log_mean(i, self.y0[i], years), years.shape)
                      for i in range(self.d)])                        # (d, years)
        cov = self.log_cov(years)                                     # (years, d, d)
        total = np.zeros(len(years))
        with np.errstate(all="ignore"):
            for exps, coef in self.poly.items():                      # a loop over terms
                e = np.array(exps, dtype=float)
                total = total + coef * np.exp(e @ m + 0.5 * np.einsum("i,tij,j->t", e, cov, e))
        bad = ~np.isfinite(total)
        if bad.any():
            raise ValuationError(
                f"the cash-flow formula gives a non-finite value (division by zero, overflow or "
                f"a power of a negative number) in its expected value in {int(bad.sum()):,} "
                f"year(s); check divisions and powers in: {self.formula.text}")
        return total

    def schedule_env(self, years) -> dict:
        return {n: np.asarray(d.schedule.at(years), dtype=float)
                for n, d in self.schedules.items()}

    def cash_flow(self, env, where: str) -> np.ndarray:
        cf = self.formula.evaluate(env)
        if self.tax:
            cf = cf - self.tax * np.maximum(cf, 0.0)
        bad = ~np.isfinite(cf)
        if bad.any():
            raise ValuationError(
                f"the cash-flow formula gives a non-finite value (division by zero, overflow or a "
                f"power of a negative number) {where} in {int(bad.sum()):,} case(s); check "
                f"divisions and powers in: {self.formula.text}")
        return cf

    def chunk_rows(self, columns: int) -> int:
        per_path = 8 * (columns * (self.d + 6) + 4 * self.d + 8)
        return max(1024, CHUNK_BYTES // per_path)

    def year_draws(self, seed: int, t: int) -> np.random.Generator:
        return np.random.Generator(np.random.PCG64(seed).jumped(t - 1))

    def shocks(self, z: np.ndarray) -> np.ndarray:
        """(d, c) correlated yearly shocks from (c, d) independent normals (fixed-order sums)."""
        out = np.zeros((self.d, z.shape[0]))
        for i in range(self.d):
            for j in range(i + 1):
                if self.chol[i, j] != 0.0:
                    out[i] += self.chol[i, j] * z[:, j]
        return out


def _cholesky_psd(a: np.ndarray) -> np.ndarray:
    """Lower-triangular L with L L^T = a for a positive semi-definite a (zero pivots allowed).

    Plain Python arithmetic over the (small) matrix, so the factor is the same on every machine.
    """
    n = a.shape[0]
    low = [[0.0] * n for _ in range(n)]
    scale = max([abs(float(a[i, i])) for i in range(n)] + [0.0])
    for j in range(n):
        s = float(a[j, j]) - sum(low[j][m] ** 2 for m in range(j))
        if s <= 1e-13 * scale:
            continue  # dependent (or deterministic) driver: no new shock
        low[j][j] = math.sqrt(s)
        for i in range(j + 1, n):
            low[i][j] = (float(a[i, j]) - sum(low[i][m] * low[j][m] for m in range(j))) / low[j][j]
    return np.array(low, dtype=float).reshape(n, n)


class _Moments:
    """Streaming count, mean and central second and fourth moments (shifted sums)."""

    def __init__(self):
        self.n = 0
        self.shift = None
        self.s = np.zeros(5)

    def add(self, x: np.ndarray) -> None:
        if x.size == 0:
            return
        if self.shift is None:
            self.shift = float(np.mean(x))
        d = x - self.shift
        d2 = d * d
        self.s += (x.size, d.sum(), d2.sum(), (d2 * d).sum(), (d2 * d2).sum())
        self.n += x.size

    def stats(self):
        n, s1, s2, s3, s4 = self.s
        m = s1 / n
        m2 = s2 / n - m * m
        m4 = s4 / n - 4 * m * s3 / n + 6 * m * m * s2 / n - 3 * m ** 4
        return self.shift + m, max(m2, 0.0), max(m4, 0.0)


def _sd_stderr(centred: np.ndarray, sd: float) -> float:
    n = centred.size
    m2 = float(np.mean(centred ** 2))
    m4 = float(np.mean(centred ** 4))
    return _delta_stderr(n, m2, m4, sd)


def _delta_stderr(n, m2, m4, sd) -> float:
    if sd <= 0:
        return 0.0
    return math.sqrt(max(m4 - m2 * m2, 0.0) / n) / (2.0 * sd)


class _Progress:
    """A one-line progress bar on stderr, only on a terminal and only after PROGRESS_AFTER s."""

    def __init__(self, total: int, label: str):
        self.total, self.label = total, label
        self.t0 = time.monotonic()
        self.enabled = bool(getattr(sys.stderr, "isatty", lambda: False)())
        self.shown = False

    def update(self, done: int) -> None:
        if not self.enabled or time.monotonic() - self.t0 < PROGRESS_AFTER:
            return
        width = 30
        full = int(width * done / max(self.total, 1))
        sys.stderr.write(f"\r{self.label} [{'#' * full}{'.' * (width - full)}] "
                         f"{done:,}/{self.total:,} paths")
        sys.stderr.flush()
        self.shown = True

    def close(self) -> None:
        if self.shown:
            sys.stderr.write("\n")
            sys.stderr.flush()


def _run(model, estimate, market, *, conditional: str = "auto",
         mean_route: str = "auto") -> DriverResult:
    """simulate_underlying; ``conditional="regression"`` forces the regression route and
    ``mean_route="simulation"`` simulated expected flows (tests)."""
    plan = _Plan(model)
    simulate = estimate is not None and estimate.method == "simulation"
    settings = estimate if simulate else DEFAULT
    validate.check(settings)         # paths and seed (ModelError)
    paths, seed = int(settings.paths), int(settings.seed)
    years = plan.years
    disc = np.asarray(market.discount_growth(years), dtype=float)
    later = years[years > 1]
    d1 = np.asarray(market.discount_growth(later - 1), dtype=float)
    route = "analytic" if plan.affine and conditional == "auto" else "regression"
    if not plan.uncertain:
        route = "analytic"   # nothing random: the flows are what the formula says

    # 1. Expected cash flows and V0: exact where the formula allows, else simulated.
    pv_stderr, fit, flow_cov = 0.0, None, None
    exact = plan.poly is not None and mean_route == "auto"
    if not plan.uncertain:
        env = plan.schedule_env(years)
        for i, x in enumerate(plan.stochastic):
            env[x.name] = np.exp(plan.log_mean(i, plan.y0[i], years) + plan.log_var(i, years) / 2)
        expected = np.broadcast_to(plan.cash_flow(env, "for the expected drivers"),
                                   years.shape).astype(float)
        how = "expected cash flows exact (no uncertain driver)"
    elif exact:
        expected = plan.exact_flows()
        how = "expected cash flows exact (formula a polynomial in the drivers; lognormal moments)"
        if simulate and route == "regression":
            _, _, fit = _simulate_paths(plan, paths, seed, later, d1, disc, need_fit=True,
                                        exact=expected)
    else:
        expected, cov, fit = _simulate_paths(plan, paths, seed, later, d1, disc,
                                             need_fit=simulate)
        pv_stderr = math.sqrt(max(float((1 / disc) @ cov @ (1 / disc)), 0.0))
        flow_cov = tuple(tuple(float(c) for c in row) for row in cov)
        how = f"expected cash flows from simulation, {paths} paths, seed {seed}"
    v0 = float(np.sum(expected / disc))
    flows = tuple((float(t), float(c)) for t, c in zip(years, expected))
    if not simulate:
        if flow_cov is None:
            return DriverResult(flows, v0, None, None, how, 0.0, 0, None, "")
        return DriverResult(flows, v0, None, None, how, pv_stderr, paths, seed, "",
                            flow_covariance=flow_cov)

    # 2. Volatility from the year-one values.
    if not plan.uncertain:
        raise ValuationError(
            "volatility estimate: no driver in the cash-flow formula is uncertain (every one is a "
            "schedule or has volatility 0), so the project value is certain; give a driver a "
            "volatility, or state underlying.volatility directly")
    if not v0 > 0:
        raise ValuationError(
            f"volatility estimate: the expected cash flows are worth {v0:,.4g} today (V0 at the "
            "discount rate); ln(V1/V0) needs a positive project value. Fix: check the formula's "
            "signs and fixed costs, or model the loss-making operation as a right (abandon, "
            "switch to idle)")
    mom = _Moments()
    low, nonpos, v1_sum = math.inf, 0, 0.0
    rows = plan.chunk_rows(max(len(later), 1))
    gen = plan.year_draws(seed, 1)
    bar = _Progress(paths, "volatility: year-one values")
    p = _n_terms(plan)
    grad_a, grad_s = np.zeros(p), np.zeros(p)   # for the fitting-error term
    done = 0
    while done < paths:
        c = min(rows, paths - done)
        y1 = plan.a[:, None] + plan.b[:, None] * plan.y0[:, None] + plan.shocks(
            gen.standard_normal((c, plan.d)))
        v1 = _cf1(plan, y1)
        phi = None
        if len(later):
            proxy = _proxy(plan, _later_means(plan, y1, later), later, d1)
            if route == "analytic":
                v1 = v1 + proxy      # exact: the formula is affine in the drivers
            else:
                phi = _basis(plan, y1, proxy, fit.proxy_scale)
                v1 = v1 + np.einsum("ci,i->c", phi, fit.coef)
        nonpos += int(np.count_nonzero(~(v1 > 0)))
        low = min(low, float(np.min(v1)))
        v1_sum += float(np.sum(v1))
        if not nonpos:
            r = np.log(v1 / v0)
            mom.add(r)
            if phi is not None:
                w = phi / v1[:, None]
                grad_a += np.einsum("c,ci->i", r - mom.shift, w)
                grad_s += w.sum(axis=0)
        done += c
        bar.update(done)
    bar.close()
    if nonpos:
        raise ValuationError(
            f"volatility estimate: the project value at year one (year-one cash flow plus the "
            f"expected value of the later flows) is zero or negative on {nonpos:,} of {paths:,} "
            f"simulated paths (lowest {low:,.4g}), so ln(V1/V0) is undefined there. Fix: check the "
            "formula's fixed costs and signs, model the loss-making operation as a right "
            "(abandon, switch to idle), or state underlying.volatility directly")
    mean, m2, m4 = mom.stats()
    sigma = math.sqrt(m2 * mom.n / (mom.n - 1))
    stderr = _delta_stderr(mom.n, m2, m4, sigma)
    if route == "analytic":
        cond = "analytic"
        err_how = "stderr: fourth-moment delta method"
    else:
        if len(later) and sigma > 0:
            g = (grad_a - (mean - mom.shift) * grad_s) / ((mom.n - 1) * sigma)
            stderr = math.hypot(stderr, math.sqrt(max(float(g @ fit.cov @ g), 0.0)))
        cond = (f"regression on year-one driver values, {p} terms, {fit.controls} control "
                "variates")
        err_how = "stderr: fourth-moment delta method plus fitting error"
    method = f"simulation, {paths} paths, seed {seed}, conditional expectation ({cond}); {err_how}"
    return DriverResult(flows, v0, sigma, stderr, method, pv_stderr, paths, seed, route,
                        v1_sum / paths, flow_cov)


def _later_means(plan, y1, later) -> dict:
    """E[X_{i,t} | year-one state] for every stochastic driver i and later year t: (c, len)."""
    return {i: _conditional_mean(plan, i, y1[i], later) for i in range(plan.d)}


def _conditional_mean(plan, i, y1, later) -> np.ndarray:
    """E[X_{i,t} | ln X_{i,1} = y1] for the later years t: (paths, len(later))."""
    tau = later - 1.0
    x = plan.stochastic[i]
    if x.process == "gbm":   # X_1 exp(drift tau): no exponential per path and year
        return np.exp(y1)[:, None] * np.exp(x.drift * tau)[None, :]
    return np.exp(plan.log_mean(i, y1[:, None], tau) + plan.log_var(i, tau) / 2)


def _proxy(plan, means, later, d1) -> np.ndarray:
    """Sum over later years of the (after-tax) formula at the conditional means, discounted to
    year one: exactly E[later flows | year one] when the formula is affine and untaxed."""
    env = plan.schedule_env(later)
    for i, x in enumerate(plan.stochastic):
        env[x.name] = means[i]
    cf = plan.cash_flow(env, "for the expected later drivers")
    return np.sum(np.broadcast_to(cf, (means[0].shape[0] if means else 1, len(later))) / d1,
                  axis=1)


def _cf1(plan, y1) -> np.ndarray:
    """Year-one cash flow on each path (0 when the flows start later)."""
    c = y1.shape[1]
    if plan.years[0] > 1:
        return np.zeros(c)
    env = plan.schedule_env(1.0)
    for i, x in enumerate(plan.stochastic):
        env[x.name] = np.exp(y1[i])
    return np.broadcast_to(plan.cash_flow(env, "in year 1"), (c,)).astype(float)


@dataclass
class _Fit:
    coef: np.ndarray        # coefficients of the basis (control columns dropped)
    cov: np.ndarray         # their covariance (homoscedastic least-squares formula)
    controls: int
    proxy_scale: float


def _degree(plan) -> int:
    return 2 if len(plan.uncertain) <= 6 else 1


def _n_terms(plan) -> int:
    k = len(plan.uncertain)
    return math.comb(k + _degree(plan), _degree(plan)) + k + 1


def _basis(plan, y1, proxy, proxy_scale) -> np.ndarray:
    """(c, terms) regression basis in the year-one state.

    Terms: a polynomial of total degree _degree in the standardised logs z_i = (ln X_i1 - mean)/sd
    (standard normal); each standardised value (X_i1 - mean)/sd; and the proxy (the formula at the
    conditional means, discounted), which carries the shape of the cash flow so that the
    polynomial only corrects it. Low degree and log terms keep the fit tame in the sparse tails.
    Means and standard deviations are analytic: the basis is fixed before any path is drawn.
    """
    logs, values = [], []
    for i in plan.uncertain:
        m, v = float(plan.log_mean(i, plan.y0[i], 1.0)), float(plan.log_var(i, 1.0))
        logs.append((y1[i] - m) / math.sqrt(v))
        mean = math.exp(m + v / 2)
        values.append((np.exp(y1[i]) - mean) / (mean * math.sqrt(math.expm1(v))))
    out = [np.ones(y1.shape[1])]
    for deg in range(1, _degree(plan) + 1):
        for combo in combinations_with_replacement(range(len(logs)), deg):
            term = logs[combo[0]].copy()
            for j in combo[1:]:
                term *= logs[j]
            out.append(term)
    out.extend(values)
    out.append(proxy / proxy_scale)
    return np.stack(out, axis=1)


SENS_GROUPS = 3   # sensitivity-weighted control columns per driver (consecutive year groups)


def _control_weights(plan, later, d1) -> dict:
    """Per uncertain driver, a (len(later), columns) weight matrix for the control variates.

    Columns: the driver's discounted noise weighted by the cash flow's sensitivity to it (finite
    difference at the expected drivers), in up to SENS_GROUPS consecutive groups of years, plus the
    plain discounted noise. Any weights give valid controls; these make them track the cash flow.
    """
    env = plan.schedule_env(later)
    means = {}
    for i, x in enumerate(plan.stochastic):
        means[i] = np.exp(plan.log_mean(i, plan.y0[i], later) + plan.log_var(i, later) / 2)
        env[x.name] = means[i]
    groups = [g for g in np.array_split(np.arange(len(later)), min(SENS_GROUPS, len(later)))
              if g.size]
    out = {}
    for i in plan.uncertain:
        name = plan.stochastic[i].name
        h = 1e-4 * means[i]
        up, down = dict(env), dict(env)
        up[name], down[name] = means[i] + h, means[i] - h
        sens = (np.broadcast_to(plan.formula.evaluate(up), later.shape)
                - np.broadcast_to(plan.formula.evaluate(down), later.shape)) / (2 * h)
        sens = np.where(np.isfinite(sens), sens, 0.0) * (1 - plan.tax)
        cols = []
        for g in groups:
            w = np.zeros(len(later))
            w[g] = sens[g] / d1[g]
            cols.append(w)
        cols.append(1.0 / d1)
        weights = np.stack(cols, axis=1)
        spread = means[i] * np.sqrt(np.expm1(plan.log_var(i, later)))   # size of the noise
        size = np.abs(weights).T @ spread
        keep = size > 0
        out[i] = weights[:, keep] / size[keep]
    return out


def _controls(plan, y1, xs_later, means, weights) -> np.ndarray:
    """Control variates with zero mean given the year-one state: weighted sums over the later
    years of X_t - E[X_t | year one] for each uncertain driver."""
    cols = []
    for i in plan.uncertain:
        noise = xs_later[i] - means[i]
        w = weights[i]
        cols.extend(np.einsum("ct,t->c", noise, w[:, j]) for j in range(w.shape[1]))
    return np.stack(cols, axis=1)


def _simulate_paths(plan, paths, seed, later, d1, disc, need_fit, exact=None):
    """Pass over full paths: mean cash flow per year, the covariance matrix of those means
    (sample covariance of a path's flows across years, over the path count), regression fit.

    The regression of the discounted later flows on the year-one basis also takes control
    variates (driver noise after year one, zero mean given the year-one state): they leave the
    conditional expectation unchanged and remove most of the noise from the fit. With ``exact``
    expected flows, the intercept is moved so that the fitted conditional expectation averages,
    over the year-one states drawn, to the exact expectation of the discounted later flows (a
    known mean): then the mean of V1 is V0 G(1) for the exact V0, up to the sampling noise of the
    year-one cash flow alone.
    """
    years = plan.years
    cols = {int(t): j for j, t in enumerate(years)}
    later_mask = years > 1
    fit_it = need_fit and len(later) > 0
    weights = _control_weights(plan, later, d1) if fit_it else {}
    sched = plan.schedule_env(years)
    p = _n_terms(plan)
    q = sum(w.shape[1] for w in weights.values())
    rows = plan.chunk_rows(len(years) + (p + q) // 2)
    gens = [plan.year_draws(seed, t) for t in range(1, plan.horizon + 1)]
    shift = None
    total, dev_sum = np.zeros(len(years)), np.zeros(len(years))
    gram_cf = np.zeros((len(years), len(years)))
    phi_sum = np.zeros(p)
    gram, rhs, yy = np.zeros((p + q, p + q)), np.zeros(p + q), 0.0
    proxy_scale = 1.0
    if fit_it:
        expected_means = {i: np.exp(plan.log_mean(i, plan.y0[i], 1.0)
                                    + plan.log_var(i, 1.0) / 2) * np.ones((1, 1))
                          for i in range(plan.d)}
        y_mid = np.log(np.array([[float(expected_means[i][0, 0])] for i in range(plan.d)]))
        proxy_scale = max(abs(float(_proxy(plan, _later_means(plan, y_mid, later), later,
                                           d1)[0])), 1e-12)
    bar = _Progress(paths, "simulating drivers")
    done = 0
    while done < paths:
        c = min(rows, paths - done)
        y = np.broadcast_to(plan.y0[:, None], (plan.d, c)).copy()
        logs = np.empty((plan.d, c, len(years)))
        y1 = None
        for t in range(1, plan.horizon + 1):
            y = plan.a[:, None] + plan.b[:, None] * y + plan.shocks(
                gens[t - 1].standard_normal((c, plan.d)))
            if t == 1:
                y1 = y.copy()
            if t in cols:
                logs[:, :, cols[t]] = y
        env = dict(sched)
        xs = {}
        for i, x in enumerate(plan.stochastic):
            xs[i] = env[x.name] = np.exp(logs[i])
        del logs
        cf = np.broadcast_to(plan.cash_flow(env, "on a simulated path"), (c, len(years)))
        if shift is None:
            shift = cf.mean(axis=0)
        total += cf.sum(axis=0)
        dev = cf - shift          # shifted sums for the covariance: no cancellation
        dev_sum += dev.sum(axis=0)
        gram_cf += np.einsum("ci,cj->ij", dev, dev)
        if fit_it:
            target = np.sum(cf[:, later_mask] / d1, axis=1)
            means = _later_means(plan, y1, later)
            xs_later = {i: xs[i][:, later_mask] for i in plan.uncertain}
            phi = _basis(plan, y1, _proxy(plan, means, later, d1), proxy_scale)
            phi_sum += phi.sum(axis=0)
            design = np.hstack([phi, _controls(plan, y1, xs_later, means, weights)])
            # einsum, not BLAS: fixed summation order, and no thread spin under load
            gram += np.einsum("ci,cj->ij", design, design)
            rhs += np.einsum("ci,c->i", design, target)
            yy += float(np.einsum("c,c->", target, target))
        done += c
        bar.update(done)
    bar.close()
    expected = total / paths
    mean_dev = dev_sum / paths
    cov = (gram_cf / paths - np.outer(mean_dev, mean_dev)) * (paths / (paths - 1)) / paths
    fit = None
    if need_fit:
        if fit_it:
            coef, _, rank, _ = np.linalg.lstsq(gram, rhs, rcond=1e-12)
            rss = max(yy - float(coef @ rhs), 0.0)
            inv = np.linalg.pinv(gram, rcond=1e-12)
            coef = coef[:p].copy()
            if exact is not None:   # intercept: the fit averages to the exact mean of the target
                coef[0] += float(np.sum(exact[later_mask] / d1)) - float(phi_sum @ coef) / paths
            fit = _Fit(coef, rss / max(paths - rank, 1) * inv[:p, :p], q, proxy_scale)
        else:
            fit = _Fit(np.zeros(p), np.zeros((p, p)), 0, proxy_scale)
    return expected, cov, fit


__all__ = ["DriverResult", "simulate_underlying", "history_volatility", "correlation_matrix",
           "check_model", "FormulaError"]
