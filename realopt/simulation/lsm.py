"""Least-squares Monte Carlo (Longstaff & Schwartz 2001) over the rights' state graph.

Conventions (docs/design.md, section 10, "Valuation on the drivers"): t in years from today; every flow is
discounted at the risk-free rate (``market.compounding``); drivers follow their risk-neutral
dynamics (realopt.simulation.paths). Cash flows: ``at_dates`` pays each cash-flow year's flow at
that date, computed from the drivers there; ``spread`` pays, at each date, the cash-flow rate at
the previous date times the part of the step inside the cash-flow years. The terminal value is
paid with the last year's flow. Decisions at a date are taken after that date's flow; one decision
per date (the state reached by exercising carries on to the next date).

A state s pays ``mult_s * F_s(X) + fixed_s`` at a cash-flow date: F_s is the base formula times the
product of the mode scales, or the own ``cash_flow`` formula of a switch mode that has one (which
replaces scale x base flow + fixed for that switch; the terminal value is then not paid);
``mult_s`` the product of the expand/contract factors. Switches absent from a subset of rights sit
in their start mode (every subset values the same base project).

Fitting (backward, on the fitting paths): at each date with open edges, the realised discounted
value of carrying on in each state involved is regressed on a full polynomial of degree ``basis``
in the standardised driver values (drivers with volatility > 0); the decision compares the fitted
carry-on values of the source and targets, net of the money on exercise. Valuing (forward, on
independent paths): the fitted policy is applied and the discounted flows and money summed along
each path, which gives a low-biased estimate with an honest standard error, and the chances of
use. All arrays are one per date over paths; loops run over dates, states and edges only.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from itertools import combinations_with_replacement

import numpy as np

from ..errors import ValuationError
from ..formula import parse
from ..model import Project, Switch
from ..rights import StateGraph

TOL = 1e-9
# Below 8 x SMALL numbers, predictions of several states cost mostly their calls: one stacked
# array; above, a loop in place keeps the arrays in the cache (measured: 10 terms, 3 states,
# 3,124 paths 41 us stacked against 54 us; 50,000 paths 708 against 566 us). Both give the same
# floats (the same products and sums, in the same order).
SMALL = 16_384


# --- time grid --------------------------------------------------------------------------------

def decision_times(right, spy: int) -> list[float]:
    a, b = right.window
    if right.exercise == "european":
        return [b]
    if right.exercise == "bermudan":
        return list(right.dates)
    k0, k1 = math.ceil(a * spy - 1e-9), math.floor(b * spy + 1e-9)
    return [a, b] + [k / spy for k in range(k0, k1 + 1)]


def build_times(project: Project) -> np.ndarray:
    """0, every cash-flow year, every decision date up to the last cash-flow year (unique,
    sorted): the project ends at its last cash-flow date and no right is used after it."""
    spec = project.simulation
    first, last = project.underlying.drivers.years
    ts = {0.0} | {float(y) for y in range(first, last + 1)}
    for r in project.rights:
        ts |= {float(t) for t in decision_times(r, spec.steps_per_year) if t <= last + 1e-9}
    out = np.array(sorted(ts))
    keep = np.concatenate([[True], np.diff(out) > 1e-9])
    return out[keep]


def open_mask(right, times, spy: int) -> np.ndarray:
    """Dates (indices of ``times``) at which ``right`` may be exercised."""
    a, b = right.window
    if right.exercise == "american":
        return (times >= a - TOL) & (times <= b + TOL)
    ds = np.array(decision_times(right, spy))
    return np.any(np.abs(times[:, None] - ds[None, :]) < 1e-9, axis=1)


# --- regression basis ---------------------------------------------------------------------------

def exponents(d: int, degree: int) -> list[tuple[int, ...]]:
    """Monomial exponents of total degree <= ``degree`` in ``d`` variables (constant first)."""
    return [e for e, _ in _monomials(d, degree)]


def _monomials(d: int, degree: int):
    """(exponents, (parent index, variable)) per monomial: each term is its parent times one
    variable, so the design matrix is built with one product per column."""
    out = [((0,) * d, None)]
    index = {(): 0}
    for deg in range(1, degree + 1):
        for combo in combinations_with_replacement(range(d), deg):
            e = [0] * d
            for i in combo:
                e[i] += 1
            index[combo] = len(out)
            out.append((tuple(e), (index[combo[:-1]], combo[-1])))
    return out


@dataclass
class Basis:
    """Polynomial in the standardised values of the uncertain drivers (indices ``cols``)."""

    cols: list[int]
    degree: int
    exps: list = field(default_factory=list)

    def __post_init__(self):
        self._mono = _monomials(len(self.cols), self.degree)
        self.exps = [e for e, _ in self._mono]

    @property
    def terms(self) -> int:
        return len(self.exps)

    def stats(self, x: np.ndarray):
        """(mean, sd, min, max) of the regression variables at one date on the fitting paths x
        (d, n)."""
        if not self.cols:
            return np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0)
        v = x[self.cols]
        return v.mean(axis=1), v.std(axis=1), v.min(axis=1), v.max(axis=1)

    def matrix(self, x: np.ndarray, st) -> np.ndarray:
        """(terms, n) design matrix, one row per monomial; constant only where the drivers do
        not vary (today)."""
        n = x.shape[-1]
        mu, sd, lo, hi = st
        if not self.cols or not np.all(sd > 1e-12 * np.maximum(1.0, np.abs(mu))):
            return np.ones((1, n))
        # values outside the fitting paths' range are held at its edge: a polynomial fitted
        # there must not be extrapolated into the tails
        v = np.clip(x[self.cols], lo[:, None], hi[:, None])
        z = (v - mu[:, None]) / sd[:, None]
        out = np.empty((self.terms, n))
        out[0] = 1.0
        for c, (_, parent) in enumerate(self._mono[1:], start=1):
            np.multiply(out[parent[0]], z[parent[1]], out=out[c])
        return out


def predict(rows: np.ndarray, coef: np.ndarray) -> np.ndarray:
    """Fitted values sum_c coef[c] rows[c] over paths (a loop over terms: no threaded BLAS, the
    same order of sums on every run)."""
    out = coef[0] * rows[0]
    for c in range(1, min(len(coef), rows.shape[0])):
        out += coef[c] * rows[c]
    return out


def predict_all(rows: np.ndarray, coefs: np.ndarray) -> np.ndarray:
    """(m, n): row j is ``predict(rows, coefs[:, j])`` to the last bit (the same products and
    sums per path, in the same order), for m regressions at once: one array operation per term
    instead of one per term and regression."""
    C = np.asarray(coefs)
    kk = min(C.shape[0], rows.shape[0])
    if rows.shape[-1] < 2 or kk * C.shape[1] * rows.shape[-1] > 8 * SMALL:
        # one path: numpy would sum the terms pairwise along its inner loop, not in order;
        # many paths: in place, term after term
        out = C[0][:, None] * rows[0]
        for c in range(1, kk):
            out += C[c][:, None] * rows[c]
        return out
    # products (terms, m, n) summed over terms in order, as predict does: with the paths as
    # the inner loop numpy reduces the outer axis term after term; the start -0.0 leaves the
    # first product as it is (a sum starting from +0.0 would turn a -0.0 into +0.0)
    return np.add.reduce(C[:kk, :, None] * rows[:kk, None, :], axis=0, initial=-0.0)


def _predict_dict(rows: np.ndarray, coefs: dict) -> dict:
    """{key: predict(rows, c)} for a dict of coefficient vectors (see :func:`predict_all`)."""
    if not coefs:
        return {}
    keys = list(coefs)
    pred = predict_all(rows, np.stack([coefs[t] for t in keys], axis=1))
    return {t: pred[j] for j, t in enumerate(keys)}


# --- the compiled problem -----------------------------------------------------------------------

@dataclass
class StateFlow:
    key: str            # formula key: "base" or a mode formula text; "" = no operating flow
    mult: float         # multiplier on that formula's value
    fixed: float        # fixed yearly flow
    tv: float           # multiplier on the terminal value


class Problem:
    """Everything the fit and the valuation share: dates, discounting, formulas, basis."""

    def __init__(self, project: Project):
        self.project = project
        u = project.underlying
        self.model = u.drivers
        spec = project.simulation
        self.spec = spec
        self.times = build_times(project)
        self.T = len(self.times)
        self.disc = 1.0 / np.asarray(project.market.risk_free_growth(self.times), dtype=float)
        first, last = self.model.years
        self.first, self.last = first, last
        self.timing = u.flow_timing
        self.tv = float(u.terminal_value)
        self.tax = float(self.model.tax_rate)
        t = self.times
        if self.timing == "spread":
            lo, hi = np.maximum(t[:-1], first - 1.0), np.minimum(t[1:], float(last))
            self.weight = np.concatenate([[0.0], np.maximum(0.0, hi - lo)])
        else:
            yrs = np.arange(first, last + 1, dtype=float)
            self.weight = np.any(np.abs(t[:, None] - yrs[None, :]) < 1e-9, axis=1).astype(float)
        self.tv_index = int(np.argmin(np.abs(t - last)))
        self.formulas = {"base": parse(self.model.cash_flow)}
        self.switches = [r for r in project.rights if isinstance(r, Switch)]
        for sw in self.switches:
            for m in sw.modes:
                if m.cash_flow is not None:
                    self.formulas.setdefault(m.cash_flow, parse(m.cash_flow))
        self.stochastic = [d for d in self.model.drivers if d.process != "schedule"]
        self.names = [d.name for d in self.stochastic]
        self.schedules = {d.name: d.schedule for d in self.model.drivers
                          if d.process == "schedule"}
        cols = [i for i, d in enumerate(self.stochastic) if d.volatility > 0]
        self.uncertain = bool(cols)
        self.basis = Basis(cols, spec.basis)
        self._money: dict = {}
        self._fixed_money: dict = {}

    # environment of the formulas at date k from driver values x (d, n)
    def env(self, k: int, x: np.ndarray) -> dict:
        e = {n: x[i] for i, n in enumerate(self.names)}
        t = float(self.times[k])
        for n, s in self.schedules.items():
            e[n] = s.at(t)
        return e

    def formula_values(self, k: int, x: np.ndarray, keys=None) -> dict:
        """{formula key: (n,) yearly flow after tax} at date k on driver values x (d, n);
        ``keys``: only those formulas."""
        e = self.env(k, x)
        n = x.shape[-1]
        out = {}
        for key, f in self.formulas.items():
            if keys is not None and key not in keys:
                continue
            v = np.broadcast_to(np.asarray(f.evaluate(e), dtype=float), (n,))
            if self.tax:
                v = v - self.tax * np.maximum(v, 0.0)
            if not np.all(np.isfinite(v)):
                raise ValuationError(
                    f"the cash-flow formula '{f.text}' gives a non-finite value (division by "
                    f"zero, overflow or a power of a negative number) at year "
                    f"{self.times[k]:g}; check its divisions and powers")
            out[key] = v
        return out

    def state_flows(self, graph: StateGraph) -> list[StateFlow]:
        """The flow description of each state of a subset's graph."""
        sub = {r.name for r in graph.rights if isinstance(r, Switch)}
        sub_switches = [r for r in graph.rights if isinstance(r, Switch)]
        out = []
        for s in graph.states:
            if s.abandoned or not s.invested:
                out.append(StateFlow("", 0.0, 0.0, 0.0))
                continue
            mult = 1.0                  # one-shot rights used so far: the type's multiplier
            for r in graph.rights:
                if not r.modal:
                    mult *= r.scale_fixed(s.used, None)[0]
            current = dict(zip([r.name for r in sub_switches], s.modes))
            scale, fixed, own = 1.0, 0.0, []
            for sw in self.switches:
                m = sw.mode(current[sw.name] if sw.name in sub else sw.start)
                if m.cash_flow is not None:
                    own.append(m.cash_flow)
                else:
                    scale *= m.scale
                    fixed += m.fixed
            if len(own) > 1:
                raise ValuationError(
                    "two switch modes with their own cash_flow are active together ("
                    + " and ".join(own) + "); put those modes into one switch right")
            if own:
                out.append(StateFlow(own[0], mult, fixed, 0.0))
            else:
                out.append(StateFlow("base", mult * scale, fixed, mult * scale))
        return out

    def flows(self, k: int, x_prev: np.ndarray, x_now: np.ndarray, sflows) -> np.ndarray:
        """(S, n) undiscounted flow of each state paid at date k (k >= 1), before that date's
        decisions (the terminal value is apart: :meth:`terminal`)."""
        n = x_now.shape[-1]
        out = np.zeros((len(sflows), n))
        w = self.weight[k]
        if w == 0.0:
            return out
        vals = self.formula_values(k - 1 if self.timing == "spread" else k,
                                   x_prev if self.timing == "spread" else x_now) if w else {}
        for s, f in enumerate(sflows):
            if f.key == "":
                continue
            out[s] = w * (f.mult * vals[f.key] + f.fixed)
        return out

    def terminal(self, sflows) -> np.ndarray:
        """(S,) discounted terminal value each state receives at the last cash-flow date, paid
        after that date's decisions (a sale there replaces it)."""
        return np.array([f.tv * self.tv for f in sflows]) * self.disc[self.T - 1]

    def money(self, edge, k: int, x: np.ndarray):
        """sign * amount received on exercising ``edge`` at date k (scalar or array over paths)."""
        a = edge.amount
        if a.formula is not None:
            f = self._money.get(a.formula)
            if f is None:
                f = self._money[a.formula] = parse(a.formula)
            v = np.asarray(f.evaluate(self.env(k, x)), dtype=float)
            if not np.all(np.isfinite(v)):
                raise ValuationError(f"the money formula '{a.formula}' of '{edge.right}' gives a "
                                     f"non-finite value at year {self.times[k]:g}")
            return edge.sign * v
        key = (id(a), edge.sign, k)
        hit = self._fixed_money.get(key)
        if hit is None:                    # the amount object is kept: its id stays its own
            hit = self._fixed_money[key] = (a, edge.sign * float(a.at(float(self.times[k]))))
        return hit[1]


