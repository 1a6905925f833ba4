"""The validated project: frozen dataclasses shared by every stage.

Conventions used everywhere in realopt:

* time ``t`` is in years from today (t = 0 is the valuation date);
* rates are yearly; ``compounding`` says whether a rate ``r`` grows money by ``(1 + r)**t``
  (``annual``) or ``exp(r * t)`` (``continuous``), and applies to both the risk-free and the
  discount rate;
* cash flows are paid at their dates; a decision at a date is taken after that date's cash flow;
* money amounts are in the project's ``currency`` and ``unit`` (display only).

Nothing here reads files or solves anything: the loader builds these objects, the later stages read
them.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import ClassVar, Mapping

import numpy as np

COMPOUNDING = ("annual", "continuous")
EXERCISE = ("american", "european", "bermudan")
FLOW_TIMING = ("at_dates", "spread")
VALUATION = ("lattice", "simulation")
RISK_NEUTRAL = ("forward", "drift", "risk_premium")


def growth_factor(rate: float, years, compounding: str):
    """Money growth over ``years`` at yearly ``rate``: (1+r)**t (annual) or exp(r*t)."""
    years = np.asarray(years, dtype=float)
    if compounding == "continuous":
        return np.exp(rate * years)
    return (1.0 + rate) ** years


@dataclass(frozen=True)
class Schedule:
    """A money amount that may depend on the date t (years).

    Three forms: a constant; ``points`` (year, value) pairs, linear between them and flat beyond
    the first and last; or ``start * (1 + growth)**t``. ``today`` (set by the valuation, never
    by the loader) replaces the value at t = 0 only: a defer right commits today at the
    investment's present value whatever its cost schedule says for later dates.
    """

    points: tuple[tuple[float, float], ...] = ((0.0, 0.0),)
    start: float | None = None
    growth: float = 0.0
    formula: str | None = None      # money as a formula over the drivers (valuation: simulation)
    today: float | None = None

    @classmethod
    def constant(cls, value: float) -> "Schedule":
        return cls(points=((0.0, float(value)),))

    @classmethod
    def from_points(cls, mapping: Mapping[float, float]) -> "Schedule":
        pts = tuple(sorted((float(k), float(v)) for k, v in mapping.items()))
        if not pts:
            raise ValueError("a schedule needs at least one (year, value) point")
        return cls(points=pts)

    @classmethod
    def compound(cls, start: float, growth: float) -> "Schedule":
        return cls(start=float(start), growth=float(growth))

    def at(self, t):
        """Value at date(s) t (years); returns a float for a scalar t."""
        t = np.asarray(t, dtype=float)
        if self.start is not None:
            out = self.start * (1.0 + self.growth) ** t
        else:
            xs = [p[0] for p in self.points]
            ys = [p[1] for p in self.points]
            out = np.interp(t, xs, ys)
        if self.today is not None:
            out = np.where(np.abs(t) < 1e-12, self.today, out)
        return float(out) if out.ndim == 0 else out

    @property
    def is_constant(self) -> bool:
        return self.start is None and self.today is None and len(
            {v for _, v in self.points}) == 1

    @classmethod
    def from_formula(cls, text: str) -> "Schedule":
        """Money given by a formula over the drivers (simulation only; ``at`` does not apply)."""
        return cls(formula=str(text))

    def describe(self, fmt: str = "{:,.2f}") -> str:
        """Short plain-words form, e.g. '12.00', '60.00 at year 0 to 35.00 at year 8'."""
        if self.formula is not None:
            return self.formula
        if self.start is not None:
            text = f"{fmt.format(self.start)} growing {self.growth:.1%} a year"
        elif len({v for _, v in self.points}) == 1:
            text = fmt.format(self.points[0][1])
        else:
            text = " to ".join(f"{fmt.format(v)} at year {y:g}" for y, v in self.points)
        if self.today is not None:
            text += f" ({fmt.format(self.today)} if committed today)"
        return text


@dataclass(frozen=True)
class Market:
    """Rates, yearly. ``discount_rate`` is the risk-adjusted rate for the project's cash flows."""

    risk_free_rate: float
    discount_rate: float
    compounding: str = "annual"

    def risk_free_growth(self, years):
        return growth_factor(self.risk_free_rate, years, self.compounding)

    def discount_growth(self, years):
        return growth_factor(self.discount_rate, years, self.compounding)


