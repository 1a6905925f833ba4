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
"""
from __future__ import annotations

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
    """(DataFrame sorted by expanded NPV per unit of today's outlay, totals dict)."""
    import math

    import pandas as pd

    groups = [options(r["commit_now_value"], r["keep_option_value"], r["outlay_today"])
              for r in results]
    free, free_value, free_outlay = choose(groups, None)
    rows = []
    for f, r, g, k in zip(files, results, groups, free):
        outlay = r["outlay_today"]
        rows.append({
            "project": r["project"], "file": str(f),
            "expanded_npv": r["expanded_npv"], "static_npv": r["static_npv"],
            "commit_now_value": r["commit_now_value"],
            "keep_option_value": r["keep_option_value"],
            "outlay_today": outlay,
            "value_per_outlay": r["expanded_npv"] / outlay if outlay > 0 else None,
            "decision_today": r["decision_today"],
            "decision_without_budget": g[k].decision,
        })
    totals = {"budget": budget, "value_without_budget": float(free_value),
              "outlay_without_budget": float(free_outlay)}
    if budget is not None:
        picked, value, outlay = choose(groups, budget)
        for row, g, k in zip(rows, groups, picked):
            row["decision_under_budget"] = g[k].decision
        totals.update(value_under_budget=float(value), outlay_under_budget=float(outlay),
                      value_given_up=float(free_value - value))
    df = pd.DataFrame(rows)
    ratio = df["value_per_outlay"].astype(float)
    key = ratio.where(df["outlay_today"] > 0, math.inf)       # no outlay today: first
    df = df.assign(_key=key).sort_values(["_key", "expanded_npv"], ascending=False,
                                         kind="stable").drop(columns="_key")
    return df.reset_index(drop=True), totals


# ------------------------------------------------------------------------------------------
# Command