# --- martingale control variate ----------------------------------------------------------------

MARTINGALE_BUDGET = 4e9        # (dates x future flow dates x drivers x paths) work allowed


def martingale_increments(prob: Problem, dyn, x: np.ndarray) -> dict | None:
    """Zero-mean increments dM_f(k) = G_f(k) + Vbar_f(k) - Vbar_f(k-1), shape (T, n), for each
    formula f affine in the simulated drivers (untaxed) that depends on them, where G_f(k) is
    the discounted formula flow paid at date k and Vbar_f(k) = E*_k[sum over later dates of G_f]
    in closed form (E*_k[X_e] = exp(m(t_e) + (ln X_k - m(t_k)) e^{-speed h} + v(h)/2)).

    Subtracting mult_s * dM_f along the path of the state held (f its formula) leaves every
    expectation unchanged (a martingale transform with predictable coefficients) and removes
    the noise of the flows after a decision: the pathwise value of a right becomes close to its
    payoff at exercise. None when no formula qualifies or the work exceeds the budget."""
    if prob.tax or not prob.uncertain:
        return None
    cf = ConditionalFlows(prob, dyn)
    if not cf.keys:
        return None
    T, n, d = prob.T, x.shape[-1], len(prob.names)
    work = T * len(cf.flow) * max(1, d) * n / 2
    if work > MARTINGALE_BUDGET:
        return None
    keys = cf.keys
    out = {key: np.zeros((T, n)) for key in keys}
    prev = None
    for k in range(T):
        vbar = cf.value(k, x[k])
        if k > 0:
            g = prob.formula_values(flow_env(prob, k), x[flow_env(prob, k)]) \
                if prob.weight[k] > 0 else None
            for key in keys:
                paid = prob.disc[k] * prob.weight[k] * g[key] if g is not None else 0.0
                out[key][k] = paid + vbar[key] - prev[key]
        prev = vbar
    return out


