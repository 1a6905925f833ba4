"""Appraisal: static NPV, expanded NPV, each right's value, exercise rules and chances of use.

Money is in the project's currency and unit, valued today (t = 0). ``static_npv`` commits now with
no flexibility; ``expanded_npv`` uses every right optimally on the lattice. Each right's
``standalone_value`` is the flexibility with it alone (plus the rights it requires); its
``shapley_value`` is its exact Shapley share of the flexibility value over all subsets of rights
(a right whose ``requires`` are missing from a subset cannot be used in that subset; a requirement
on the defer right always holds).

Every subset of rights values the same base project: no right used, every switch in its start
mode (scale_start * the cash flows + the start mode's fixed flows). ``present_value`` is that base's
value, so ``static_npv = present_value - investment_pv`` always; ``cash_flow_value`` is the plain
DCF of the file's flows (equal to ``present_value`` when every start mode is the plain project).
"""
from __future__ import annotations

import functools
import gc
import math
from dataclasses import dataclass, replace
from typing import ClassVar

import numpy as np

from . import CAUTION, validate
from .errors import ValuationError
from .lattice import Grid, Solution, build_grid, exercise_steps, occupancy, solve
from .model import Project
from .rights import (Action, StateGraph, base_description, base_scale_fixed, build_state_graph,
                     held_switches, prepared_rights, requirement_closure, structure_warnings,
                     threshold_side, usable_subset)
from .underlying import ResolvedUnderlying, resolve

MAX_RIGHTS = 10
PERCENTILES = (5, 25, 50, 75, 95)


@dataclass(frozen=True)
class LatticeInfo:
    steps: int
    step_years: float
    up: float
    down: float
    probability: float
    real_world_probability: float
    horizon: float
    compounding: str
    states: int
    tree: str


@dataclass(frozen=True)
class Threshold:
    """At ``year``, from state ``state``, ``action`` is best for lower < V < upper (project value
    after that date's cash flow); None = unbounded on that side. ``never``: no node exercises."""

    year: float
    state: str
    action: str
    lower: float | None
    upper: float | None
    never: bool = False


@dataclass(frozen=True)
class RightValue:
    name: str
    type: str
    window: tuple[float, float]
    exercise: str
    standalone_value: float
    shapley_value: float
    side: str | None                  # "above", "below", "band" or None (never used)
    thresholds: tuple[Threshold, ...]
    use_years: tuple[float, ...]
    use_risk_neutral: tuple[float, ...]
    use_real_world: tuple[float, ...]
    use_measure: str                  # what the chance of use counts
    rule: str
    # switches: mode name -> (risk-neutral, real-world) share of paths in that mode at use_years
    mode_shares: dict | None = None


@dataclass(frozen=True)
class DecisionMap:
    """Best action on a reduced grid: ``codes[v, t]`` indexes ``actions`` (-1 outside the tree)."""

    state: str
    actions: tuple[str, ...]
    times: np.ndarray
    values: np.ndarray
    codes: np.ndarray


@dataclass(frozen=True)
class Appraisal:
    """Result of :func:`appraise`. ``to_dict()`` is the JSON contract; ``summary()`` a table."""

    method: ClassVar[str] = "lattice"      # as SimulationAppraisal.method: which valuer
    project: Project
    present_value: float
    investment_pv: float
    static_npv: float
    expanded_npv: float
    flexibility_value: float
    interaction: float
    decision_today: str
    rights: tuple[RightValue, ...]
    lattice: LatticeInfo
    volatility: float | None
    volatility_stderr: float | None
    volatility_method: str
    warnings: tuple[str, ...]
    state_graph: StateGraph
    decision_maps: tuple[DecisionMap, ...]
    fan_years: np.ndarray
    fan: dict                         # percentile -> array of project values (real-world)
    expected_real_world: np.ndarray   # mean project value at fan_years, real-world drift
    expected_risk_neutral: np.ndarray
    present_value_stderr: float = 0.0  # standard error of a simulated V0; 0.0 when exact
    cash_flow_value: float | None = None   # plain DCF of the file's flows (no start mode)
    base: str = ""                         # one line: the base project every subset values
    headline_warnings: tuple[str, ...] = ()   # warnings that bear on the headline numbers

    def right(self, name: str) -> RightValue:
        return next(r for r in self.rights if r.name == name)

    def to_dict(self) -> dict:
        """The results contract of docs/design.md, section 6 (plain JSON types)."""
        p = self.project
        return {
            "project": p.name,
            "currency": p.currency,
            "unit": p.unit,
            "present_value": self.present_value,
            "present_value_stderr": self.present_value_stderr,
            "cash_flow_value": (self.present_value if self.cash_flow_value is None
                                else self.cash_flow_value),
            "base": self.base,
            "investment_pv": self.investment_pv,
            "static_npv": self.static_npv,
            "expanded_npv": self.expanded_npv,
            "flexibility_value": self.flexibility_value,
            "interaction": self.interaction,
            "decision_today": self.decision_today,
            "volatility": self.volatility,
            "volatility_stderr": self.volatility_stderr,
            "volatility_method": self.volatility_method,
            "rights": [_right_dict(r) for r in self.rights],
            "lattice": {k: getattr(self.lattice, k) for k in LatticeInfo.__dataclass_fields__},
            "warnings": list(self.warnings),
            "headline_warnings": list(self.headline_warnings),
            "caution": CAUTION,
            "method": self.method,         # DESIGN "Valuation on the drivers": exact on the tree
            # the lattice is exact given V0; a V0 estimated by simulation carries its error
            "standard_error": {"present_value": self.present_value_stderr, "expanded_npv": 0.0,
                               "flexibility_value": 0.0},
        }

    def summary(self):
        """Headline table (pandas DataFrame): one row per line of the value bridge. Both
        columns add up: ``value`` down the rights (their Shapley shares) gives the flexibility
        value, and so does ``standalone_value`` down the rights (each valued alone) plus the
        interaction between them."""
        import pandas as pd

        rows = [("Present value of the operating project", self.present_value, None),
                ("Investment (present value)", -self.investment_pv, None),
                ("Static NPV", self.static_npv, None)]
        rows += [(f"{r.name} ({r.type})", r.shapley_value, r.standalone_value)
                 for r in self.rights]
        if self.rights:
            rows.append(("Interaction between rights", None, self.interaction))
        rows += [("Flexibility value", self.flexibility_value,
                  self.flexibility_value if self.rights else None),
                 ("Expanded NPV", self.expanded_npv, None)]
        return pd.DataFrame(rows, columns=["item", "value", "standalone_value"]).set_index("item")


