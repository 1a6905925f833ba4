"""The operating project as an asset: DCF value V0, payout schedule, volatility.

Conventions: years from today; ``market.compounding`` applies to the discount rate; cash flows
are paid at their dates (t > 0); the terminal value is paid with the last forecast year's flow.

The lattice treats the base project value V as a traded-asset equivalent that pays, at each
cash-flow date t_k, the fraction ``delta_k = CF_k / W_k`` of its value just before the flow, where
``W_k`` is the value at t_k of the flows from t_k on (proportional payout keeps the tree
recombining). In the ``present_value`` form the asset pays a continuous yield instead.

``flow_timing: spread``: each year's flow accrues at a constant rate over the period before its
date (from the previous date; the first over one spacing before it), so V0 is the value of those
streams at the discount intensity (ln(1 + k) for annual compounding) and the lattice pays, at each
step, what accrued since the previous step (see ``ResolvedUnderlying.accrued``).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace
from functools import lru_cache

import numpy as np

from .errors import ValuationError
from .model import Market, Project, Underlying


@dataclass(frozen=True)
class ResolvedUnderlying:
    """What the lattice needs to know about the operating project."""

    present_value: float
    flow_times: tuple[float, ...]       # cash-flow dates (years); empty for the present_value form
    cash_flows: tuple[float, ...]       # expected flows at those dates (terminal value included)
    payout: tuple[float, ...]           # delta_k: fraction of value paid out at each date
    payout_yield: float                 # continuous yearly yield (present_value form)
    volatility: float | None
    volatility_stderr: float | None
    volatility_method: str
    last_flow_year: float | None        # None for the present_value form
    timing: str = "at_dates"            # "at_dates" | "spread"
    period_start: float = 0.0           # start of the first flow's accrual period (years)
    terminal_value: float = 0.0
    intensity: float = 0.0              # continuous discount intensity of discount_rate
    present_value_stderr: float | None = None   # simulated V0's standard error; None: exact

    @property
    def has_flows(self) -> bool:
        return bool(self.flow_times)

    def periods(self):
        """(start, end, amount) of each flow's accrual period: from the previous date (the first
        from ``period_start``) to its date."""
        starts = (self.period_start,) + self.flow_times[:-1]
        amounts = list(self.cash_flows)
        amounts[-1] -= self.terminal_value
        return list(zip(starts, self.flow_times, amounts))

    def value_after(self, t, tv_date=None):
        """``spread`` form: value at t (array, years) of the flows after t, at the discount rate,
        with the terminal value paid at ``tv_date`` (default the last date). Each flow accrues at
        a constant rate over its period."""
        tv_date = self.last_flow_year if tv_date is None else tv_date
        return stream_value_after(self.periods(), self.intensity, t, self.terminal_value, tv_date)

    def accrued(self, t0, t1):
        """``spread`` form: value at t1 of the flows accruing over (t0, t1] (arrays, years),
        compounded to t1 at the discount intensity."""
        return stream_accrued(self.periods(), self.intensity, t0, t1)


def stream_value_after(periods, rho: float, t, terminal: float = 0.0, tv_date: float = 0.0):
    """Value at t (array, years) of uniform streams ((start, end, amount) each) after t, at
    continuous intensity rho, plus ``terminal`` paid at ``tv_date`` if that is after t."""
    t = np.asarray(t, float)
    out = np.where(t < tv_date - 1e-12, terminal * np.exp(-rho * (tv_date - t)), 0.0)
    for a, b, amount in periods:
        c = amount / (b - a)
        x = np.maximum(a, t)
        out = out + np.where(b > x, c * np.exp(-rho * (x - t)) * _integral(-rho, b - x), 0.0)
    return out


def stream_accrued(periods, rho: float, t0, t1):
    """Value at t1 of what uniform streams ((start, end, amount) each) pay over (t0, t1],
    compounded to t1 at continuous intensity rho (arrays, years)."""
    t0, t1 = np.asarray(t0, float), np.asarray(t1, float)
    out = np.zeros(np.broadcast(t0, t1).shape)
    for a, b, amount in periods:
        c = amount / (b - a)
        lo, hi = np.maximum(a, t0), np.minimum(b, t1)
        out = out + np.where(hi > lo, c * np.exp(rho * (t1 - hi)) * _integral(
            rho, np.maximum(hi - lo, 0.0)), 0.0)
    return out


def _integral(rho: float, length):
    """Integral of exp(rho s) for s in [0, length] (length array; rho may be 0)."""
    length = np.asarray(length, float)
    if rho == 0.0:
        return length
    return np.expm1(rho * length) / rho


def intensity(rate: float, compounding: str) -> float:
    """Continuous yearly intensity equivalent to ``rate`` under ``compounding``."""
    return math.log1p(rate) if compounding == "annual" else rate


def accrual_start(times) -> float:
    """Start of the first flow's accrual period: one spacing before it (a year for a single
    flow), not before today."""
    spacing = times[1] - times[0] if len(times) > 1 else 1.0
    return max(0.0, times[0] - spacing)


def payout_schedule(flows, terminal_value: float, market: Market):
    """V0 and payout fractions of ``flows`` ((year, cf), sorted by year, year > 0).

    W_k = CF_k + W_{k+1} / G(t_{k+1} - t_k) with G the discount-rate growth; delta_k = CF_k/W_k
    (the last fraction is 1: everything remaining is paid out). Raises ValuationError when a
    remaining value W_k is not positive (the proportional-payout lattice needs V > 0).
    """
    times = np.array([t for t, _ in flows], dtype=float)
    cfs = np.array([c for _, c in flows], dtype=float)
    cfs[-1] += terminal_value
    remaining = np.empty_like(cfs)
    acc = 0.0
    for k in range(len(cfs) - 1, -1, -1):      # a loop over forecast years, not lattice nodes
        nxt = times[k + 1] - times[k] if k + 1 < len(cfs) else 0.0
        acc = cfs[k] + (acc / float(market.discount_growth(nxt)) if k + 1 < len(cfs) else 0.0)
        if not acc > 0:
            raise ValuationError(
                f"The expected cash flows from year {times[k]:g} on are worth {acc:,.4g} at that "
                "date (at the discount rate); the lattice of project value needs this remaining "
                "value to be positive at every cash-flow date. Fix: check the signs of the later "
                "cash flows, add a terminal_value, or model the loss-making tail as a right "
                "(abandon or switch to an idle mode)."
            )
        remaining[k] = acc
    v0 = remaining[0] / float(market.discount_growth(times[0]))
    return float(v0), times, cfs, cfs / remaining


@lru_cache(maxsize=64)
def _resolve(underlying: Underlying, market: Market) -> ResolvedUnderlying:
    vol, stderr, method = underlying.volatility, None, "given in the project file"
    flows, sim = underlying.cash_flows, None
    est = underlying.volatility_estimate
    if underlying.drivers is not None:
        from . import drivers

        sim = drivers.simulate_underlying(underlying.drivers, est, market)
        flows = sim.cash_flows
        if est is not None and est.method == "simulation":
            vol, stderr, method = sim.volatility, sim.volatility_stderr, sim.method
    if est is not None and est.method == "history":
        from . import drivers

        vol, stderr = est.resolved or drivers.history_volatility(est.file, est.column,
                                                                 est.periods_per_year)
        method = (f"history: annualised standard deviation of log returns of '{est.column}' "
                  f"in {est.file} ({est.periods_per_year:g} periods a year)")
    if underlying.present_value is not None and not flows:
        return ResolvedUnderlying(
            present_value=float(underlying.present_value), flow_times=(), cash_flows=(),
            payout=(), payout_yield=float(underlying.payout_yield), volatility=vol,
            volatility_stderr=stderr, volatility_method=method, last_flow_year=None)
    flows = tuple(sorted((float(t), float(c)) for t, c in flows))
    if not flows:
        raise ValuationError("The project has no cash flows and no present_value to value.")
    v0, times, cfs, delta = payout_schedule(flows, float(underlying.terminal_value), market)
    res = ResolvedUnderlying(
        present_value=v0, flow_times=tuple(times.tolist()), cash_flows=tuple(cfs.tolist()),
        payout=tuple(delta.tolist()), payout_yield=0.0, volatility=vol,
        volatility_stderr=stderr, volatility_method=method, last_flow_year=float(times[-1]),
        timing=underlying.flow_timing, period_start=accrual_start(times),
        terminal_value=float(underlying.terminal_value),
        intensity=intensity(market.discount_rate, market.compounding))
    if res.timing == "spread":
        v0 = float(res.value_after(0.0))
        if not v0 > 0:
            raise ValuationError(f"The expected cash flows are worth {v0:,.4g} today; the lattice "
                                 "of project value needs a positive value.")
        res = replace(res, present_value=v0, payout=())
    if sim is not None and sim.flow_covariance is not None:   # V0 is linear in the mean flows
        res = replace(res, present_value_stderr=sim.stderr_of(
            [float(stream_value_after([(a, b, 1.0)], res.intensity, 0.0)) for a, b, _ in
             res.periods()] if res.timing == "spread" else 1 / market.discount_growth(times)))
    return res


def resolve(project: Project) -> ResolvedUnderlying:
    """DCF value, payout schedule and volatility of the project's operating asset (memoised)."""
    return _resolve(project.underlying, project.market)
