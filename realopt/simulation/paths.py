"""Driver paths for the simulation valuation, on any set of dates, with exact transitions.

Every stochastic driver moves in logs, y = ln X, as a Gaussian process with a deterministic mean
m(t) and decay e^{-speed h} over a step of h years (speed 0 for gbm):

    y(t+h) = m(t+h) + (y(t) - m(t)) e^{-speed h} + eps,
    cov(eps_i, eps_j) = rho_ij vol_i vol_j (1 - e^{-(k_i+k_j) h}) / (k_i + k_j)   (h when k_i+k_j=0)

which is exact (no discretisation error) for both processes. The mean m(t) depends on the measure:

* real world: gbm m(t) = ln X0 + (drift - vol^2/2) t; mean_reverting m(t) = ln L + (ln X0 - ln L)
  e^{-speed t} (L = long_run);
* risk-neutral ``drift: mu``: gbm m(t) = ln X0 + (mu - vol^2/2) t;
* ``risk_premium: lambda``: the drift of ln X falls by lambda vol (gbm), the long-run level of
  ln X by lambda vol / speed (mean_reverting; with speed 0 the drift falls by lambda vol);
* ``forward: {year: F}``: m(t) = ln F(t) - v(t)/2 with v(t) the variance of y(t), so that
  E*[X_t] = F(t) exactly at every t (for mean_reverting this is Schwartz's 1997 one-factor model
  with theta(t) fitted to the curve). F(0) = start, log-linear between points, flat beyond.

Randomness: one PCG64 generator per (seed, stream); the normals of date k are drawn after those of
date k-1, shape (drivers, paths) or half of it with antithetic pairs (path j and j + n/2 use z and
-z). The same seed, stream and path count give the same numbers; the real-world paths reuse the
risk-neutral valuing stream (common random numbers).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..drivers import _cholesky_psd, correlation_matrix
from ..errors import ValuationError
from ..model import DriverModel

STREAMS = {"fit": 1, "value": 2, "upper": 3, "inner": 4, "control": 5}


@dataclass(frozen=True)
class Dynamics:
    """Stochastic drivers of a model under one measure (arrays over drivers)."""

    names: tuple[str, ...]
    y0: np.ndarray
    vol: np.ndarray
    speed: np.ndarray
    corr: np.ndarray
    measure: str
    _means: tuple          # per driver: callable t -> m(t)

    def mean(self, t: float) -> np.ndarray:
        """m(t): the mean of ln X_t (unconditional, from today)."""
        return np.array([f(float(t)) for f in self._means], dtype=float)

    def step_cov(self, h: float) -> np.ndarray:
        k = self.speed[:, None] + self.speed[None, :]
        safe = np.where(k > 0, k, 1.0)
        w = np.where(k > 0, -np.expm1(-k * h) / safe, h)
        return self.corr * np.outer(self.vol, self.vol) * w


def _variance(vol: float, speed: float, t: float) -> float:
    if speed == 0:
        return vol * vol * t
    return vol * vol * -math.expm1(-2 * speed * t) / (2 * speed)


def forward_curve(start: float, points) -> callable:
    """ln F(t): log-linear through (0, start) and ``points``, flat beyond the last."""
    xs = [0.0] + [float(y) for y, _ in points]
    ys = [math.log(start)] + [math.log(f) for _, f in points]
    return lambda t: float(np.interp(t, xs, ys))


def _mean_function(d, measure: str):
    y0, s, k = math.log(d.start), d.volatility, (d.speed if d.process == "mean_reverting" else 0.)
    rn = d.risk_neutral
    if measure == "risk_neutral" and rn is None:
        raise ValuationError(f"driver '{d.name}' has no risk_neutral description; give one of "
                             "forward, drift or risk_premium")
    if measure == "risk_neutral" and rn.kind == "forward":
        lnf = forward_curve(d.start, rn.forward)
        return lambda t: lnf(t) - 0.5 * _variance(s, k, t)
    lam = rn.value if (measure == "risk_neutral" and rn.kind == "risk_premium") else 0.0
    if d.process == "gbm":
        mu = rn.value if (measure == "risk_neutral" and rn.kind == "drift") else d.drift - lam * s
        return lambda t: y0 + (mu - 0.5 * s * s) * t
    if k == 0:
        return lambda t: y0 - lam * s * t
    theta = math.log(d.long_run) - lam * s / k
    return lambda t: theta + (y0 - theta) * math.exp(-k * t)


def dynamics(model: DriverModel, measure: str = "risk_neutral") -> Dynamics:
    """The stochastic drivers of ``model`` under ``measure`` (risk_neutral | real_world)."""
    names, corr = correlation_matrix(model)
    by = {d.name: d for d in model.drivers}
    ds = [by[n] for n in names]
    return Dynamics(
        names=tuple(names),
        y0=np.array([math.log(d.start) for d in ds]),
        vol=np.array([d.volatility for d in ds], dtype=float),
        speed=np.array([d.speed if d.process == "mean_reverting" else 0.0 for d in ds]),
        corr=corr, measure=measure, _means=tuple(_mean_function(d, measure) for d in ds))


def generator(seed: int, stream: str, extra: int = 0) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(
        [int(seed), STREAMS[stream], int(extra)])))


def simulate(dyn: Dynamics, times, paths: int, seed: int, stream: str,
             antithetic: bool = True, dtype=np.float64) -> np.ndarray:
    """Driver values X[k, i, j] at ``times[k]`` (times[0] = 0), driver i, path j.

    ``paths`` must be even with ``antithetic``. Memory: len(times) * drivers * paths * 8 bytes.
    """
    times = np.asarray(times, dtype=float)
    d, T = len(dyn.names), len(times)
    out = np.empty((T, d, paths), dtype=dtype)
    if d == 0:
        return out
    half = paths // 2 if antithetic else paths
    if antithetic and paths % 2:
        raise ValuationError("internal: antithetic paths need an even number of paths")
    gen = generator(seed, stream)
    y = np.repeat(dyn.y0[:, None], paths, axis=1)
    zbuf = np.empty((d, half))
    out[0] = np.exp(y)
    means = np.array([dyn.mean(t) for t in times])          # (T, d)
    chol_cache: dict = {}
    for k in range(1, T):
        h = float(times[k] - times[k - 1])
        key = round(h, 12)
        if key not in chol_cache:
            chol_cache[key] = _cholesky_psd(dyn.step_cov(h))
        L = chol_cache[key]
        gen.standard_normal(out=zbuf)
        decay = np.exp(-dyn.speed * h)
        y -= means[k - 1][:, None]
        y *= decay[:, None]
        y += means[k][:, None]
        for i in range(d):                  # y += L z, a fixed order of sums, no BLAS
            for j in range(i + 1):
                if L[i, j] != 0.0:
                    step = L[i, j] * zbuf[j]
                    y[i, :half] += step
                    if antithetic:
                        y[i, half:] -= step         # the antithetic path takes -z
        np.exp(y, out=out[k])
    return out


def one_step(dyn: Dynamics, t0: float, t1: float, x0: np.ndarray, z: np.ndarray) -> np.ndarray:
    """X at t1 from X at t0 (drivers x m) with independent normals z (drivers x m)."""
    h = float(t1 - t0)
    L = _cholesky_psd(dyn.step_cov(h))
    decay = np.exp(-dyn.speed * h)
    y = dyn.mean(t1)[:, None] + (np.log(x0) - dyn.mean(t0)[:, None]) * decay[:, None] + L @ z
    return np.exp(y)


def one_step_mean(dyn: Dynamics, t0: float, t1: float, x0: np.ndarray) -> np.ndarray:
    """E[X_t1 | X_t0 = x0] (drivers x m), exact for the lognormal transition."""
    h = float(t1 - t0)
    var = np.diag(dyn.step_cov(h))
    decay = np.exp(-dyn.speed * h)
    y = dyn.mean(t1)[:, None] + (np.log(x0) - dyn.mean(t0)[:, None]) * decay[:, None]
    return np.exp(y + 0.5 * var[:, None])


def change_measure(x: np.ndarray, times, src: Dynamics, dst: Dynamics) -> np.ndarray:
    """The paths ``x`` simulated under ``src`` moved to ``dst`` with the same normals: the
    deviation y(t) - m(t) follows the same recursion under both measures, so
    X_dst = X_src exp(m_dst(t) - m_src(t)) exactly (in place; returns x)."""
    for k, t in enumerate(np.asarray(times, dtype=float)):
        shift = np.exp(dst.mean(t) - src.mean(t))
        x[k] *= shift[:, None]
    return x


def expected(dyn: Dynamics, t: float) -> np.ndarray:
    """E[X_t] from today under the measure of ``dyn``: exp(m(t) + v(t)/2)."""
    v = np.array([_variance(s, k, float(t)) for s, k in zip(dyn.vol, dyn.speed)])
    return np.exp(dyn.mean(t) + 0.5 * v)