def _thin(thresholds, limit: int = 240):
    """At most ``limit`` dates of thresholds (evenly spread, last date kept) for the JSON."""
    years = sorted({t.year for t in thresholds})
    if len(years) <= limit:
        return thresholds
    keep = {years[int(k)] for k in np.round(np.linspace(0, len(years) - 1, limit))}
    return tuple(t for t in thresholds if t.year in keep)


def _right_dict(r: RightValue) -> dict:
    use = {"years": list(r.use_years), "measure": r.use_measure,
           "risk_neutral": list(r.use_risk_neutral), "real_world": list(r.use_real_world)}
    if r.mode_shares is not None:
        use["modes"] = {m: {"risk_neutral": list(rn), "real_world": list(rw)}
                        for m, (rn, rw) in r.mode_shares.items()}
    return {
        "name": r.name, "type": r.type, "window": list(r.window), "exercise": r.exercise,
        "standalone_value": r.standalone_value, "shapley_value": r.shapley_value,
        "rule": r.rule, "threshold_side": r.side,
        "thresholds": [{"year": t.year, "state": t.state, "action": t.action,
                        "exercise_above": t.lower, "exercise_below": t.upper, "never": t.never}
                       for t in _thin(r.thresholds)],
        "chance_of_use": use,
    }


# --------------------------------------------------------------------------------------------
class _Valuer:
    """Solves the lattice for subsets of rights, caching by the usable subset."""

    def __init__(self, project: Project):
        self.project = project
        self.res: ResolvedUnderlying = resolve(project)
        self.grid: Grid = build_grid(project, self.res)
        self.rights = prepared_rights(project)
        self.investment_pv = project.investment.present_value(project.market)
        scale, fixed = base_scale_fixed(self.rights)
        self.plain = scale == 1.0 and fixed == 0.0
        # the base project: every switch in its start mode (the same in every subset)
        self.base_value = (self.res.present_value if self.plain else
                           scale * self.res.present_value + fixed * self.grid.fixed_pv)
        self.static_npv = self.base_value - self.investment_pv
        # no right can be used at any step (e.g. every window after the last cash-flow date):
        # the expanded NPV is the static NPV exactly, not a lattice solve's rounding of it
        self.live = any(exercise_steps(self.grid, r).any() for r in self.rights)
        self._cache: dict[frozenset, float] = {}

    def value(self, names) -> float:
        usable = usable_subset(self.rights, set(names))
        usable = tuple(r for r in usable if exercise_steps(self.grid, r).any())
        key = frozenset(r.name for r in usable)
        if not key:
            return self.static_npv
        if key not in self._cache:
            graph = build_state_graph(usable, held=held_switches(self.rights, usable))
            sol = solve(self.grid, graph)
            self._cache[key] = self._npv(sol, graph)
        return self._cache[key]

    def _npv(self, sol: Solution, graph: StateGraph) -> float:
        if not self.live:
            return self.static_npv
        v = float(sol.values[graph.initial])
        invested_at_start = graph.states[graph.initial].invested
        return v - self.investment_pv if invested_at_start else v


