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

import argparse
import json
import textwrap
from dataclasses import dataclass
from pathlib import Path

from .errors import ProjectError, RealoptError, ValuationError

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


def _amount(text: str) -> float:
    import math

    try:
        x = float(text.replace(",", "").replace("_", ""))
    except ValueError:
        x = math.nan
    if not (math.isfinite(x) and x >= 0):
        raise argparse.ArgumentTypeError(
            f"expected an amount of 0 or more in the projects' money (e.g. 80 or 80.5), got "
            f"'{text}'")
    return x


def register(sub) -> None:
    from .cli import add_project_options

    p = sub.add_parser(
        "portfolio", help="appraise several projects and choose what to commit within a budget",
        description=textwrap.dedent("""\
            Appraise every project (in parallel on Dask) and write DIR/portfolio.csv: one row a
            project with its expanded NPV, the value if committed today, the value of keeping
            the option to wait (projects with a defer right), today's outlay, and the expanded
            NPV per unit of today's outlay (rows sorted by it). With --budget, the decisions
            today (commit now / keep the option / pass) that give the largest sum of values with
            today's outlays within the budget, solved exactly, and the value the budget gives
            up. Also DIR/portfolio.md and DIR/portfolio.html. Amounts are in the projects'
            money (the files should share one currency and unit)."""),
        epilog=textwrap.dedent("""\
            examples:
              realopt portfolio projects/coating_line.yaml projects/peaking_unit.yaml
              realopt portfolio projects/coating_line.yaml projects/flake_line.yaml \\
                  projects/peaking_unit.yaml projects/staged_field.yaml --budget 80 -o committee-2027"""),
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("files", nargs="+", metavar="FILE", help="YAML project files")
    p.add_argument("--budget", metavar="AMOUNT", type=_amount,
                   help="today's budget: the most that may be paid out today, in the projects' "
                        "money")
    p.add_argument("-o", "--output", metavar="DIR", default="portfolio",
                   help="folder to write (default: portfolio); must be new, empty or an "
                        "earlier portfolio, which is replaced")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--workers", metavar="N", type=_workers,
                       help="worker processes of the local cluster (default: one per core)")
    where.add_argument("--scheduler", metavar="ADDRESS",
                       help="run on the Dask cluster at this scheduler address")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    add_project_options(p)
    p.set_defaults(run=run_portfolio)


def _workers(text):
    from .sweep import _workers as w

    return w(text)


def _prepare(out: Path) -> None:
    if out.exists() and not out.is_dir():
        raise RealoptError(f"-o {out}: this is a file, not a folder. Fix: name a new folder")
    if out.is_dir() and any(out.iterdir()) and not (out / MANIFEST).is_file():
        names = sorted(p.name for p in out.iterdir())
        raise RealoptError(f"-o {out}: the folder holds other files ({', '.join(names[:3])}"
                           f"{', ...' if len(names) > 3 else ''}) and is not a realopt "
                           "portfolio. Fix: name a new or empty folder")


def run_portfolio(args) -> int:
    from .cli import _out, guard_message, load_from_args
    from .fanout import Resolver, dask_client, run_all
    from .lattice import plan as make_plan
    from .outputs.portfolio_summary import html_summary, markdown_summary
    from .sweep import write_atomic

    out = Path(args.output)
    _prepare(out)
    if len(set(map(str, args.files))) != len(args.files):
        raise RealoptError("a project file is named twice. Fix: name each file once")
    resolver, projects, bad = Resolver(), [], []
    for f in args.files:                          # validate everything before any work is sent
        try:
            project = resolver(load_from_args(args, f))
            if project.valuation == "simulation":
                raise ValuationError(
                    f"{f}: valuation: simulation is not covered by realopt portfolio yet (the "
                    "choices today are read off the lattice). Fix: appraise it with realopt "
                    "appraise, or value it on the lattice for the portfolio")
            refusal = None if args.allow_large else guard_message(project, make_plan(project))
            if refusal:
                raise ValuationError(f"{f}: {refusal}")
            projects.append(project)
        except ProjectError as err:
            bad.append(str(err))
        except ValuationError as err:
            bad.append(str(err) if str(err).startswith(str(f)) else f"{f}: {err}")
    if bad:
        raise RealoptError("\n".join(bad + ["Nothing was run."]))
    results, failed = [None] * len(projects), []

    def arrived(i, value):
        status, payload = value
        if status == "ok":
            results[i] = payload
        else:
            failed.append(f"{args.files[i]}: {payload}")

    with dask_client(args.workers, args.scheduler, tasks=len(projects)) as client:
        run_all(client, worker_item, enumerate(projects), arrived, label="projects",
                quiet=args.quiet)
    if failed:
        raise RealoptError("\n".join(failed))
    monies = {(r["currency"], r["unit"]) for r in results}
    df, totals = portfolio_table(args.files, results, args.budget)
    money = " ".join(x for x in next(iter(monies)) if x) if len(monies) == 1 else ""
    notes = [] if len(monies) <= 1 else [
        "The files state different currencies or units (" + "; ".join(
            " ".join(x for x in m if x) or "none" for m in sorted(monies)) +
        "): amounts are added as given, not converted."]
    out.mkdir(parents=True, exist_ok=True)
    write_atomic(out / MANIFEST, json.dumps({"kind": "realopt portfolio", "version": 1,
                                             "files": [str(f) for f in args.files]}) + "\n")
    write_atomic(out / "portfolio.csv", df.to_csv(index=False))
    write_atomic(out / "portfolio.md", markdown_summary(df, totals, money, notes))
    write_atomic(out / "portfolio.html", html_summary(df, totals, money, notes))
    line = f"{len(df)} projects in {out}/: portfolio.csv, portfolio.md, portfolio.html"
    if args.budget is not None:
        line += (f"; within the budget of {args.budget:,.2f}: value "
                 f"{totals['value_under_budget']:,.2f} (without the budget {totals['value_without_budget']:,.2f}, given up "
                 f"{totals['value_given_up']:,.2f})")
    _out(line)
    return 0
