"""Dual upper bound by nested simulation of the fitted policy (Andersen & Broadie 2004).

Conventions as in :mod:`realopt.simulation.lsm`: dates ``prob.times`` in years, every amount
discounted to today at the risk-free rate, a date's flow paid before that date's decisions, the
terminal value after the last date's decisions.

The lower estimate follows the fitted exercise policy. Let C_k(s) be the value of that policy, at
date k after the decision, of holding state s until k + 1 and following the policy from then on
(discounted flows, money and terminal value). For each state s a martingale is built from the
policy's own value process (Andersen & Broadie 2004, state by state for a controlled chain as
Rogers 2007):

    dM_s(k) = Y_k(s) - C_{k-1}(s),   Y_k(s) = flow_k(s) + money_k(s) + C_k(f_k(s)),

f_k(s) the state the policy moves s to at date k (s itself where it carries on) and money_k(s)
what that move pays. E_{k-1}[Y_k(s)] = C_{k-1}(s), so where the policy carries on at k the
conditional expectation of the next value is the value itself, and one estimate C_k(s) per date and
state serves both the value process and its conditional mean. Each C_k(s) is estimated on each
outer path by ``inner`` inner paths (antithetic pairs) started from that path's drivers at date k in
state s and run forward under the fitted policy (:func:`lsm.decide`, the decisions of the lower
estimate). The pathwise maximum over every sequence of states, flows less the increments of the
state held, is then found by backward induction along each outer path; its mean is an upper
bound in expectation for any martingale, and the zero-mean noise of the inner estimates can only
raise it (Jensen's inequality on a maximum of functions linear in that noise).

Variance (inner noise raises the bound, so it is what keeps the bound tight): an inner path's
flows of formulas affine in the drivers (untaxed) are replaced by their closed-form conditional
value (:class:`lsm.ConditionalFlows`) taken when the path enters and leaves each state, and the
increments of a polynomial martingale fitted to the policy's value (:class:`ValueControl`) are
subtracted along the states it holds; both have mean zero, so the estimates stay unbiased.
Every inner path of an outer path takes the same normals at a date (common random numbers), so
the estimates that the maximum compares err together. An inner path whose state can no longer
move and whose flows are known is finished at once with its remaining value.

Work saved: C_k(s) is estimated only where a decision at k can differ from carrying on (it
cancels elsewhere, :meth:`Layout.needed`), and a move that ends the project is left out of the
maximum where it pays less than never moving again (it cannot be optimal there).

Cost: outer x inner x (dates^2 / 2) path-steps per state. All inner paths started at every date of
a chunk of outer paths move together through the dates (one array over outer x inner x start
dates x states), so the loops run over dates and states only; the chunk of outer paths is sized
so that the inner paths alive at once stay within :data:`MEMORY` bytes.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import lsm
from .paths import generator

MEMORY = 256e6            # bytes of inner paths alive at once (one chunk of outer paths)
METHOD = ("Andersen & Broadie (2004) duality: the martingale of the fitted policy's own value, "
          "estimated by inner paths that follow the policy")


class Layout:
    """What the nested bound needs of the state graph and the dates, before any path is drawn:
    the states reachable after each date's decisions, the dates after which a state can no longer
    move, and the known remaining value of a state that cannot."""

    def __init__(self, prob: lsm.Problem, graph, open_edges: dict, sflows, dyn=None):
        self.prob, self.graph, self.open_edges = prob, graph, open_edges
        S, T = len(graph.states), prob.T
        self.S, self.T = S, T
        self.dead = np.array([st.abandoned for st in graph.states], dtype=bool)
        # reachable after the decisions at each date (a commitment and a second move at once)
        reach = {graph.initial}
        self.reach = []
        last_open = np.full(S, -1)
        for k in range(T):
            ids = open_edges.get(k, ())
            grown = True
            while grown:
                add = {graph.edges[e].target for e in ids if graph.edges[e].source in reach}
                grown = bool(add - reach)
                reach |= add
            self.reach.append(sorted(s for s in reach if not self.dead[s]))
            for e in ids:
                last_open[graph.edges[e].source] = k
        self.last_open = last_open
        names = set(prob.names)
        cf = lsm.ConditionalFlows(prob, dyn) if dyn is not None else None
        self.cf = cf
        covered = set(cf.keys) if cf is not None else set()
        self.vmult = {key: np.array([f.mult if f.key == key else 0.0 for f in sflows])
                      for key in covered}
        # formulas left to simulate on the inner paths (taxed, non-affine, ...): their mult
        left = {f.key for f in sflows
                if f.key and f.key not in covered and prob.formulas[f.key].names & names}
        self.smult = {key: np.array([f.mult if f.key == key else 0.0 for f in sflows])
                      for key in sorted(left)}
        stochastic = np.array([f.key in left for f in sflows])
        self.known = ~stochastic         # every flow of the state known or in closed form
        # known flows of each state at each date, discounted: fixed + formulas of no simulated
        # driver (the covered formulas enter through their conditional value)
        d = len(prob.names)
        probe = np.ones((d, 1))
        self.cflow = np.zeros((T, S))
        const = {f.key for f in sflows if f.key and f.key not in covered and f.key not in left}
        for j in range(1, T):
            w = prob.weight[j]
            if w == 0.0:
                continue
            vals = (prob.formula_values(lsm.flow_env(prob, j), probe, keys=const)
                    if const else {})
            for s, f in enumerate(sflows):
                if not f.key:
                    continue
                part = f.fixed + (f.mult * float(vals[f.key][0]) if f.key in vals else 0.0)
                self.cflow[j, s] = prob.disc[j] * w * part
        terminal = prob.terminal(sflows)
        self.terminal = terminal
        # tail[j, s]: known flows after date j and the terminal value
        tail = np.zeros((T, S))
        acc = terminal.copy()
        for j in range(T - 1, -1, -1):
            tail[j] = acc
            acc = acc + self.cflow[j]
        tail[:, self.dead] = 0.0
        self.tail = tail
        # finished[j, s]: after the decisions at j, state s never moves again and its flows are
        # known (absorbing states always)
        dates = np.arange(T)[:, None]
        self.finished = (dates >= last_open[None, :]) & ~stochastic[None, :]
        self.finished[:, self.dead] = True
        self.spawn = [[s for s in self.reach[k] if not self.finished[k, s]] for k in range(T)]
        # C_k(s) enters the bound on every path where s can move to a live state at k or be
        # moved to at k; a move that ends the project only where it can be worth taking
        self.always = []
        self.sales = []
        for k in range(T):
            ids = [e for e in open_edges.get(k, ()) if graph.edges[e].source in self.reach[k]]
            alw = {graph.edges[e].target for e in ids if not self.dead[graph.edges[e].target]}
            alw |= {graph.edges[e].source for e in ids if not self.dead[graph.edges[e].target]}
            self.always.append(alw)
            sales = {}
            for e in ids:
                if self.dead[graph.edges[e].target]:
                    sales.setdefault(graph.edges[e].source, []).append(graph.edges[e])
            self.sales.append(sales)

    def needed(self, k: int, s: int, xk: np.ndarray, dest: np.ndarray, stay: np.ndarray):
        """Outer paths (indices) on which C_k(s) must be estimated. Elsewhere the policy
        carries s on at k and the pathwise maximum cannot move from s at k, so C_k(s) enters
        the increments into and out of date k with opposite signs and cancels: only the
        estimates at dates where a decision can differ from carrying on are needed (as
        Andersen & Broadie need the value process only at exercise dates)."""
        m = xk.shape[-1]
        if k == 0 or s in self.always[k]:
            return np.arange(m)
        need = dest != s
        for e in self.sales[k].get(s, ()):
            money = np.broadcast_to(self.prob.money(e, k, xk), (m,)) * self.prob.disc[k]
            if np.isnan(stay[0]):
                return np.arange(m)
            need |= money >= stay
        return np.flatnonzero(need)

    def steps_per_outer(self, inner: int) -> tuple[int, int]:
        """(inner path-steps, inner paths alive at most) per outer path, before any inner path
        finishes early."""
        m = 2 * max(1, inner // 2)
        steps = sum(len(sp) * (self.T - 1 - k) for k, sp in enumerate(self.spawn))
        alive = sum(len(sp) for sp in self.spawn)
        return m * steps, m * alive


def bytes_per_inner_path(prob: lsm.Problem) -> int:
    """Memory of one inner path alive (drivers, logs, normals, basis rows and scratch)."""
    return 8 * (3 * max(1, len(prob.names)) + prob.basis.terms + 10)


def chunk_size(prob: lsm.Problem, layout: Layout, inner: int) -> int:
    """Outer paths per chunk: the inner paths alive at once within :data:`MEMORY` bytes."""
    _, alive = layout.steps_per_outer(inner)
    return max(1, int(MEMORY // max(1, alive * bytes_per_inner_path(prob))))


CONTROL_PATHS = 10_000    # paths on which the control's polynomials are fitted
CONTROL_DEGREE = 3        # highest degree of the control's polynomials


class ValueControl:
    """A zero-mean control for the inner paths: along the state s held over (j-1, j], the
    increment P_js(X_j) - E_{j-1}[P_js(X_j)] of a polynomial P_js in the simulated drivers, whose
    conditional mean is exact for lognormal transitions (E_{j-1}[prod X_i^e_i] = exp(e.mu +
    e' Sigma e / 2)). P_js is fitted by least squares to the policy's realised value of having held
    s up to j (flows, money and what follows, less the closed-form part of the covered flows) on
    paths of their own, so the inner value less the sum of these increments keeps its mean and
    loses most of its noise (Belomestny, Bender & Schoenmakers 2009 use such martingales alone;
    here they only reduce the variance of the nested estimate)."""

    def __init__(self, prob: lsm.Problem, pol, dyn, lay: Layout, seed: int,
                 paths: int = CONTROL_PATHS):
        from .paths import expected, simulate

        self.cols = list(prob.basis.cols)
        self.active = bool(self.cols) and prob.uncertain
        if not self.active:
            return
        T, S = prob.T, lay.S
        degree = min(prob.spec.basis, CONTROL_DEGREE)
        self.mono = lsm._monomials(len(self.cols), degree)
        e = np.array([m_[0] for m_ in self.mono], dtype=float)          # (terms, c)
        self.terms = len(self.mono)
        cols = self.cols
        self.logc = np.array([np.log(expected(dyn, t))[cols] for t in prob.times])   # (T, c)
        self.means = np.array([dyn.mean(t)[cols] for t in prob.times])
        self.decay = np.ones((T, len(cols)))
        self.gain = np.ones((T, self.terms))
        for j in range(1, T):
            h = float(prob.times[j] - prob.times[j - 1])
            self.decay[j] = np.exp(-dyn.speed[cols] * h)
            cov = dyn.step_cov(h)[np.ix_(cols, cols)]
            self.gain[j] = np.exp(0.5 * np.einsum("ti,ij,tj->t", e, cov, e))
        self.beta = np.zeros((T, S, self.terms))
        self.fitted = [[] for _ in range(T)]      # states with a polynomial at each date
        x = simulate(dyn, prob.times, paths + paths % 2, seed, "control", True)
        self._fit(prob, pol, lay, x)

    def _rows(self, u: np.ndarray) -> np.ndarray:
        """(terms, n) monomials of u (c, n), each its parent times one variable."""
        out = np.empty((self.terms, u.shape[-1]))
        out[0] = 1.0
        for t, (_, parent) in enumerate(self.mono[1:], start=1):
            np.multiply(out[parent[0]], u[parent[1]], out=out[t])
        return out

    def _u(self, j: int, y: np.ndarray) -> np.ndarray:
        """Scaled drivers X_j / E[X_j] from the logs y (d, n) at date j."""
        return np.exp(y[self.cols] - self.logc[j][:, None])

    def _w(self, j: int, y_prev: np.ndarray) -> np.ndarray:
        """exp(mu - log c): the scaled conditional log-mean at date j from date j - 1."""
        mu = self.means[j][:, None] + (y_prev[self.cols] - self.means[j - 1][:, None]) \
            * self.decay[j][:, None]
        return np.exp(mu - self.logc[j][:, None])

    def expected_rows(self, j: int, y_prev: np.ndarray) -> np.ndarray:
        """(terms, n) E_{j-1}[monomials of X_j / E[X_j]] from the logs at date j - 1."""
        return self.gain[j][:, None] * self._rows(self._w(j, y_prev))

    def increment(self, j: int, x_now: np.ndarray, erows: np.ndarray, state: np.ndarray):
        """(n,) P_js(X_j) - E_{j-1}[P_js(X_j)] for the state s held by each path over
        (j-1, j]: x_now the drivers at j, erows from :meth:`expected_rows`."""
        u = x_now[self.cols] * np.exp(-self.logc[j])[:, None]
        diff = self._rows(u)
        diff -= erows
        out = np.zeros(state.shape[0])
        for s in self.fitted[j]:                 # one polynomial per state: a loop over states
            v = lsm.predict(diff, self.beta[j, s])
            if len(self.fitted[j]) == 1:
                return v * (state == s)
            np.copyto(out, v, where=state == s)
        return out

    def _fit(self, prob, pol, lay: Layout, x: np.ndarray) -> None:
        """Backward along the control paths: R_j(s) = what having held s over (j-1, j] brings
        from date j on (the known and simulated flows at j, the policy's money and move at j,
        the jump of the closed-form flow values at a move, and the same from the state moved
        to), regressed on the monomials of X_j."""
        T, S, n = prob.T, lay.S, x.shape[-1]
        cf = lay.cf
        cont = np.zeros((S, n))                 # R'_j(f): from date j on, after the decision
        cont[:] = lay.terminal[:, None]
        cont[lay.dead] = 0.0
        cols = np.arange(n)
        for j in range(T - 1, 0, -1):
            held = lay.reach[j - 1]
            if not held:
                continue
            xj = x[j]
            if j in pol.open_edges:
                xt = np.concatenate([xj] * len(held), axis=1)
                new, money, _ = lsm.decide(prob, pol, j, xt,
                                           np.repeat(np.array(held, dtype=np.int64), n))
            unc = {}
            if lay.smult and prob.weight[j] > 0:
                xe = x[j - 1] if prob.timing == "spread" else xj
                unc = prob.formula_values(lsm.flow_env(prob, j), xe, keys=set(lay.smult))
            rows = self._rows(self._u(j, np.log(xj)))
            nxt = np.zeros((S, n))
            for i, s in enumerate(held):
                r = np.full(n, lay.cflow[j, s])
                for key, mult in lay.smult.items():
                    if mult[s] and unc:         # no flow at j (weight 0): nothing to add
                        r += prob.disc[j] * prob.weight[j] * mult[s] * unc[key]
                if j in pol.open_edges:
                    f = new[i * n:(i + 1) * n]
                    r += prob.disc[j] * money[i * n:(i + 1) * n]
                    sw = np.flatnonzero(f != s)
                    if sw.size and cf is not None and cf.keys:
                        vb = cf.value(j, xj[:, sw])
                        for key in cf.keys:
                            vm = lay.vmult[key]
                            r[sw] += (vm[f[sw]] - vm[s]) * vb[key]
                    r += cont[f, cols]
                else:
                    r += cont[s]
                self.beta[j, s] = lsm.least_squares(rows, r[None, :])[:, 0]
                self.fitted[j].append(s)
                nxt[s] = r
            cont = nxt


SECONDS_PER_STEP = 13.5e-9   # CPU seconds per inner path-step and unit of work (calibrated on
#                              projects/river_ccgt.yaml, tests/benchmarks/bench_simulation.py)


@dataclass(frozen=True)
class BoundPlan:
    """Size of the nested bound before anything is simulated (``realopt check``, the guard)."""

    path_steps: int          # inner path-steps at most (paths that end early take fewer)
    chunk: int               # outer paths per chunk
    chunks: int
    memory_bytes: int
    seconds_estimate: float


def open_edges(graph, open_by_right: dict, T: int) -> dict:
    """{date index: edge ids open at that date}, as :func:`lsm.fit` builds them."""
    out = {}
    for k in range(T):
        ids = [i for i, e in enumerate(graph.edges) if open_by_right[e.right][k]]
        if ids:
            out[k] = ids
    return out


def plan(prob: lsm.Problem, graph, open_by_right: dict, outer: int, inner: int) -> BoundPlan:
    """Inner path-steps, chunks, memory and CPU time of the nested bound on ``outer`` paths with
    ``inner`` inner paths: an upper estimate (inner paths that end early, at a sale, and dates
    where an estimate is not needed take less)."""
    from .paths import dynamics

    lay = Layout(prob, graph, open_edges(graph, open_by_right, prob.T),
                 prob.state_flows(graph), dynamics(prob.model, "risk_neutral"))
    steps, alive = lay.steps_per_outer(inner)
    chunk = min(outer, chunk_size(prob, lay, inner))
    chunks = -(-outer // chunk)
    d, S, T = max(1, len(prob.names)), lay.S, prob.T
    terms = prob.basis.terms
    control = CONTROL_PATHS * 8 * (T * d + 4 * S + 3 * terms)
    memory = (chunk * alive * bytes_per_inner_path(prob) + 8 * T * d * outer
              + 8 * 5 * T * S * chunk + control)
    unit = 2 + d + terms + S
    seconds = (outer * steps * unit * SECONDS_PER_STEP
               + CONTROL_PATHS * T * S * unit * 5 * SECONDS_PER_STEP)
    return BoundPlan(path_steps=int(outer * steps), chunk=chunk, chunks=chunks,
                     memory_bytes=int(memory), seconds_estimate=float(seconds))


def nested_upper_bound(prob: lsm.Problem, pol, dyn, outer: np.ndarray, inner: int, seed: int,
                       progress=None, diagnostics: dict | None = None) -> np.ndarray:
    """Pathwise dual values on the ``outer`` paths (T, d, n); the upper bound is their mean
    (see the module doc). ``inner``: inner paths per outer path, date and state (rounded down to
    antithetic pairs, at least one pair). ``diagnostics``: receives ``chat`` (T, S, n), the
    estimates C_k(s) on each outer path (0 where not needed)."""
    layout = Layout(prob, pol.graph, pol.open_edges, pol.sflows, dyn)
    control = ValueControl(prob, pol, dyn, layout, seed)
    n = outer.shape[-1]
    chunk = chunk_size(prob, layout, inner)
    out = np.empty(n)
    chats = []
    for c, lo in enumerate(range(0, n, chunk)):
        hi = min(n, lo + chunk)
        out[lo:hi], chat = _chunk(prob, pol, dyn, layout, control, outer[:, :, lo:hi], inner,
                                  generator(seed, "inner", c), progress)
        if diagnostics is not None:
            chats.append(chat)
    if diagnostics is not None:
        diagnostics["chat"] = np.concatenate(chats, axis=2)
    return out


def _chunk(prob, pol, dyn, lay: Layout, vc: ValueControl, X, inner, gen, progress):
    """Dual values of one chunk of outer paths X (T, d, m)."""
    S, T, m = lay.S, lay.T, X.shape[-1]
    d = X.shape[1]
    pairs = max(1, inner // 2)
    cf = lay.cf
    chat = np.zeros((T, S, m))            # C_k(s) on each outer path
    sums = np.zeros(T * S * m)            # sums of the inner values by (date, state, outer)
    means = np.array([dyn.mean(t) for t in prob.times]) if d else np.zeros((T, 0))
    dest = np.repeat(np.arange(S)[None, :, None], T, axis=0).repeat(m, axis=2)   # f_k(s)
    cash = np.zeros((T, S, m))                                                 # money_k(s)
    stay = np.full((T, S, m), np.nan)     # value of never moving again (known flows only)
    chol: dict = {}

    def vstart(k, xk, s):
        """Conditional value of the covered flows after date k in state s (outer drivers)."""
        v = np.zeros(xk.shape[-1])
        if cf is not None and cf.keys and any(lay.vmult[key][s] for key in cf.keys):
            vb = cf.value(k, xk)
            for key in cf.keys:
                if lay.vmult[key][s]:
                    v += lay.vmult[key][s] * vb[key]
        return v

    # the inner paths alive, one entry each: logs of the drivers y (d, N), state, value so far,
    # group (start date, start state, outer path), pair (outer path, pair index) whose normals
    # it takes, and the sign it takes them with (antithetic pairs)
    live = {"y": np.zeros((d, 0)), "cur": np.zeros(0, dtype=np.int64), "val": np.zeros(0),
            "grp": np.zeros(0, dtype=np.int64), "pid": np.zeros(0, dtype=np.int64),
            "sgn": np.zeros(0)}

    def start(k) -> dict | None:
        """Exact C_k for states that cannot move; new inner paths for the others, on the outer
        paths where C_k enters the bound (see :meth:`Layout.needed`)."""
        xk = X[k]
        parts = []
        for s in lay.reach[k]:
            v = vstart(k, xk, s)
            if lay.known[s]:
                stay[k, s] = v + lay.tail[k, s]
            if lay.finished[k, s]:
                chat[k, s] = v + lay.tail[k, s]
                continue
            idx = lay.needed(k, s, xk, dest[k, s], stay[k, s])
            if idx.size:
                parts.append((s, idx, v[idx]))
        if not parts:
            return None
        sel = np.concatenate([np.repeat(idx, pairs) for _, idx, _ in parts])
        pp = np.tile(np.arange(pairs), sel.size // pairs)
        ly = np.log(xk[:, sel]) if d else np.zeros((0, sel.size))
        c_new = np.concatenate([np.full(idx.size * pairs, s, dtype=np.int64)
                                for s, idx, _ in parts])
        v_new = np.concatenate([np.repeat(v, pairs) for _, _, v in parts])
        g_new = np.concatenate([(k * S + s) * m + np.repeat(idx, pairs) for s, idx, _ in parts])
        two = sel.size
        return {"y": np.concatenate([ly, ly], axis=1), "cur": np.concatenate([c_new, c_new]),
                "val": np.concatenate([v_new, v_new]), "grp": np.concatenate([g_new, g_new]),
                "pid": np.tile(sel * pairs + pp, 2),
                "sgn": np.concatenate([np.ones(two), -np.ones(two)])}

    def merge(keep, new):
        for name in live:
            old = live[name][..., keep] if keep is not None else live[name]
            live[name] = old if new is None else np.concatenate([old, new[name]], axis=-1)

    merge(None, start(0))
    for j in range(1, T):
        if progress:
            progress()
        keep = None
        N = live["grp"].size
        if N:
            y, cur, val = live["y"], live["cur"], live["val"]
            x_prev = np.exp(y) if (lay.smult and prob.timing == "spread") else None
            erows = None
            if d:
                h = float(prob.times[j] - prob.times[j - 1])
                key = round(h, 12)
                if key not in chol:
                    chol[key] = (_step_cholesky(dyn, h), np.exp(-dyn.speed * h))
                L, decay = chol[key]
                if vc.active:
                    erows = vc.expected_rows(j, y)
                # common random numbers: every inner path of an outer path takes the same
                # normals at a date (its pair's, with its sign), whatever its start date and
                # state, so the estimates that the pathwise maximum compares err together
                z = gen.standard_normal((d, m * pairs))[:, live["pid"]] * live["sgn"]
                y -= means[j - 1][:, None]
                y *= decay[:, None]
                y += means[j][:, None]
                for a in range(d):                  # y += L z, a fixed order of sums
                    for b in range(a + 1):
                        if L[a, b] != 0.0:
                            y[a] += L[a, b] * z[b]
                x = np.exp(y)
            else:
                x = np.zeros((0, N))
            val += lay.cflow[j][cur]
            if erows is not None:
                val -= vc.increment(j, x, erows, cur)
            if lay.smult and prob.weight[j] > 0:
                xe = x_prev if prob.timing == "spread" else x
                fv = prob.formula_values(lsm.flow_env(prob, j), xe, keys=set(lay.smult))
                w = prob.disc[j] * prob.weight[j]
                for key, mult in lay.smult.items():
                    val += w * mult[cur] * fv[key]
            if j in pol.open_edges:
                new, money, _ = lsm.decide(prob, pol, j, x, cur)
                val += prob.disc[j] * money
                sw = np.flatnonzero(new != cur)
                if sw.size and cf is not None and cf.keys:
                    vb = cf.value(j, x[:, sw])
                    for key in cf.keys:
                        vm = lay.vmult[key]
                        val[sw] += (vm[new[sw]] - vm[cur[sw]]) * vb[key]
                cur = live["cur"] = new
            fin = lay.finished[j][cur]
            if fin.any():
                done = np.flatnonzero(fin)
                sums += np.bincount(live["grp"][done], weights=val[done] + lay.tail[j][cur[done]],
                                    minlength=sums.size)
                keep = np.flatnonzero(~fin)
        # the policy's move on the outer paths from each state held since the previous date
        held = lay.reach[j - 1]
        if j in pol.open_edges and held:
            xt = np.concatenate([X[j]] * len(held), axis=1)
            ct = np.repeat(np.array(held, dtype=np.int64), m)
            new, money, _ = lsm.decide(prob, pol, j, xt, ct)
            for i, s in enumerate(held):
                dest[j, s] = new[i * m:(i + 1) * m]
                cash[j, s] = prob.disc[j] * money[i * m:(i + 1) * m]
        if j < T - 1:
            merge(keep, start(j))
        else:
            merge(keep, None)
            for s in lay.reach[j]:
                chat[j, s] = lay.tail[j, s]          # the terminal value, known
    if live["grp"].size:
        sums += np.bincount(live["grp"], weights=live["val"] + lay.terminal[live["cur"]],
                            minlength=sums.size)
    est = sums.reshape(T, S, m) / (2 * pairs)
    for k in range(T - 1):
        for s in lay.spawn[k]:
            chat[k, s] = est[k, s]
    return _dual(prob, pol, lay, X, chat, dest, cash, stay), chat


def _step_cholesky(dyn, h):
    from ..drivers import _cholesky_psd

    return _cholesky_psd(dyn.step_cov(h))


def _dual(prob, pol, lay: Layout, X, chat, dest, cash, stay) -> np.ndarray:
    """Pathwise backward induction over the states with the flows penalised by the increments
    dM_s(k) = flow_k(s) + money_k(s) + C_k(f_k(s)) - C_{k-1}(s) of the state held.

    A move that ends the project (a sale, an abandonment) is left out where its money is below
    ``stay``, the value of never moving again: there it is never optimal, so the problem keeps
    its value and the pathwise maximum loses only the inner noise of dates where it cannot
    matter (as Andersen & Broadie's bound counts in-the-money dates only)."""
    graph = pol.graph
    S, T, m = lay.S, lay.T, X.shape[-1]
    dead = {s for s in range(S) if lay.dead[s]}
    cols = np.arange(m)
    Z = np.zeros((S, m))
    for k in range(T - 1, -1, -1):
        if k < T - 1:
            j = k + 1
            fl = prob.disc[j] * prob.flows(j, X[k], X[j], pol.sflows)
            inc = np.zeros((S, m))
            for s in lay.reach[k]:
                w = cash[j, s] + chat[j, dest[j, s], cols]
                inc[s] = fl[s] + w - chat[k, s]
            G = Z + fl - inc
        else:
            G = np.repeat(lay.terminal[:, None], m, axis=1)
        Znew = G.copy()
        srcs = lsm._sources(graph, pol.open_edges.get(k, []))
        for s in sorted(srcs, key=lambda q: (not graph.states[q].invested, q)):
            V = Znew if not graph.states[s].invested else G    # commitments: after decisions
            best = G[s]
            for e_id in srcs[s]:
                e = graph.edges[e_id]
                money = np.broadcast_to(prob.money(e, k, X[k]), (m,)) * prob.disc[k]
                if e.target in dead:
                    alt = money
                    if not np.isnan(stay[k, s, 0]):
                        alt = np.where(money >= stay[k, s], money, -np.inf)
                else:
                    alt = V[e.target] + money
                best = np.maximum(best, alt)
            Znew[s] = best
        Z = Znew
    return Z[graph.initial]


def gap_share(upper: float, lower: float, option: float) -> float | None:
    """The gap between the bounds as a share of the option value (None when it is ~0)."""
    if not math.isfinite(option) or abs(option) < 1e-12:
        return None
    return (upper - lower) / abs(option)
