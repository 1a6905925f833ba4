"""Time grid, binomial tree of project value, and backward induction over all states at once.

Tree: Cox-Ross-Rubinstein by default (u = exp(sigma sqrt(dt)), d = 1/u) or explicit up/down per
``step_years``. Risk-neutral probability p = (g - d)/(u - d) with g the risk-free growth over one
step ((1+r)^dt annual, exp(r dt) continuous) times exp(-q dt) for a continuous payout yield q.
Node (i, j) (step i, j up-moves) carries the base project value just before that date's cash flow,
V = V0 * C_i * u^j * d^(i-j), C_i the product of (1 - delta) over cash-flow dates before step i.

Backward induction holds one array per state and time slice (shape: states x nodes); the policy is
kept as the runs of nodes where a right is used, per state and step (see ``Policy``), never
a full tree of values.

The project ends at its last cash-flow date (cash-flow forms): at that date the year's flow is paid
first, then the decisions are taken, then the terminal value is paid to the state chosen (a sale
there replaces the terminal value); no right can be used after it. Committing through the defer
right and using another right at the same date is allowed (the commitment is taken first), so the
project committed today can do everything the project committed without the defer right can.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import NamedTuple
from functools import cached_property

import numpy as np

from .errors import ValuationError
from .model import Project
from .rights import StateGraph
from .underlying import ResolvedUnderlying, intensity, stream_accrued, stream_value_after

_LOG_LIMIT = 700.0          # exp() stays finite in float64 below ~709


@dataclass(frozen=True)
class Grid:
    """The time grid and tree factors. Times in years; ``discount`` is per step (risk-free)."""

    steps: int
    step_years: float
    horizon: float
    up: float
    down: float
    probability: float           # risk-neutral
    real_probability: float      # under the real-world drift implied by discount_rate
    discount: float
    log_v0: float
    log_carry: np.ndarray        # (steps+1,) log C_i
    delta: np.ndarray            # (steps+1,) payout fraction at step i (0 if no flow)
    yield_flow: float            # present_value form: exp(q dt) - 1, paid at every step >= 1
    fixed_weight: np.ndarray     # (steps+1,) years of a state's fixed yearly flow paid at step i
    fixed_beyond: float          # value at the horizon of 1 a year of fixed flow after it
    warnings: tuple[str, ...] = ()
    late: np.ndarray | None = None   # (steps+1,) part of delta paid after the decisions (the
    #                                  terminal value at the last cash-flow date)
    last_step: int | None = None     # step of the last cash-flow date (None: present_value form)

    def late_share(self, i: int) -> float:
        return float(self.late[i]) if self.late is not None else 0.0

    def ex_fraction(self, i: int) -> float:
        """Share of the cum-flow value left when the decisions at step i are taken."""
        return 1.0 - float(self.delta[i]) + self.late_share(i)

    @cached_property
    def fixed_pv(self) -> float:
        """Value today of 1 a year of fixed flow in the timing the lattice pays it (risk-free)."""
        disc = self.discount ** np.arange(self.steps + 1)
        return float(self.fixed_weight @ disc + self.fixed_beyond * disc[-1])

    @cached_property
    def times(self) -> np.ndarray:
        return np.arange(self.steps + 1) * self.step_years

    def step_of(self, t: float) -> int:
        return int(min(self.steps, max(0, round(t / self.step_years))))

    @cached_property
    def _powers(self) -> np.ndarray:
        """(u/d)^j for j = 0..steps (the grid refuses trees wider than float range)."""
        return np.exp(np.arange(self.steps + 1) * math.log(self.up / self.down))

    @cached_property
    def _heads(self) -> list:
        """Project value at node (i, 0) of each step i (the lowest node), before the flow."""
        base = (self.log_v0 + self.log_carry) + np.arange(self.steps + 1) * math.log(self.down)
        return [math.exp(max(x, -_LOG_LIMIT)) for x in base.tolist()]

    def nodes(self, i: int) -> np.ndarray:
        """Project value at the nodes of step i, before that date's cash flow (cum-flow)."""
        return self._heads[i] * self._powers[:i + 1]

    def nodes_ex(self, i: int) -> np.ndarray:
        """Project value at step i after that date's cash flow (the value decisions look at; at
        the last cash-flow date, the terminal value still to be paid)."""
        return self.nodes(i) * self.ex_fraction(i)

    @cached_property
    def _power_list(self) -> list:
        return self._powers.tolist()

    def nodes_ex_at(self, i: int, js) -> list[float]:
        """``nodes_ex(i)[j]`` for each j in ``js`` (the same floating point values, computed
        for those nodes only)."""
        head, f, powers = self._heads[i], self.ex_fraction(i), self._power_list
        return [head * powers[j] * f for j in js]

    def memory_bytes(self, states: int) -> int:
        """Rough peak memory of one solve: a few slices per state plus the recorded policy."""
        return int(8 * 6 * states * (self.steps + 1) + 200 * states * (self.steps + 1))