class ConditionalFlows:
    """Vbar_f(k, x) = E*_k[sum over dates after k of the discounted flow of formula f], in
    closed form, for each formula f affine in the simulated drivers (untaxed) that depends on
    them (``keys``; empty otherwise). The flow paid at date e' uses the drivers at its
    environment date e (e' - 1 with ``spread``); E*_k[X_e] = exp(m(t_e) + (ln X_k - m(t_k))
    e^{-speed h} + v(h)/2)."""

    def __init__(self, prob: Problem, dyn):
        self.prob, self.dyn = prob, dyn
        self.keys = []
        if prob.tax or not prob.uncertain:
            return
        names = set(prob.names)
        self.keys = [k for k, f in prob.formulas.items() if f.is_affine(names) and f.names & names]
        if not self.keys:
            return
        d = len(prob.names)
        T = prob.T
        self.flow = [(s, s - 1 if prob.timing == "spread" else s) for s in range(1, T)
                     if prob.weight[s] > 0]
        # affine coefficients at each env date: c0 and c_i (schedules at that date)
        probe = np.concatenate([np.zeros((d, 1)), np.eye(d)], axis=1)
        self.coef = {}
        for s_, e in self.flow:
            vals = prob.formula_values(e, probe)
            self.coef[e] = {key: (vals[key][0], vals[key][1:] - vals[key][0])
                            for key in self.keys}
        self.means = np.array([dyn.mean(t) for t in prob.times])           # (T, d)

    def value(self, k: int, xk: np.ndarray) -> dict:
        """{formula key: (n,) Vbar at date k} on driver values ``xk`` (d, n) at date k."""
        from .paths import _variance

        prob, dyn, means = self.prob, self.dyn, self.means
        d, n = xk.shape[0], xk.shape[-1]
        logx = np.log(xk) if d else None
        dev = logx - means[k][:, None] if d else None      # the same for every later date
        vbar = {key: np.zeros(n) for key in self.keys}
        for s_, e in self.flow:
            if s_ <= k:
                continue
            w = prob.disc[s_] * prob.weight[s_]
            if e == k:
                ex = xk
            else:
                h = float(prob.times[e] - prob.times[k])
                b = np.exp(-dyn.speed * h)
                v = np.array([_variance(sg, kp, h) for sg, kp in zip(dyn.vol, dyn.speed)])
                ex = np.exp(means[e][:, None] + dev * b[:, None] + 0.5 * v[:, None])
            for key in self.keys:
                c0, ci = self.coef[e][key]
                acc = vbar[key]
                acc += w * c0
                for i in range(d):
                    if ci[i] != 0.0:
                        acc += (w * ci[i]) * ex[i]
        return vbar


