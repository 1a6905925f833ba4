"""The simulation appraisal: values with standard errors, Shapley shares, rules in driver units.

Money is in the project's currency and unit, valued today at the risk-free rate (risk-neutral
valuation of the drivers). ``present_value`` is the risk-neutral value of the base state's flows;
``static_npv = present_value - investment_pv``. Each subset of rights is fitted on the same
fitting paths and valued on the same independent valuing paths (common random numbers), so the
flexibility value, each right's standalone value and its Shapley share are means of pathwise
differences, and their standard errors are those of the differences. With antithetic pairs the
standard errors are computed from the pair means.
"""
from __future__ import annotations

import math
import sys
import time
from dataclasses import dataclass, field, replace
from typing import NamedTuple

import numpy as np

from ..errors import ValuationError
from ..model import Project, Switch
from ..rights import (base_description, build_state_graph, prepared_rights,
                      requirement_closure, structure_warnings, threshold_side, usable_subset)
from . import bound, lsm
from .paths import change_measure, dynamics, simulate

MAX_RIGHTS = 10
PROGRESS_AFTER = 2.0
MEMORY_SHARE = 0.5
TIME_LIMIT = 600.0
CAUTION_SIMULATION = (
    "Caution: these results rest on the inputs and the model's assumptions (least-squares Monte "
    "Carlo on the drivers' risk-neutral paths, the stated processes, correlations and rates; "
    "simulation values carry the standard errors shown). They support, and do not replace, "
    "professional judgement; local regulations and licensed financial, tax and legal advice take "
    "precedence.")


# --- result objects ----------------------------------------------------------------------------

@dataclass(frozen=True)
class DriverThreshold:
    """At ``year``, from ``state``, ``action`` is best for lower < driver < upper (None:
    unbounded on that side; ``never``: not worth it anywhere on the grid)."""

    year: float
    state: str
    action: str
    driver: str
    lower: float | None
    upper: float | None
    never: bool = False


@dataclass(frozen=True)
class DriverMap:
    """Best action on a grid of two drivers at one date, the others at their median:
    ``codes[iy, ix]`` indexes ``actions``."""

    state: str
    year: float
    actions: tuple[str, ...]
    x_driver: str
    y_driver: str
    x_values: np.ndarray
    y_values: np.ndarray
    codes: np.ndarray
    others: dict
    change: float | None = None     # the share of the plane whose best action changes between
    #                                 this date and an adjacent decision date, which chose it
    #                                 (None: the first decision date, or every date is shown)


@dataclass(frozen=True)
class SimRightValue:
    name: str
    type: str
    window: tuple[float, float]
    exercise: str
    standalone_value: float
    standalone_standard_error: float
    shapley_value: float
    shapley_standard_error: float
    side: str | None
    thresholds: tuple[DriverThreshold, ...]
    use_years: tuple[float, ...]
    use_risk_neutral: tuple[float, ...]
    use_real_world: tuple[float, ...]
    use_measure: str
    rule: str
    mode_shares: dict | None = None   # switch: mode -> (risk-neutral, real-world) shares


@dataclass(frozen=True)
class SimulationInfo:
    paths: int
    seed: int
    steps_per_year: int
    basis: int
    antithetic: bool
    dates: int
    decision_dates: int
    horizon: float
    regression_terms: int
    states: int
    in_sample_value: float
    seconds: float


@dataclass(frozen=True)
class SimulationAppraisal:
    """Result of :func:`appraise` for ``valuation: simulation``; ``to_dict()`` is the JSON."""

    project: Project
    present_value: float
    investment_pv: float
    static_npv: float
    expanded_npv: float
    flexibility_value: float
    interaction: float
    decision_today: str
    rights: tuple[SimRightValue, ...]
    standard_error: dict
    upper_bound: dict | None
    simulation: SimulationInfo
    real_world_dcf: dict
    warnings: tuple[str, ...]
    state_graph: object
    driver_maps: tuple[DriverMap, ...]
    fan_years: np.ndarray
    fan: dict = field(default_factory=dict)   # driver -> {percentile: array} (real-world)
    method: str = "simulation"
    base: str = ""                            # the base project every subset values
    headline_warnings: tuple[str, ...] = ()   # the warnings that bear on the headline numbers
    cash_flow_value: float | None = None      # risk-neutral value of the file's plain flows
    cash_flow_fan: dict = field(default_factory=dict)  # percentile -> array at fan_years (real
    #                                         world; money per year; NaN where no flow is paid)
    today_choices: dict | None = None         # appraise(today=True): see _today_choices

    @property
    def present_value_stderr(self) -> float:
        return self.standard_error["present_value"]

    def right(self, name: str) -> SimRightValue:
        return next(r for r in self.rights if r.name == name)

    def to_dict(self) -> dict:
        p = self.project
        s = self.simulation
        return {
            "project": p.name, "currency": p.currency, "unit": p.unit,
            "method": "simulation",
            "present_value": self.present_value,
            "present_value_stderr": self.standard_error["present_value"],
            "cash_flow_value": (self.present_value if self.cash_flow_value is None
                                else self.cash_flow_value),
            "base": self.base, "headline_warnings": list(self.headline_warnings),
            "investment_pv": self.investment_pv,
            "static_npv": self.static_npv, "expanded_npv": self.expanded_npv,
            "flexibility_value": self.flexibility_value, "interaction": self.interaction,
            "decision_today": self.decision_today,
            "standard_error": dict(self.standard_error),
            "upper_bound": self.upper_bound,
            "real_world_dcf": dict(self.real_world_dcf),
            "rights": [_right_dict(r) for r in self.rights],
            "simulation": {"paths": s.paths, "seed": s.seed, "steps_per_year": s.steps_per_year,
                           "basis": s.basis, "antithetic": s.antithetic, "dates": s.dates,
                           "decision_dates": s.decision_dates, "horizon": s.horizon,
                           "regression_terms": s.regression_terms, "states": s.states,
                           "in_sample_value": s.in_sample_value, "seconds": s.seconds},
            "lattice": None,
            "warnings": list(self.warnings),
            "caution": CAUTION_SIMULATION,
        }

    def summary(self):
        import pandas as pd

        se = self.standard_error
        rows = [("Present value of the operating project", self.present_value, None,
                 se["present_value"]),
                ("Investment (present value)", -self.investment_pv, None, 0.0),
                ("Static NPV", self.static_npv, None, se["present_value"])]
        rows += [(f"{r.name} ({r.type})", r.shapley_value, r.standalone_value,
                  r.shapley_standard_error) for r in self.rights]
        rows += [("Interaction between rights", self.interaction, None, None),
                 ("Flexibility value", self.flexibility_value, None, se["flexibility_value"]),
                 ("Expanded NPV", self.expanded_npv, None, se["expanded_npv"])]
        return pd.DataFrame(rows, columns=["item", "value", "standalone_value",
                                           "standard_error"]).set_index("item")

    def headline(self, width: int = 100) -> str:
        """The headline table as text (``realopt appraise``)."""
        import textwrap

        p = self.project
        money = " ".join(x for x in (p.currency, p.unit) if x) or "money units"
        se = self.standard_error

        def num(x):
            return "" if x is None else f"{x:,.2f}"

        def pm(x, e):          # a value computed in closed form has no sampling error
            return f"{x:,.2f} (exact)" if e == 0 else f"{x:,.2f} +- {e:,.2f}"

        labels = [f"{r.name} ({r.type})" for r in self.rights]
        w = min(max([46] + [len(s) for s in labels]), width - 44)

        def row(label, *cols):
            label = label if len(label) <= w else label[: w - 3] + "..."
            return f"{label:<{w}}" + "".join(f"{c:>22}" for c in cols)

        s = self.simulation
        out = [p.name, f"amounts in {money}, valued today (simulation on the drivers; +- one "
               "standard error)", ""]
        out.append(row("Present value of the operating project", "",
                       pm(self.present_value, se["present_value"])))
        out.append(row("Investment (present value)", "", num(-self.investment_pv)))
        out.append(row("Static NPV (commit now, no flexibility)", "",
                       pm(self.static_npv, se["present_value"])))
        out.append("")
        if self.rights:
            out.append(row("Right", "standalone", "Shapley share"))
            for label, r in zip(labels, self.rights):
                out.append(row(label, pm(r.standalone_value, r.standalone_standard_error),
                               pm(r.shapley_value, r.shapley_standard_error)))
            out.append(row("Interaction between the rights", num(self.interaction), ""))
            out.append(row("Flexibility value", "", pm(self.flexibility_value,
                                                       se["flexibility_value"])))
        else:
            out.append("No rights in the file: the expanded NPV is the static NPV.")
        out.append(row("Expanded NPV (static NPV + flexibility)", "",
                       pm(self.expanded_npv, se["expanded_npv"])))
        if self.upper_bound:
            ub = self.upper_bound
            out.append(row("Dual upper bound on the expanded NPV", "",
                           pm(ub["value"], ub["standard_error"])))
            share = ub.get("gap_share")
            out += textwrap.wrap(
                f"Bound less the expanded NPV: {num(ub['gap'])}"
                + (f" ({100 * share:.1f}% of the flexibility value)" if share is not None else "")
                + "; the value of the best policy lies between the two, within their standard "
                f"errors (nested simulation, {ub['paths']:,} outer x {ub['inner']} inner paths; "
                "Andersen & Broadie 2004)", width, subsequent_indent="  ")
        out.append("")
        out.append(f"Decision today: {self.decision_today}")
        rw = self.real_world_dcf
        out += textwrap.wrap(
            f"Real-world DCF of the base flows at the discount rate: {num(rw['value'])} (the "
            f"risk-neutral value above is {num(self.present_value)}; the difference is the price "
            "of the drivers' risk that the discount rate and the risk-neutral description imply "
            "differently)", width, subsequent_indent="  ")
        out += textwrap.wrap(
            f"Simulation: {s.paths:,} paths to fit the policy and {s.paths:,} independent paths "
            f"to value it (seed {s.seed}{', antithetic pairs' if s.antithetic else ''}); "
            f"{s.dates} dates ({s.decision_dates} with a decision) to year {s.horizon:g}; "
            f"regression on {s.regression_terms} terms (degree {s.basis}); {s.states} states; "
            f"{s.seconds:.1f} s", width, subsequent_indent="  ")
        if self.rights:
            out += ["", "When to use each right:"]
            for r in self.rights:
                out += textwrap.wrap(r.rule, width, initial_indent="  - ",
                                     subsequent_indent="    ")
        if self.warnings:
            out += ["", "Warnings:"]
            for x in self.warnings:
                out += textwrap.wrap(x, width, initial_indent="  - ", subsequent_indent="    ")
        out += [""] + textwrap.wrap(CAUTION_SIMULATION, width)
        return "\n".join(out)


