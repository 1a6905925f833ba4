"""Outside references for the tests: closed forms and QuantLib, each with its source.

Continuous yearly rates throughout (QuantLib's FlatForward default; our ``compounding:
continuous``).
"""
from __future__ import annotations

import math

from realopt.model import (Abandon, Defer, Expand, Investment, LatticeSpec, Market, Project,
                           Schedule, Underlying)


def norm_cdf(x: float) -> float:
    return 0.5 * (1.0 + math.erf(x / math.sqrt(2.0)))


def bsm(kind: str, s: float, k: float, r: float, q: float, sigma: float, t: float) -> float:
    """Black-Scholes-Merton European call/put with continuous payout yield q (Merton 1973)."""
    d1 = (math.log(s / k) + (r - q + 0.5 * sigma ** 2) * t) / (sigma * math.sqrt(t))
    d2 = d1 - sigma * math.sqrt(t)
    if kind == "call":
        return s * math.exp(-q * t) * norm_cdf(d1) - k * math.exp(-r * t) * norm_cdf(d2)
    return k * math.exp(-r * t) * norm_cdf(-d2) - s * math.exp(-q * t) * norm_cdf(-d1)


def perpetual_invest(v: float, i: float, r: float, q: float, sigma: float):
    """McDonald & Siegel (1986), Dixit & Pindyck (1994, ch. 5): perpetual option to invest I in a
    project worth V with payout yield q. Returns (value A V^beta, threshold V*)."""
    a = (r - q) / sigma ** 2
    beta = 0.5 - a + math.sqrt((a - 0.5) ** 2 + 2.0 * r / sigma ** 2)
    v_star = beta / (beta - 1.0) * i
    big_a = (v_star - i) / v_star ** beta
    return (big_a * v ** beta if v < v_star else v - i), v_star


def perpetual_put(v: float, k: float, r: float, q: float, sigma: float):
    """Merton (1973): perpetual American put (here: abandonment for salvage K). Returns
    (value, exercise threshold V*), gamma the negative root of the fundamental quadratic."""
    a = (r - q) / sigma ** 2
    gamma = 0.5 - a - math.sqrt((a - 0.5) ** 2 + 2.0 * r / sigma ** 2)
    v_star = gamma / (gamma - 1.0) * k
    return ((k - v_star) * (v / v_star) ** gamma if v > v_star else k - v), v_star


def quantlib_binomial(kind, s, k, r, q, sigma, t, steps, american=True, pin_p=None):
    """QuantLib's BinomialVanillaEngine("crr") (PyPI package QuantLib).

    QuantLib's CRR branch probability is 1/2 + (r - q - sigma^2/2) sqrt(dt) / (2 sigma); with
    ``pin_p`` it is handed the payout yield q' = r - sigma^2/2 - (2p - 1) sigma / sqrt(dt) that makes
    it equal to ours (docs/design.md, section 4), so both trees are the same tree."""
    import QuantLib as ql

    today = ql.Date(15, 1, 2026)
    ql.Settings.instance().evaluationDate = today
    dc = ql.Actual365Fixed()
    days = int(round(365 * t))
    maturity = today + days
    dt = days / 365.0 / steps
    if pin_p is not None:
        q = r - 0.5 * sigma ** 2 - (2.0 * pin_p - 1.0) * sigma / math.sqrt(dt)
    spot = ql.QuoteHandle(ql.SimpleQuote(s))
    rts = ql.YieldTermStructureHandle(ql.FlatForward(today, r, dc))
    qts = ql.YieldTermStructureHandle(ql.FlatForward(today, q, dc))
    vol = ql.BlackVolTermStructureHandle(ql.BlackConstantVol(today, ql.NullCalendar(), sigma, dc))
    process = ql.BlackScholesMertonProcess(spot, qts, rts, vol)
    payoff = ql.PlainVanillaPayoff(ql.Option.Call if kind == "call" else ql.Option.Put, k)
    exercise = ql.AmericanExercise(today, maturity) if american else ql.EuropeanExercise(maturity)
    option = ql.VanillaOption(payoff, exercise)
    option.setPricingEngine(ql.BinomialVanillaEngine(process, "crr", steps))
    return option.NPV()


def pv_project(right, v0=100.0, r=0.05, q=0.0, sigma=0.3, steps_per_year=100, cost=100.0,
               compounding="continuous", discount=0.10):
    """A project in the ``present_value`` form with one right (continuous rates)."""
    return Project(
        name="reference case", market=Market(r, discount, compounding),
        underlying=Underlying(present_value=v0, payout_yield=q, volatility=sigma),
        investment=Investment(((0.0, cost),)), rights=(right,) if right else (),
        lattice=LatticeSpec(steps_per_year=steps_per_year))


def abandon(t=1.0, salvage=100.0, exercise="american", dates=()):
    return Abandon(name="sell out", window=(0.0, t), exercise=exercise, dates=dates,
                   salvage=Schedule.constant(salvage))


def expand(t=1.0, scale=0.5, cost=60.0, exercise="american", dates=()):
    return Expand(name="add capacity", window=(0.0, t), exercise=exercise, dates=dates,
                  scale=scale, cost=Schedule.constant(cost))


def defer(t=1.0, cost=None, exercise="american", dates=()):
    return Defer(name="wait", window=(0.0, t), exercise=exercise, dates=dates,
                 cost=None if cost is None else Schedule.constant(cost))