def flow_env(prob: Problem, k: int) -> int:
    return k - 1 if prob.timing == "spread" else k


def _correction(pol_sflows, mart, k: int, S: int, n: int) -> np.ndarray | None:
    """(S, n) martingale correction of each state for the step ending at date k."""
    if mart is None:
        return None
    out = np.zeros((S, n))
    hit = False
    for s, f in enumerate(pol_sflows):
        inc = mart.get(f.key)
        if inc is not None and f.mult != 0.0:
            out[s] = f.mult * inc[k]
            hit = True
    return out if hit else None


# --- policy -------------------------------------------------------------------------------------

@dataclass
class Policy:
    """Fitted carry-on regressions: ``beta[k][s]`` coefficients, ``stats[k]`` standardisation."""

    graph: StateGraph
    sflows: list
    open_edges: dict          # k -> list of edge ids open at k
    beta: dict                # k -> {state: coefficients}
    stats: list               # per date (mean, sd, min, max) of the regression variables
    in_sample: float          # fitted (high-biased) value at t = 0 of the initial state
    refit: dict = field(default_factory=dict)   # (k, s) -> (cutoff, {state: coef}, unc)
    unc: dict = field(default_factory=dict)     # k -> first-stage uncertainty (see _unc)
    post: dict = field(default_factory=dict)    # (k, s) -> {target: coef} of a commitment's
    #                                             targets, valued after their own decision
    unc_src: dict = field(default_factory=dict)  # (k, s) -> uncertainty of those fits

    def estimates(self, prob: Problem, k: int, B: np.ndarray, states) -> dict:
        b = self.beta[k]
        est = _predict_dict(B, {s: b[s] for s in states if s in b})
        return {s: (est[s] if s in b else np.zeros(B.shape[1])) for s in states}

    def gains(self, prob: Problem, k: int, s: int, eids, x: np.ndarray) -> np.ndarray:
        """(edges, paths) gain of each edge from state s over carrying on at date k (discounted
        to today) on driver values x: the first-stage fit everywhere, the refit near and beyond
        the exercise boundary (see :func:`fit`)."""
        B = prob.basis.matrix(x, self.stats[k])
        est = self.estimates(prob, k, B, _involved(self.graph, s, eids))
        est.update(_predict_dict(B, self.post.get((k, s), {})))
        g = _edge_gains(prob, self.graph, k, s, eids, x, est)
        ref = self.refit.get((k, s))
        if ref is None:
            return _apply_margin(g, self.graph, s, eids, B,
                                 self.unc_src.get((k, s), self.unc.get(k)))
        cutoff, b2, unc = ref
        near = np.flatnonzero(g.max(axis=0) >= cutoff)
        if near.size:
            Bn = B[:, near]
            est = _predict_dict(Bn, b2)
            g[:, near] = _apply_margin(_edge_gains(prob, self.graph, k, s, eids, x[:, near],
                                                   est), self.graph, s, eids, Bn, unc)
        return g