def shapley(names, value) -> dict:
    """Exact Shapley shares of value(all) - value(empty) over subsets of ``names``."""
    n = len(names)
    vals = {}
    for mask in range(2 ** n):
        vals[mask] = value([names[k] for k in range(n) if mask >> k & 1])
    w = [math.factorial(s) * math.factorial(n - s - 1) / math.factorial(n) for s in range(n)]
    out = {}
    for k, name in enumerate(names):
        bit = 1 << k
        out[name] = sum(w[bin(m).count("1")] * (vals[m | bit] - vals[m])
                        for m in range(2 ** n) if not m & bit)
    return out


def expanded_npv(project: Project) -> float:
    """Expanded NPV only (one solve, nothing recorded): for sensitivities and convergence."""
    v = _Valuer(project)
    return v.value([r.name for r in project.rights])


def quick_appraisal(project: Project, decision: bool = True) -> tuple[float, float, str | None]:
    """(static NPV, expanded NPV, decision today) from one solve, nothing else: for
    sensitivities of the flexibility value and break-evens of the decision today. The numbers
    and the decision text are those :func:`appraise` would give for the same project.
    ``decision=False`` skips recording the policy (faster) and returns None for the decision."""
    v = _Valuer(project)
    graph = build_state_graph(v.rights)
    sol = solve(v.grid, graph, record=decision, today_only=True)
    full = v._npv(sol, graph)
    if not decision:
        return v.static_npv, full, None
    return v.static_npv, full, _decision_today(sol, graph, full, _money_format(project))


def _without_gc_pauses(fn):
    """Run ``fn`` with the cyclic garbage collector paused: an appraisal makes many small
    objects (policy runs, thresholds) and no reference cycles, and a full collection in the
    middle of it can cost more than the work."""
    @functools.wraps(fn)
    def run(*args, **kwargs):
        if not gc.isenabled():
            return fn(*args, **kwargs)
        gc.disable()
        try:
            return fn(*args, **kwargs)
        finally:
            gc.enable()
    return run


@_without_gc_pauses
def appraise(project: Project) -> Appraisal:
    """Value every right of ``project`` on the lattice; see :class:`Appraisal`.
    A project built in Python is checked against the model's rules first (realopt.validate):
    a bad value raises :class:`realopt.errors.ModelError` with the message a file would get.
    (``valuation: simulation`` goes to realopt.simulation: a SimulationAppraisal.)"""
    validate.check(project)
    if getattr(project, "valuation", "lattice") == "simulation":
        from .simulation import appraise as simulate

        return simulate(project)
    if len(project.rights) > MAX_RIGHTS:
        raise ValuationError(
            f"The project has {len(project.rights)} rights; exact Shapley shares need 2^n lattice "
            f"solves, refused above {MAX_RIGHTS} rights. Fix: value related rights as one "
            "(e.g. one switch right with several modes) or split the project.")
    val = _Valuer(project)
    names = [r.name for r in val.rights]
    graph = build_state_graph(val.rights)
    sol = solve(val.grid, graph, record=True)
    full = val._npv(sol, graph)
    val._cache[frozenset(names)] = full
    shares = shapley(names, val.value) if names else {}
    standalone = {n: val.value(requirement_closure(val.rights, n)) - val.static_npv
                  for n in names}
    flex = full - val.static_npv
    grid = val.grid
    sample = _sample_steps(grid.steps)
    # both measures in one forward pass: [0] risk-neutral, [1] real-world
    occ = occupancy(sol, (grid.probability, grid.real_probability), at=sample)
    fmt = _money_format(project)
    v0 = val.res.present_value
    rights = tuple(
        _right_value(r, graph, sol, shares[r.name], standalone[r.name], occ, sample, fmt, v0)
        for r in val.rights)
    headline = structure_warnings(graph, val.res.last_flow_year, grid.horizon,
                                  terminal_value=val.res.terminal_value)
    warnings = list(project.warnings) + list(grid.warnings) + headline
    headline += _defer_cost_warnings(val.rights, fmt)    # the loader's located form is above
    fan_steps = _sample_steps(grid.steps, limit=120)
    fan_years, fan, mean_rw, mean_rn = _fan(grid, fan_steps)
    return Appraisal(
        project=project, present_value=val.base_value, investment_pv=val.investment_pv,
        static_npv=val.static_npv, expanded_npv=full, flexibility_value=flex,
        interaction=flex - sum(standalone.values()),
        decision_today=_decision_today(sol, graph, full, fmt),
        rights=rights,
        lattice=LatticeInfo(steps=grid.steps, step_years=grid.step_years, up=grid.up,
                            down=grid.down, probability=grid.probability,
                            real_world_probability=grid.real_probability, horizon=grid.horizon,
                            compounding=project.market.compounding, states=len(graph.states),
                            tree="explicit factors" if project.lattice.explicit
                            else "Cox-Ross-Rubinstein"),
        volatility=val.res.volatility, volatility_stderr=val.res.volatility_stderr,
        volatility_method=val.res.volatility_method, warnings=tuple(warnings),
        state_graph=graph, decision_maps=_decision_maps(sol, graph),
        fan_years=fan_years, fan=fan, expected_real_world=mean_rw, expected_risk_neutral=mean_rn,
        present_value_stderr=abs(base_scale_fixed(val.rights)[0]) * (
            val.res.present_value_stderr or 0.0),
        cash_flow_value=v0, base=base_description(val.rights, _base_what(project)),
        headline_warnings=tuple(headline))


