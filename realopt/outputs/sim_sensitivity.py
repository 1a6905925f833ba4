"""Tornado of a simulation result (``valuation: simulation``): inputs moved one at a time.

Every bar is a difference taken on common random numbers: the base project and each moved copy
are valued with the same ``simulation.seed`` and the same number of paths, so they draw the same
normals, and the change in expanded NPV (and in flexibility value) is the mean of the pathwise
differences, with the standard error of that mean
(:func:`realopt.simulation.quick.difference`). Each copy fits and values the full set of rights
only (and the base project with no right), never the Shapley subsets, the rules or the
real-world runs. To bound the cost, the copies (and the base, valued again the same way) run at
the largest of paths, paths/2, ... paths/16 whose work fits :data:`TORNADO_WORK`, so the bars'
centre is that re-valued base, not the appraisal's own expanded NPV (stated beside it).

Moved copies are made as the lattice tornado's are (:class:`realopt.outputs.sensitivity.
Copier`: dotted keys set on the raw tree, validated again by the loader). Moves, with the keys
they set (``Moves``: ``volatility``, ``rates`` and ``correlation`` absolute, ``level`` and
``relative`` factors):

* each simulated driver with a volatility above 0: its volatility +- ``volatility`` (floored
  at 1%), ``underlying.drivers.<d>.volatility``;
* its level, x (1 +- ``level``): with a forward curve, today's value and every point of the
  curve together (``start`` and ``risk_neutral.forward``); otherwise ``start``;
* its risk-neutral growth (drivers without a forward curve): a risk-neutral ``drift`` +-
  ``rates``; a ``risk_premium`` lambda +- ``rates`` / volatility (the risk-neutral drift of
  ln X moves by -+ ``rates``);
* each correlation the file gives, +- ``correlation`` (within -1 and 1; a set the loader
  refuses is left out with a note), ``underlying.correlation``;
* the risk-free rate +- ``rates`` (discounting; a driver's given drift is not moved with it);
* the investment cost, each right's money (costs, savings, salvage, switching costs, mode fixed
  flows and a mode's own cash-flow formula) and scales, x (1 +- ``relative``), as the lattice
  tornado moves them (money formulas are multiplied as formulas).

Not moved: the discount rate and the drivers' real-world drift and long-run level (they enter
only the real-world outputs, not the values), the tax rate, and deterministic drivers.

Money in the project's currency and unit, valued today; rates yearly; volatilities yearly.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field

from ..errors import RealoptError
from ..model import Project
from .sensitivity import DEFAULT_MOVES, Case, Copier, Moves, _investment, _pct, points

TORNADO_WORK = 2.25e8       # copies x dates x paths x (states + regression terms) allowed
PATH_DIVISORS = (1, 2, 4, 8, 16)


@dataclass(frozen=True)
class SimTornadoRow:
    """One input moved down and up: settings as text, the moved values (base + the pathwise
    difference) and the standard error of each difference to the base."""

    input: str
    low_setting: str
    high_setting: str
    expanded_low: float
    expanded_high: float
    expanded_low_se: float
    expanded_high_se: float
    flexibility_low: float
    flexibility_high: float
    flexibility_low_se: float
    flexibility_high_se: float

    @property
    def swing(self) -> float:
        return abs(self.expanded_high - self.expanded_low)


@dataclass(frozen=True)
class SimSensitivity:
    """The tornado of a simulation result. ``paths``: the paths of the base and every copy
    (as many again fit the policy); ``result_paths``: the appraisal's own."""

    moves: Moves
    paths: int
    result_paths: int
    seed: int
    base_expanded: float
    base_expanded_se: float
    base_flexibility: float
    base_flexibility_se: float
    rows: tuple[SimTornadoRow, ...]
    notes: tuple[str, ...] = field(default_factory=tuple)

    def describe_moves(self) -> str:
        m = self.moves
        return (f"volatility +-{points(m.volatility)}, driver levels +-{m.level:.0%}, "
                f"risk-free rate and risk-neutral drifts +-{points(m.rates)}, "
                f"correlations +-{m.correlation:g}, costs, salvage and scale inputs "
                f"+-{m.relative:.0%}")


def _num(x: float) -> str:
    return f"{x:.3g}"