def _involved(graph, s, eids) -> set:
    dead = {i for i, st in enumerate(graph.states) if st.abandoned}
    return ({s} | {graph.edges[e].target for e in eids}) - dead


def _edge_gains(prob, graph, k, s, eids, x, est) -> np.ndarray:
    """(edges, paths): fitted value of the target plus the money, less carrying on in s."""
    m = x.shape[-1]
    out = np.empty((len(eids), m))
    for j, e_id in enumerate(eids):
        e = graph.edges[e_id]
        money = prob.money(e, k, x)
        money = (money * prob.disc[k] if getattr(money, "ndim", 0) == 0 else
                 np.broadcast_to(money, (m,)) * prob.disc[k])
        out[j] = (est[e.target] if e.target in est else 0.0) + money - est[s]
    return out


REFIT_SHARE = 0.25      # refit on at least this share of the paths (and twice the exercised)
MARGIN = 0.5            # exercise only where the fitted gain exceeds this many standard errors


def _unc(B: np.ndarray, Y: np.ndarray, coef: np.ndarray, states, G: np.ndarray) -> tuple:
    """(inverse of B B' = ``G``, residual covariance of the regressed states, their order): what
    the standard error of a fitted gain needs."""
    k, n = B.shape
    try:
        Ginv = np.linalg.inv(G + 1e-10 * (np.trace(G) / k) * np.eye(k))
    except np.linalg.LinAlgError:
        Ginv = np.linalg.pinv(G)
    R = np.asarray(Y) - predict_all(B, coef)
    cov = np.einsum("an,bn->ab", R, R) / max(1, n - k)
    return Ginv, cov, {t: j for j, t in enumerate(states)}


def _apply_margin(g: np.ndarray, graph, s, eids, B: np.ndarray, unc) -> np.ndarray:
    """``g`` less MARGIN standard errors where some gain is positive (elsewhere the decision
    is to carry on either way); in place, returns g."""
    if unc is None:
        return g
    pos = np.flatnonzero(g.max(axis=0) > 0)
    if pos.size:
        g[:, pos] -= MARGIN * _gain_sd(graph, s, eids, B[:, pos], unc)
    return g


def _gain_sd(graph, s, eids, B: np.ndarray, unc) -> np.ndarray:
    """(edges, paths) standard error of each fitted gain: h(x) (var_t + var_s - 2 cov_ts) with
    the leverage h(x) = b(x)' (B B')^-1 b(x) (zero where no uncertainty was recorded)."""
    if unc is None:
        return np.zeros((len(eids), B.shape[1]))
    Ginv, cov, pos = unc
    kk = min(B.shape[0], Ginv.shape[0])
    h = np.einsum("in,ij,jn->n", B[:kk], Ginv[:kk, :kk], B[:kk])
    out = np.empty((len(eids), B.shape[1]))
    i = pos[s]
    for j, e_id in enumerate(eids):
        t = pos.get(graph.edges[e_id].target)
        var = cov[i, i] + (0.0 if t is None else cov[t, t] - 2.0 * cov[i, t])
        out[j] = np.sqrt(np.maximum(h * max(var, 0.0), 0.0))
    return out


_EYES: dict = {}


def _eye(k: int) -> np.ndarray:
    """The identity of size k, built once (read only)."""
    e = _EYES.get(k)
    if e is None:
        e = _EYES[k] = np.eye(k)
        e.flags.writeable = False
    return e


def quantile(a: np.ndarray, q: float) -> float:
    """``float(np.quantile(a, q))`` of a 1-d float array (the default linear method, Hyndman &
    Fan's 7th) with numpy's own arithmetic, without its general set-up: one partition of a copy
    and the same interpolation (``a`` is not modified; NaN if ``a`` holds one)."""
    n = a.shape[0]
    v = (n - 1) * q
    if v >= n - 1:                 # numpy's indices there: -1 (the last), weight v + 1
        i = j = n - 1
        t = v + 1
    elif v < 0:
        i = j = 0
        t = v
    else:
        i = int(math.floor(v))
        j = i + 1
        t = v - i
    part = np.partition(a, sorted({0, n - 1, i, j}))
    if np.isnan(part[-1]):
        return math.nan
    lo, hi = part[i], part[j]
    diff = hi - lo
    return float(hi - diff * (1 - t) if t >= 0.5 else lo + diff * t)


def least_squares(B: np.ndarray, Y: np.ndarray, gram: bool = False):
    """Coefficients (k, m) of Y (m, n) on the rows of B (k, n) by the normal equations (the
    basis is standardised, so B B' is well conditioned at the degrees allowed); a tiny ridge
    guards collinear rows, an SVD solve is the fallback. ``gram``: also return B B'."""
    G = B @ B.T
    rhs = np.einsum("in,mn->im", B, Y)
    k = G.shape[0]
    ridge = 1e-10 * (np.trace(G) / k if k else 1.0)
    try:
        L = np.linalg.cholesky(G + ridge * _eye(k))
        coef = np.linalg.solve(L.T, np.linalg.solve(L, rhs))
    except np.linalg.LinAlgError:
        coef = np.linalg.lstsq(B.T, Y.T, rcond=None)[0]
    return (coef, G) if gram else coef