def _base_what(project: Project) -> str:
    u = project.underlying
    if u.drivers is not None:
        return "the cash flows of the drivers as given"
    if u.present_value is not None and not u.cash_flows:
        return "the project value as given"
    return "the cash flows as given"


def _defer_cost_warnings(rights, fmt) -> list[str]:
    """A defer right whose cost at year 0 differs from the investment's present value."""
    out = []
    for r in rights:
        if r.commits and r.cost.today is not None:
            later = replace(r.cost, today=None)
            out.append(f"'{r.name}': committing today costs the investment's present value "
                       f"({fmt(r.cost.today)}), the same commitment as the static NPV; the "
                       f"right's cost ({later.describe(fmt.template)}, {fmt(later.at(0.0))} at "
                       "year 0) applies at its later exercise dates.")
    return out


# --------------------------------------------------------------------------------------------
def _sample_steps(steps: int, limit: int = 240) -> np.ndarray:
    if steps + 1 <= limit:
        return np.arange(steps + 1)
    picked = np.round(np.linspace(0, steps, limit)).astype(int)      # non-decreasing
    return picked[np.concatenate([[True], picked[1:] != picked[:-1]])]


def _money_template(project: Project, digits: int = 1) -> str:
    """Format string for money, e.g. 'EUR {:,.1f} million'."""
    return " ".join(s for s in (project.currency, "{:,.%df}" % digits, project.unit) if s)


def _money_format(project: Project):
    template = _money_template(project)

    def fmt(x: float) -> str:
        return template.format(x)
    fmt.template = _money_template(project, 2)
    return fmt


def _primary_states(r, graph: StateGraph) -> list[int]:
    """States from which the rule of right ``r`` is read (asked of its type: the project
    invested, the rights that ``r`` requires used, every switch at its start mode; for a switch
    each mode in turn)."""
    return r.primary_states(graph, requirement_closure(graph.rights, r.name) - {r.name})


def graph_right(graph: StateGraph, name: str):
    return next(r for r in graph.rights if r.name == name)


def _crossing(x_far, x_near, x_in, g_far, g_near, g_in, smooth: bool) -> float:
    """Project value between x_near (carry on) and x_in (exercise) where the gain of exercising
    over carrying on crosses zero.

    Where exercise stays possible at the next step the gain touches zero smoothly (smooth
    pasting: gain ~ -c (x* - x)^2 on the carry-on side), so sqrt(-gain) is extrapolated linearly
    from the two carry-on nodes; otherwise (a last exercise date: gain linear in V) the gain is
    interpolated linearly between x_near and x_in."""
    lo_x, hi_x = min(x_near, x_in), max(x_near, x_in)
    if smooth and g_far is not None and g_far < g_near < 0:
        s_far, s_near = math.sqrt(-g_far), math.sqrt(-g_near)
        x = x_near + (x_near - x_far) * s_near / (s_far - s_near)
        return float(min(hi_x, max(lo_x, x)))
    if g_near is None or g_in is None or g_in == g_near:
        return float(math.sqrt(x_near * x_in))
    w = -g_near / (g_in - g_near)
    return float(x_near + min(1.0, max(0.0, w)) * (x_in - x_near))


def _crossings(x_far, x_near, x_in, g_far, g_near, g_in, smooth) -> list[float]:
    """:func:`_crossing` over arrays (nan for None), element by element the same floating
    point operations; an element that is not finite is handed to :func:`_crossing`."""
    with np.errstate(all="ignore"):
        lo_x, hi_x = np.minimum(x_near, x_in), np.maximum(x_near, x_in)
        pasting = smooth & (g_far < g_near) & (g_near < 0)
        s_far, s_near = np.sqrt(-g_far), np.sqrt(-g_near)
        x = x_near + (x_near - x_far) * s_near / (s_far - s_near)
        out = np.where(pasting, np.minimum(hi_x, np.maximum(lo_x, x)), np.nan)
        geometric = ~pasting & (np.isnan(g_near) | np.isnan(g_in) | (g_in == g_near))
        out = np.where(geometric, np.sqrt(x_near * x_in), out)
        w = -g_near / (g_in - g_near)
        linear = ~pasting & ~geometric
        out = np.where(linear, x_near + np.minimum(1.0, np.maximum(0.0, w)) * (x_in - x_near),
                       out)
    out = out.tolist()
    for k in np.flatnonzero(~np.isfinite(out) | (pasting & (s_far == s_near))).tolist():
        def arg(a):
            return None if math.isnan(a[k]) else float(a[k])
        out[k] = _crossing(arg(x_far), float(x_near[k]), float(x_in[k]), arg(g_far),
                           arg(g_near), arg(g_in), bool(smooth[k]))
    return out


