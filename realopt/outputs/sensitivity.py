"""Sensitivities of the appraisal: tornado of stated input moves, break-evens of the decision
today, and convergence of the expanded NPV over the lattice's steps per year.

Every number here comes from the valuation engine (:func:`realopt.appraisal.quick_appraisal` and
:func:`realopt.appraisal.expanded_npv`) run on a moved copy of the project
(``dataclasses.replace``); the base values are the Appraisal's own, never recomputed.

Moves (defaults in :data:`DEFAULT_MOVES`, stated in the figure and the tables):

* volatility: +- ``volatility`` (absolute, yearly sigma of ln V; floored at 1%);
* risk-free rate and discount rate: +- ``rates`` (absolute, yearly, in the project's compounding);
* money and scale inputs: x (1 +- ``relative``): the investment outlays, the expected cash flows
  (or the present value), each right's cost, savings, salvage, switching costs and fixed mode
  flows, and each expand/contract scale (a contraction is capped below 100%).

For a project whose cash flows come from drivers, the volatility and cash-flow moves keep the
simulated expected cash flows as they are (no new simulation, so no simulation noise in the
difference); the rate moves re-run the simulation with the file's own paths and seed.

Break-evens: the volatility and the investment cost (every outlay, and any defer right's own
cost, moved in proportion; stated as the present value of the outlays, the Appraisal's
``investment_pv`` today) nearest to today's at which the decision today changes, found by a
scan of SCAN_POINTS steps then BISECT_STEPS halvings (to within 1/(6 x 2^8), about 0.07%, of
the searched span); None where the decision does not change inside the searched range.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Callable

from ..errors import RealoptError
from ..model import Abandon, Contract, Defer, Expand, Project, Schedule, Switch, Underlying

VOL_RANGE = (0.02, 1.50)          # searched for the volatility break-even (yearly sigma)
COST_RANGE = (0.0, 3.0)           # searched for the investment-cost break-even (x today's cost)
SCAN_POINTS = 6
BISECT_STEPS = 8
MAX_CONVERGENCE_STEPS = 4800      # finest grid of the convergence figure (total steps)
CONTRACT_CAP = 0.99               # a moved contraction keeps some of the project
SETTLED = 0.005                   # a grid has settled within 0.5% of the finest grid's value


@dataclass(frozen=True)
class Moves:
    """Stated moves of the tornado: absolute for volatility and rates, relative for the rest."""

    volatility: float = 0.05
    rates: float = 0.01
    relative: float = 0.20

    def describe(self) -> str:
        return (f"volatility +-{self.volatility * 100:g} points, rates +-{self.rates * 100:g} "
                f"points, costs, cash flows, salvage and scale inputs +-{self.relative:.0%}")


DEFAULT_MOVES = Moves()


@dataclass(frozen=True)
class TornadoRow:
    """One input moved down and up: settings as text, and the resulting values."""

    input: str
    low_setting: str
    high_setting: str
    expanded_low: float
    expanded_high: float
    flexibility_low: float
    flexibility_high: float

    @property
    def swing(self) -> float:
        return abs(self.expanded_high - self.expanded_low)


@dataclass(frozen=True)
class BreakEven:
    """The value of ``input`` nearest today's at which the decision today changes (None: no
    change within ``searched``); ``decision_beyond`` is the decision on the far side."""

    input: str
    today: float
    below: float | None
    decision_below: str | None
    above: float | None
    decision_above: str | None
    searched: tuple[float, float]
    unit: str                      # "sigma" or "money"


@dataclass(frozen=True)
class Convergence:
    """Expanded NPV against steps per year; ``chosen`` is the project's own grid."""

    steps_per_year: tuple[int, ...]
    expanded_npv: tuple[float, ...]
    chosen: int
    relative_gap: float | None     # |chosen - finest| / |finest| (None if finest is 0)
    settled_at: int | None = None  # fewest steps a year from which every grid shown is within
    #                                SETTLED of the finest (None: only the finest itself)

    @property
    def settled(self) -> bool:
        return self.settled_at is not None and self.chosen >= self.settled_at