def _sources(graph, edges):
    by = {}
    for e_id in edges:
        by.setdefault(graph.edges[e_id].source, []).append(e_id)
    return by


def fit(prob: Problem, graph: StateGraph, x: np.ndarray, stats, open_by_right,
        all_states: bool = False, progress=None, mart: dict | None = None) -> Policy:
    """Backward induction on the fitting paths ``x`` (T, d, n): the policy for ``graph``.

    ``all_states``: regress every live state at every date (for the dual upper bound)."""
    S, n, T = len(graph.states), x.shape[-1], prob.T
    sflows = prob.state_flows(graph)
    dead = {s for s, st in enumerate(graph.states) if st.abandoned}
    live = [s for s in range(S) if s not in dead]
    open_edges = {}
    for k in range(T):
        ids = [i for i, e in enumerate(graph.edges) if open_by_right[e.right][k]]
        if ids:
            open_edges[k] = ids
    beta: dict = {}
    refit: dict = {}
    unc: dict = {}
    post: dict = {}
    unc_src: dict = {}
    P = np.zeros((S, n))
    terminal = prob.terminal(sflows)
    for k in range(T - 1, -1, -1):
        if progress:
            progress()
        if k < T - 1:
            Y = P + prob.disc[k + 1] * prob.flows(k + 1, x[k], x[k + 1], sflows)
            corr = _correction(sflows, mart, k + 1, S, n)
            if corr is not None:
                Y -= corr
        else:                                # the terminal value, paid after the decisions
            Y = np.repeat(terminal[:, None], n, axis=1)
        ids = open_edges.get(k)
        if not ids and not all_states:
            P = Y
            continue
        needed = set(live) if all_states else set()
        for e_id in ids or ():
            e = graph.edges[e_id]
            needed |= {e.source, e.target}
        needed = sorted(needed - dead)
        B = prob.basis.matrix(x[k], stats[k])
        coef, G = least_squares(B, Y[needed], gram=True)
        beta[k] = {s: coef[:, j] for j, s in enumerate(needed)}
        if not ids:
            P = Y
            continue
        unc[k] = _unc(B, Y[needed], coef, needed, G)
        est = dict(zip(needed, predict_all(B, coef)))
        P = Y.copy()
        srcs = _sources(graph, ids)
        # invested states decide first; a commitment is then valued with its target's own
        # decision at the same date (committing and using another right at one date)
        for s in sorted(srcs, key=lambda q: (not graph.states[q].invested, q)):
            eids = srcs[s]
            commit = not graph.states[s].invested
            V = P if commit else Y           # the targets' realised values
            est_s = est
            if commit:
                tg = sorted(_involved(graph, s, eids) - {s})
                rows = np.array([Y[s]] + [P[t] for t in tg])
                cp, Gp = least_squares(B, rows, gram=True)
                post[(k, s)] = {t: cp[:, j + 1] for j, t in enumerate(tg)}
                unc_src[(k, s)] = _unc(B, rows, cp, [s] + tg, Gp)
                est_s = dict(est)
                est_s.update(dict(zip(tg, predict_all(B, cp[:, 1:]))))
            g = _edge_gains(prob, graph, k, s, eids, x[k], est_s)
            best = g.max(axis=0)
            margin_done = False
            # Second stage (as Longstaff & Schwartz regress on the paths in the money): refit
            # on the paths near and beyond the exercise boundary, where the decision is made
            share = max(REFIT_SHARE, 2.0 * float((best > 0).mean()))
            if B.shape[0] > 1 and share < 1.0 and share * n >= 20 * B.shape[0]:
                cutoff = min(0.0, quantile(best, 1.0 - share))
                near = np.flatnonzero(best >= cutoff)
                inv = sorted(_involved(graph, s, eids))
                Bn = B[:, near]
                Yn = np.array([(Y if t == s else V)[t][near] for t in inv])
                c2, G2 = least_squares(Bn, Yn, gram=True)
                b2 = {t: c2[:, j] for j, t in enumerate(inv)}
                u2 = _unc(Bn, Yn, c2, inv, G2)
                refit[(k, s)] = (cutoff, b2, u2)
                g[:, near] = _apply_margin(_edge_gains(
                    prob, graph, k, s, eids, x[k][:, near],
                    dict(zip(inv, predict_all(Bn, c2)))), graph, s, eids, Bn, u2)
                margin_done = True
            if not margin_done:
                g = _apply_margin(g, graph, s, eids, B, unc_src.get((k, s), unc[k]))
            pick = g.argmax(axis=0)
            go = g[pick, np.arange(n)] > 0
            realised = Y[s].copy()
            for j, e_id in enumerate(eids):
                e = graph.edges[e_id]
                hit = go & (pick == j)
                if hit.any():
                    m = np.broadcast_to(prob.money(e, k, x[k]), (n,)) * prob.disc[k]
                    tgt = V[e.target] if e.target not in dead else 0.0
                    realised[hit] = (tgt + m)[hit] if np.ndim(tgt) else m[hit]
            P[s] = realised
    return Policy(graph=graph, sflows=sflows, open_edges=open_edges, beta=beta, stats=stats,
                  in_sample=float(P[graph.initial].mean()), refit=refit, unc=unc, post=post,
                  unc_src=unc_src)