@dataclass(frozen=True)
class Plan:
    """What ``realopt check`` prints and the memory/time guard reads, before anything is solved."""

    steps: int
    step_years: float
    horizon: float
    up: float
    down: float
    probability: float
    states: int
    solves: int
    memory_bytes: int
    seconds_estimate: float
    warnings: tuple[str, ...]
    solve_seconds: float = 0.0     # one solve of the whole project (the unit of extra solves)
    volatility: float | None = None        # the yearly volatility used (given or estimated)
    volatility_stderr: float | None = None
    volatility_method: str = ""


def _event_dates(project: Project, res: ResolvedUnderlying):
    """(date, what) pairs the grid must hit: cash-flow dates within the horizon, windows,
    bermudan dates."""
    out = [(t, f"cash flow of year {t:g}") for t in res.flow_times]
    for r in project.rights:
        out += [(t, f"window of '{r.name}'") for t in r.window]
        if r.exercise == "bermudan":
            out += [(t, f"exercise date of '{r.name}'") for t in r.dates]
    return out


def build_grid(project: Project, res: ResolvedUnderlying) -> Grid:
    """Grid, factors and payout arrays; raises ValuationError if p is not inside (0, 1)."""
    spec, market = project.lattice, project.market
    horizon = float(project.horizon)
    warnings = []
    if spec.explicit:
        dt = float(spec.step_years or 1.0)
        steps = max(1, int(round(horizon / dt)))
        if abs(steps * dt - horizon) > 1e-9 * max(1.0, horizon):
            warnings.append(f"The horizon {horizon:g} years is not a whole number of "
                            f"{dt:g}-year steps; the tree runs {steps} steps ({steps * dt:g} years).")
        up, down = float(spec.up), float(spec.down)
        if steps * abs(math.log(up / down)) > _LOG_LIMIT:
            raise ValuationError(
                f"The tree of {steps} steps with up = {up:g}, down = {down:g} would span beyond "
                "floating point range. Fix: fewer steps or closer up/down factors.")
    else:
        steps = max(1, int(round(spec.steps_per_year * horizon)))
        dt = horizon / steps
        sigma = res.volatility
        if sigma is None or not sigma > 0:
            raise ValuationError("The project value volatility is missing or not positive: set "
                                 "underlying.volatility (e.g. 0.25) or an estimate block.")
        up = math.exp(sigma * math.sqrt(dt))
        down = 1.0 / up
        width = sigma * math.sqrt(dt) * steps
        if 2 * width > _LOG_LIMIT:
            raise ValuationError(
                f"The tree would span exp(+-{width:.0f}) times today's value, beyond floating "
                "point range. Fix: lower lattice.steps_per_year or the horizon.")
    q = res.payout_yield
    g = float(market.risk_free_growth(dt))
    gq = g * math.exp(-q * dt)
    p = (gq - down) / (up - down) if up != down else float("nan")
    if not (0.0 < p < 1.0):
        raise ValuationError(
            f"The risk-neutral probability p = (g - d)/(u - d) = {p:.4g} is not strictly between "
            f"0 and 1 (one-step growth g = {gq:.6g} including the payout yield, u = {up:.6g}, "
            f"d = {down:.6g}). The tree then admits arbitrage. Fix: choose factors with "
            "d < g < u (explicit up/down), or use more steps per year / a higher volatility so "
            "that exp(sigma*sqrt(dt)) exceeds the one-step growth.")
    gk = float(market.discount_growth(dt)) * math.exp(-q * dt)
    p_real = (gk - down) / (up - down)
    if not (0.0 <= p_real <= 1.0):
        warnings.append(f"The real-world drift implied by discount_rate gives an up-probability "
                        f"of {p_real:.3f} per step; it is clipped to [0, 1] for the real-world "
                        "chances and fan chart.")
        p_real = min(1.0, max(0.0, p_real))

    delta = np.zeros(steps + 1)
    moved = []
    for t, what in _event_dates(project, res):
        if t > horizon + 1e-12:
            continue
        k = int(round(t / dt))
        if abs(k * dt - t) > 1e-9 * max(1.0, t):
            moved.append(f"{what} (year {t:g}) moved to year {k * dt:.4g}")
    if moved:
        warnings.append(f"{len(moved)} date(s) fall between steps of {dt:.4g} years and were "
                        "moved to the nearest step: " + "; ".join(moved[:6])
                        + ("; ..." if len(moved) > 6 else "")
                        + ". Choose steps_per_year so that these dates fall on steps.")
    fixed_beyond = 0.0
    fixed_weight = np.zeros(steps + 1)
    yield_flow = 0.0
    late = np.zeros(steps + 1)
    last_step = None
    if res.has_flows:
        last_step = int(round(res.last_flow_year / dt))
    if res.has_flows and res.timing == "spread":
        delta, fixed_weight, fixed_beyond, late = _spread_payouts(res, market, steps, dt,
                                                                  horizon)
    elif res.has_flows:
        keep = np.ones(steps + 1)
        starts = (res.period_start,) + res.flow_times[:-1]
        n = len(res.flow_times)
        for m, (t, dl, t_prev) in enumerate(zip(res.flow_times, res.payout, starts)):
            if t <= horizon + 1e-12:
                k = int(round(t / dt))
                if m == n - 1 and res.cash_flows[-1] > 0:      # the terminal value's share
                    late[k] = keep[k] * res.terminal_value / res.cash_flows[-1]
                keep[k] *= 1.0 - dl
                fixed_weight[k] += t - t_prev
            else:
                fixed_beyond += (t - t_prev) / float(market.risk_free_growth(t - horizon))
        delta = 1.0 - keep
    else:
        # continuous payout: a fixed yearly flow accrues over every step (dt years of it,
        # compounded to the step at the risk-free rate), to the horizon
        yield_flow = math.expm1(q * dt) if q else 0.0
        rf = intensity(market.risk_free_rate, market.compounding)
        fixed_weight[1:] = math.expm1(rf * dt) / rf if rf else dt
    with np.errstate(divide="ignore"):
        logkeep = np.log(np.maximum(1.0 - delta, 0.0))
    log_carry = np.concatenate([[0.0], np.cumsum(logkeep)[:-1]])
    return Grid(steps=steps, step_years=dt, horizon=horizon, up=up, down=down, probability=p,
                real_probability=p_real, discount=1.0 / g, log_v0=math.log(res.present_value),
                log_carry=log_carry, delta=delta, yield_flow=yield_flow,
                fixed_weight=fixed_weight, fixed_beyond=fixed_beyond, warnings=tuple(warnings),
                late=late, last_step=last_step)