@dataclass(frozen=True)
class Driver:
    """One source of uncertainty in the cash-flow formula (see realopt.drivers).

    ``process``: ``gbm`` (d ln X = (drift - vol^2/2) dt + vol dW), ``mean_reverting``
    (d ln X = speed (ln long_run - ln X) dt + vol dW) or ``schedule`` (deterministic, linear
    between year points). Real-world measure; volatility and drift yearly, continuous.
    """

    name: str
    process: str
    start: float = 0.0
    drift: float = 0.0
    volatility: float = 0.0
    long_run: float = 0.0
    speed: float = 0.0
    schedule: Schedule | None = None
    risk_neutral: "RiskNeutral | None" = None   # valuation: simulation (realopt.simulation)


@dataclass(frozen=True)
class RiskNeutral:
    """A driver's risk-neutral description (valuation: simulation).

    ``kind``: ``forward`` (E*[X_t] = F(t), F(0) = start, log-linear between ``forward`` points,
    flat beyond the last), ``drift`` (gbm: risk-neutral drift of X, continuous yearly) or
    ``risk_premium`` (market price of risk lambda = ``value``: the drift of ln X falls by
    lambda * volatility; mean_reverting: the long-run level of ln X falls by lambda * vol / speed).
    """

    kind: str
    value: float = 0.0
    forward: tuple[tuple[float, float], ...] = ()


@dataclass(frozen=True)
class DriverModel:
    """Cash flows from drivers: ``cash_flow`` is a whitelisted arithmetic formula over driver names.

    ``years`` are the cash-flow years (inclusive integers); ``correlation`` lists
    (driver, driver, rho) of the stochastic drivers; ``tax_rate`` applies to positive cash flow.
    """

    years: tuple[int, int]
    drivers: tuple[Driver, ...]
    cash_flow: str
    correlation: tuple[tuple[str, str, float], ...] = ()
    tax_rate: float = 0.0


@dataclass(frozen=True)
class VolatilityEstimate:
    """How to estimate the project volatility: ``simulation`` (from drivers) or ``history``."""

    method: str
    paths: int = 20000
    seed: int = 1
    file: str | None = None          # absolute path (resolved by the loader)
    column: str | None = None
    periods_per_year: float | None = None
    # history: (sigma, standard error) already read from ``file`` (set by realopt.fanout before a
    # project is sent to Dask workers, which need no access to the file); None = read the file
    resolved: tuple[float, float] | None = None


@dataclass(frozen=True)
class Underlying:
    """The operating project before any right is used.

    Either ``cash_flows`` ((year, expected free cash flow) with year > 0, plus an optional
    ``terminal_value`` paid with the last year's flow), or ``present_value`` with a continuous
    yearly ``payout_yield``, or ``drivers``. ``volatility`` is the yearly sigma of ln(project
    value); it may instead come from ``volatility_estimate``.
    """

    cash_flows: tuple[tuple[float, float], ...] = ()
    terminal_value: float = 0.0
    present_value: float | None = None
    payout_yield: float = 0.0
    volatility: float | None = None
    volatility_estimate: VolatilityEstimate | None = None
    drivers: DriverModel | None = None
    flow_timing: str = "at_dates"    # "at_dates" | "spread" (see realopt.underlying)


@dataclass(frozen=True)
class Investment:
    """Outlays (year, amount) if committed today; valued at the risk-free rate."""

    outlays: tuple[tuple[float, float], ...]

    def present_value(self, market: Market) -> float:
        return float(sum(a / market.risk_free_growth(y) for y, a in self.outlays))