@dataclass(frozen=True)
class Sensitivity:
    moves: Moves
    base_expanded: float
    base_flexibility: float
    decision_today: str
    rows: tuple[TornadoRow, ...]
    breakevens: tuple[BreakEven, ...]
    convergence: Convergence | None
    notes: tuple[str, ...] = field(default_factory=tuple)


# --------------------------------------------------------------------------------------------
def _scaled(s: Schedule | None, k: float) -> Schedule | None:
    if s is None:
        return None
    if s.start is not None:
        return replace(s, start=s.start * k)
    return replace(s, points=tuple((y, v * k) for y, v in s.points))


def _replace_right(p: Project, name: str, **changes) -> Project:
    return replace(p, rights=tuple(replace(r, **changes) if r.name == name else r
                                   for r in p.rights))


def _frozen_flows(p: Project, k: float = 1.0, sigma: float | None = None) -> Project:
    """A driver-based project as the cash-flow form the lattice sees: the same expected cash
    flows (times ``k``) and the same volatility (or ``sigma``), without a new simulation, so a
    move of one input is not blurred by simulation noise."""
    from ..underlying import resolve

    res = resolve(p)
    u = Underlying(cash_flows=tuple((t, c * k) for t, c in zip(res.flow_times, res.cash_flows)),
                   volatility=res.volatility if sigma is None else sigma)
    return replace(p, underlying=u)


def _with_volatility(p: Project, sigma: float) -> Project:
    u = p.underlying
    if u.drivers is not None:
        return _frozen_flows(p, sigma=sigma)
    return replace(p, underlying=replace(u, volatility=sigma, volatility_estimate=None))


def _money_inputs(p: Project):
    """(label, builder(k) -> Project) for each money input; k multiplies it."""
    out: list[tuple[str, Callable[[float], Project]]] = []
    u = p.underlying
    out.append(("Investment cost", lambda k: replace(p, investment=replace(
        p.investment, outlays=tuple((y, a * k) for y, a in p.investment.outlays)))))
    if u.cash_flows:
        out.append(("Expected cash flows", lambda k: replace(p, underlying=replace(
            u, cash_flows=tuple((y, c * k) for y, c in u.cash_flows),
            terminal_value=u.terminal_value * k))))
    elif u.drivers is not None:
        out.append(("Expected cash flows", lambda k: _frozen_flows(p, k)))
    elif u.present_value is not None:
        out.append(("Present value of the project", lambda k: replace(p, underlying=replace(
            u, present_value=u.present_value * k))))
    for r in p.rights:
        n = r.name
        if isinstance(r, Defer) and r.cost is not None:
            out.append((f"{n}: cost", lambda k, r=r: _replace_right(p, r.name,
                                                                    cost=_scaled(r.cost, k))))
        elif isinstance(r, Expand):
            out.append((f"{n}: cost", lambda k, r=r: _replace_right(p, r.name,
                                                                    cost=_scaled(r.cost, k))))
        elif isinstance(r, Contract):
            out.append((f"{n}: savings", lambda k, r=r: _replace_right(
                p, r.name, savings=_scaled(r.savings, k))))
        elif isinstance(r, Abandon):
            out.append((f"{n}: salvage", lambda k, r=r: _replace_right(
                p, r.name, salvage=_scaled(r.salvage, k))))
        elif isinstance(r, Switch):
            out.append((f"{n}: switching costs", lambda k, r=r: _replace_right(
                p, r.name, costs=tuple((a, b, _scaled(c, k)) for a, b, c in r.costs))))
            if any(m.fixed for m in r.modes):
                out.append((f"{n}: fixed flows of the modes", lambda k, r=r: _replace_right(
                    p, r.name, modes=tuple(replace(m, fixed=m.fixed * k) for m in r.modes))))
    return out