def _spread_payouts(res: ResolvedUnderlying, market, steps: int, dt: float, horizon: float):
    """``flow_timing: spread``: at step i the asset pays what accrued over (t_{i-1}, t_i]
    (compounded to t_i at the discount intensity), so that value before the payment = payment +
    value after it, exactly; the terminal value is paid at the last date's step. Returns the
    payout fractions, the fixed-flow weights (years of fixed flow accrued per step, compounded
    at the risk-free rate), the value at the horizon of 1 a year of fixed flow after it, and the
    share of the payment at the last date that is the terminal value (paid after decisions)."""
    times = np.arange(steps + 1) * dt
    pieces = np.zeros(steps + 1)
    pieces[1:] = res.accrued(times[:-1], times[1:])
    tv_step = int(round(res.last_flow_year / dt))
    tv_date = tv_step * dt
    after = res.value_after(times, tv_date)
    if tv_step <= steps:
        pieces[tv_step] += res.terminal_value
    before = pieces + after
    live = before[1:min(tv_step, steps) + 1]          # after the last date V is simply 0
    if np.any(live <= 0) or not after[0] > 0:
        k = int(np.argmax(live <= 0)) + 1
        raise ValuationError(
            f"The expected cash flows from year {times[k]:.4g} on are worth {before[k]:,.4g} "
            "at that date (at the discount rate); the lattice of project value needs this "
            "remaining value to be positive. Fix: check the signs of the later cash flows, add a "
            "terminal_value, or model the loss-making tail as a right.")
    delta = np.where(before > 0, pieces / np.where(before > 0, before, 1.0), 0.0)
    delta[0] = 0.0
    late = np.zeros(steps + 1)
    if 0 < tv_step <= steps and before[tv_step] > 0:
        late[tv_step] = res.terminal_value / before[tv_step]
    rf = intensity(market.risk_free_rate, market.compounding)
    unit = [(res.period_start, res.last_flow_year, res.last_flow_year - res.period_start)]
    weight = np.zeros(steps + 1)                  # 1 a year of fixed flow, at the risk-free rate
    weight[1:] = stream_accrued(unit, rf, times[:-1], times[1:])
    beyond = float(stream_value_after(unit, rf, horizon)) if res.last_flow_year > horizon else 0.0
    return delta, weight, beyond, late