def _right_dict(r: SimRightValue) -> dict:
    return {
        "name": r.name, "type": r.type, "window": list(r.window), "exercise": r.exercise,
        "standalone_value": r.standalone_value,
        "standalone_standard_error": r.standalone_standard_error,
        "shapley_value": r.shapley_value, "shapley_standard_error": r.shapley_standard_error,
        "rule": r.rule, "threshold_side": r.side,
        "thresholds": [{"year": t.year, "state": t.state, "action": t.action,
                        "driver": t.driver, "exercise_above": t.lower,
                        "exercise_below": t.upper, "never": t.never} for t in r.thresholds],
        "chance_of_use": dict(
            {"years": list(r.use_years), "measure": r.use_measure,
             "risk_neutral": list(r.use_risk_neutral), "real_world": list(r.use_real_world)},
            **({"modes": {m: {"risk_neutral": list(rn), "real_world": list(rw)}
                          for m, (rn, rw) in r.mode_shares.items()}}
               if r.mode_shares is not None else {})),
    }


# --- plan and guard ----------------------------------------------------------------------------

@dataclass(frozen=True)
class SimPlan:
    """What ``realopt check`` prints and the guard reads, before anything is simulated."""

    paths: int
    dates: int
    decision_dates: int
    horizon: float
    drivers: int
    regression_terms: int
    states: int
    solves: int                 # subsets of rights fitted and valued (Shapley)
    memory_bytes: int
    seconds_estimate: float
    warnings: tuple[str, ...]
    bound_memory_bytes: int = 0      # the dual upper bound's share of the two above
    bound_seconds: float = 0.0


def _paths_used(project: Project, prob: lsm.Problem) -> int:
    if not prob.uncertain:
        return 1
    n = project.simulation.paths
    return n + (n % 2) if project.simulation.antithetic else n


def plan(project: Project) -> SimPlan:
    """Dates, regressions, memory and time estimate (calibrated on the 2-core machine of the
    benchmarks: tests/benchmarks/bench_simulation.py)."""
    _check_project(project)
    prob = lsm.Problem(project)
    rights = prepared_rights(project)
    graph = build_state_graph(rights)
    spy = project.simulation.steps_per_year
    opened = np.zeros(prob.T, dtype=bool)
    for r in rights:
        opened |= lsm.open_mask(r, prob.times, spy)
    n = _paths_used(project, prob)
    d = len(prob.stochastic)
    m = len(rights)
    solves = 2 ** m if m else 1
    S = len(graph.states)
    terms = prob.basis.terms
    sets = 2 * prob.T * max(d, 1) * n * 8
    work = 8 * n * (6 * S + 3 * terms + 2 * solves + 8)
    ub = _bound_plan(project, prob, graph, rights)
    memory = int(sets + work + (ub.memory_bytes if ub else 0))
    dec = int(opened.sum())
    # CPU seconds, calibrated on tests/benchmarks/bench_simulation.py (the Bermudan put and the
    # three-driver plant on this project's 2-core machine); a loaded machine takes longer
    seconds = 0.3 + n * solves * prob.T * (S + terms) * 9.5e-9 + n * prob.T * max(d, 1) * 2e-8
    if ub:
        seconds += ub.seconds_estimate
    warnings = list(project.warnings) + structure_warnings(     # the same words as appraise
        graph, float(prob.model.years[1]), max(r.window[1] for r in rights) if rights else 0.0,
        terminal_value=prob.tv)
    return SimPlan(paths=n, dates=prob.T, decision_dates=dec, horizon=float(prob.times[-1]),
                   drivers=d, regression_terms=terms, states=S, solves=solves,
                   memory_bytes=memory, seconds_estimate=seconds, warnings=tuple(warnings),
                   bound_memory_bytes=ub.memory_bytes if ub else 0,
                   bound_seconds=ub.seconds_estimate if ub else 0.0)