def _scale_inputs(p: Project):
    out = []
    for r in p.rights:
        if isinstance(r, Expand):
            out.append((f"{r.name}: scale", r.scale, None,
                        lambda k, r=r: _replace_right(p, r.name, scale=r.scale * k)))
        elif isinstance(r, Contract):
            out.append((f"{r.name}: scale", r.scale, CONTRACT_CAP,
                        lambda k, r=r: _replace_right(p, r.name,
                                                      scale=min(CONTRACT_CAP, r.scale * k))))
        elif isinstance(r, Switch):
            for m in r.modes:
                if m.name != r.start and m.scale:
                    out.append((f"{r.name}: scale of mode '{m.name}'", m.scale, None,
                                lambda k, r=r, m=m: _replace_right(p, r.name, modes=tuple(
                                    replace(x, scale=x.scale * k) if x.name == m.name else x
                                    for x in r.modes))))
    return out


def _pct(x: float) -> str:
    return f"{x * 100:.3g}%"


def _quick(project: Project, decision: bool = True):
    from ..appraisal import quick_appraisal

    return quick_appraisal(project, decision=decision)


def tornado(appraisal, moves: Moves = DEFAULT_MOVES) -> tuple[list[TornadoRow], list[str]]:
    """Rows of the tornado, largest swing of expanded NPV first; notes on skipped inputs."""
    p = appraisal.project
    cases: list[tuple[str, str, str, Project, Project]] = []
    notes = []
    m = p.market
    if p.lattice.explicit:
        notes.append("Volatility is not moved: the lattice uses explicit up/down factors.")
    elif appraisal.volatility is not None:
        s = appraisal.volatility
        lo, hi = max(0.01, s - moves.volatility), s + moves.volatility
        cases.append(("Volatility", _pct(lo), _pct(hi), _with_volatility(p, lo),
                      _with_volatility(p, hi)))
    for key, label in (("risk_free_rate", "Risk-free rate"), ("discount_rate", "Discount rate")):
        if key == "discount_rate" and p.underlying.present_value is not None \
                and not p.underlying.cash_flows and p.underlying.drivers is None:
            notes.append("Discount rate is not moved: the project value is given as a present "
                         "value, so the discount rate does not enter the valuation.")
            continue
        base = getattr(m, key)
        lo, hi = base - moves.rates, base + moves.rates
        cases.append((label, _pct(lo), _pct(hi),
                      replace(p, market=replace(m, **{key: lo})),
                      replace(p, market=replace(m, **{key: hi}))))
    k_lo, k_hi = 1.0 - moves.relative, 1.0 + moves.relative
    for label, build in _money_inputs(p):
        cases.append((label, f"x{k_lo:g}", f"x{k_hi:g}", build(k_lo), build(k_hi)))
    for label, base, cap, build in _scale_inputs(p):
        hi = base * k_hi if cap is None else min(cap, base * k_hi)
        cases.append((label, _pct(base * k_lo), _pct(hi), build(k_lo), build(k_hi)))
    rows = []
    for label, lo_txt, hi_txt, p_lo, p_hi in cases:
        try:
            s_lo, e_lo, _ = _quick(p_lo, decision=False)
            s_hi, e_hi, _ = _quick(p_hi, decision=False)
        except RealoptError as err:
            notes.append(f"{label} is not moved: {err}")
            continue
        rows.append(TornadoRow(label, lo_txt, hi_txt, e_lo, e_hi, e_lo - s_lo, e_hi - s_hi))
    rows.sort(key=lambda r: -r.swing)
    return rows, notes


def _search(decide, today: float, lo: float, hi: float, base: str):
    """Nearest point below and above ``today`` in [lo, hi] where decide(x) != base."""
    def first_change(points):
        prev = today
        for x in points:
            d = decide(x)
            if d is not None and d != base:
                a, b = prev, x                     # base at a, changed at b
                for _ in range(BISECT_STEPS):
                    mid = 0.5 * (a + b)
                    dm = decide(mid)
                    if dm is None or dm == base:
                        a = mid
                    else:
                        b, d = mid, dm
                return 0.5 * (a + b), d
            if d is not None:
                prev = x
        return None, None

    n = SCAN_POINTS
    down = [today - (today - lo) * (k + 1) / n for k in range(n)] if today > lo else []
    up = [today + (hi - today) * (k + 1) / n for k in range(n)] if today < hi else []
    below, d_below = first_change(down)
    above, d_above = first_change(up)
    return below, d_below, above, d_above