def exercise_steps(grid: Grid, right) -> np.ndarray:
    """Boolean mask over steps where ``right`` may be exercised (windows inclusive; a defer
    right may always commit today; nothing after the last cash-flow date, where the project
    ends)."""
    mask = np.zeros(grid.steps + 1, dtype=bool)
    a, b = grid.step_of(right.window[0]), grid.step_of(right.window[1])
    if right.exercise == "american":
        mask[a:b + 1] = True
    elif right.exercise == "european":
        mask[b] = True
    else:
        for t in right.dates:
            if right.window[0] - 1e-12 <= t <= right.window[1] + 1e-12:
                mask[grid.step_of(t)] = True
    if right.commits:                   # committing today is always one of the choices
        mask[0] = True
    if grid.last_step is not None:
        mask[grid.last_step + 1:] = False
    return mask


class Gains(NamedTuple):
    """Where an edge is used at one step from one state: its exercise region is the nodes
    ``first`` .. ``last``; the other fields are the gain of using it over carrying on (money,
    valued at that date) at nodes first-2, first-1, first, last, last+1, last+2 (None outside
    the step's nodes). realopt.appraisal reads the thresholds off them."""

    first: int
    last: int
    below_far: float | None
    below_near: float | None
    at_first: float | None
    at_last: float | None
    above_near: float | None
    above_far: float | None


@dataclass
class Policy:
    """Optimal action per node. ``moves[state][step]`` lists the runs of nodes where a right is
    used, ``((first, stop, code), ...)`` in node order: nodes first .. stop-1 take action code
    (edge id + 1); every other node carries on (code 0). Steps where the state has no choice
    are absent (a step where it has a choice and carries on everywhere holds ``()``)."""

    moves: dict = field(default_factory=dict)
    # (state, step, edge) -> Gains (the exercise region's first and last node, gains over
    # carrying on either side of it)
    gains: dict = field(default_factory=dict)

    def actions(self, state: int, step: int) -> np.ndarray:
        """Action code of every node of ``step`` (0 where the state has no choice)."""
        out = np.zeros(step + 1, dtype=np.int16)
        for a, b, code in self.moves.get(state, {}).get(step, ()):
            out[a:b] = code
        return out

    def action(self, state: int, step: int, node: int) -> int:
        """Action code at one node (0: carry on, or no choice at that step)."""
        for a, b, code in self.moves.get(state, {}).get(step, ()):
            if a <= node < b:
                return code
        return 0


@dataclass
class Solution:
    values: np.ndarray           # (states,) value of each state at t = 0 (abandoned: 0)
    policy: Policy | None
    grid: Grid
    graph: StateGraph
    carry: np.ndarray | None = None   # (states,) carry-on value at t = 0, before today's choice


def _compile_edges(grid: Grid, graph: StateGraph, rights_by_name, rows):
    """Per step: (edges out of invested states, commit edges), each a list of (source row,
    target row or -1, amount at that step, edge id). Commit edges are decided second, against
    the values of the invested states after their own decisions at that step."""
    times = grid.times
    per_step = [([], []) for _ in range(grid.steps + 1)]
    for e_id, e in enumerate(graph.edges):
        mask = exercise_steps(grid, rights_by_name[e.right])
        amounts = e.sign * np.broadcast_to(np.asarray(e.amount.at(times), float), times.shape)
        tgt = rows.get(e.target, -1)
        phase = 0 if graph.states[e.source].invested else 1
        src = rows[e.source]
        for i, amount in zip(np.flatnonzero(mask).tolist(), amounts[mask].tolist()):
            per_step[i][phase].append((src, tgt, amount, e_id))
    return per_step


def _gains_around(lo: int, hi: int, cand, carry) -> Gains:
    """Gains(lo, hi, gain at lo-2, lo-1, lo, hi, hi+1, hi+2), None outside the slice; gain =
    cand - carry (cand: a number or an array over the slice's nodes)."""
    near, far = slice(max(lo - 2, 0), lo + 1), slice(hi, hi + 3)
    if isinstance(cand, np.ndarray):
        below, above = (cand[near] - carry[near]).tolist(), (cand[far] - carry[far]).tolist()
    else:
        below, above = (cand - carry[near]).tolist(), (cand - carry[far]).tolist()
    return Gains(lo, hi, *([None] * (3 - len(below)) + below),
                 *(above + [None] * (3 - len(above))))