def _thresholds(sol: Solution, state: int, edge_ids, steps) -> list[Threshold]:
    """Exercise region bounds of each edge from ``state`` at each step it is open (``steps``:
    increasing step numbers)."""
    grid, graph, pol = sol.grid, sol.graph, sol.policy
    rights = {r.name: r for r in graph.rights}
    out = []
    label_of = graph.states[state].label
    times = grid.times.tolist()
    heads = np.asarray(grid._heads)
    exf = (1.0 - grid.delta) + (grid.late if grid.late is not None else 0.0)
    powers = grid._powers
    nan = float("nan")
    steps = np.asarray(steps, dtype=int)
    for e_id in edge_ids:
        e = graph.edges[e_id]
        label = rights[e.right].action_text(e)
        open_at = exercise_steps(grid, rights[e.right])
        found = {}
        at = steps[open_at[steps]].tolist()
        rows = [(i, g) for i in at if (g := pol.gains.get((state, i, e_id))) is not None]
        if rows:
            i_ = np.array([i for i, _ in rows])
            lo = np.array([g.first for _, g in rows])
            hi = np.array([g.last for _, g in rows])
            g_ = np.array([g[2:] for _, g in rows], dtype=float)       # the gains; None -> nan
            smooth = np.array([(state, i + 1, e_id) in pol.gains for i, _ in rows])

            def value(j, ok):              # nodes_ex(i)[j] where ok, nan elsewhere
                jj = np.where(ok, j, 0)
                return np.where(ok, heads[i_] * powers[jj] * exf[i_], nan)
            lower = [None] * len(rows)
            upper = [None] * len(rows)
            has = lo > 0
            if has.any():
                k = np.flatnonzero(has)
                vals = _crossings(value(lo - 2, lo > 1)[k], value(lo - 1, has)[k],
                                  value(lo, has)[k], g_[k, 0], g_[k, 1], g_[k, 2], smooth[k])
                for kk, x in zip(k.tolist(), vals):
                    lower[kk] = x
            has = hi < i_
            if has.any():
                k = np.flatnonzero(has)
                vals = _crossings(value(hi + 2, hi + 2 <= i_)[k], value(hi + 1, has)[k],
                                  value(hi, hi >= 0)[k], g_[k, 5], g_[k, 4], g_[k, 3],
                                  smooth[k])
                for kk, x in zip(k.tolist(), vals):
                    upper[kk] = x
            found = {i: (a, b) for (i, _), a, b in zip(rows, lower, upper)}
        for i in at:
            bounds = found.get(i)
            if bounds is None:
                out.append(Threshold(times[i], label_of, label, None, None, never=True))
            else:
                out.append(Threshold(times[i], label_of, label, bounds[0], bounds[1]))
    out.sort(key=lambda t: t.year)
    return out


def _right_value(r, graph, sol, share, alone, occ, sample, fmt, v0) -> RightValue:
    """``occ``: (state_prob at ``sample``, exercised at every step), each with a leading axis
    of the two measures (risk-neutral, real-world)."""
    grid = sol.grid
    edge_ids = [k for k, e in enumerate(graph.edges) if e.right == r.name]
    prim = _primary_states(r, graph)
    thr = []
    for s in prim:
        ids = [k for k in edge_ids if graph.edges[k].source == s]
        thr += _thresholds(sol, s, ids, range(grid.steps + 1))
    # what the chance of use counts is the type's (a switch: first moves out of its start mode)
    def first_uses(ids):              # a forward pass that drops the paths once they move
        return occupancy(sol, (grid.probability, grid.real_probability), absorb=set(ids),
                         at=())[1]
    rn_use, rw_use, measure, mode_shares = r.chance_of_use(graph, edge_ids, occ, first_uses)
    side = threshold_side(thr)
    return RightValue(
        name=r.name, type=r.kind, window=tuple(float(x) for x in r.window), exercise=r.exercise,
        standalone_value=float(alone), shapley_value=float(share), side=side,
        thresholds=tuple(thr), use_years=tuple(float(grid.times[i]) for i in sample),
        use_risk_neutral=tuple(float(min(1.0, x)) for x in rn_use[sample]),
        use_real_world=tuple(float(min(1.0, x)) for x in rw_use[sample]),
        use_measure=measure, mode_shares=mode_shares,
        rule=_rule(r, [t for t, ok in zip(thr, _plausible_all(grid, thr)) if ok], side, fmt, v0,
                   float(min(1.0, rw_use[-1])), grid.horizon))


def _when(r) -> str:
    a, b = r.window
    if r.exercise == "european":
        return f"at year {b:g} only"
    if r.exercise == "bermudan":
        return "on the dates " + ", ".join(f"{t:g}" for t in r.dates)
    if a == 0:
        return f"at any time up to year {b:g}"
    return f"at any time between years {a:g} and {b:g}"


def _what(r, money: str) -> str:
    """The rule's action in words (the type's own wording)."""
    return r.what(money)