@dataclass(frozen=True)
class LatticeSpec:
    """``steps_per_year`` (Cox-Ross-Rubinstein) or explicit ``up``/``down`` per ``step_years``."""

    steps_per_year: int = 12
    up: float | None = None
    down: float | None = None
    step_years: float | None = None

    @property
    def explicit(self) -> bool:
        return self.up is not None


@dataclass(frozen=True, kw_only=True)
class Right:
    """A decision right. ``window`` (start, end) in years, inclusive; ``exercise`` american (any
    step in the window), european (the window's end only) or bermudan (``dates`` inside it).

    Each type of right is a subclass in its own module of :mod:`realopt.rights` (registered in
    :mod:`realopt.rights.registry`); the state graph, the appraisal, the sensitivities and the
    tables ask the right through the hooks below, never its class. The flags say how the state
    graph treats the type: ``commits`` (the one move out of "not yet invested"), ``ends``
    (absorbing: the project is closed), ``one_shot`` (used at most once, recorded in the
    state), ``modal`` (the state records its current mode; its moves repeat)."""

    name: str
    window: tuple[float, float]
    exercise: str = "american"
    dates: tuple[float, ...] = ()
    requires: tuple[str, ...] = ()
    excludes: tuple[str, ...] = ()
    kind: ClassVar[str] = ""
    KEYS: ClassVar[tuple[str, ...]] = ()      # the file keys of this type (beside the common ones)
    commits: ClassVar[bool] = False
    ends: ClassVar[bool] = False
    one_shot: ClassVar[bool] = False
    modal: ClassVar[bool] = False

    def event_dates(self) -> tuple[float, ...]:
        """Dates the time grid must hit for this right."""
        if self.exercise == "bermudan":
            return tuple(self.dates)
        return tuple(self.window)


from .rights.defer import Defer  # noqa: E402,F401  (the right types, re-exported)
from .rights.expand import Expand  # noqa: E402,F401
from .rights.contract import Contract  # noqa: E402,F401
from .rights.abandon import Abandon  # noqa: E402,F401
from .rights.switch import Mode, Switch  # noqa: E402,F401
from .rights.shutdown import Shutdown  # noqa: E402,F401
from .rights.registry import RIGHT_TYPES  # noqa: E402,F401


@dataclass(frozen=True)
class SimulationSpec:
    """Least-squares Monte Carlo settings (valuation: simulation; see realopt.simulation).

    ``paths`` fit the exercise policy and as many again, independent, value it; ``steps_per_year``
    decision dates a year inside american windows; ``basis`` the degree of the regression
    polynomial in the drivers; ``upper_bound_paths``/``upper_bound_inner`` the dual upper bound
    (0 = not asked); ``map_drivers`` the two drivers of the decision maps (empty: chosen).
    """

    paths: int = 50000
    seed: int = 1
    steps_per_year: int = 12
    basis: int = 3
    antithetic: bool = True
    upper_bound_paths: int = 0
    upper_bound_inner: int = 0
    map_drivers: tuple[str, ...] = ()


@dataclass(frozen=True)
class Project:
    """A validated project: everything the valuation needs, nothing about where it came from
    except ``source`` (the file, for messages) and the loader's ``warnings``."""

    name: str
    market: Market
    underlying: Underlying
    investment: Investment
    rights: tuple[Right, ...] = ()
    lattice: LatticeSpec = LatticeSpec()
    currency: str = ""
    unit: str = ""
    source: str | None = None
    warnings: tuple[str, ...] = ()
    valuation: str = "lattice"                 # lattice | simulation
    simulation: SimulationSpec | None = None   # with valuation: simulation
    # the raw tree the loader validated (overrides applied) and its folder, so that moved copies
    # (realopt.outputs.sensitivity) go through the loader again; None when built in Python
    origin: tuple | None = field(default=None, compare=False, repr=False)

    @property
    def horizon(self) -> float:
        """Lattice horizon (years): the latest window end, or one year when there is no right."""
        ends = [r.window[1] for r in self.rights]
        return max(ends) if ends and max(ends) > 0 else 1.0

    def right(self, name: str) -> Right:
        return next(r for r in self.rights if r.name == name)