def _record(policy, i, edges, cands, act, H, live):
    """Store the runs of each deciding state and, for each edge, the gain over carrying on
    (cand - H) at the nodes either side of its exercise region (for thresholds)."""
    span = {}
    for src in {e[0] for e in edges}:
        codes = act[src]
        starts = [0] + (np.flatnonzero(codes[1:] != codes[:-1]) + 1).tolist()
        stops = starts[1:] + [i + 1]
        runs = tuple((a, b, c) for a, b, c in zip(starts, stops, codes[starts].tolist()) if c)
        policy.moves.setdefault(live[src], {})[i] = runs
        for a, b, c in runs:
            lo, hi = span.get((src, c), (a, b - 1))
            span[(src, c)] = (min(lo, a), b - 1)
    for (src, _, _, e_id), cand in zip(edges, cands):
        region = span.get((src, e_id + 1))
        if region is None:
            continue
        policy.gains[(live[src], i, e_id)] = _gains_around(region[0], region[1], cand, H[src])


def _solve_alone(grid: Grid, graph: StateGraph, per_step, live, policy, today_only):
    """:func:`solve` for one live state whose every edge ends the project (abandonment): the
    same arithmetic on 1-d slices. At each step the first edge offering the largest amount is
    used where the carry-on value is below that amount (one band of low nodes when the value
    grows with the project value; several bands are recorded as such).

    When every term added to a slice grows with the node (non-negative scale and flows, node
    values growing with j), rounding keeps each slice non-decreasing in j, so the nodes below
    the amount are found by binary search instead of a comparison over the slice."""
    N = grid.steps
    p = grid.probability
    a, b = grid.discount * (1.0 - p), grid.discount * p
    state = graph.states[live[0]]
    scale, fixed = np.float64(state.scale), np.float64(state.fixed)
    heads, powers = grid._heads, grid._powers
    delta = grid.delta.tolist()
    late = grid.late.tolist() if grid.late is not None else [0.0] * (N + 1)
    weights = grid.fixed_weight.tolist()
    shares = [d - t if d != 0.0 else (grid.yield_flow if i > 0 else 0.0)
              for i, (d, t) in enumerate(zip(delta, late))]
    monotone = bool(scale == 0.0 or (
        scale > 0.0 and 1.0 - delta[N] >= 0.0 and min(late) >= 0.0 and min(shares) >= 0.0
        and np.all(powers[1:] >= powers[:-1])))
    bufs = (np.empty(N + 1), np.empty(N + 1))
    tmp = np.empty(N + 1)
    better = np.empty(N + 1, dtype=bool)
    moves = policy.moves.setdefault(live[0], {}) if policy is not None else None
    gains = policy.gains if policy is not None else None
    X = bufs[0]
    np.multiply(scale, grid.nodes(N) * (1.0 - grid.delta[N]), out=X)
    X += fixed * grid.fixed_beyond
    for i in range(N, -1, -1):
        if i < N:
            H = bufs[(N - i) & 1][:i + 1]
            np.multiply(X[1:], b, out=H)
            t = tmp[:i + 1]
            np.multiply(X[:-1], a, out=t)
            H += t
        else:
            H = X
        if late[i]:                                # the terminal value, paid after decisions
            H += scale * (grid.nodes(i) * late[i])
        edges = per_step[i][0]
        if edges:
            best, e_best = edges[0][2], edges[0][3]
            for _, _, amount, e_id in edges[1:]:
                if amount > best:
                    best, e_best = amount, e_id
            code = e_best + 1
            if moves is None or (today_only and i):
                np.maximum(H, best, out=H)
            elif monotone:
                k = int(H.searchsorted(best))          # H[j] < best exactly for j < k
                if k:
                    moves[i] = ((0, k, code),)
                    above = H[k - 1:k + 2].tolist()
                    gains[(live[0], i, e_best)] = Gains(0, k - 1, None, None,
                                                        best - float(H[0]), *(
                        [best - x for x in above] + [None, None])[:3])
                    H[:k] = best
                else:
                    moves[i] = ()
            else:
                bt = better[:i + 1]
                np.less(H, best, out=bt)
                k = int(np.count_nonzero(bt))
                if not k:
                    moves[i] = ()
                else:
                    lo = int(bt.argmax())
                    hi = lo + k - 1
                    if hi <= i and np.count_nonzero(bt[lo:hi + 1]) == k:
                        moves[i] = ((lo, hi + 1, code),)
                    else:                     # several bands (carry-on not monotone in V)
                        hi = i - int(bt[::-1].argmax())
                        starts = [0] + (np.flatnonzero(bt[1:] != bt[:-1]) + 1).tolist()
                        stops = starts[1:] + [i + 1]
                        moves[i] = tuple((s, e, code) for s, e, inside in
                                         zip(starts, stops, bt[starts].tolist()) if inside)
                    gains[(live[0], i, e_best)] = _gains_around(lo, hi, best, H)
                    np.copyto(H, best, where=bt)
        share = shares[i]
        if share:
            flow = np.multiply(powers[:i + 1], heads[i], out=tmp[:i + 1])
            flow *= share * scale
            H += flow
        if fixed and weights[i]:
            H += fixed * weights[i]
        X = H
    values = np.zeros(len(graph.states))
    values[live[0]] = X[0]
    return Solution(values=values, policy=policy, grid=grid, graph=graph)