def _plausible(grid: Grid, t: Threshold) -> bool:
    """Whether a threshold lies within 5 standard deviations of ln(project value) at its date
    (risk-neutral centre). Far out in the tree the boundary near a cash-flow date can be huge
    and says nothing useful in a one-line rule; it stays in the thresholds table."""
    if t.never:
        return True
    i = grid.step_of(t.year)
    sd = 0.5 * math.log(grid.up / grid.down) * math.sqrt(max(i, 1))
    g = grid.probability * grid.up + (1 - grid.probability) * grid.down
    centre = grid.log_v0 + grid.log_carry[i] + i * math.log(g) + math.log(
        max(1e-300, grid.ex_fraction(i)))
    return all(abs(math.log(b) - centre) <= 5.0 * sd + 1e-12
               for b in (t.lower, t.upper) if b is not None and b > 0)


def _plausible_all(grid: Grid, thr) -> list[bool]:
    """:func:`_plausible` of each threshold: the same floating point test, with the terms of
    each date computed once for all dates."""
    n = np.arange(grid.steps + 1)
    sd = (0.5 * math.log(grid.up / grid.down) * np.sqrt(np.maximum(n, 1))).tolist()
    g = grid.probability * grid.up + (1 - grid.probability) * grid.down
    exf = [grid.ex_fraction(i) for i in range(grid.steps + 1)]
    logs = {x: math.log(max(1e-300, x)) for x in set(exf)}
    centre = ((grid.log_v0 + grid.log_carry) + n * math.log(g)
              + np.array([logs[x] for x in exf])).tolist()
    step = {t: i for i, t in enumerate(grid.times.tolist())}     # = grid.step_of(year)
    out = []
    log = math.log
    for t in thr:
        ok = True
        if not t.never:
            i = step.get(t.year)
            i = grid.step_of(t.year) if i is None else i
            c, d = centre[i], 5.0 * sd[i] + 1e-12
            b = t.lower
            if b is not None and b > 0:
                ok = abs(log(b) - c) <= d
            b = t.upper
            if ok and b is not None and b > 0:
                ok = abs(log(b) - c) <= d
        out.append(ok)
    return out


def _rule(r, thr, side, fmt, v0, use_rw, horizon) -> str:
    head = f"{r.name}: {_what(r, fmt.template)} {_when(r)}"
    tail = (f"; today project value is {fmt(v0)}; chance of use by year {horizon:g}: "
            f"{use_rw:.0%} (real-world)")
    if r.modal:                         # repeatable moves: one bound per move
        parts = []
        for action in dict.fromkeys(t.action for t in thr):
            ts = [t for t in thr if t.action == action and not t.never]
            if not ts:
                parts.append(f"{action}: never")
                continue
            parts.append(f"{action} {_bound_text(ts, fmt)}")
        return head + ": " + "; ".join(parts) + tail
    ts = [t for t in thr if not t.never]
    if not ts:
        return head + ": not worth using at any node of the lattice at these inputs" + tail
    text = _bound_text(ts, fmt, once=True)
    return head + (": " if text.startswith("used") else " ") + text + tail


def _everywhere(year: float) -> str:
    return "used today, at today's project value" if year == 0 else (
        f"used at year {year:.3g}, at every project value")


def _bound_text(ts, fmt, once: bool = False) -> str:
    """The policy found, from the thresholds of the dates where the right is used (sorted by
    date). A date without bounds is one where every node of the tree uses the right: stated as
    such, with its date. ``once``: a one-shot right, whose rule ends at the first date where it
    is used at every node (nothing is left to decide); for a repeatable move, early dates where
    the tree spans few values lead the bounds."""
    every = [t for t in ts if t.lower is None and t.upper is None]
    bounded = [t for t in ts if t.lower is not None or t.upper is not None]
    if not bounded or (once and every and every[0].year <= bounded[0].year):
        return _everywhere(every[0].year)
    lead = [t for t in every if t.year < bounded[0].year]
    late = [t for t in every if t.year > bounded[0].year]
    ab = [t for t in bounded if t.lower is not None]
    be = [t for t in bounded if t.upper is not None]
    if ab and (len(ab) >= len(be)):
        first, last = ab[0], ab[-1]
        txt = f"once project value exceeds {fmt(first.lower)} (year {first.year:.3g})"
        if last is not first:
            txt += f", {fmt(last.lower)} by year {last.year:.3g}"
    else:
        first, last = be[0], be[-1]
        txt = f"if project value falls below {fmt(first.upper)} (year {first.year:.3g})"
        if last is not first:
            txt += f", {fmt(last.upper)} by year {last.year:.3g}"
    if lead:
        span = (f"at year {lead[0].year:.3g}" if len(lead) == 1 else
                f"from year {lead[0].year:.3g} to {lead[-1].year:.3g}")
        txt = f"{span} at every project value the tree reaches, then " + txt
    if late:
        txt += "; " + _everywhere(late[0].year)
    return txt