def breakevens(appraisal) -> list[BreakEven]:
    """Volatility and investment cost at which the decision today changes (see module doc)."""
    p = appraisal.project
    base = appraisal.decision_today
    out = []

    def decide_with(build):
        def decide(x):
            try:
                return _quick(build(x))[2]
            except RealoptError:
                return None
        return decide

    if not p.lattice.explicit and appraisal.volatility is not None:
        s = appraisal.volatility
        b, db, a, da = _search(decide_with(lambda x: _with_volatility(p, x)), s, *VOL_RANGE,
                               base)
        out.append(BreakEven("Volatility", s, b, db, a, da, VOL_RANGE, "sigma"))

    def cost_project(k):
        q = replace(p, investment=replace(
            p.investment, outlays=tuple((y, c * k) for y, c in p.investment.outlays)))
        for r in p.rights:
            if isinstance(r, Defer) and r.cost is not None:
                q = _replace_right(q, r.name, cost=_scaled(r.cost, k))
        return q

    today = appraisal.investment_pv            # every outlay moves by k, so its PV by k
    if today > 0:
        b, db, a, da = _search(decide_with(cost_project), 1.0, *COST_RANGE, base)
        out.append(BreakEven("Investment cost", today, None if b is None else b * today, db,
                             None if a is None else a * today, da,
                             (COST_RANGE[0] * today, COST_RANGE[1] * today), "money"))
    return out


def report_solves(project: Project) -> float:
    """Lattice solves the report adds after the appraisal, in units of one solve of the whole
    project at its own grid (for the command line's memory/time guard): two per tornado input,
    the break-even scans and bisections at most, and the convergence grids (cost ~ steps^2)."""
    inputs = 3 + len(list(_money_inputs(project))) + len(list(_scale_inputs(project)))
    solves = 2.0 * inputs + 4.0 * (SCAN_POINTS + BISECT_STEPS)
    if not project.lattice.explicit:
        chosen = int(project.lattice.steps_per_year)
        for f in (0.25, 0.5, 2, 4, 8, 16):
            n = max(1, round(chosen * f))
            if n * float(project.horizon) <= MAX_CONVERGENCE_STEPS:
                solves += (n / chosen) ** 2
    return solves


def convergence(appraisal) -> Convergence | None:
    """Expanded NPV over steps per year (x1/4 .. x16 of the chosen grid, capped in total
    steps); None for explicit up/down trees, whose step is fixed by the file."""
    from ..appraisal import expanded_npv

    p = appraisal.project
    if p.lattice.explicit:
        return None
    chosen = int(p.lattice.steps_per_year)
    horizon = float(p.horizon)
    grid = sorted({max(1, round(chosen * f)) for f in (0.25, 0.5, 1, 2, 4, 8, 16)})
    grid = [n for n in grid if n == chosen or n * horizon <= MAX_CONVERGENCE_STEPS]
    values = []
    for n in grid:
        if n == chosen:
            values.append(appraisal.expanded_npv)
        else:
            values.append(expanded_npv(replace(p, lattice=replace(p.lattice, steps_per_year=n))))
    finest = values[-1]
    gap = abs(appraisal.expanded_npv - finest) / abs(finest) if finest else None
    tol = SETTLED * abs(finest) if finest else 1e-12
    settled_at = None
    for k in range(len(grid) - 1):
        if all(abs(v - finest) <= tol for v in values[k:-1]):
            settled_at = grid[k]
            break
    return Convergence(tuple(grid), tuple(values), chosen, gap, settled_at)


def analyse(appraisal, moves: Moves = DEFAULT_MOVES) -> Sensitivity:
    """Tornado, break-evens and convergence for ``appraisal`` (see the module doc)."""
    rows, notes = tornado(appraisal, moves)
    return Sensitivity(moves=moves, base_expanded=appraisal.expanded_npv,
                       base_flexibility=appraisal.flexibility_value,
                       decision_today=appraisal.decision_today, rows=tuple(rows),
                       breakevens=tuple(breakevens(appraisal)),
                       convergence=convergence(appraisal), notes=tuple(notes))