def solve(grid: Grid, graph: StateGraph, record: bool = False,
          today_only: bool = False) -> Solution:
    """Backward induction over every state at once.

    At step i (after that date's cash flow) a state's value is the best of carrying on, H_s, and
    each edge allowed at i: H_target + money received (one decision per invested state and date;
    a commitment first, then the invested state's decision). The value carried back includes the
    state's flows at i: scale_s * delta_i * V + fixed_s; the terminal value (at the last
    cash-flow date) is paid after the decisions. At the horizon a state is worth
    scale_s * V_ex + fixed_s * PV(fixed flows beyond the horizon).
    ``record`` keeps the policy (every step, or step 0 only with ``today_only``).
    """
    rights_by_name = {r.name: r for r in graph.rights}
    live = [k for k, s in enumerate(graph.states) if not s.abandoned]
    rows = {k: r for r, k in enumerate(live)}
    scales = np.array([graph.states[k].scale for k in live])[:, None]
    fixed = np.array([graph.states[k].fixed for k in live])[:, None]
    has_fixed = bool(np.any(fixed))
    per_step = _compile_edges(grid, graph, rights_by_name, rows)
    N = grid.steps
    p = grid.probability
    a, b = grid.discount * (1.0 - p), grid.discount * p
    policy = Policy() if record else None

    S = len(live)
    if S == 1 and all(e[1] < 0 for es in per_step for e in es[0] + es[1]):
        return _solve_alone(grid, graph, per_step, live, policy, today_only)
    bufs = (np.empty((S, N + 1)), np.empty((S, N + 1)))   # two slices, swapped each step
    tmp = np.empty((S, N + 1))
    delta = grid.delta.tolist()
    lates = grid.late.tolist() if grid.late is not None else [0.0] * (N + 1)
    weights = grid.fixed_weight.tolist()
    X = bufs[0]
    np.multiply(scales, (grid.nodes(N) * (1.0 - grid.delta[N]))[None, :], out=X)
    X += fixed * grid.fixed_beyond
    cur = 0
    one_state = S == 1
    for i in range(N, -1, -1):
        if i < N:
            cur ^= 1
            H = bufs[cur][:, :i + 1]
            np.multiply(X[:, 1:], b, out=H)
            t = tmp[:, :i + 1]
            np.multiply(X[:, :-1], a, out=t)
            H += t
        else:
            H = X
        late = lates[i]
        if late:                                   # the terminal value, paid after decisions
            H += scales * (grid.nodes(i) * late)[None, :]
        if i == 0:
            carry0 = H[:, 0].copy()                # each state's carry-on value today
        invested_edges, commits = per_step[i]
        if invested_edges or commits:
            recording = record and (i == 0 or not today_only)
            if recording:
                carry = H.copy()
                act = np.zeros(H.shape, dtype=np.int16)
                every, every_cand = [], []
            for edges in (invested_edges, commits):
                # candidates are computed from the carry-on values before any is overwritten
                # (commitments: from the invested states' values after their decisions)
                cands = [(H[tgt] + amount) if tgt >= 0 else amount for _, tgt, amount, _ in edges]
                if recording:
                    for (src, _, _, e_id), cand in zip(edges, cands):
                        better = cand > H[src]
                        act[src][better] = e_id + 1
                        np.copyto(H[src], cand, where=better)
                    every += edges
                    every_cand += cands
                else:
                    for (src, _, _, _), cand in zip(edges, cands):
                        np.maximum(H[src], cand, out=H[src])
            if recording:
                _record(policy, i, every, every_cand, act, carry, live)
        share = delta[i] - late if delta[i] != 0.0 else (grid.yield_flow if i > 0 else 0.0)
        if share:
            flow = grid.nodes(i)
            if one_state:
                flow *= share * scales[0, 0]
                H[0] += flow
            else:
                flow *= share
                t = tmp[:, :i + 1]
                np.multiply(scales, flow[None, :], out=t)
                H += t
        if has_fixed and weights[i]:
            H += fixed * weights[i]
        X = H
    values = np.zeros(len(graph.states))
    values[live] = X[:, 0]
    carry = np.zeros(len(graph.states))
    carry[live] = carry0
    return Solution(values=values, policy=policy, grid=grid, graph=graph, carry=carry)