def _decision_today(sol: Solution, graph: StateGraph, full: float, fmt) -> str:
    pol = sol.policy
    s0 = graph.initial
    act = pol.action(s0, 0, 0)
    state = graph.states[s0]
    if not state.invested:
        if act:
            commit = graph.edges[act - 1]
            then = pol.action(commit.target, 0, 0)
            also = f", and use '{graph.edges[then - 1].right}' at once" if then else ""
            return f"invest now ({commit.right}){also}"
        return "wait: keep the right to invest, do not commit today"
    verdict = "invest" if full >= 0 else "do not invest: the expanded NPV is negative"
    if act:
        e = graph.edges[act - 1]
        verdict += f", and use '{e.right}' at once"
    return verdict


def _policy_runs(pol) -> dict:
    """state -> step -> (starts, codes) as lists, every node covered (code 0 = carry on), read
    from the recorded policy (run-length ``runs``, or the ``moves`` that list only the runs
    where a right is used)."""
    if hasattr(pol, "runs"):
        return {s: {i: (list(map(int, st)), list(map(int, cd))) for i, (st, cd) in steps.items()}
                for s, steps in pol.runs.items()}
    out = {}
    for s, steps in pol.moves.items():
        per = out.setdefault(s, {})
        for i, moves in steps.items():
            starts, codes, pos = [], [], 0
            for a, b, code in sorted(moves):
                if a > pos:
                    starts.append(pos)
                    codes.append(0)
                starts.append(int(a))
                codes.append(int(code))
                pos = int(b)
            if pos <= i:
                starts.append(pos)
                codes.append(0)
            per[i] = (starts, codes)
    return out


