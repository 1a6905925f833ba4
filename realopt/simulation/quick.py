"""Pathwise values of the full set of rights and of the base project, for sensitivities.

:func:`path_values` fits and values two subsets of rights only (all of them, and none) on the
project's own fitting and valuing paths: the same set-up, random streams and arithmetic as
:func:`realopt.simulation.result.appraise`, without Shapley subsets, rules, real-world runs or
the upper bound. Two projects that differ in their inputs but share ``simulation.paths``,
``seed``, the dates and the stochastic drivers draw the same normals (common random numbers), so
:func:`difference` estimates the change in expanded NPV and in flexibility value as a mean of
pathwise differences, with the standard error of that mean (antithetic pair means; the zero-mean
martingale and closed-form base controls of both projects fitted by least squares on the same
paths, as in the appraisal). The policies are refitted for each project, so the difference
also carries the refit's own (small, low-biased) change, not measured by that standard error.

Money is in the project's currency and unit, discounted to today at the risk-free rate, net of
the investment as the rights allow (as ``expanded_npv``).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..model import Project
from ..rights import build_state_graph, usable_subset
from . import lsm
from .paths import simulate
from .result import _exact_base_value, _mean_se, control_set, set_up


@dataclass(frozen=True)
class PathValues:
    """One project's pathwise values on its valuing paths (arrays of shape (paths,))."""

    expanded: np.ndarray       # discounted value with every right, net of the investment
    base: np.ndarray           # the base project (no right used), net of the investment
    controls: tuple            # zero-mean pathwise controls (martingale sums, base less its mean)
    antithetic: bool
    paths: int
    seed: int
    times: tuple               # the simulation dates (years), for the common-numbers check
    drivers: tuple             # names of the stochastic drivers, in the paths' order
    static_exact: float | None = None   # the static NPV in closed form, where the base is affine

    def estimate(self) -> dict:
        """{expanded_npv, flexibility_value, static_npv: (mean, standard error)}, controls as
        the appraisal's (the closed-form base value makes static_npv exact when it applies)."""
        c = self.controls
        static = ((self.static_exact, 0.0) if self.static_exact is not None else
                  _mean_se(self.base, self.antithetic, c))
        flex = _mean_se(self.expanded - self.base, self.antithetic, c)
        full = _mean_se(self.expanded, self.antithetic, c)
        # as the appraisal: expanded = static + flexibility exactly; with an exact static NPV
        # its standard error is the flexibility's
        return {"expanded_npv": (static[0] + flex[0], flex[1] if static[1] == 0 else full[1]),
                "flexibility_value": flex, "static_npv": static}


def path_values(project: Project) -> PathValues:
    """Fit and value the full set of rights and the base project (see the module doc)."""
    spec = project.simulation
    prob, rights, open_by, anti, n, dyn, investment_pv = set_up(project)
    x_fit = simulate(dyn, prob.times, n, spec.seed, "fit", anti)
    stats = [prob.basis.stats(x_fit[k]) for k in range(prob.T)]
    x_val = simulate(dyn, prob.times, n, spec.seed, "value", anti)
    mart = lsm.martingale_increments(prob, dyn, x_val)
    out = {}
    for subset in ((), usable_subset(rights, {r.name for r in rights})):   # as appraise: base first
        key = frozenset(r.name for r in subset)
        if key in out:
            continue
        graph = build_state_graph(subset)
        pol = lsm.fit(prob, graph, x_fit, stats, open_by)
        res = lsm.run(prob, pol, x_val, mart=mart)
        v = res.values - (investment_pv if graph.states[graph.initial].invested else 0.0)
        out[key] = (v, res.correction if res.correction is not None else np.zeros_like(v))
    (v_base, _), (v_full, c_full) = out[frozenset()], out[key]
    exact = _exact_base_value(prob, dyn)
    base_cv = None if exact is None or n <= 1 else v_base + investment_pv - exact
    controls = control_set([c for _, c in out.values()], c_full, base_cv, n)
    return PathValues(expanded=v_full, base=v_base, controls=tuple(controls), antithetic=anti,
                      paths=n, seed=spec.seed, times=tuple(float(t) for t in prob.times),
                      drivers=tuple(prob.names),
                      static_exact=None if base_cv is None else float(exact) - investment_pv)


def common_numbers(a: PathValues, b: PathValues) -> bool:
    """True when ``a`` and ``b`` were valued on the same normals (same paths, seed, pairing,
    dates and stochastic drivers): then their pathwise differences are meaningful."""
    return (a.paths, a.seed, a.antithetic, a.times, a.drivers) == \
        (b.paths, b.seed, b.antithetic, b.times, b.drivers)


def difference(moved: PathValues, base: PathValues) -> dict:
    """{expanded_npv, flexibility_value: (mean, standard error)} of moved minus base, as the
    mean of pathwise differences with both projects' controls (see the module doc). Raises
    ValueError when the two were not valued on the same normals."""
    if not common_numbers(moved, base):
        raise ValueError("the two projects were not simulated on the same random numbers")
    c = moved.controls + base.controls
    anti = base.antithetic
    d_full = moved.expanded - base.expanded
    d_flex = (moved.expanded - moved.base) - (base.expanded - base.base)
    return {"expanded_npv": _mean_se(d_full, anti, c),
            "flexibility_value": _mean_se(d_flex, anti, c)}