def _bound_plan(project: Project, prob: lsm.Problem, graph, rights):
    """The nested bound's size (bound.plan), None when not asked; deterministic drivers use
    one outer path and one inner pair."""
    spec = project.simulation
    if not spec.upper_bound_paths:
        return None
    open_by = {r.name: lsm.open_mask(r, prob.times, spec.steps_per_year) for r in rights}
    if not prob.uncertain:
        return bound.plan(prob, graph, open_by, 1, 2)
    return bound.plan(prob, graph, open_by, spec.upper_bound_paths, spec.upper_bound_inner)


def guard_message(project: Project, pl: SimPlan, memory_available: int | None) -> str | None:
    """None when the run fits; else why not and the largest paths that fit."""
    excess = []
    ratio = 1.0
    if memory_available is not None and pl.memory_bytes > MEMORY_SHARE * memory_available:
        excess.append(f"about {pl.memory_bytes / 1e9:.1f} GB of memory (this machine has "
                      f"{memory_available / 1e9:.1f} GB available)")
        ratio = min(ratio, MEMORY_SHARE * memory_available / pl.memory_bytes)
    if pl.seconds_estimate > TIME_LIMIT:
        excess.append(f"about {pl.seconds_estimate / 60:.0f} minutes (the limit is "
                      f"{TIME_LIMIT / 60:.0f} minutes)")
        ratio = min(ratio, TIME_LIMIT / pl.seconds_estimate)
    if not excess:
        return None
    spec = project.simulation
    rest_m, rest_s = pl.memory_bytes - pl.bound_memory_bytes, pl.seconds_estimate - pl.bound_seconds
    if spec.upper_bound_paths and (memory_available is None
                                   or rest_m <= MEMORY_SHARE * memory_available) \
            and rest_s <= TIME_LIMIT:
        # the dual upper bound is what does not fit: its time grows with outer x inner paths
        share = 1.0
        if pl.bound_seconds and pl.seconds_estimate > TIME_LIMIT:
            share = min(share, (TIME_LIMIT - rest_s) / pl.bound_seconds)
        if memory_available is not None and pl.memory_bytes > MEMORY_SHARE * memory_available:
            share = min(share, (MEMORY_SHARE * memory_available - rest_m)
                        / max(1, pl.bound_memory_bytes))
        outer = max(10, int(spec.upper_bound_paths * share * 0.9) // 10 * 10)
        return (f"This run would need {' and '.join(excess)}, most of it for the dual upper "
                f"bound ({spec.upper_bound_paths:,} outer paths x {spec.upper_bound_inner} "
                f"inner paths over {pl.dates} dates; its time grows with outer x inner x "
                f"dates^2). Fix: use --set simulation.upper_bound.paths={outer} (or fewer "
                "inner paths: simulation.upper_bound.inner), or pass --allow-large to run "
                "anyway.")
    smaller = max(100, int(pl.paths * ratio * 0.9) // 100 * 100)
    return (f"This run would need {' and '.join(excess)}: {pl.paths:,} + {pl.paths:,} paths, "
            f"{pl.dates} dates, {pl.states} states, {pl.solves} subsets of rights. Fix: use "
            f"--set simulation.paths={smaller} (or fewer decision dates: "
            "simulation.steps_per_year), or pass --allow-large to run anyway.")


# --- the appraisal -----------------------------------------------------------------------------

class _Progress:
    def __init__(self, total: int, label: str):
        self.total, self.done, self.label = max(1, total), 0, label
        self.t0 = time.monotonic()
        self.enabled = bool(getattr(sys.stderr, "isatty", lambda: False)())
        self.shown = False

    def __call__(self):
        self.done += 1
        if not self.enabled or time.monotonic() - self.t0 < PROGRESS_AFTER:
            return
        if self.done % 8 and self.done < self.total:
            return
        full = int(30 * min(1.0, self.done / self.total))
        sys.stderr.write(f"\r{self.label} [{'#' * full}{'.' * (30 - full)}] "
                         f"{min(self.done, self.total):,}/{self.total:,} date passes")
        sys.stderr.flush()
        self.shown = True

    def close(self):
        if self.shown:
            sys.stderr.write("\n")
            sys.stderr.flush()


def _check_project(project: Project) -> None:
    if project.valuation != "simulation" or project.simulation is None:
        raise ValuationError("internal: the simulation valuation needs valuation: simulation")
    if project.underlying.drivers is None:
        raise ValuationError("valuation: simulation needs the cash flows from drivers "
                             "(underlying: years, drivers, cash_flow)")
    if len(project.rights) > MAX_RIGHTS:
        raise ValuationError(
            f"The project has {len(project.rights)} rights; exact Shapley shares need 2^n "
            f"fits, refused above {MAX_RIGHTS} rights. Fix: value related rights as one or "
            "split the project.")


def control_set(corrections: list, c_full, base_cv, n: int) -> list:
    """The one fixed set of zero-mean controls of an appraisal: every fitted subset's pathwise
    martingale correction (in the order the subsets were first valued, the base first) while
    they are few against the paths, else the full set's alone; plus the base value less its
    exact mean where that is known. Shared by :func:`appraise` and simulation.quick."""
    ctrl = [c for c in corrections if c is not None]
    if len(ctrl) + 1 > max(2, n // 200):
        ctrl = [c_full] if c_full is not None else []
    return ctrl + ([base_cv] if base_cv is not None else [])


def _mean_se(v: np.ndarray, antithetic: bool, controls=()):
    """(mean, standard error) of pathwise values ``v``; antithetic pairs are averaged first.
    ``controls``: pathwise values of known mean 0 (control variates; coefficients by least
    squares on the same paths; the estimate is linear in ``v``, so sums of shares stay exact).
    Controls that do not vary are dropped."""
    n = v.shape[0]
    if n <= 1:
        return float(v.mean()), 0.0

    def pairs(a):
        return 0.5 * (a[: n // 2] + a[n // 2:]) if antithetic else a

    w = pairs(v)
    h = w.shape[0]
    scale = 1.0 + float(np.abs(v).max())
    cols = []
    for c in controls:
        c = pairs(c)
        cc = c - c.mean()
        if float(np.einsum("i,i->", cc, cc)) > (1e-9 * scale) ** 2 * h:
            cols.append(c)
    if cols:
        C = np.array(cols)
        Cc = C - C.mean(axis=1, keepdims=True)
        G = np.einsum("in,jn->ij", Cc, Cc)
        rhs = np.einsum("in,n->i", Cc, w - w.mean())
        try:
            beta = np.linalg.solve(G + 1e-12 * np.trace(G) * np.eye(len(cols)), rhs)
        except np.linalg.LinAlgError:
            beta = np.zeros(len(cols))
        w = w - np.einsum("i,in->n", beta, C)
    return float(w.mean()), float(w.std(ddof=1) / math.sqrt(h)) if h > 1 else 0.0


def shapley_weights(n: int) -> list[float]:
    return [math.factorial(s) * math.factorial(n - s - 1) / math.factorial(n) for s in range(n)]


class SetUp(NamedTuple):
    """What every valuation of a simulation project starts from (appraise, simulation.quick)."""

    prob: lsm.Problem
    rights: list
    open_by: dict              # right name -> (T,) bool: the dates it may be used
    antithetic: bool
    paths: int                 # paths per set (fitting, valuing)
    dyn: object                # risk-neutral dynamics of the drivers
    investment_pv: float


def set_up(project: Project) -> SetUp:
    """Check ``project``, build its problem, rights and dates; refuse too few paths for the
    basis (the loader's rule, for projects built in Python)."""
    _check_project(project)
    spec = project.simulation
    prob = lsm.Problem(project)
    rights = prepared_rights(project)
    open_by = {r.name: lsm.open_mask(r, prob.times, spec.steps_per_year) for r in rights}
    n = _paths_used(project, prob)
    if prob.uncertain and n < lsm_min_paths(prob):
        raise ValuationError(f"{n:,} paths are too few for {prob.basis.terms} regression "
                             f"coefficients; use simulation.paths: {lsm_min_paths(prob):,} or "
                             "more, or a lower simulation.basis")
    return SetUp(prob, rights, open_by, spec.antithetic and prob.uncertain, n,
                 dynamics(prob.model, "risk_neutral"),
                 project.investment.present_value(project.market))


def appraise(project: Project, *, progress: bool = True,
             today: bool = False) -> SimulationAppraisal:
    """Value every right of ``project`` by least-squares Monte Carlo; see the module doc.
    ``today``: also value the decisions open today (``today_choices``, for realopt.portfolio;
    one more forward pass, nothing else changes)."""
    t_start = time.monotonic()
    spec = project.simulation
    prob, rights, open_by, anti, n, dyn, investment_pv = set_up(project)
    names = [r.name for r in rights]
    masks = 2 ** len(names)
    ub_plan = _bound_plan(project, prob, build_state_graph(rights), rights)
    prog = _Progress((masks + 2) * 2 * prob.T + (ub_plan.chunks * prob.T if ub_plan else 0),
                     "realopt simulation") if progress else None

    x_fit = simulate(dyn, prob.times, n, spec.seed, "fit", anti)
    stats = [prob.basis.stats(x_fit[k]) for k in range(prob.T)]
    x_val = simulate(dyn, prob.times, n, spec.seed, "value", anti)
    mart = lsm.martingale_increments(prob, dyn, x_val)

    cache: dict = {}
    policies: dict = {}
    full_key = frozenset(r.name for r in usable_subset(rights, set(names)))

    def value_of(subset_names):
        """(pathwise value, pathwise martingale control) of a subset of rights."""
        usable = usable_subset(rights, set(subset_names))
        key = frozenset(r.name for r in usable)
        if key not in cache:
            graph = build_state_graph(usable)
            full = key == full_key
            pol = lsm.fit(prob, graph, x_fit, stats, open_by, progress=prog)
            res = lsm.run(prob, pol, x_val, record=full, progress=prog, mart=mart)
            v = res.values - (investment_pv if graph.states[graph.initial].invested else 0.0)
            cache[key] = (v, res.correction if res.correction is not None else np.zeros_like(v))
            policies[key] = (pol, res)
        return cache[key]

    base, base_c = value_of([])
    vals = {m: value_of([names[k] for k in range(len(names)) if m >> k & 1])
            for m in range(masks)}
    pol, res_rn = policies[full_key]
    v_full, c_full = vals[masks - 1]
    w = shapley_weights(len(names)) if names else []
    share_paths, alone_paths = {}, {}
    for k, name in enumerate(names):
        bit = 1 << k
        acc, acc_c = np.zeros_like(base), np.zeros_like(base)
        for m in range(masks):
            if not m & bit:
                acc += w[bin(m).count("1")] * (vals[m | bit][0] - vals[m][0])
                acc_c += w[bin(m).count("1")] * (vals[m | bit][1] - vals[m][1])
        share_paths[name] = (acc, acc_c)
        v_alone, c_alone = value_of(requirement_closure(rights, name))
        alone_paths[name] = (v_alone - base, c_alone - base_c)
    del mart

    # Control variates (zero mean, coefficients fitted on the same paths, linear in the
    # estimate so Shapley shares still add up): the martingale sum along the states held
    # (lsm.martingale_increments) and, when the base flows are affine, the base value less its
    # exact risk-neutral mean (then the present value itself is exact).
    exact = _exact_base_value(prob, dyn)
    base_cv = None if exact is None or n <= 1 else base + investment_pv - exact

    # one fixed set of controls for every estimate, so that the estimate is linear in the
    # pathwise values and Shapley shares add up to the flexibility value exactly
    ctrl = control_set([c for _, c in cache.values()], c_full, base_cv, n)

    def estimate(v, c=None):
        return _mean_se(v, anti, ctrl)

    static, se_pv = estimate(base, base_c)
    if base_cv is not None:
        static, se_pv = float(exact) - investment_pv, 0.0
    _, se_full = estimate(v_full, c_full)
    flex, se_flex = estimate(v_full - base, c_full - base_c)
    # the table adds up exactly: expanded = static + flexibility (the pathwise difference is the
    # sharper estimate); with an exact static NPV its standard error is the flexibility's
    expanded = static + flex
    if base_cv is not None:
        se_full = se_flex
    choices = (_today_choices(prob, pol, x_val, v_full, estimate, (expanded, se_full))
               if today else None)
    present_value = static + investment_pv

    plain_value = _plain_value(prob, dyn, x_val, anti)

    # rules in driver units, from the fitting paths' spread of the drivers
    thresholds, maps, cf_rules, influence = _rules(prob, pol, x_fit, stats, spec)
    del x_fit

    # real world: the same valuing normals with real-world drifts (chances of use, DCF)
    dyn_rw = dynamics(prob.model, "real_world")
    x_rw = change_measure(x_val, prob.times, dyn, dyn_rw)     # x_val is not needed after this
    res_rw = lsm.run(prob, pol, x_rw, record=True, progress=prog)
    rw_dcf, rw_se = _real_world_dcf(prob, x_rw, anti)
    fan_years, fan, cf_fan = _fan(prob, x_rw)
    del x_rw

    upper = None
    if spec.upper_bound_paths:
        upper = _upper_bound(prob, pol, dyn, spec, anti, investment_pv, expanded, flex, prog)
    if prog:
        prog.close()

    graph = pol.graph
    fmt = _money_format(project)
    out_rights, alone_means = [], {}
    for r in rights:
        sh, sh_se = estimate(*share_paths[r.name])
        al, al_se = estimate(*alone_paths[r.name])
        alone_means[r.name] = al
        out_rights.append(_right_value(r, graph, prob, res_rn, res_rw, sh, sh_se, al, al_se,
                                       thresholds.get(r.name, ()), cf_rules.get(r.name),
                                       maps, fmt))
    headline = structure_warnings(
        graph, float(prob.model.years[1]), max(r.window[1] for r in rights) if rights else 0.0,
        terminal_value=prob.tv)
    warnings = list(project.warnings) + headline
    info = lsm_info(project, prob, n, anti, open_by, graph, pol, time.monotonic() - t_start)
    return SimulationAppraisal(
        project=project, present_value=present_value, investment_pv=investment_pv,
        static_npv=static, expanded_npv=expanded, flexibility_value=flex,
        interaction=flex - sum(alone_means.values()),
        decision_today=_decision_today(prob, pol, x_val, expanded, fmt),
        rights=tuple(out_rights),
        standard_error={"present_value": se_pv, "expanded_npv": se_full,
                        "flexibility_value": se_flex},
        upper_bound=upper, simulation=info,
        real_world_dcf={"value": rw_dcf, "standard_error": rw_se,
                        "discount_rate": project.market.discount_rate},
        warnings=tuple(warnings), state_graph=graph, driver_maps=tuple(maps),
        fan_years=fan_years, fan=fan, cash_flow_fan=cf_fan,
        base=base_description(rights, "the cash flows of the drivers as given"),
        headline_warnings=tuple(headline), cash_flow_value=plain_value,
        today_choices=choices)


def _today_choices(prob, pol, x_val, v_full, estimate, full_estimate) -> dict:
    """The decisions open today, valued on the valuing paths with the fitted policy of every
    right (money valued today; standard errors with the appraisal's own control variates).

    * ``commit_now_value``: the paths start today in the invested state the commitment reaches
      (its own decisions today first, as on the lattice), then follow the policy; less the
      commitment's cost today (the investment's present value). Without a defer right the
      project is committed today: the expanded NPV itself.
    * ``keep_option_value``: the paths stay uncommitted today (no commitment at date 0), then
      follow the policy (which may commit later); None without a defer right.
    * ``commit_minus_keep_se``: standard error of the pathwise difference of the two.

    The drivers are known today, so the fitted policy takes one decision today on every path:
    the expanded NPV's pathwise values are exactly those of that decision (reused, not
    recomputed, and its estimate is the appraisal's own ``full_estimate``: (expanded NPV, its
    standard error)); the other decision takes one more forward pass. The policy is handed a start
    state (``graph.initial``) or today's open edges without the commitment; lsm is unchanged."""

    from ..rights import Action

    graph = pol.graph
    s0 = graph.initial
    full, full_se = full_estimate
    if graph.states[s0].invested:
        return {"commit_now_value": full, "commit_now_se": full_se, "keep_option_value": None,
                "keep_option_se": None, "commit_minus_keep_se": None}
    e = next(e for e in graph.edges if e.source == s0 and e.action == Action.COMMIT)
    committed = False
    if 0 in pol.open_edges:
        new, _, _ = lsm.decide(prob, pol, 0, x_val[0][:, :1], np.array([s0]))
        committed = int(new[0]) != s0
    if committed:
        commit = v_full
        held = {k: v for k, v in pol.open_edges.items() if k != 0}
        rest = [i for i in pol.open_edges[0] if graph.edges[i].source != s0]
        if rest:
            held[0] = rest
        keep = lsm.run(prob, replace(pol, open_edges=held), x_val).values
    else:
        keep = v_full
        n = x_val.shape[-1]
        cost = np.broadcast_to(prob.money(e, 0, x_val[0]), (n,)) * prob.disc[0]
        start = replace(pol, graph=replace(graph, initial=e.target))
        commit = lsm.run(prob, start, x_val).values + cost
    c, c_se = (full, full_se) if commit is v_full else estimate(commit)
    k, k_se = (full, full_se) if keep is v_full else estimate(keep)
    return {"commit_now_value": c, "commit_now_se": c_se, "keep_option_value": k,
            "keep_option_se": k_se, "commit_minus_keep_se": estimate(commit - keep)[1]}


def _upper_bound(prob, pol, dyn, spec, anti, investment_pv, expanded, flex, prog) -> dict:
    """The dual upper bound on the expanded NPV (``simulation.upper_bound``) by nested
    simulation of the fitted policy (Andersen & Broadie 2004; realopt.simulation.bound): its
    value and standard error, the outer paths and inner paths asked, and the gap to the lower
    estimate (money, and as a share of the flexibility value; null when that is 0)."""
    inner = spec.upper_bound_inner
    if prob.uncertain:
        m = spec.upper_bound_paths + (spec.upper_bound_paths % 2 if anti else 0)
        outer = simulate(dyn, prob.times, m, spec.seed, "upper", anti)
    else:                           # deterministic drivers: one path, one inner pair, exact
        inner, anti = 2, False
        outer = simulate(dyn, prob.times, 1, spec.seed, "upper", False)
    z = bound.nested_upper_bound(prob, pol, dyn, outer, inner, spec.seed, progress=prog)
    invested0 = pol.graph.states[pol.graph.initial].invested
    z = z - (investment_pv if invested0 else 0.0)
    ub, ub_se = _mean_se(z, anti)
    return {"value": ub, "standard_error": ub_se, "paths": spec.upper_bound_paths,
            "inner": spec.upper_bound_inner, "method": bound.METHOD,
            "gap": ub - expanded, "gap_share": bound.gap_share(ub, expanded, flex)}


def lsm_min_paths(prob: lsm.Problem) -> int:
    from ..project_simulation import PATHS_PER_TERM

    return PATHS_PER_TERM * prob.basis.terms


def lsm_info(project, prob, n, anti, open_by, graph, pol, seconds) -> SimulationInfo:
    spec = project.simulation
    opened = np.zeros(prob.T, dtype=bool)
    for m in open_by.values():
        opened |= m
    return SimulationInfo(paths=n, seed=spec.seed, steps_per_year=spec.steps_per_year,
                          basis=spec.basis, antithetic=anti, dates=prob.T,
                          decision_dates=int(opened.sum()), horizon=float(prob.times[-1]),
                          regression_terms=prob.basis.terms, states=len(graph.states),
                          in_sample_value=pol.in_sample, seconds=seconds)


def _money_format(project):
    template = " ".join(s for s in (project.currency, "{:,.2f}", project.unit) if s)
    return lambda x: template.format(x)


def _exact_base_value(prob: lsm.Problem, dyn) -> float | None:
    """Risk-neutral value of the base state's flows in closed form when its formula is affine in
    the simulated drivers and untaxed (E*[X_t] = exp(m(t) + v(t)/2)); else None."""
    from .paths import expected

    f = prob.state_flows(build_state_graph(()))[0]
    if prob.tax or f.key == "" or not prob.formulas[f.key].is_affine(set(prob.names)):
        return None
    total = float(prob.terminal([f])[0])
    for k in range(1, prob.T):
        ex_now = expected(dyn, prob.times[k])[:, None]
        ex_prev = expected(dyn, prob.times[k - 1])[:, None]
        total += prob.disc[k] * float(prob.flows(k, ex_prev, ex_now, [f])[0, 0])
    return total


def _plain_value(prob: lsm.Problem, dyn, x: np.ndarray, anti: bool) -> float:
    """Risk-neutral value of the file's own cash flows (the formula as written, every switch
    mode aside): closed form when affine and untaxed, else the mean over the valuing paths."""
    from .paths import expected

    f = lsm.StateFlow("base", 1.0, 0.0, 1.0)
    total = float(prob.terminal([f])[0])
    if not prob.tax and prob.formulas["base"].is_affine(set(prob.names)):
        for k in range(1, prob.T):
            ex_now = expected(dyn, prob.times[k])[:, None]
            ex_prev = expected(dyn, prob.times[k - 1])[:, None]
            total += prob.disc[k] * float(prob.flows(k, ex_prev, ex_now, [f])[0, 0])
        return total
    acc = np.zeros(x.shape[-1])
    for k in range(1, prob.T):
        acc += prob.disc[k] * prob.flows(k, x[k - 1], x[k], [f])[0]
    return total + _mean_se(acc, anti)[0]


def _real_world_dcf(prob: lsm.Problem, x: np.ndarray, anti: bool):
    """PV at the discount rate of the real-world expected base flows (pathwise, mean and se)."""
    graph = build_state_graph(())
    sflows = prob.state_flows(graph)
    g = 1.0 / np.asarray(prob.project.market.discount_growth(prob.times), dtype=float)
    total = np.zeros(x.shape[-1])
    for k in range(1, prob.T):
        total += g[k] * prob.flows(k, x[k - 1], x[k], sflows)[0]
    total += sflows[0].tv * prob.tv * g[prob.T - 1]
    return _mean_se(total, anti)


def _fan(prob: lsm.Problem, x: np.ndarray):
    """Real-world percentiles (5, 25, 50, 75, 95) of each stochastic driver at each date, and
    of the base state's cash flow as a rate per year (the step's flow over its year fraction,
    before tax; NaN at dates that pay none), over the same first 20,000 valuing paths."""
    qs = (5, 25, 50, 75, 95)
    ks = _sample(prob.T, 61)
    out = {}
    for i, name in enumerate(prob.names):
        pc = np.percentile(x[ks, i, :20000], qs, axis=1)
        out[name] = {q: pc[j] for j, q in enumerate(qs)}
    sflows = prob.state_flows(build_state_graph(()))
    cf = np.full((len(qs), len(ks)), np.nan)
    for j, k in enumerate(ks):
        w = prob.weight[k] if k >= 1 else 0.0
        if w:
            flow = prob.flows(k, x[k - 1, :, :20000], x[k, :, :20000], sflows)[0] / w
            cf[:, j] = np.percentile(flow, qs)
    return prob.times[ks].copy(), out, {q: cf[j] for j, q in enumerate(qs)}


# --- rules in the drivers' units -----------------------------------------------------------------

def _primary_states(r, graph) -> list[int]:
    """States the rule of ``r`` is read from (the right type says which: realopt.rights)."""
    return r.primary_states(graph, requirement_closure(graph.rights, r.name) - {r.name})


def _action(graph, e) -> str:
    """The action named in rules and maps (the right type's wording: a modal right names the
    move)."""
    return next(r for r in graph.rights if r.name == e.right).action_text(e)


def _gains(prob, pol, k, s, xg):
    """Gain over carrying on of each edge from s open at k, on driver values xg (d, m), in
    money of that date."""
    graph = pol.graph
    eids = [e for e in pol.open_edges.get(k, []) if graph.edges[e].source == s]
    if not eids:
        return {}
    g = pol.gains(prob, k, s, eids, xg) / prob.disc[k]
    return {e_id: g[j] for j, e_id in enumerate(eids)}


def _crossings(grid, gain):
    pos = gain > 0
    if not pos.any():
        return None, None, True
    i0, i1 = int(np.argmax(pos)), int(len(pos) - 1 - np.argmax(pos[::-1]))

    def cross(a, b):
        ga, gb = gain[a], gain[b]
        w = 0.5 if ga == gb else -ga / (gb - ga)
        return float(grid[a] + min(1.0, max(0.0, w)) * (grid[b] - grid[a]))

    lower = cross(i0 - 1, i0) if i0 > 0 else None
    upper = cross(i1, i1 + 1) if i1 < len(pos) - 1 else None
    return lower, upper, False


def _rules(prob, pol, x_fit, stats, spec):
    """Thresholds (one uncertain driver), decision maps (two or more) and cash-flow rules."""
    graph = pol.graph
    cols = prob.basis.cols
    thresholds, maps, cf_rules = {}, [], {}
    if not cols:
        return thresholds, maps, cf_rules, {}
    open_dates = sorted(pol.open_edges)
    if len(open_dates) > 120:                      # thresholds at 120 dates at most
        keep = np.unique(np.round(np.linspace(0, len(open_dates) - 1, 120)).astype(int))
        open_dates = [open_dates[i] for i in keep]
    med, lo, hi, q025, q975 = {}, {}, {}, {}, {}
    for k in open_dates:
        q = np.percentile(x_fit[k][:, :20000], [1, 2.5, 50, 97.5, 99], axis=1)
        lo[k], q025[k], med[k], q975[k], hi[k] = q
    G = 241
    for r in graph.rights:
        prim = _primary_states(r, graph)
        thr = []
        cf_fit = []
        for s in prim:
            for k in open_dates:
                eids = [e for e in pol.open_edges[k] if graph.edges[e].source == s
                        and graph.edges[e].right == r.name]
                if not eids:
                    continue
                year = float(prob.times[k])
                if len(cols) == 1:
                    j = cols[0]
                    if hi[k][j] - lo[k][j] <= 0:
                        continue
                    grid = np.linspace(lo[k][j], hi[k][j], G)
                    xg = np.repeat(med[k][:, None], G, axis=1)
                    xg[j] = grid
                    gains = _gains(prob, pol, k, s, xg)
                    for e_id in eids:
                        a, b, never = _crossings(grid, gains[e_id])
                        if a is not None and b is not None:
                            # a band: the regression is least reliable in the tails, so the
                            # bound farther from the median is dropped if it lies outside the
                            # central 95% of the fitting paths
                            m = med[k][j]
                            if abs(math.log(a / m)) > abs(math.log(b / m)):
                                a = None if a < q025[k][j] else a
                            else:
                                b = None if b > q975[k][j] else b
                        thr.append(DriverThreshold(year, graph.states[s].label,
                                                   _action(graph, graph.edges[e_id]), prob.names[j],
                                                   a, b, never))
                cf_fit.append((s, k, eids))
        thresholds[r.name] = tuple(sorted(_one_sided(thr), key=lambda t: t.year))
        cf_rules[r.name] = _cash_flow_rule(prob, pol, x_fit, cf_fit)
    influence = {}
    if len(cols) >= 2:
        maps = _maps(prob, pol, med, lo, hi, spec)
    return thresholds, maps, cf_rules, influence


def _one_sided(thr: list) -> list:
    """Each (state, action)'s thresholds with the tail bound of a few bands dropped: where the
    rule is one-sided ("above" or "below") at most dates, a band at the other dates has its far
    bound in the tail of the paths, where the regression is fitted on few of them; that bound
    describes the fit, not the decision a reader can use. The fitted policy (and so every value)
    is unchanged; only the stated rule reads one way."""
    from dataclasses import replace

    out = []
    for key in dict.fromkeys((t.state, t.action) for t in thr):
        ts = [t for t in thr if (t.state, t.action) == key]
        side = threshold_side(ts)
        if side == "above":
            ts = [replace(t, upper=None) if t.lower is not None else t for t in ts]
        elif side == "below":
            ts = [replace(t, lower=None) if t.upper is not None else t for t in ts]
        out += ts
    return out


def _cash_flow_rule(prob, pol, x_fit, cases, limit=24, agree=0.97):
    """Each action's rule as a threshold on the year's base cash flow (the underlying
    ``cash_flow`` formula at the date's driver values), where such a threshold reproduces the
    fitted decision on at least ``agree`` of the fitting paths at every sampled date where the
    action is ever taken. Returns [(action, state, side, [(year, threshold)], agreement)]."""
    graph = pol.graph
    by_action: dict = {}
    for s, k, eids in cases:
        for e_id in eids:
            by_action.setdefault((_action(graph, graph.edges[e_id]), s), []).append((k, e_id))
    out = []
    for (action, s), items in by_action.items():
        pick = np.unique(np.round(np.linspace(0, len(items) - 1,
                                              min(limit, len(items)))).astype(int))
        pts, worst, sides, tried = [], 1.0, set(), 0
        for c in pick:
            k, e_id = items[c]
            x = x_fit[k][:, :20000]
            cf = prob.formula_values(k, x)["base"]
            ex = _gains(prob, pol, k, s, x)[e_id] > 0
            if not ex.any() or ex.all():
                continue
            order = np.argsort(cf, kind="stable")
            e_sorted = ex[order]
            n = e_sorted.size
            below_ex = np.cumsum(e_sorted)                      # exercised with cf <= c_i
            above_not = (n - np.arange(1, n + 1)) - (e_sorted.sum() - below_ex)
            acc_below = (below_ex + above_not) / n
            acc_above = 1.0 - acc_below
            ib, ia = int(np.argmax(acc_below)), int(np.argmax(acc_above))
            if acc_below[ib] >= acc_above[ia]:
                side, acc, thr = "below", float(acc_below[ib]), float(cf[order][ib])
            else:
                side, acc, thr = "above", float(acc_above[ia]), float(cf[order][ia])
            # errors also small against the rarer decision, so "never" cannot pass as a rule
            errors = (1.0 - acc) * n
            rare = min(int(ex.sum()), n - int(ex.sum()))
            tried += 1
            if errors > 0.25 * rare or acc < agree:
                continue
            sides.add(side)
            worst = min(worst, acc)
            pts.append((float(prob.times[k]), thr))
        # the rule must hold at 80% or more of the sampled dates where the action is taken
        if pts and len(sides) == 1 and len(pts) >= 0.8 * tried:
            out.append((action, graph.states[s].label, sides.pop(), pts, worst))
    return out


MAP_DATES = ("the first decision date, then the dates where the fitted policy changes most "
             "between consecutive decision dates (the largest share of the plane whose best "
             "action changes), each change shown at whichever of its two dates has more of "
             "the plane in an action")


def _maps(prob, pol, med, lo, hi, spec, n_dates=4, size=61):
    """Decision maps of each state with a choice at up to ``n_dates`` dates (:func:`_map_dates`),
    in the plane of two drivers (``map_drivers`` or the two the gains depend on most), the
    others at their median; ``size`` x ``size`` points between the 1% and 99% points."""
    graph = pol.graph
    cols = prob.basis.cols
    names = prob.names
    if spec.map_drivers:
        pair = [names.index(spec.map_drivers[0]), names.index(spec.map_drivers[1])]
    else:
        score = {j: 0.0 for j in cols}
        for k in sorted(med)[:: max(1, len(med) // 8)]:
            for s in {graph.edges[e].source for e in pol.open_edges[k]}:
                for j in cols:
                    xg = np.repeat(med[k][:, None], 41, axis=1)
                    xg[j] = np.linspace(lo[k][j], hi[k][j], 41)
                    for g in _gains(prob, pol, k, s, xg).values():
                        score[j] += float(np.ptp(g))
        pair = sorted(cols, key=lambda j: -score[j])[:2]
    a, b = pair
    out = []
    dates = sorted(med)
    for s in sorted({graph.edges[e].source for k in dates for e in pol.open_edges[k]}):
        ks = [k for k in dates if any(graph.edges[e].source == s for e in pol.open_edges[k])]
        if not ks:
            continue
        pick, change = _map_dates(prob, pol, s, ks, a, b, med, lo, hi, n_dates)
        for k in pick:
            out.append(replace(_map_at(prob, pol, s, k, a, b, med, lo, hi, size),
                               change=change.get(k)))
    return out


def _map_at(prob, pol, s, k, a, b, med, lo, hi, size) -> DriverMap:
    """The best action from state s at date k on a ``size`` x ``size`` grid of drivers a and b
    between their 1% and 99% points on the fitting paths, the others at their median."""
    graph = pol.graph
    names = prob.names
    xs = np.linspace(lo[k][a], hi[k][a], size)
    ys = np.linspace(lo[k][b], hi[k][b], size)
    gx, gy = np.meshgrid(xs, ys)
    xg = np.repeat(med[k][:, None], size * size, axis=1)
    xg[a], xg[b] = gx.ravel(), gy.ravel()
    gains = _gains(prob, pol, k, s, xg)
    eids = list(gains)
    best = np.zeros(size * size)
    code = np.zeros(size * size, dtype=np.int16)
    for c, e_id in enumerate(eids, start=1):
        better = gains[e_id] > best
        best = np.where(better, gains[e_id], best)
        code = np.where(better, c, code)
    labels = ("carry on" if graph.states[s].invested else "wait",) + tuple(
        f"{graph.edges[e].right}: {_action(graph, graph.edges[e])}" for e in eids)
    return DriverMap(state=graph.states[s].label, year=float(prob.times[k]),
                     actions=labels, x_driver=names[a], y_driver=names[b],
                     x_values=xs, y_values=ys, codes=code.reshape(size, size),
                     others={names[j]: float(med[k][j]) for j in range(len(names))
                             if j not in (a, b)})


def _map_dates(prob, pol, s, ks, a, b, med, lo, hi, n_dates, size=21):
    """(dates, {date: share changed}) of the maps of state s among its decision dates ``ks``
    (indices of ``prob.times``, ascending): the first, then the dates of the ``n_dates - 1``
    largest changes of the fitted policy between consecutive decision dates, in date order.

    A change is the share of the plane whose best action differs between two consecutive dates,
    on one ``size`` x ``size`` grid of drivers a and b spanning every date's 1%-99% box (the
    others at each date's median), counting the points inside both dates' boxes (outside its
    box a date's fit is held at its edge). Each change is shown by the one of its two dates
    with more of the plane in an action (so a window that opens, or a rule used just before a
    cash-flow date, is shown where it is used; ties: the later date); a date's score is its
    largest change, and ties go to the earlier date. Without enough changes, evenly spaced
    dates fill the rest."""
    if len(ks) <= n_dates:
        return list(ks), {}
    xs = np.linspace(min(lo[k][a] for k in ks), max(hi[k][a] for k in ks), size)
    ys = np.linspace(min(lo[k][b] for k in ks), max(hi[k][b] for k in ks), size)
    gx, gy = (v.ravel() for v in np.meshgrid(xs, ys))
    codes, boxes = [], []
    for k in ks:
        xg = np.repeat(med[k][:, None], gx.size, axis=1)
        xg[a], xg[b] = gx, gy
        best = np.zeros(gx.size)
        code = np.full(gx.size, -1, dtype=np.int64)      # -1: carry on / wait
        for e_id, g in _gains(prob, pol, k, s, xg).items():
            better = g > best
            best = np.where(better, g, best)
            code = np.where(better, e_id, code)
        codes.append(code)
        boxes.append((gx >= lo[k][a]) & (gx <= hi[k][a]) & (gy >= lo[k][b]) & (gy <= hi[k][b]))
    score: dict = {}
    for i in range(1, len(ks)):
        both = boxes[i] & boxes[i - 1]
        if not both.any():
            continue
        moved = float((codes[i][both] != codes[i - 1][both]).mean())
        if moved <= 0:
            continue
        used = [float((codes[j][both] >= 0).mean()) for j in (i - 1, i)]
        k = ks[i] if used[1] >= used[0] else ks[i - 1]
        score[k] = max(score.get(k, 0.0), moved)
    ranked = sorted((k for k in score if k != ks[0]), key=lambda k: (-score[k], k))
    pick = [ks[0]] + ranked[: n_dates - 1]
    even = [ks[int(i)] for i in np.round(np.linspace(0, len(ks) - 1, n_dates))]
    for k in even + list(ks):                        # too few changes: evenly spaced dates
        if len(pick) >= n_dates:
            break
        if k not in pick:
            pick.append(k)
    return sorted(pick), score


def _sample(T: int, limit: int = 240) -> np.ndarray:
    if T <= limit:
        return np.arange(T)
    return np.unique(np.round(np.linspace(0, T - 1, limit)).astype(int))


def _right_value(r, graph, prob, res_rn, res_rw, sh, sh_se, al, al_se, thr, cf_rule, maps, fmt):
    sample = _sample(prob.T)
    edge_ids = [k for k, e in enumerate(graph.edges) if e.right == r.name]
    mode_shares = None
    if isinstance(r, Switch):
        switches = [s for s in graph.rights if isinstance(s, Switch)]
        k = switches.index(r)
        rn_use = res_rn.first_use[r.name]
        rw_use = res_rw.first_use[r.name]
        mode_shares = {}
        for m in r.modes:
            cols = [i for i, s in enumerate(graph.states)
                    if not s.abandoned and s.invested and s.modes[k] == m.name]
            mode_shares[m.name] = tuple(
                tuple(float(min(1.0, max(0.0, x))) for x in res.occupancy[:, cols].sum(
                    axis=1)[sample]) for res in (res_rn, res_rw))
        measure = (f"chance of having switched out of '{r.start}' at least once by each date "
                   "(never falls); the mode shares are the chance of being in each mode at "
                   "each date (the project invested and not abandoned)")
    else:
        rn_use = np.cumsum(res_rn.exercised[:, edge_ids].sum(axis=1))
        rw_use = np.cumsum(res_rw.exercised[:, edge_ids].sum(axis=1))
        measure = "chance that the right has been exercised by each date"
    side = threshold_side(thr)
    rule = _rule_text(r, thr, side, cf_rule, maps, fmt, float(rw_use[-1]) if len(rw_use) else 0.0,
                      float(max(rw_use.max(), 0.0)) if len(rw_use) else 0.0,
                      float(prob.times[-1]))
    return SimRightValue(
        name=r.name, type=r.kind, window=tuple(float(x) for x in r.window), exercise=r.exercise,
        standalone_value=al, standalone_standard_error=al_se, shapley_value=sh,
        shapley_standard_error=sh_se, side=side, thresholds=tuple(thr),
        use_years=tuple(float(prob.times[i]) for i in sample),
        use_risk_neutral=tuple(float(min(1.0, x)) for x in rn_use[sample]),
        use_real_world=tuple(float(min(1.0, x)) for x in rw_use[sample]),
        use_measure=measure, rule=rule, mode_shares=mode_shares)


def _when(r) -> str:
    a, b = r.window
    if r.exercise == "european":
        return f"at year {b:g} only"
    if r.exercise == "bermudan":
        ds = list(r.dates)
        if len(ds) > 6:
            return f"on {len(ds)} dates from year {ds[0]:g} to {ds[-1]:g}"
        return "on the dates " + ", ".join(f"{t:g}" for t in ds)
    return f"at any decision date up to year {b:g}" if a == 0 else \
        f"at any decision date between years {a:g} and {b:g}"


def _what(r) -> str:
    """The rule's action in words (the right type's own wording, amounts as plain numbers)."""
    return r.what("{:,.2f}")


def _sig(x: float, digits: int = 4) -> str:
    """``x`` to ``digits`` significant figures in plain notation with thousands separators
    (15,630 rather than 1.563e+04: a driver's price reads as a price)."""
    if x == 0 or not math.isfinite(x):
        return f"{x:g}"
    r = round(x, digits - 1 - math.floor(math.log10(abs(x))))
    d = digits - 1 - math.floor(math.log10(abs(r)))      # 999.96 rounds up to 1,000
    return f"{r:,.{max(d, 0)}f}"


def _rule_text(r, thr, side, cf_rule, maps, fmt, use_end, use_max, horizon) -> str:
    head = f"{r.name}: {_what(r)} {_when(r)}"
    tail = f"; chance of use (real-world): {use_max:.0%} at its highest, {use_end:.0%} at year " \
           f"{horizon:g}"
    parts = []
    for action, state, side_cf, pts, acc in (cf_rule or []) if not thr else []:
        a, b = pts[0], pts[-1]
        txt = (f"{action} (from '{state}') when the year's base cash flow is {side_cf} "
               f"{fmt(a[1])} (year {a[0]:.3g})")
        if b is not a:
            txt += f", {fmt(b[1])} by year {b[0]:.3g}"
        parts.append(txt + f" (this matches {acc:.0%} or more of the fitted decisions)")
    live = [t for t in thr if not t.never]
    if thr:
        if not live:
            parts.append("not worth using at any driver value on the grid")
        else:
            for action in dict.fromkeys(t.action for t in live):
                ts = [t for t in live if t.action == action]
                ab = [t for t in ts if t.lower is not None and t.upper is None]
                be = [t for t in ts if t.upper is not None and t.lower is None]
                drv = ts[0].driver
                if be and len(be) >= len(ab):
                    f, l = be[0], be[-1]
                    txt = f"{action} if {drv} falls below {_sig(f.upper)} (year {f.year:.3g})"
                    if l is not f:
                        txt += f", {_sig(l.upper)} by year {l.year:.3g}"
                elif ab:
                    f, l = ab[0], ab[-1]
                    txt = f"{action} once {drv} exceeds {_sig(f.lower)} (year {f.year:.3g})"
                    if l is not f:
                        txt += f", {_sig(l.lower)} by year {l.year:.3g}"
                else:
                    txt = f"{action} at most {drv} values"
                parts.append(txt)
    if maps and not thr:
        parts.append(f"the decision maps in the plane of {maps[0].x_driver} and "
                     f"{maps[0].y_driver} show the whole rule")
    return head + (": " + "; ".join(parts) if parts else "") + tail


def _decision_today(prob, pol, x_val, expanded, fmt) -> str:
    graph = pol.graph
    s0 = graph.initial
    act = None
    if 0 in pol.open_edges:
        cur = np.array([s0])
        new, _, taken = lsm.decide(prob, pol, 0, x_val[0][:, :1], cur)
        if taken[0] >= 0:
            act = graph.edges[int(taken[0])]
    if not graph.states[s0].invested:
        if act is not None:
            return f"invest now ({act.right})"
        return "wait: keep the right to invest, do not commit today"
    verdict = "invest" if expanded >= 0 else "do not invest: the expanded NPV is negative"
    if act is not None:
        verdict += f", and use '{act.right}' at once"
    return verdict