def _decision_maps(sol: Solution, graph: StateGraph, n_times=150, n_values=160):
    """Best action per state on a reduced grid of dates and project values.

    Columns: an even sample of ``n_times`` steps, plus one step of every run of consecutive
    steps where an action is used that the sample would miss (a one-step bermudan date stays
    on the map at any steps_per_year). Rows: log-spaced values covering the tree's central
    band (3 standard deviations of ln V at each date, and around today's value over the whole
    horizon), widened to hold the edge of every exercise region found (up to 8 standard
    deviations out, and for an action used only farther out, its nearest node)."""
    grid, pol = sol.grid, sol.policy
    maps = []
    step = math.log(grid.up / grid.down)
    even = [int(i) for i in _sample_steps(grid.steps, limit=n_times)]
    half = 3.0 * step * math.sqrt(max(grid.steps, 1)) / 2

    log_down = math.log(grid.down)

    def first_log(i):
        """ln of the lowest node's value at step i as the decisions see it (None: all zero)."""
        keep = grid.ex_fraction(i) if hasattr(grid, "ex_fraction") else 1.0 - float(
            grid.delta[i])
        if keep <= 0.0:
            return None
        x = grid.log_v0 + float(grid.log_carry[i]) + i * log_down + math.log(keep)
        return x if math.isfinite(x) else None

    def centre_sd(i):
        b = first_log(i)
        return (None if b is None else b + i * step / 2), step * math.sqrt(max(i, 1)) / 2

    for s, runs in _policy_runs(pol).items():
        codes_used = [0] + sorted({int(c) for st in runs.values() for c in st[1] if c})
        labels = ["carry on" if graph.states[s].invested else "wait"] + [
            (graph.edges[c - 1].right if graph.edges[c - 1].action != Action.SWITCH
             else f"{graph.edges[c - 1].right}: {graph.edges[c - 1].label}")
            for c in codes_used[1:]]
        lookup = {c: k for k, c in enumerate(codes_used)}
        # one pass over the run-length codes (a few runs per step, no node arrays): the
        # steps each action is used at, and the edges of its regions in ln V
        used_at: dict[int, list[int]] = {}
        edges_at: list[float] = []
        shown: set[int] = set()
        nearest: dict[int, tuple[float, float]] = {}
        for i in sorted(runs):
            starts, codes = runs[i]
            if not any(codes):
                continue
            b = first_log(i)
            c, sd = centre_sd(i)
            n_runs = len(codes)
            for k, code in enumerate(codes):
                if not code:
                    continue
                lst = used_at.setdefault(int(code), [])
                if not lst or lst[-1] != i:
                    lst.append(i)
                if b is None:
                    continue
                first, last = starts[k], (starts[k + 1] - 1 if k + 1 < n_runs else i)
                inner = ([first] if k > 0 else []) + ([last] if k + 1 < n_runs else [])
                near = [b + j * step for j in inner if abs(b + j * step - c) <= 8 * sd]
                if near:
                    edges_at += near
                    shown.add(code)
                elif code not in shown:
                    j = min(last, max(first, round((c - b) / step)))
                    x = b + j * step
                    if code not in nearest or abs(x - c) < nearest[code][0]:
                        nearest[code] = (abs(x - c), x)
        # dates: every run of steps using an action gets at least one column
        cols = set(even)
        for ii in used_at.values():
            run = [ii[0]]
            for i in ii[1:] + [None]:
                if i is not None and i == run[-1] + 1:
                    run.append(i)
                    continue
                if not cols.intersection(run):
                    cols.add(run[len(run) // 2])
                if i is not None:
                    run = [i]
        steps = np.array(sorted(cols), dtype=int)
        # values: the central band, widened to every exercise region's edge
        lo, hi = grid.log_v0 - half, grid.log_v0 + half
        for i in steps:
            c, sd = centre_sd(int(i))
            if c is not None:
                lo, hi = min(lo, c - 3 * sd), max(hi, c + 3 * sd)
        if edges_at:
            lo, hi = min(lo, min(edges_at)), max(hi, max(edges_at))
        for code, (_, x) in nearest.items():
            if code not in shown:
                lo, hi = min(lo, x), max(hi, x)
        pad = 0.5 * step
        lo, hi = lo - pad, hi + pad
        span = (hi - lo) / (0.45 * step) if step > 0 else float("nan")
        n_v = int(min(800, max(n_values, math.ceil(span)))) if math.isfinite(span) else n_values
        lv = np.linspace(lo, hi, n_v)
        values = np.exp(lv)
        codes = np.full((n_v, len(steps)), -1, dtype=np.int16)
        for col, i in enumerate(steps):
            i = int(i)
            if i not in runs:
                continue
            v = grid.nodes_ex(i)
            if not np.all(v > 0):
                act = pol.actions(s, i)
                if np.all(v == 0) and act.size and np.all(act == act[0]):
                    codes[:, col] = lookup[int(act[0])]   # value 0 at every node (after the
                continue                                   # last flow): one action for all
            logs = np.log(v)
            j = np.rint((lv - logs[0]) / step).astype(int) if i > 0 else np.zeros(n_v, int)
            inside = (j >= 0) & (j <= i) & (lv >= logs[0] - step / 2) & (lv <= logs[-1] + step / 2)
            act = pol.actions(s, i)
            mapped = np.vectorize(lookup.get)(act) if act.size else act
            codes[inside, col] = np.asarray(mapped)[j[inside]]
        maps.append(DecisionMap(state=graph.states[s].label, actions=tuple(labels),
                                times=grid.times[steps], values=values, codes=codes))
    return tuple(maps)


def _fan(grid: Grid, steps):
    """Percentiles and means of project value (after each date's flow) at ``steps``.

    Percentiles treat each node's probability as spread evenly over its cell in ln V (width
    ln(u/d)), so they move smoothly with the date instead of jumping from node to node (and
    between the node sets of odd and even steps)."""
    p = grid.real_probability
    N = grid.steps
    logfact = np.concatenate([[0.0], np.cumsum(np.log(np.arange(1, N + 1)))])
    fan = {q: np.empty(len(steps)) for q in PERCENTILES}
    mean_rw = np.empty(len(steps))
    mean_rn = np.empty(len(steps))
    cell = math.log(grid.up / grid.down)          # log spacing of the nodes at one step
    growth = grid.probability * grid.up + (1 - grid.probability) * grid.down
    levels = np.array([q / 100.0 for q in PERCENTILES])
    if 0.0 < p < 1.0:                             # k * log(p), k * log(1 - p) for k = 0..N
        ups = np.arange(N + 1) * math.log(p)
        downs = np.arange(N + 1) * math.log(1 - p)
    at = np.empty((len(steps), 3, len(levels)))   # value, mass and cdf at each percentile's node
    for col, i in enumerate(steps):
        i = int(i)
        v = grid.nodes_ex(i)
        if 0.0 < p < 1.0:   # log C(i, j) + j log p + (i - j) log(1 - p), j = 0..i
            logpmf = logfact[i] - logfact[:i + 1] - logfact[i::-1] + ups[:i + 1] + downs[i::-1]
            pmf = np.exp(logpmf)
        else:
            pmf = np.zeros(i + 1)
            pmf[i if p >= 1.0 else 0] = 1.0
        cdf = np.cumsum(pmf)
        ks = np.minimum(i, np.searchsorted(cdf, levels))
        row = at[col]
        row[0], row[1], row[2] = v[ks], pmf[ks], cdf[ks]
        mean_rw[col] = float(pmf @ v)
        mean_rn[col] = math.exp(grid.log_v0 + grid.log_carry[i] + i * math.log(growth)) * (
            grid.ex_fraction(i))
    vk, pk, ck = at[:, 0], at[:, 1], at[:, 2]
    spread = (np.asarray(steps)[:, None] > 0) & (vk > 0) & (pk > 0)   # mass over its log cell
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.minimum(1.0, np.maximum(0.0, (levels - (ck - pk)) / pk))
    shifts = ((w - 0.5) * cell).tolist()
    values = vk.tolist()
    for n, (row, keep) in enumerate(zip(values, spread.tolist())):
        for m, q in enumerate(PERCENTILES):
            fan[q][n] = row[m] * math.exp(shifts[n][m]) if keep[m] else row[m]
    return grid.times[steps], fan, mean_rw, mean_rn
