"""The operating project as an asset: DCF value V0, payout schedule, volatility.

Conventions: years from today; ``market.compounding`` applies to the discount rate; cash flows
are paid at their dates (t > 0); the terminal value is paid with the last forecast year's flow.

The lattice treats the base project value V as a traded-asset equivalent that pays, at each
cash-flow date t_k, the fraction ``delta_k = CF_k / W_k`` of its value just before the flow, where
``W_k`` is the value at t_k of the flows from t_k on (proportional payout keeps the tree
recombining). In the ``present_value`` form the asset pays a continuous yield instead.
"""
from __future__ import annotations

from dataclasses import dataclass
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

    @property
    def has_flows(self) -> bool:
        return bool(self.flow_times)


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
    flows = underlying.cash_flows
    est = underlying.volatility_estimate
    if underlying.drivers is not None:
        from . import drivers

        sim = drivers.simulate_underlying(underlying.drivers, est, market)
        flows = sim.cash_flows
        if est is not None and est.method == "simulation":
            vol, stderr, method = sim.volatility, sim.volatility_stderr, sim.method
    if est is not None and est.method == "history":
        from . import drivers

        vol, stderr = drivers.history_volatility(est.file, est.column, est.periods_per_year)
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
    return ResolvedUnderlying(
        present_value=v0, flow_times=tuple(times.tolist()), cash_flows=tuple(cfs.tolist()),
        payout=tuple(delta.tolist()), payout_yield=0.0, volatility=vol,
        volatility_stderr=stderr, volatility_method=method, last_flow_year=float(times[-1]))


def resolve(project: Project) -> ResolvedUnderlying:
    """DCF value, payout schedule and volatility of the project's operating asset (memoised)."""
    return _resolve(project.underlying, project.market)
