"""The ``realopt`` command line (also ``python -m realopt``).

Commands: ``check`` (validate, show the lattice that would be built) and ``appraise`` (the headline
table, or the JSON contract with ``--json``). Neither writes anything to disk.

Exit codes: 0 success; 1 invalid project or failed valuation (a located message, never a
traceback); 2 wrong usage.

Adding a command takes one entry in ``COMMANDS``: either a function here or a ``"module:function"``
string naming a ``register(subparsers)`` function elsewhere (e.g. in realopt/outputs). It adds its
parser with ``subparsers.add_parser(...)``, may call :func:`add_project_options`, and sets
``parser.set_defaults(run=handler)``; ``handler(args) -> int`` prints its output and returns the
exit code, raising :class:`realopt.errors.RealoptError` for anything the user can fix. Keep heavy
imports (the engine, pandas, matplotlib) inside the handler: ``realopt appraise`` must start fast,
and this module imports no plotting library.
"""
from __future__ import annotations

import argparse
import math
import os
import sys
import textwrap
from dataclasses import replace

from . import __version__
from .errors import ProjectError, RealoptError, ValuationError
from .jsontext import _plain, to_json  # noqa: F401  (one serializer for every JSON result)

PROG = "realopt"
MEMORY_SHARE = 0.5          # refuse a run needing more than this share of the available memory
TIME_LIMIT = 600.0          # ... or more than this many seconds (estimate)
WIDTH = 100                 # text width of the headline output

EXAMPLES = """\
examples:
  realopt check projects/coating_line.yaml
  realopt appraise projects/coating_line.yaml
  realopt appraise projects/peaking_unit.yaml --set underlying.volatility=0.45
  realopt appraise projects/staged_field.yaml --steps-per-year 50 --json

exit codes: 0 success, 1 invalid project or failed valuation, 2 wrong usage.
Project file format: see "Project file reference" in README.md.
"""


# ------------------------------------------------------------------------------------------
# Shared pieces for commands that read a project file


def _override(text: str) -> tuple[str, str]:
    key, sep, value = text.partition("=")
    if not sep or not key.strip():
        raise argparse.ArgumentTypeError(
            f"expected KEY=VALUE (e.g. underlying.volatility=0.35), got '{text}'")
    return key.strip(), value.strip()