def _driver_cases(p: Project, moves: Moves) -> list[Case]:
    out = []
    k_lo, k_hi = 1.0 - moves.level, 1.0 + moves.level
    for d in p.underlying.drivers.drivers:
        if d.process == "schedule" or d.volatility <= 0:
            continue
        at = f"underlying.drivers.{d.name}"
        lo, hi = max(0.01, d.volatility - moves.volatility), d.volatility + moves.volatility
        out.append(Case(f"{d.name}: volatility", _pct(lo), _pct(hi),
                        {f"{at}.volatility": lo}, {f"{at}.volatility": hi}))
        rn = d.risk_neutral
        if rn is not None and rn.kind == "forward":
            def level(k, d=d, rn=rn, at=at):
                return {f"{at}.start": d.start * k,
                        f"{at}.risk_neutral": {"forward": {y: f * k for y, f in rn.forward}}}
            out.append(Case(f"{d.name}: level (today and the forward curve)", f"x{k_lo:g}",
                            f"x{k_hi:g}", level(k_lo), level(k_hi)))
            continue
        out.append(Case(f"{d.name}: today's value", f"x{k_lo:g}", f"x{k_hi:g}",
                        {f"{at}.start": d.start * k_lo}, {f"{at}.start": d.start * k_hi}))
        if rn is None:
            continue
        if rn.kind == "drift":
            lo, hi = rn.value - moves.rates, rn.value + moves.rates
            out.append(Case(f"{d.name}: risk-neutral drift", _pct(lo), _pct(hi),
                            {f"{at}.risk_neutral": {"drift": lo}},
                            {f"{at}.risk_neutral": {"drift": hi}}))
        elif rn.kind == "risk_premium":
            step = moves.rates / d.volatility
            lo, hi = rn.value - step, rn.value + step
            out.append(Case(f"{d.name}: risk premium", _num(lo), _num(hi),
                            {f"{at}.risk_neutral": {"risk_premium": lo}},
                            {f"{at}.risk_neutral": {"risk_premium": hi}}))
    return out


def _correlation_cases(p: Project, moves: Moves) -> list[Case]:
    pairs = list(p.underlying.drivers.correlation)
    out = []
    for i, (a, b, rho) in enumerate(pairs):
        def moved(r, i=i):
            return {"underlying.correlation": [[x, y, (r if j == i else q)]
                                               for j, (x, y, q) in enumerate(pairs)]}
        lo, hi = max(-1.0, rho - moves.correlation), min(1.0, rho + moves.correlation)
        out.append(Case(f"correlation {a}-{b}", _num(lo), _num(hi), moved(lo), moved(hi)))
    return out


def cases(project: Project, moves: Moves = DEFAULT_MOVES):
    """The tornado's inputs with their overrides, and notes on what is not moved."""
    p = project
    out = _driver_cases(p, moves) + _correlation_cases(p, moves)
    r0 = p.market.risk_free_rate
    out.append(Case("Risk-free rate", _pct(r0 - moves.rates), _pct(r0 + moves.rates),
                    {"market.risk_free_rate": r0 - moves.rates},
                    {"market.risk_free_rate": r0 + moves.rates}))
    k_lo, k_hi = 1.0 - moves.relative, 1.0 + moves.relative
    money = [("Investment cost", lambda k: _investment(p, k))]
    for i, r in enumerate(p.rights):
        money += r.money_inputs(f"rights.{i}")
    for label, build in money:
        out.append(Case(label, f"x{k_lo:g}", f"x{k_hi:g}", build(k_lo), build(k_hi)))
    for i, r in enumerate(p.rights):
        for label, base, cap, build in r.scale_inputs(f"rights.{i}"):
            hi = base * k_hi if cap is None else min(cap, base * k_hi)
            out.append(Case(label, _pct(base * k_lo), _pct(hi), build(k_lo), build(k_hi)))
    notes = ["The discount rate and the drivers' real-world drift and long-run level are not "
             "moved: under the simulation they enter only the real-world outputs (chances of "
             "use, the real-world DCF), not the values."]
    if p.underlying.drivers.tax_rate:
        notes.append("The tax rate is not moved.")
    return out, notes


def _shape(project: Project) -> tuple[int, int, int, int]:
    """(paths used, dates, states of the full set of rights, regression terms)."""
    from ..rights import build_state_graph, prepared_rights
    from ..simulation import lsm
    from ..simulation.result import _paths_used

    prob = lsm.Problem(project)
    graph = build_state_graph(prepared_rights(project))
    return _paths_used(project, prob), prob.T, len(graph.states), prob.basis.terms


