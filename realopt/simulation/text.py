"""Command-line glue for ``valuation: simulation``: the ``check`` text and the guarded run.

Kept here so that realopt/cli.py dispatches with a few lines; the wording follows the lattice's.
"""
from __future__ import annotations

import textwrap

from ..errors import ValuationError
from .result import appraise, guard_message, plan


def _bytes(n: float) -> str:
    for unit, size in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= size:
            return f"{n / size:.1f} {unit}"
    return f"{n:.0f} bytes"


def check_text(path, project, memory) -> str:
    """What ``realopt check`` prints for a simulation project (nothing is simulated)."""
    pl = plan(project)
    u = project.underlying.drivers
    spec = project.simulation
    money = " ".join(x for x in (project.currency, project.unit) if x)
    stoch = [d for d in u.drivers if d.process != "schedule"]
    lines = [f"{path}: valid - {project.name}" + (f" ({money})" if money else "")]
    lines.append(f"underlying: cash flows from {len(u.drivers)} drivers ({len(stoch)} simulated: "
                 + (", ".join(f"{d.name} {d.process}, risk-neutral {d.risk_neutral.kind}"
                              for d in stoch) or "none") + f"), years {u.years[0]} to {u.years[1]}")
    for r in project.rights:
        lines.append(f"right: {r.name} ({r.kind}, {r.exercise}, years {r.window[0]:g} to "
                     f"{r.window[1]:g})")
    if not project.rights:
        lines.append("rights: none (the expanded NPV equals the static NPV)")
    pairs = ", antithetic pairs" if spec.antithetic and pl.paths > 1 else ""
    paths = (f"{pl.paths:,} paths to fit the policy and {pl.paths:,} independent paths to value "
             f"it (seed {spec.seed}{pairs})"
             if pl.paths > 1 else "1 path (every driver is deterministic: exact dynamic "
             "programming)")
    lines.append(f"simulation: least-squares Monte Carlo, {paths}; {pl.dates} dates to year "
                 f"{pl.horizon:g}, {pl.decision_dates} with a decision ({spec.steps_per_year} a "
                 f"year inside american windows); regression on {pl.regression_terms} terms "
                 f"(polynomial of degree {spec.basis} in "
                 f"{len([d for d in stoch if d.volatility > 0])} drivers)"
                 + (f"; dual upper bound by nested simulation on {spec.upper_bound_paths:,} "
                    f"outer paths x {spec.upper_bound_inner} inner paths (about "
                    f"{pl.bound_seconds:.0f} s of the time below)" if spec.upper_bound_paths
                    else ""))
    lines.append(f"size: {pl.states} states, {pl.solves} subsets of rights fitted and valued; "
                 f"memory about {_bytes(pl.memory_bytes)}, time about "
                 f"{pl.seconds_estimate:.0f} s")
    refusal = guard_message(project, pl, memory)
    if refusal:
        lines.append("appraise would refuse this run: " + refusal)
    lines.append("warnings: none" if not pl.warnings else "warnings:")
    out = [lines[0]] + [textwrap.fill(x, 100, initial_indent="  ", subsequent_indent="      ")
                        for x in lines[1:]]
    out += [textwrap.fill(w, 100, initial_indent="    - ", subsequent_indent="      ")
            for w in pl.warnings]
    return "\n".join(out)


def appraise_guarded(project, allow_large: bool, memory):
    """Refuse a run beyond the machine (unless ``allow_large``), else appraise it."""
    if not allow_large:
        refusal = guard_message(project, plan(project), memory)
        if refusal:
            raise ValuationError(refusal)
    return appraise(project)
