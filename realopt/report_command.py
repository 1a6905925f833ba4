"""``realopt report FILE [-o DIR] [--set ...]``: value the project and write its report.

Registered in realopt.cli's COMMANDS as ``"realopt.report_command:register"``. This module
imports only argparse at load time: the engine, pandas and matplotlib load inside the handler,
so ``realopt appraise`` never imports a plotting library.
"""
from __future__ import annotations

import argparse
import textwrap
from pathlib import Path


def _moves(text: str):
    """--moves volatility=0.1,rates=0.005,relative=0.25 -> Moves (and, for a simulation
    result, level=X and correlation=X)."""
    from .outputs.sensitivity import DEFAULT_MOVES, Moves

    values = {}
    for part in text.split(","):
        key, sep, val = part.partition("=")
        key = key.strip()
        if not sep or key not in ("volatility", "rates", "relative", "level", "correlation"):
            raise argparse.ArgumentTypeError(
                f"expected volatility=X, rates=X, relative=X, level=X and/or correlation=X "
                f"separated by commas (e.g. volatility=0.1,relative=0.25), got '{text}'")
        try:
            x = float(val)
        except ValueError:
            x = float("nan")
        if not (0 < x < 1):
            raise argparse.ArgumentTypeError(
                f"--moves {key}: expected a number between 0 and 1 (0.05 for 5 points or 5%), "
                f"got '{val.strip()}'")
        values[key] = x
    return Moves(**{**DEFAULT_MOVES.__dict__, **values})


def register(sub) -> None:
    from .cli import add_project_options

    p = sub.add_parser(
        "report", help="value the project and write its decision-paper report to a folder",
        description=textwrap.dedent("""\
            Value every right of the project (as `appraise` does) and write a report into DIR:
            report.html (one self-contained page, prints on A4 and Letter), report.pdf,
            report.md, results.json (the JSON results), tables/*.csv (and tables.xlsx when
            openpyxl is installed) and figures/*.png at print resolution: the value bridge,
            decision maps, exercise thresholds, chance of use, value fan, sensitivity tornado
            with break-evens, convergence over the lattice grid and the diagram of project
            states. A simulation result (valuation: simulation) gets the value bridge with
            standard errors, decision maps in two drivers' plane (or thresholds in the one
            driver's units), chance of use, the drivers' fan and the real-world DCF. The folder is written whole or not at all: a failure leaves any previous
            report in DIR as it was."""),
        epilog=textwrap.dedent("""\
            examples:
              realopt report projects/coating_line.yaml
              realopt report projects/peaking_unit.yaml -o board-paper/peaking
              realopt report projects/coating_line.yaml --set underlying.volatility=0.4 -o high-vol
              realopt report projects/staged_field.yaml --moves volatility=0.1,relative=0.3"""),
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("file", metavar="FILE", help="YAML project file")
    p.add_argument("-o", "--output", metavar="DIR",
                   help="folder to write (default: FILE's name with '-report', in the current "
                        "folder); an existing folder is replaced only if it is a realopt report")
    p.add_argument("--moves", metavar="KEY=X,...", type=_moves,
                   help="sensitivity moves: volatility (absolute, default 0.05), rates "
                        "(absolute, default 0.01), relative (costs, cash flows, salvage and "
                        "scale inputs, default 0.20); for valuation: simulation also level "
                        "(the drivers' levels, relative, default 0.10) and correlation "
                        "(absolute, default 0.1)")
    p.add_argument("--sweep", metavar="SWEEP_DIR",
                   help="also include the figure of a finished `realopt sweep` folder")
    add_project_options(p)
    p.set_defaults(run=run_report)


def run_report(args) -> int:
    from .cli import _out, appraise_from_args, load_from_args
    from .outputs.report import write_report
    from .outputs.sensitivity import DEFAULT_MOVES, report_solves

    extra = []
    if getattr(args, "sweep", None):
        from .outputs.sweep_figures import sweep_chart

        extra.append(sweep_chart(args.sweep))
    result = appraise_from_args(args, extra_solves=report_solves)
    out = Path(args.output) if args.output else Path(f"{Path(args.file).stem}-report")
    write_report(result, out, source=args.file, moves=args.moves or DEFAULT_MOVES,
                 extra_charts=extra)
    _out(f"{args.file}: report written to {out}/ (report.html, report.pdf, report.md, "
         "results.json, tables/, figures/)")
    return 0