def tornado_paths(project: Project, copies: int) -> int:
    """Paths of the tornado's copies: the largest of paths / (1, 2, 4, 8, 16) (even, at least
    the loader's fewest for the basis) whose work ``copies x dates x paths x (states +
    regression terms)`` is within :data:`TORNADO_WORK`; paths/16 at most."""
    from ..project_simulation import PATHS_PER_TERM

    n, dates, states, terms = _shape(project)
    if n <= 1:
        return n
    least = max(100, PATHS_PER_TERM * terms)
    best = n
    for div in PATH_DIVISORS:
        m = max(least, (n // div) // 2 * 2)
        if m > n:
            break
        best = m
        if copies * dates * m * (states + terms) <= TORNADO_WORK:
            break
    return best


# --------------------------------------------------------------------------------------------
# running the copies (in forked worker processes where there are several cores)

_JOB = None          # (copier, [overrides]) for forked workers


def _value(k: int):
    from ..simulation.quick import path_values

    copier, todo = _JOB
    try:
        return path_values(copier(todo[k]))
    except RealoptError as err:
        return str(err).splitlines()[-1].strip(" -")


class Pending:
    """The tornado being computed: :meth:`result` waits for it (the copies run in forked
    worker processes where the platform forks and there are several cores, so the caller may
    draw the other figures meanwhile; otherwise they run in :meth:`result`). Use as a context
    manager, or call :meth:`close`, so the workers always stop."""

    def __init__(self, a, moves: Moves, workers: int | None):
        global _JOB
        self.a, self.moves = a, moves
        self.pool = self.futures = None
        self.copier = Copier(a.project)
        self.todo: list = []
        self.notes: list = []
        self.jobs: list = []
        if self.copier.route is None:
            return
        self.todo, self.notes = cases(a.project, moves)
        m = tornado_paths(a.project, 1 + 2 * len(self.todo))
        extra = {"simulation.paths": m}
        self.jobs = [extra] + [{**side, **extra} for c in self.todo for side in (c.low, c.high)]
        n = workers if workers is not None else min(4, os.cpu_count() or 1)
        ctx = None
        if n > 1:
            import multiprocessing

            try:
                ctx = multiprocessing.get_context("fork")
            except ValueError:
                ctx = None
        if ctx is not None:
            from concurrent.futures import ProcessPoolExecutor

            _JOB = (self.copier, self.jobs)      # inherited by the workers forked below
            try:
                self.pool = ProcessPoolExecutor(max_workers=n, mp_context=ctx)
                self.futures = [self.pool.submit(_value, k) for k in range(len(self.jobs))]
            except BaseException:
                self.close()
                raise

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def close(self) -> None:
        global _JOB
        if self.pool is not None:
            self.pool.shutdown(wait=True, cancel_futures=True)
            self.pool = None
        _JOB = None

    def _values(self) -> list:
        global _JOB
        if self.futures is not None:
            try:
                return [f.result() for f in self.futures]
            finally:
                self.close()
        _JOB = (self.copier, self.jobs)
        try:
            return [_value(k) for k in range(len(self.jobs))]
        finally:
            _JOB = None

    def result(self) -> "SimSensitivity | None":
        """The tornado (see :func:`analyse`)."""
        if not hasattr(self, "_result"):
            self._result = self._compute()
        return self._result

    def _compute(self):
        from ..simulation.quick import common_numbers, difference

        if self.copier.route is None:
            return None
        got = self._values()
        base = got[0]
        if isinstance(base, str):
            return None
        notes = list(self.notes)
        est = base.estimate()
        (e0, e0_se), (f0, f0_se) = est["expanded_npv"], est["flexibility_value"]
        rows = []
        for i, c in enumerate(self.todo):
            lo, hi = got[1 + 2 * i], got[2 + 2 * i]
            bad = next((x for x in (lo, hi) if isinstance(x, str)), None)
            if bad is not None:
                notes.append(f"{c.input} is not moved: {bad}")
                continue
            if not (common_numbers(lo, base) and common_numbers(hi, base)):
                notes.append(f"{c.input} is not moved: the moved copy does not draw the same "
                             "random numbers as the base (its dates or simulated drivers "
                             "differ)")
                continue
            d_lo, d_hi = difference(lo, base), difference(hi, base)
            rows.append(SimTornadoRow(
                c.input, c.low_setting, c.high_setting,
                e0 + d_lo["expanded_npv"][0], e0 + d_hi["expanded_npv"][0],
                d_lo["expanded_npv"][1], d_hi["expanded_npv"][1],
                f0 + d_lo["flexibility_value"][0], f0 + d_hi["flexibility_value"][0],
                d_lo["flexibility_value"][1], d_hi["flexibility_value"][1]))
        rows.sort(key=lambda r: -r.swing)
        return SimSensitivity(moves=self.moves, paths=base.paths,
                              result_paths=self.a.simulation.paths, seed=base.seed,
                              base_expanded=e0, base_expanded_se=e0_se, base_flexibility=f0,
                              base_flexibility_se=f0_se, rows=tuple(rows), notes=tuple(notes))


def start(a, moves: Moves = DEFAULT_MOVES, workers: int | None = None) -> Pending:
    """Start the tornado of the simulation result ``a``; ``.result()`` gives it."""
    return Pending(a, moves, workers)


def analyse(a, moves: Moves = DEFAULT_MOVES, workers: int | None = None) -> SimSensitivity | None:
    """The tornado of the simulation result ``a`` (see the module doc); None when the project
    cannot be copied through the loader or its base cannot be valued again (:func:`why_not`
    says why). ``workers``: processes for the copies (default: one per core, at most 4; 1 runs
    them here)."""
    with start(a, moves, workers) as pending:
        return pending.result()


def why_not(a) -> str:
    """The sentence the report shows when :func:`analyse` gives None."""
    copier = Copier(a.project)
    if copier.route is None:
        return (f"No sensitivity is computed: moved copies of the project are made by the "
                f"project loader, and {copier.problem}.")
    return "No sensitivity is computed: the base project could not be valued again."