def _positive_int(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        n = 0
    if n < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number of 1 or more, got '{text}'")
    return n


def add_project_options(parser: argparse.ArgumentParser) -> None:
    """--set, --steps-per-year and --allow-large, for any command that values a project."""
    parser.add_argument(
        "--set", metavar="KEY=VALUE", action="append", type=_override, default=[],
        dest="overrides",
        help="override a project key by its dotted path before validation, e.g. "
             "--set underlying.volatility=0.35 or --set 'rights.Sell the line.window=[2, 8]' "
             "(a right by its name or its index); VALUE is read as YAML; repeatable")
    parser.add_argument(
        "--steps-per-year", metavar="N", type=_positive_int,
        help="lattice steps per year (same as --set lattice.steps_per_year=N); for a project "
             "with valuation: simulation, the decision dates a year inside american windows "
             "(same as --set simulation.steps_per_year=N); more steps are more accurate and "
             "slower")
    parser.add_argument(
        "--allow-large", action="store_true",
        help="run even when the estimated memory or time exceeds this machine's means")


def steps_key(data) -> str:
    """The key --steps-per-year sets in a raw project tree (after any --set): the simulation's
    decision dates a year under ``valuation: simulation``, else the lattice's steps a year."""
    simulation = isinstance(data, dict) and data.get("valuation") == "simulation"
    return "simulation.steps_per_year" if simulation else "lattice.steps_per_year"


def load_from_args(args, path):
    """Load ``path`` with the command's --set and --steps-per-year overrides applied (the
    latter after the former, on the key :func:`steps_key` names)."""
    from pathlib import Path

    from .project import apply_overrides, build_project, parse_value, read_tree

    overrides, labels = {}, {}
    for key, text in getattr(args, "overrides", []) or []:
        overrides[key] = parse_value(text, key)
        labels[key] = f"--set {key}"
    tree = read_tree(path)
    if overrides:
        apply_overrides(tree, overrides, labels)
    n = getattr(args, "steps_per_year", None)
    if n:
        key = steps_key(tree.data)
        apply_overrides(tree, {key: n}, {key: f"--steps-per-year {n}"})
    return build_project(tree, Path(path).resolve().parent)


def available_memory() -> int | None:
    """Bytes of memory available now (Linux MemAvailable, else free physical pages)."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (AttributeError, ValueError, OSError):
        return None


def _bytes(n: float) -> str:
    for unit, size in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= size:
            return f"{n / size:.1f} {unit}"
    return f"{n:.0f} bytes"


def _seconds(s: float) -> str:
    if s < 1:
        return f"{s:.2f} s"
    if s < 120:
        return f"{s:.0f} s"
    if s < 7200:
        return f"{s / 60:.0f} minutes"
    return f"{s / 3600:.1f} hours"


def _excess(plan, memory, extra_solves: float = 0.0) -> list[str]:
    out = []
    if memory is not None and plan.memory_bytes > MEMORY_SHARE * memory:
        out.append(f"about {_bytes(plan.memory_bytes)} of memory (this machine has "
                   f"{_bytes(memory)} available)")
    seconds = _seconds_with(plan, extra_solves)
    if seconds > TIME_LIMIT:
        out.append(f"about {_seconds(seconds)} (the limit is {_seconds(TIME_LIMIT)})")
    return out


def _seconds_with(plan, extra_solves: float) -> float:
    """The plan's time estimate plus ``extra_solves`` solves of the whole project."""
    one = getattr(plan, "solve_seconds", 0.0) or plan.seconds_estimate / max(1, plan.solves)
    return plan.seconds_estimate + extra_solves * one


def guard_message(project, plan, extra_solves: float = 0.0) -> str | None:
    """None when the run fits this machine; otherwise why not and a smaller steps_per_year.
    ``extra_solves``: further lattice solves the command adds (in units of one solve of the
    whole project at its grid), e.g. the report's sensitivities."""
    memory = available_memory()
    excess = _excess(plan, memory, extra_solves)
    if not excess:
        return None
    head = (f"This run would need {' and '.join(excess)}: {plan.steps:,} lattice steps, "
            f"{plan.states} states, {plan.solves} solves.")
    if project.lattice.explicit:
        return (head + " Fix: use a longer lattice.step_years or shorter windows, or pass "
                "--allow-large to run anyway.")
    smaller = _smaller_steps(project, plan, memory, extra_solves)
    fix = (f" Fix: use --steps-per-year {smaller} (or lattice.steps_per_year: {smaller} in the "
           "file)" if smaller else " Fix: shorten the windows or value fewer rights together")
    return head + fix + ", or pass --allow-large to run anyway."


def _smaller_steps(project, plan, memory, extra_solves: float = 0.0) -> int | None:
    """The largest steps_per_year (searched downwards) whose plan fits this machine."""
    from .lattice import plan as make_plan

    spy = project.lattice.steps_per_year
    ratio = 1.0
    seconds = _seconds_with(plan, extra_solves)
    if seconds > TIME_LIMIT:
        ratio = min(ratio, (TIME_LIMIT / seconds) ** 0.5)
    if memory is not None and plan.memory_bytes > MEMORY_SHARE * memory:
        ratio = min(ratio, MEMORY_SHARE * memory / plan.memory_bytes)
    k = max(1, int(spy * ratio * 0.95))
    for _ in range(60):
        trial = replace(project, lattice=replace(project.lattice, steps_per_year=k))
        try:
            if not _excess(make_plan(trial), memory, extra_solves):
                return k
        except ValuationError:
            return None
        if k == 1:
            return None
        k = max(1, int(k * 0.85))
    return None


# ------------------------------------------------------------------------------------------
# realopt check


def _register_check(sub) -> None:
    p = sub.add_parser(
        "check", help="validate project files and show the lattice that would be built",
        description="Validate each project file and print the lattice that `appraise` would "
                    "build (steps, step length, up/down factors, risk-neutral probability, "
                    "memory and time estimates) with any warnings. Nothing is valued or written.",
        epilog="example: realopt check projects/*.yaml",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("files", nargs="+", metavar="FILE", help="YAML project file(s)")
    add_project_options(p)
    p.set_defaults(run=run_check)


def run_check(args) -> int:
    from .lattice import plan as make_plan

    status = 0
    for path in args.files:
        try:
            project = load_from_args(args, path)
            if project.valuation == "simulation":      # realopt.simulation (own plan and text)
                from .simulation.text import check_text

                _out(check_text(path, project, available_memory()))
                continue
            pl = make_plan(project)
        except ProjectError as err:
            _err(str(err))             # every problem names the file
            status = 1
            continue
        except RealoptError as err:
            _err(f"{path}: {err}")
            status = 1
            continue
        _out(_check_text(path, project, pl))
    return status


def _check_text(path, project, pl) -> str:
    u = project.underlying
    money = " ".join(x for x in (project.currency, project.unit) if x)
    lines = [f"{path}: valid - {project.name}" + (f" ({money})" if money else "")]
    if u.cash_flows:
        what = (f"{len(u.cash_flows)} cash-flow dates to year {u.cash_flows[-1][0]:g}"
                + (" plus a terminal value" if u.terminal_value else ""))
    elif u.present_value is not None:
        what = f"present value {u.present_value:,.2f}, payout yield {u.payout_yield:.1%}"
    else:
        what = f"cash flows from {len(u.drivers.drivers)} drivers, years {u.drivers.years[0]} " \
               f"to {u.drivers.years[1]}"
    if project.lattice.explicit:
        vol = "tree set by explicit up/down factors"
    elif u.volatility is not None:
        vol = f"volatility {u.volatility:.1%} a year"
    else:
        vol = f"volatility estimated from {u.volatility_estimate.method}"
        if getattr(pl, "volatility", None) is not None:
            vol += f": {pl.volatility:.1%} a year"
            if getattr(pl, "volatility_stderr", None):
                vol += f" (standard error {pl.volatility_stderr:.1%})"
    lines.append(f"  underlying: {what}; {vol}")
    for r in project.rights:
        lines.append(f"  right: {r.name} ({r.kind}, {r.exercise}, years {r.window[0]:g} to "
                     f"{r.window[1]:g})")
    if not project.rights:
        lines.append("  rights: none (the expanded NPV equals the static NPV)")
    lines.append(f"  lattice: {pl.steps:,} steps of {pl.step_years:.6g} years to year "
                 f"{pl.horizon:g}; up {pl.up:.6g}, down {pl.down:.6g}, risk-neutral "
                 f"probability {pl.probability:.6g}")
    lines.append(f"  size: {pl.states} states, {pl.solves} lattice solves; memory about "
                 f"{_bytes(pl.memory_bytes)}, time about {_seconds(pl.seconds_estimate)}")
    refusal = guard_message(project, pl)
    if refusal:
        lines.append("  appraise would refuse this run: " + refusal)
    warnings = list(pl.warnings)
    lines.append("  warnings: none" if not warnings else "  warnings:")
    lines = [lines[0]] + [_wrap(x.strip(), "  ", "      ") for x in lines[1:]]
    lines += [_wrap(w, "    - ", "      ") for w in warnings]
    from .outputs.text import no_negative_zero

    return no_negative_zero("\n".join(lines))


# ------------------------------------------------------------------------------------------
# realopt appraise


def _register_appraise(sub) -> None:
    p = sub.add_parser(
        "appraise", help="value the project's rights and print the headline table",
        description=textwrap.dedent("""\
            Value every right of the project on a binomial lattice of project value and print:
            the present value of the operating project, the investment, the static NPV, each
            right's standalone value and Shapley share of the flexibility value, the interaction
            between the rights, the expanded NPV, and the exercise rule of each right in plain
            words. Amounts are in the currency and unit of the file, valued today.

            With --json, print instead one JSON object (the results contract of docs/design.md:
            present_value, investment_pv, static_npv, expanded_npv, flexibility_value, rights[],
            lattice, ...)."""),
        epilog=textwrap.dedent("""\
            examples:
              realopt appraise projects/coating_line.yaml
              realopt appraise projects/coating_line.yaml --set underlying.volatility=0.4
              realopt appraise projects/coating_line.yaml --json > result.json"""),
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("file", metavar="FILE", help="YAML project file")
    p.add_argument("--json", action="store_true", help="print the JSON results object")
    add_project_options(p)
    p.set_defaults(run=run_appraise)


def appraise_from_args(args, extra_solves=None):
    """Load ``args.file`` with the overrides, refuse a run beyond the machine (unless
    --allow-large), and appraise it; valuation errors name the file. ``extra_solves(project)``:
    the solves the command adds after the appraisal (counted by the guard)."""
    from .appraisal import appraise
    from .lattice import plan as make_plan

    project = load_from_args(args, args.file)
    if project.valuation == "simulation":              # realopt.simulation (own guard)
        from .simulation.text import appraise_guarded

        try:
            return appraise_guarded(project, args.allow_large, available_memory())
        except ValuationError as err:
            raise ValuationError(f"{args.file}: {err}") from None
    try:
        if not args.allow_large:
            extra = extra_solves(project) if extra_solves else 0.0
            refusal = guard_message(project, make_plan(project), extra)
            if refusal:
                raise ValuationError(refusal)
        return appraise(project)
    except ValuationError as err:
        raise ValuationError(f"{args.file}: {err}") from None


def run_appraise(args) -> int:
    result = appraise_from_args(args)
    if args.json:
        _out(to_json(result.to_dict()))
    else:
        _out(result.headline(WIDTH) if getattr(result, "method", "") == "simulation"
             else headline(result))
    return 0


def headline(a) -> str:
    """The headline table of an Appraisal as text."""
    from . import CAUTION

    p = a.project
    money = " ".join(x for x in (p.currency, p.unit) if x) or "money units"

    def num(x):
        return "" if x is None else _money(x)

    labels = [f"{r.name} ({r.type})" for r in a.rights]
    w = max([46] + [len(s) for s in labels])
    w = min(w, WIDTH - 32)

    def row(label, *cols):
        label = label if len(label) <= w else label[: w - 3] + "..."
        return f"{label:<{w}}" + "".join(f"{c:>16}" for c in cols)

    out = [f"{p.name}", f"amounts in {money}, valued today", ""]
    base = (getattr(a, "base", "") or "").strip()
    if base and _base_is_not_plain(p):
        text = base if base.lower().startswith("base project") else f"Base project: {base}"
        out += [_wrap(text, "", "  "), ""]
    se = getattr(a, "present_value_stderr", None)
    out.append(row("Present value of the operating project", "", num(a.present_value))
               + (f" \u00b1 {_money(se)} (standard error)" if se else ""))
    out.append(row("Investment (present value)", "", num(-a.investment_pv)))
    out.append(row("Static NPV (commit now, no flexibility)", "", num(a.static_npv)))
    out.append("")
    if a.rights:
        out.append(row("Right", "value alone", "Shapley share"))
        for label, r in zip(labels, a.rights):
            out.append(row(label, num(r.standalone_value), num(r.shapley_value)))
        out.append(row("Interaction between the rights", num(a.interaction), ""))
        out.append(row("Flexibility value", num(a.flexibility_value), num(a.flexibility_value)))
    else:
        out.append("No rights in the file: the expanded NPV is the static NPV.")
    out.append(row("Expanded NPV (static NPV + flexibility)", "", num(a.expanded_npv)))
    out.append("")
    first = list(getattr(a, "headline_warnings", ()) or ())
    if first:
        out.append("Read these numbers with the following warnings:")
        out += [_wrap(x, "  ! ", "    ") for x in first]
        out.append("")
    if getattr(a, "decision_today", None):
        out.append(f"Decision today: {a.decision_today}")
    out.append(_wrap(f"Volatility: {_volatility_text(a)}", "", "  "))
    lat = a.lattice
    out.append(_wrap(f"Lattice: {getattr(lat, 'tree', 'binomial')}, {lat.steps:,} steps of "
                     f"{lat.step_years:.4g} years to year {lat.horizon:g}; up {lat.up:.5g}, "
                     f"down {lat.down:.5g}, risk-neutral probability {lat.probability:.4g}",
                     "", "  "))
    if a.rights:
        out += ["", "When to use each right:"]
        out += [_wrap(r.rule, "  - ", "    ") for r in a.rights]
    if a.warnings:
        out += ["", "Warnings:"]
        out += [_wrap(x, "  - ", "    ") for x in a.warnings]
    out += ["", _wrap(CAUTION, "", "")]
    from .outputs.text import no_negative_zero

    return no_negative_zero("\n".join(out))


def _base_is_not_plain(project) -> bool:
    """Whether a switch right starts in a mode other than the plain project (scale 1, no fixed
    flow): then the headline says which base project every subset of rights values."""
    for r in project.rights:
        modes = getattr(r, "modes", None)
        if modes and getattr(r, "start", None) is not None:
            m = next((m for m in modes if m.name == r.start), None)
            if m is not None and (m.scale != 1.0 or m.fixed != 0.0):
                return True
    return False


def _money(x: float) -> str:
    """2 decimals with thousands separators; a tiny negative shows as 0.00, never -0.00."""
    text = f"{x:,.2f}"
    return "0.00" if text == "-0.00" else text


def _volatility_text(a) -> str:
    if a.volatility is None:
        return "not used (explicit up/down factors)"
    text = f"{a.volatility:.1%} a year"
    method = getattr(a, "volatility_method", "") or ""
    if method:
        text += f" ({method})"
    if getattr(a, "volatility_stderr", None):
        text += f", standard error {a.volatility_stderr:.1%}"
    return text


# ------------------------------------------------------------------------------------------
# Entry point

COMMANDS = (
    _register_check,
    _register_appraise,
    "realopt.report_command:register",
    "realopt.sweep_command:register",
    "realopt.portfolio_command:register",
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog=PROG,
        description=textwrap.dedent("""\
            Value the flexibility inside a capital project on a binomial lattice of project value.

            Describe the project in a YAML file (expected cash flows, volatility, rates, the
            investment, and the rights to wait, expand, contract, abandon or switch), then:
              check     validate the file and show the lattice that would be built
              appraise  print the static NPV, the value of each right, the expanded NPV and
                        when to use each right
              report    write the decision-paper report (HTML, PDF, Markdown, JSON, CSV,
                        figures) to a folder
              sweep     appraise over a grid of --set values, in parallel on Dask
              portfolio appraise several projects; choose what to commit within a budget"""),
        epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"{PROG} {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for entry in COMMANDS:
        if isinstance(entry, str):
            import importlib

            module, _, func = entry.partition(":")
            entry = getattr(importlib.import_module(module), func)
        entry(sub)
    return parser


def _wrap(text: str, first: str, rest: str) -> str:
    return textwrap.fill(text, WIDTH, initial_indent=first, subsequent_indent=rest,
                         break_on_hyphens=False, break_long_words=False)


def _out(text: str) -> None:
    sys.stdout.write(text + "\n")


def _err(text: str) -> None:
    sys.stderr.write(text + "\n")


def main(argv=None) -> int:
    """Run the command line; returns the exit code (0 ok, 1 invalid/failed, 2 usage)."""
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.reconfigure(errors="replace")
        except (AttributeError, ValueError):
            pass
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:          # --help, --version (0) or a usage error (2)
        return exc.code if isinstance(exc.code, int) else 2
    if getattr(args, "run", None) is None:
        parser.print_usage(sys.stderr)
        _err(f"{PROG}: error: name a command (check, appraise, report, sweep, portfolio); see {PROG} --help")
        return 2
    try:
        return args.run(args)
    except RealoptError as err:
        _err(str(err))
        return 1
    except KeyboardInterrupt:
        _err(f"{PROG}: interrupted")
        return 130
    except BrokenPipeError:
        try:
            sys.stdout = open(os.devnull, "w")
        except OSError:
            pass
        return 1
    except MemoryError:
        _err(f"{PROG}: ran out of memory. Fix: use a smaller --steps-per-year, or value fewer "
             "rights together")
        return 1
    except Exception as exc:  # a bug: short message, traceback only on request
        if os.environ.get("REALOPT_DEBUG"):
            raise
        _err(f"{PROG}: internal error ({type(exc).__name__}: {exc}). This is a fault in realopt, "
             f"not in your file; please report it with the project file. Set REALOPT_DEBUG=1 to "
             "see the details.")
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