def occupancy(sol: Solution, p, absorb=(), at=None):
    """Forward pass under up-probability ``p`` with the recorded policy.

    ``p`` is one probability or a sequence of them (one pass for all: the measures are rows of
    one array). Returns (state_prob, exercised): state_prob[m, n, k] = chance under measure m
    of being in state k after the decisions at step ``at[n]`` (every step if ``at`` is None);
    exercised[m, i, e] = chance that edge e is taken at step i. For a single ``p`` the leading
    axis is left out. Commitments move first, then the invested states' decisions (as in
    :func:`solve`). Mass taking an edge in ``absorb`` is counted and then dropped (first uses
    only: e.g. a switch's first move).
    """
    graph, grid, pol = sol.graph, sol.grid, sol.policy
    single = np.ndim(p) == 0
    ps = np.atleast_1d(np.asarray(p, dtype=float))
    M, S, E, N = len(ps), len(graph.states), len(graph.edges), grid.steps
    steps_at = np.arange(N + 1) if at is None else np.asarray(at, dtype=int)
    row_of = {int(i): n for n, i in enumerate(steps_at)}
    state_prob = np.zeros((M, len(steps_at), S))
    exercised = np.zeros((M, N + 1, E))
    up = ps[:, None, None]
    down = (1.0 - ps)[:, None, None]
    bufs = (np.zeros((M, S, N + 1)), np.zeros((M, S, N + 1)))
    pi = bufs[0][..., :1]
    pi[:, graph.initial, 0] = 1.0
    absorbed = np.zeros((M, S))
    targets = [e.target for e in graph.edges]
    gone = [graph.states[t].abandoned or k in absorb for k, t in enumerate(targets)]
    if len(pol.moves) == 1 and all(gone[code - 1] for steps in pol.moves.values()
                                   for runs in steps.values() for _, _, code in runs):
        _occupancy_alone(pol, next(iter(pol.moves)), ps, steps_at, targets, state_prob,
                         exercised)
        return (state_prob[0], exercised[0]) if single else (state_prob, exercised)
    phases = ([(s, pol.moves[s]) for s in pol.moves if not graph.states[s].invested],
              [(s, pol.moves[s]) for s in pol.moves if graph.states[s].invested])
    for i in range(N + 1):
        if i > 0:
            nxt = bufs[i % 2][..., :i + 1]
            np.multiply(pi, down, out=nxt[..., :i])
            nxt[..., i] = 0.0
            nxt[..., 1:] += up * pi
            pi = nxt
        for sources in phases:
            moves = []
            for s, steps in sources:
                for a, b, code in steps.get(i, ()):
                    moves.append((s, code - 1, a, b, pi[:, s, a:b].copy()))
            for s, e_id, a, b, mass in moves:      # all moves read the pre-decision masses
                pi[:, s, a:b] -= mass
                total = mass.sum(axis=1)
                if gone[e_id]:
                    absorbed[:, targets[e_id]] += total
                else:
                    pi[:, targets[e_id], a:b] += mass
                exercised[:, i, e_id] += total
        n = row_of.get(i)
        if n is not None:
            state_prob[:, n] = pi.sum(axis=2) + absorbed
    if single:
        return state_prob[0], exercised[0]
    return state_prob, exercised


_NEGLIGIBLE = 1e-300      # path mass below this is left out (it never shows in any sum)


