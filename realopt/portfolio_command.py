"""`realopt portfolio`: the command (parser, validation of every file before any work is
sent, the run on Dask and the files it writes). The choices and the exact budgeted choice are in
realopt.portfolio; registered in realopt.cli's COMMANDS as
``"realopt.portfolio_command:register"``."""
from __future__ import annotations

import argparse
import json
import textwrap
from pathlib import Path

from .errors import ProjectError, RealoptError, ValuationError
from .portfolio import MANIFEST, portfolio_table, worker_item


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
            money (the files should share one currency and unit). Files valued by simulation
            (valuation: simulation) may be mixed with lattice ones: their values carry standard
            errors, and the summaries name any choice within two standard errors of another."""),
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
    from .sweep_command import _workers as w

    return w(text)


def _prepare(out: Path) -> None:
    if out.exists() and not out.is_dir():
        raise RealoptError(f"-o {out}: this is a file, not a folder. Fix: name a new folder")
    if out.is_dir() and any(out.iterdir()) and not (out / MANIFEST).is_file():
        names = sorted(p.name for p in out.iterdir())
        raise RealoptError(f"-o {out}: the folder holds other files ({', '.join(names[:3])}"
                           f"{', ...' if len(names) > 3 else ''}) and is not a realopt "
                           "portfolio. Fix: name a new or empty folder")


def _refusal(project) -> str | None:
    """Why ``project`` would not fit this machine (None when it fits): the lattice's guard, or
    the simulation's (paths, dates, subsets of rights), as ``realopt appraise`` applies them.
    The simulation's check also refuses too few paths for the regression, located."""
    from .cli import available_memory, guard_message

    if project.valuation == "simulation":
        from .simulation.result import guard_message as sim_guard, plan

        return sim_guard(project, plan(project), available_memory())
    from .lattice import plan as make_plan

    return guard_message(project, make_plan(project))


def run_portfolio(args) -> int:
    from .cli import _out, load_from_args
    from .fanout import Resolver, dask_client, run_all
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
            refusal = None if args.allow_large else _refusal(project)
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
    close = totals.get("close_calls", {})
    if any(close.values()):
        line += ("; some choices are within two standard errors of another, not settled by "
                 "the simulation (see portfolio.md)")
    _out(line)
    return 0