@dataclass
class Run:
    """Forward pass of a policy: pathwise discounted value and where the paths went."""

    values: np.ndarray        # (n,) discounted flows + money of the initial state's path
    occupancy: np.ndarray     # (T, S) share of paths in each state after each date's decision
    exercised: np.ndarray     # (T, E) share of paths taking each edge at each date
    correction: np.ndarray | None = None   # (n,) martingale sum along the states held
    first_use: dict = field(default_factory=dict)   # switch name -> (T,) share of paths that
    #                                                 have left its start mode at least once


def decide(prob: Problem, pol: Policy, k: int, xk: np.ndarray, cur: np.ndarray, counts=None):
    """New state per path after the decision at date k, and the money received (undiscounted)
    and the edge taken (-1 none)."""
    graph = pol.graph
    new = cur.copy()
    money = np.zeros(cur.shape[0])
    taken = np.full(cur.shape[0], -1)
    srcs = _sources(graph, pol.open_edges[k])
    for invested in (False, True):       # a commitment first, then the invested states decide
        cur = new.copy()
        for s, eids in srcs.items():
            if graph.states[s].invested == invested:
                _decide_state(prob, pol, k, xk, cur, new, money, taken, s, eids, counts)
    return new, money, taken


def _decide_state(prob, pol, k, xk, cur, new, money, taken, s, eids, counts=None):
    """The decision at date k of the paths in state s (in place on new, money, taken; a path
    that takes two edges at one date, a commitment and another, keeps the second in taken)."""
    graph = pol.graph
    if True:
        idx = np.flatnonzero(cur == s)
        if idx.size == 0:
            return
        xs = xk[:, idx]
        g = pol.gains(prob, k, s, eids, xs)
        pick = g.argmax(axis=0)
        go = g[pick, np.arange(idx.size)] > 0
        choice = np.where(go, np.asarray(eids)[pick], -1)
        cash = np.zeros(idx.size)
        for j, e_id in enumerate(eids):
            sel = go & (pick == j)
            if sel.any():
                m = np.broadcast_to(prob.money(graph.edges[e_id], k, xs), (idx.size,))
                cash[sel] = m[sel]
        hit = choice >= 0
        if hit.any():
            targets = np.array([e.target for e in graph.edges])
            new[idx[hit]] = targets[choice[hit]]
            money[idx[hit]] += cash[hit]
            taken[idx[hit]] = choice[hit]
            if counts is not None:
                np.add.at(counts, choice[hit], 1)


def run(prob: Problem, pol: Policy, x: np.ndarray, record: bool = False, progress=None,
        mart: dict | None = None) -> Run:
    """Apply the fitted policy forward on paths ``x`` (independent of the fit). ``mart``:
    martingale increments of these paths; their sum along the states held is returned as
    ``correction`` (zero mean: a control variate for ``values``)."""
    graph = pol.graph
    S, E, n, T = len(graph.states), len(graph.edges), x.shape[-1], prob.T
    cur = np.full(n, graph.initial)
    total = np.zeros(n)
    occ = np.zeros((T, S)) if record else np.zeros((0, S))
    exe = np.zeros((T, E)) if record else np.zeros((0, E))
    cols = np.arange(n)
    ctrl = np.zeros(n) if mart is not None else None
    sw_edges = {r.name: np.array([i for i, e in enumerate(graph.edges) if e.right == r.name])
                for r in graph.rights if r.modal} if record else {}
    ever = {name: np.zeros(n, dtype=bool) for name in sw_edges}
    first = {name: np.zeros(T) for name in sw_edges}
    for k in range(T):
        if progress:
            progress()
        if k > 0:
            fl = prob.flows(k, x[k - 1], x[k], pol.sflows)
            if fl.any():
                total += prob.disc[k] * fl[cur, cols]
            corr = _correction(pol.sflows, mart, k, S, n)
            if corr is not None:
                ctrl += corr[cur, cols]
        if k in pol.open_edges:
            counts = np.zeros(E) if record else None
            cur, money, taken = decide(prob, pol, k, x[k], cur, counts)
            total += prob.disc[k] * money
            if record:
                exe[k] = counts / n
                for name, ids in sw_edges.items():
                    if ids.size:
                        ever[name] |= np.isin(taken, ids)
        if record:
            occ[k] = np.bincount(cur, minlength=S)[:S] / n
            for name in sw_edges:
                first[name][k] = ever[name].mean()
    total += prob.terminal(pol.sflows)[cur]        # paid after the last date's decisions
    return Run(values=total, occupancy=occ, exercised=exe, correction=ctrl, first_use=first)


# --- dual upper bound of the fitted value function (Haugh & Kogan 2004) ---------------------------