def _occupancy_alone(pol, state, ps, steps_at, targets, state_prob, exercised):
    """:func:`occupancy` when ``state`` (the initial state) is the only one that decides and
    every move out of it ends the path (abandonment): each measure's mass is followed only
    over the window of nodes where it is not negligible (above the exercise band, a few dozen
    standard deviations wide), one correlation (the two-point stencil) per step. Fills the
    arrays."""
    N = exercised.shape[1] - 1
    moves = pol.moves[state]
    want = {int(i): n for n, i in enumerate(steps_at)}
    correlate, cut = np.correlate, _NEGLIGIBLE
    for m, p in enumerate(ps.tolist()):
        kernel = np.array([p, 1.0 - p])    # node j keeps (1 - p) of its mass, j+1 gains p
        pi, lo = np.ones(1), 0             # the window: mass at nodes lo .. lo + pi.size - 1
        left = []                          # (step, edge, mass leaving there)
        alive = {}
        for i in range(N + 1):
            if i and pi.size:
                pi = correlate(pi, kernel, "full")     # new[j] = q old[j] + p old[j-1]
                if pi[0] < cut:
                    k = 1
                    while k < pi.size and pi[k] < cut:
                        k += 1
                    pi = pi[k:]
                    lo += k
                if pi.size and pi[-1] < cut:
                    k = pi.size - 1
                    while k > 0 and pi[k - 1] < cut:
                        k -= 1
                    pi = pi[:k]
            runs = moves.get(i)
            if runs and pi.size:
                for a, b, code in runs:
                    a, b = max(a, lo) - lo, min(b, lo + pi.size) - lo
                    if a >= b:
                        continue
                    piece = pi[a:b]
                    left.append((i, code - 1, float(piece.sum()) if b - a > 8
                                 else sum(piece.tolist())))
                    if a == 0:
                        pi = pi[b:]
                        lo += b
                    elif b == pi.size:
                        pi = pi[:a]
                    else:
                        pi = pi.copy()
                        pi[a:b] = 0.0
            if i in want:
                alive[i] = float(pi.sum())
        for i, e_id, mass in left:
            exercised[m, i, e_id] += mass
        gone = np.cumsum(exercised[m], axis=0)[list(want)]      # by edge, at steps_at
        for e_id, t in enumerate(targets):
            state_prob[m, :, t] += gone[:, e_id]
        state_prob[m, :, state] += [alive[i] for i in want]


# Time model of ``plan`` (process time on this project's 2-core machine, one core per run,
# measured with tests/benchmarks/bench_plan.py): a lattice solve costs NODE_SECONDS per node
# and live state plus STEP_SECONDS + EDGE_SECONDS per open edge at every step; the appraisal
# solves each distinct usable subset of rights once (the full set with the policy recorded)
# and then spends about EXTRA_SOLVES solves of the whole project on the recorded policy, the
# thresholds, two forward passes, the decision maps and the value fan.
NODE_SECONDS = 1.6e-9
STEP_SECONDS = 8e-6
EDGE_SECONDS = 1.5e-6
EXTRA_SOLVES = 8.0
EXACT_SUBSETS = 6          # up to this many rights every subset's own state graph is counted


def plan(project: Project) -> Plan:
    """Grid and cost estimate without solving (for ``realopt check`` and the memory guard).

    ``solves`` is the number of distinct lattice solves of the appraisal (subsets of rights
    that leave the same rights usable are solved once); ``seconds_estimate`` its wall time on
    an unloaded machine, each subset costed with its own states and edges."""
    from .rights import build_state_graph, prepared_rights, structure_warnings, usable_subset
    from .underlying import resolve

    res = resolve(project)
    grid = build_grid(project, res)
    rights = prepared_rights(project)
    graph = build_state_graph(rights)
    n = len(rights)
    live = sum(1 for s in graph.states if not s.abandoned)
    nodes = (grid.steps + 1) * (grid.steps + 2) / 2

    def cost(g: StateGraph) -> float:
        alive = sum(1 for s in g.states if not s.abandoned)
        return NODE_SECONDS * nodes * max(1, alive) + grid.steps * (
            STEP_SECONDS + EDGE_SECONDS * len(g.edges))

    full = cost(graph)
    if n == 0:
        solves, seconds = 1, full * (1 + EXTRA_SOLVES)
    elif n <= EXACT_SUBSETS:
        open_rights = {r.name for r in rights if exercise_steps(grid, r).any()}
        seen: dict[frozenset, float] = {}
        for mask in range(1, 2 ** n):
            names = {rights[k].name for k in range(n) if mask >> k & 1}
            key = frozenset(r.name for r in usable_subset(rights, names)
                            if r.name in open_rights)
            if key and key not in seen:
                seen[key] = cost(build_state_graph(
                    tuple(r for r in rights if r.name in key)))
        solves = max(1, len(seen))
        seconds = sum(seen.values()) + EXTRA_SOLVES * full
    else:                      # many rights: a subset has about half of the live states
        solves = 2 ** n
        seconds = (solves - 1) * 0.5 * full + (1 + EXTRA_SOLVES) * full
    return Plan(steps=grid.steps, step_years=grid.step_years, horizon=grid.horizon, up=grid.up,
                down=grid.down, probability=grid.probability, states=len(graph.states),
                solves=solves, memory_bytes=grid.memory_bytes(live), seconds_estimate=seconds,
                warnings=tuple(project.warnings) + grid.warnings + tuple(structure_warnings(
                    graph, res.last_flow_year, grid.horizon)), solve_seconds=full,
                volatility=res.volatility, volatility_stderr=res.volatility_stderr,
                volatility_method=res.volatility_method)
