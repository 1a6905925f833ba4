"""``realopt portfolio FILE... [--budget AMOUNT]``: several projects against today's budget.

For each project (appraised in parallel on Dask, as by ``realopt sweep``) the three decisions
open today and their values, in the project's money, valued today:

* **commit now**: ``commit_now_value``, the expanded NPV if the project is committed today (with
  a defer right: its commitment taken at t = 0, the other rights kept; without one, the expanded
  NPV itself); today's cash outlay ``outlay_today``;
* **keep the option**: ``keep_option_value``, the value of the defer right held today without
  committing (no outlay today); only with a defer right;
* **pass**: 0, nothing paid.

``expanded_npv`` = max(commit_now_value, keep_option_value) (one lattice, same numbers as
``realopt appraise``). ``outlay_today`` is the cash paid at year 0 on committing today: the
investment's year-0 outlays, or, with a defer right that has its own ``cost``, that cost at year
0 (paid whole on exercise). Later outlays of the plan are not today's budget.

With a budget, :func:`choose` finds the decisions (one per project) that maximise the sum of the
values while the sum of today's outlays stays within the budget: a multiple-choice knapsack solved
exactly on the real outlays (no rounding of money: each amount is taken as the shortest decimal
that reads back as its float, i.e. as written in the file, and sums are exact rationals, so
outlays of 0.1 and 0.2 fit a budget of 0.3) by dynamic programming over the Pareto frontier of
(outlay, value) of partial choices (Nemhauser & Ullmann 1969), which keeps every undominated
partial choice, so the optimum is never pruned. The value given up by the budget is the unconstrained optimum minus the budgeted one.

A ``valuation: simulation`` project gives the same three decisions from its least-squares Monte
Carlo appraisal (realopt.simulation.result, ``appraise(today=True)``): commit now is the value of
the paths started today in the invested state (its other rights held, the fitted policy of every
right), keep the option the value of the paths left uncommitted today, both on the appraisal's
valuing paths; each carries its standard error (``*_se``; 0 on the lattice), and
``commit_minus_keep_se`` is the standard error of their pathwise difference. The expanded NPV is
exactly the value of the decision the fitted policy takes today; the choices use the point
estimates, and :func:`close_calls` names the alternatives the simulation does not separate from
them (within two standard errors).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from .errors import RealoptError

COMMIT, KEEP, PASS = "commit now", "keep the option", "pass"
MANIFEST = ".realopt-portfolio"


# ------------------------------------------------------------------------------------------
# Today's choices of one project (runs on a worker)


def today_choices(project) -> dict:
    """The appraisal JSON object plus ``commit_now_value``, ``keep_option_value`` (None without
    a defer right) and ``outlay_today`` of ``project`` (see the module docstring)."""
    from .appraisal import _Valuer, appraise
    from .lattice import solve
    from .rights import Action, build_state_graph

    if getattr(project, "valuation", "lattice") == "simulation":
        return _simulation_choices(project)
    a = appraise(project)
    d = a.to_dict()
    v = _Valuer(project)
    graph = build_state_graph(v.rights)
    s0 = graph.initial
    year0 = sum(amount for year, amount in project.investment.outlays if year == 0)
    outlay = year0            # committing today is the static commitment: its year-0 outlays
    if graph.states[s0].invested:
        commit, keep = a.expanded_npv, None
    else:
        sol = solve(v.grid, graph)
        edge = next(e for e in graph.edges if e.source == s0 and e.action == Action.COMMIT)
        # committing today: the invested state's value after its own decisions today (it may use
        # a right at once), less the commitment's cost today (the investment's present value)
        commit = float(sol.values[edge.target] + edge.sign * edge.amount.at(0.0))
        keep = float(sol.carry[s0])
    d.update(commit_now_value=float(commit), keep_option_value=keep,
             outlay_today=float(outlay))
    return d


def _simulation_choices(project) -> dict:
    """:func:`today_choices` of a ``valuation: simulation`` project, with standard errors."""
    from .simulation.result import appraise

    a = appraise(project, progress=False, today=True)
    d = a.to_dict()
    t = a.today_choices
    year0 = sum(amount for year, amount in project.investment.outlays if year == 0)
    d.update(commit_now_value=float(t["commit_now_value"]),
             keep_option_value=t["keep_option_value"], outlay_today=float(year0),
             expanded_npv_se=float(a.standard_error["expanded_npv"]),
             commit_now_se=float(t["commit_now_se"]), keep_option_se=t["keep_option_se"],
             commit_minus_keep_se=t["commit_minus_keep_se"])
    return d


def worker_item(project) -> tuple[str, object]:
    """On a worker: ("ok", :func:`today_choices`) or ("error", message)."""
    try:
        return "ok", today_choices(project)
    except RealoptError as err:
        return "error", str(err)


# ------------------------------------------------------------------------------------------
# The exact budgeted choice


@dataclass(frozen=True)
class Option:
    decision: str
    value: float
    outlay: float


def options(commit_value: float, keep_value: float | None, outlay: float) -> tuple[Option, ...]:
    """The decisions open today for one project."""
    out = [Option(COMMIT, commit_value, outlay)]
    if keep_value is not None:
        out.append(Option(KEEP, keep_value, 0.0))
    out.append(Option(PASS, 0.0, 0.0))
    return tuple(out)


def _exact(x: float):
    """The amount as the shortest decimal that reads back as the float ``x``, exactly (a
    Fraction)."""
    from fractions import Fraction

    return Fraction(repr(float(x)))


def choose(groups, budget: float | None):
    """Exact multiple-choice knapsack: one option per group maximising the sum of values with
    the sum of outlays <= ``budget`` (None: no limit). Returns (indices of the chosen option per
    group, total value as a Fraction, total outlay as a Fraction). Ties: the smaller outlay,
    then the earlier options. Every group must hold an option of outlay 0 or less, so a choice
    always exists (pass)."""
    cap = None if budget is None else _exact(budget)
    # frontier: list of (outlay, value, choice tuple), outlay ascending and value strictly rising
    frontier = [(_exact(0.0), _exact(0.0), ())]
    for opts in groups:
        cand = []
        for w, v, ch in frontier:
            for k, o in enumerate(opts):
                w2 = w + _exact(o.outlay)
                if cap is not None and w2 > cap:
                    continue
                cand.append((w2, v + _exact(o.value), ch + (k,)))
        if not cand:
            raise RealoptError("internal: no choice fits the budget")
        cand.sort(key=lambda t: (t[0], -t[1], t[2]))
        frontier = []
        for w, v, ch in cand:                   # keep only undominated (outlay, value) pairs
            if not frontier or v > frontier[-1][1]:
                frontier.append((w, v, ch))
    best = max(frontier, key=lambda t: (t[1], -t[0]))
    return list(best[2]), best[1], best[0]


def brute_force(groups, budget: float | None):
    """Every combination (for tests): same result contract as :func:`choose`."""
    import itertools

    cap = None if budget is None else _exact(budget)
    best = None
    for ch in itertools.product(*(range(len(g)) for g in groups)):
        w = sum((_exact(g[k].outlay) for g, k in zip(groups, ch)), _exact(0.0))
        if cap is not None and w > cap:
            continue
        v = sum((_exact(g[k].value) for g, k in zip(groups, ch)), _exact(0.0))
        key = (v, -w)
        if best is None or key > best[0]:
            best = (key, list(ch), v, w)
    return best[1], best[2], best[3]


# ------------------------------------------------------------------------------------------
# The table


def portfolio_table(files, results, budget):
    """(DataFrame sorted by expanded NPV per unit of today's outlay, totals dict).

    With a simulation project among them, the table adds ``method`` and the standard-error
    columns (``expanded_npv_se``, ``commit_now_se``, ``keep_option_se``,
    ``commit_minus_keep_se``; 0 on lattice rows, empty without a defer right), and the totals
    add ``close_calls`` (see :func:`close_calls`): {"without_budget": [...], "under_budget":
    [...]}. A portfolio of lattice projects gives the same table as before, column for column."""
    import pandas as pd

    groups = [options(r["commit_now_value"], r["keep_option_value"], r["outlay_today"])
              for r in results]
    sim = any(r.get("method") == "simulation" for r in results)
    free, free_value, free_outlay = choose(groups, None)
    rows = []
    for f, r, g, k in zip(files, results, groups, free):
        outlay = r["outlay_today"]
        row = {"project": r["project"], "file": str(f)}
        if sim:
            row["method"] = r.get("method", "lattice")
        row["expanded_npv"] = r["expanded_npv"]
        if sim:
            row["expanded_npv_se"] = r.get("expanded_npv_se", 0.0)
        row["static_npv"] = r["static_npv"]
        row["commit_now_value"] = r["commit_now_value"]
        if sim:
            row["commit_now_se"] = r.get("commit_now_se", 0.0)
        row["keep_option_value"] = r["keep_option_value"]
        if sim:
            held = r["keep_option_value"] is not None
            row["keep_option_se"] = r.get("keep_option_se", 0.0) if held else None
            row["commit_minus_keep_se"] = r.get("commit_minus_keep_se", 0.0) if held else None
        row.update({
            "outlay_today": outlay,
            "value_per_outlay": r["expanded_npv"] / outlay if outlay > 0 else None,
            "decision_today": r["decision_today"],
            "decision_without_budget": g[k].decision,
        })
        rows.append(row)
    totals = {"budget": budget, "value_without_budget": float(free_value),
              "outlay_without_budget": float(free_outlay)}
    spread = _spreads(results, groups)
    if sim:
        totals["close_calls"] = {"without_budget": close_calls(groups, spread, free, None),
                                 "under_budget": []}
    if budget is not None:
        picked, value, outlay = choose(groups, budget)
        for row, g, k in zip(rows, groups, picked):
            row["decision_under_budget"] = g[k].decision
        totals.update(value_under_budget=float(value), outlay_under_budget=float(outlay),
                      value_given_up=float(free_value - value))
        if sim:
            totals["close_calls"]["under_budget"] = close_calls(groups, spread, picked, budget)
    if sim:
        names = [r["project"] for r in results]
        for calls in totals["close_calls"].values():
            for c in calls:
                c["changes"] = [(names[p], d_new, d_old) for p, d_new, d_old in c["changes"]]
    df = pd.DataFrame(rows)
    ratio = df["value_per_outlay"].astype(float)
    key = ratio.where(df["outlay_today"] > 0, math.inf)       # no outlay today: first
    df = df.assign(_key=key).sort_values(["_key", "expanded_npv"], ascending=False,
                                         kind="stable").drop(columns="_key")
    return df.reset_index(drop=True), totals


# ------------------------------------------------------------------------------------------
# Choices the simulation does not settle

CLOSE = 2.0          # standard errors: a smaller difference is not settled by the simulation


def _spreads(results, groups):
    """spread(p, i, j): standard error of the difference between options i and j of project p
    (commit and keep: of their pathwise difference; either against pass: of that value)."""
    def spread(p, i, j):
        if i == j:
            return 0.0
        r = results[p]
        pair = {groups[p][i].decision, groups[p][j].decision}
        key = ("commit_minus_keep_se" if pair == {COMMIT, KEEP} else
               "commit_now_se" if COMMIT in pair else "keep_option_se")
        return float(r.get(key) or 0.0)
    return spread


def close_calls(groups, spread, picked, budget, z: float = CLOSE) -> list[dict]:
    """The alternatives to the chosen decisions ``picked`` that lie within ``z`` standard errors
    of them. For each project p and each other decision k that fits the budget alone, the best
    combination with p held at k (exact, :func:`choose`); it is a close call when the chosen sum
    exceeds it by less than z standard errors of the difference (projects are appraised
    independently: the variance is the sum, over the projects whose decision differs, of the
    variance of that project's difference). Each: {"alternative": option index per project,
    "changes": [(project index, new decision, chosen decision)], "value": its sum, "chosen": the chosen sum, "difference", "se"}; distinct
    combinations only, closest (smallest difference / se) first. Lattice projects add 0."""
    chosen = sum((_exact(g[k].value) for g, k in zip(groups, picked)), _exact(0.0))
    cap = None if budget is None else _exact(budget)
    seen, out = set(), []
    for p, g in enumerate(groups):
        for k, o in enumerate(g):
            if k == picked[p] or (cap is not None and _exact(o.outlay) > cap):
                continue
            alt, value, _ = choose(list(groups[:p]) + [(o,)] + list(groups[p + 1:]), budget)
            alt[p] = k
            if tuple(alt) in seen:
                continue
            seen.add(tuple(alt))
            moved = [q for q in range(len(groups)) if alt[q] != picked[q]]
            se = math.sqrt(sum(spread(q, picked[q], alt[q]) ** 2 for q in moved))
            diff = float(chosen - value)
            if se > 0 and diff < z * se:
                out.append({"alternative": list(alt),
                            "changes": [(q, groups[q][alt[q]].decision,
                                         groups[q][picked[q]].decision) for q in moved],
                            "value": float(value), "chosen": float(chosen),
                            "difference": diff, "se": se})
    out.sort(key=lambda c: c["difference"] / c["se"])
    return out