def upper_bound(prob: Problem, pol: Policy, dyn, outer: np.ndarray, inner: int, seed: int,
                progress=None) -> np.ndarray:
    """Pathwise dual values on the ``outer`` paths (T, d, n): the upper bound is their mean.

    Not used by the appraisal, which takes the tighter bound of the policy's own value process
    (realopt.simulation.bound, Andersen & Broadie 2004); kept as the cheap point of comparison
    of the tests and tests/benchmarks/bench_simulation.py (needs ``fit(all_states=True)``).

    Martingale: for each state s, M_s increments d(k+1) [flow_s(k+1) + V_s(k+1)] less their
    conditional mean given date k, estimated from ``inner`` one-step draws per path, where
    V_s(k) = max over the edges open at k of (fitted carry-on of the target + money), or the
    fitted carry-on of s. Pathwise, the best sequence of states is then found by backward
    induction along each path with the flows penalised by the increments of the state held
    (Rogers 2007 for controlled chains). Any martingale gives an upper bound in expectation;
    inner-sampling noise only raises it."""
    from .paths import generator, one_step, one_step_mean

    graph = pol.graph
    S, n, T = len(graph.states), outer.shape[-1], prob.T
    dead = {s for s, st in enumerate(graph.states) if st.abandoned}
    live = [s for s in range(S) if s not in dead]
    gen = generator(seed, "inner")
    terminal = prob.terminal(pol.sflows)

    def value_fn(k, xk):
        """(S, m) fitted value after the decision at date k, discounted to today."""
        m = xk.shape[-1]
        if k == T - 1 and k not in pol.open_edges:
            return np.repeat(terminal[:, None], m, axis=1)
        out = np.zeros((S, m))
        B = prob.basis.matrix(xk, pol.stats[k])
        est = pol.estimates(prob, k, B, set(live))
        for s in live:
            out[s] = est[s]
        srcs = _sources(graph, pol.open_edges.get(k, []))
        for s in sorted(srcs, key=lambda q: (not graph.states[q].invested, q)):
            eids = srcs[s]
            if not graph.states[s].invested:   # a commitment: its target after its decision
                post = {t: out[t] for t in _involved(graph, s, eids) - {s}}
                g = _edge_gains(prob, graph, k, s, eids, xk, {**est, **post})
                out[s] = out[s] + np.maximum(g.max(axis=0), 0.0)
                continue
            g = _edge_gains(prob, graph, k, s, eids, xk, est)
            carry = out[s].copy()
            ref = pol.refit.get((k, s))
            if ref is not None:                  # the refit near the boundary, as decided
                cutoff, b2, _ = ref
                near = np.flatnonzero(g.max(axis=0) >= cutoff)
                if near.size:
                    est2 = {t: predict(B[:, near], c) for t, c in b2.items()}
                    g[:, near] = _edge_gains(prob, graph, k, s, eids, xk[:, near], est2)
                    carry[near] = est2[s]
            out[s] = carry + np.maximum(g.max(axis=0), 0.0)
        return out

    # increments dM[k] (S, n) for k = 1..T-1
    Z = np.zeros((S, n))               # pathwise dual value after the decision at date k
    incs = [None] * T
    for k in range(1, T):
        if progress:
            progress()
        xk0, xk1 = outer[k - 1], outer[k]
        g1 = prob.disc[k] * prob.flows(k, xk0, xk1, pol.sflows) + value_fn(k, xk1)
        # conditional mean from inner draws: (d, n*inner)
        d = xk0.shape[0]
        half = max(1, inner // 2)
        z = gen.standard_normal((d, n, half))
        z = np.concatenate([z, -z], axis=2).reshape(d, n * 2 * half)    # antithetic inner
        m_in = 2 * half
        x0r = np.repeat(xk0, m_in, axis=1)
        x1r = one_step(dyn, prob.times[k - 1], prob.times[k], x0r, z)
        gi = (prob.disc[k] * prob.flows(k, x0r, x1r, pol.sflows)
              + value_fn(k, x1r)).reshape(S, n, m_in)
        cond = gi.mean(axis=2)
        if d and prob.uncertain:
            # control variates: the drivers' own values, whose conditional means are exact
            cols = prob.basis.cols
            xc = x1r[cols].reshape(len(cols), n, m_in)
            mu = one_step_mean(dyn, prob.times[k - 1], prob.times[k], xk0)[cols]
            dx = xc - xc.mean(axis=2, keepdims=True)
            cxx = np.einsum("inm,jnm->nij", dx, dx) / m_in
            cxx += 1e-12 * np.eye(len(cols))[None] * (1.0 + np.abs(cxx).max())
            gap = xc.mean(axis=2) - mu                                      # (c, n)
            for s_ in live:
                dg = gi[s_] - cond[s_][:, None]
                cxg = np.einsum("inm,nm->ni", dx, dg) / m_in
                beta = np.linalg.solve(cxx, cxg[..., None])[..., 0]         # (n, c)
                cond[s_] = cond[s_] - np.einsum("ni,in->n", beta, gap)
        incs[k] = g1 - cond
    for k in range(T - 1, -1, -1):
        if k < T - 1:
            fl = prob.disc[k + 1] * prob.flows(k + 1, outer[k], outer[k + 1], pol.sflows)
            G = Z + fl - incs[k + 1]
        else:
            G = np.repeat(terminal[:, None], n, axis=1)
        Znew = G.copy()
        srcs = _sources(graph, pol.open_edges.get(k, []))
        for s in sorted(srcs, key=lambda q: (not graph.states[q].invested, q)):
            V = Znew if not graph.states[s].invested else G    # commitments: after decisions
            best = G[s]
            for e_id in srcs[s]:
                e = graph.edges[e_id]
                m = np.broadcast_to(prob.money(e, k, outer[k]), (n,)) * prob.disc[k]
                best = np.maximum(best, (V[e.target] if e.target not in dead else 0.0) + m)
            Znew[s] = best
        Z = Znew
    return Z[graph.initial]
