"""`realopt sweep`: the command (parser, validation of every point before any work is sent,
the run on Dask and the files it writes). The grid, folder and table helpers are in
realopt.sweep; registered in realopt.cli's COMMANDS as ``"realopt.sweep_command:register"``."""
from __future__ import annotations

import argparse
import textwrap
from pathlib import Path

from .errors import ProjectError, RealoptError, ValuationError
from .sweep import (MAX_POINTS, _figure, _write_parquet, check_folder, done_points, grid,
                    manifest_for, parse_vary, point_label, point_path, prepare_folder, table,
                    write_atomic)


def validate_points(args, varies, points, fixed):
    """Load, validate, resolve and size-check every point; returns the resolved projects.
    Raises RealoptError listing the first bad points with their KEY=VALUE and the message."""
    from .cli import guard_message
    from .fanout import Resolver
    from .lattice import plan as make_plan
    from .project import load_project, parse_value

    resolver = Resolver()
    base, labels = {}, {}
    for key, text in fixed:
        base[key] = parse_value(text, key)
        labels[key] = f"--set {key}"
    steps = getattr(args, "steps_per_year", None)
    if steps:                 # the lattice's or the simulation's key, as realopt.cli's
        from .cli import steps_key
        from .project import read_tree

        data = read_tree(args.file).data
        own = data.get("valuation") if isinstance(data, dict) else None
    parsed = {}
    projects, bad = [], []
    for point in points:
        over, lab = dict(base), dict(labels)
        for v, text in zip(varies, point):
            if (v.key, text) not in parsed:
                parsed[v.key, text] = parse_value(text, v.key)
            over[v.key] = parsed[v.key, text]
            lab[v.key] = f"--vary {v.key}={text}"
        if steps:
            key = steps_key({"valuation": over.get("valuation", own)})
            over[key] = steps
            lab[key] = f"--steps-per-year {steps}"
        try:
            project = resolver(load_project(args.file, over, labels=lab))
            if project.valuation == "simulation":       # its own plan and guard
                from .cli import available_memory
                from .simulation.result import guard_message as sim_guard, plan as sim_plan

                refusal = None if args.allow_large else sim_guard(
                    project, sim_plan(project), available_memory())
                if refusal:
                    raise ValuationError(refusal)
            elif not args.allow_large:
                refusal = guard_message(project, make_plan(project))
                if refusal:
                    raise ValuationError(refusal)
            else:
                make_plan(project)          # the tree must be buildable (p inside (0, 1), ...)
        except (ProjectError, ValuationError) as err:
            bad.append((point_label(varies, point), str(err)))
            if len(bad) >= 5:
                break
            continue
        projects.append(project)
    if bad:
        head = (f"{args.file}: {'the first ' if len(bad) >= 5 else ''}{len(bad)} point"
                f"{'s' if len(bad) != 1 else ''} of the sweep cannot be valued; nothing was run.")
        body = [f"point {label}:\n" + textwrap.indent(msg, "    ") for label, msg in bad]
        raise RealoptError("\n".join([head] + body))
    return projects


def register(sub) -> None:
    from .cli import add_project_options

    p = sub.add_parser(
        "sweep", help="appraise the project over a grid of what-ifs, in parallel on Dask",
        description=textwrap.dedent("""\
            Appraise FILE at every point of a grid of --set values, in parallel on Dask (a
            local cluster of worker processes, or the cluster at --scheduler). Each point is
            exactly `realopt appraise FILE --set KEY=VALUE ... --json`. Every point is
            validated before any work is sent. Results go to DIR/points/ as they arrive (one
            JSON file a point), then DIR/sweep.csv and DIR/sweep.parquet (one row a point) and
            DIR/sweep.png (one key: expanded NPV, static NPV and flexibility value against it;
            two keys: heat map of expanded NPV with the boundary of the decision today). An
            interrupted or failed run is completed with --resume."""),
        epilog=textwrap.dedent("""\
            examples:
              realopt sweep projects/coating_line.yaml --vary underlying.volatility=0.2:0.5:7
              realopt sweep projects/peaking_unit.yaml --vary underlying.volatility=0.2:0.5:7 \\
                  --vary investment.cost=40,50,60 -o peaking-sweep
              realopt sweep projects/coating_line.yaml --vary market.risk_free_rate=0.01:0.05:5 \\
                  --scheduler tcp://10.0.0.5:8786
              realopt sweep projects/coating_line.yaml --vary underlying.volatility=0.2:0.5:7 \\
                  --resume"""),
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("file", metavar="FILE", help="YAML project file")
    p.add_argument("--vary", metavar="KEY=START:STOP:N", action="append", required=True,
                   help="a key (any --set path) and its values: START:STOP:N for N evenly "
                        "spaced values, both ends included, or v1,v2,... as written; "
                        "repeat for a full grid")
    p.add_argument("-o", "--output", metavar="DIR",
                   help="folder to write (default: FILE's name with '-sweep'); must be new, "
                        "empty, or with --resume an earlier run of the same sweep")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--workers", metavar="N", type=_workers,
                       help="worker processes of the local cluster (default: one per core)")
    where.add_argument("--scheduler", metavar="ADDRESS",
                       help="run on the Dask cluster at this scheduler address, e.g. "
                            "tcp://10.0.0.5:8786 (its workers need realopt installed, not "
                            "the project's files)")
    p.add_argument("--resume", action="store_true",
                   help="complete an earlier run in DIR: compute only the missing points")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    add_project_options(p)
    p.set_defaults(run=run_sweep)


def _workers(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        n = 0
    if not 1 <= n <= 512:
        raise argparse.ArgumentTypeError(f"expected a whole number from 1 to 512, got '{text}'")
    return n


def run_sweep(args) -> int:
    from .cli import _err, _out
    from .fanout import appraise_text, dask_client, run_all

    varies = [parse_vary(t) for t in args.vary]
    keys = [v.key for v in varies]
    if len(set(keys)) != len(keys):
        dup = next(k for k in keys if keys.count(k) > 1)
        raise RealoptError(f"--vary {dup}: the key is varied twice. Fix: give all its values in "
                           "one --vary")
    fixed = list(getattr(args, "overrides", []) or [])
    clash = [k for k, _ in fixed if k in keys]
    if clash:
        raise RealoptError(f"--set {clash[0]} and --vary {clash[0]}: the key is both fixed and "
                           "varied. Fix: drop one of them")
    if not Path(args.file).is_file():
        raise RealoptError(f"{args.file}: no such file. Fix: check the path of the project file")
    points = grid(varies)
    if len(points) > MAX_POINTS:
        raise RealoptError(f"the grid has {len(points):,} points; at most {MAX_POINTS:,}. Fix: "
                           "fewer values per --vary")
    out = Path(args.output) if args.output else Path(f"{Path(args.file).stem}-sweep")
    manifest = manifest_for(args, varies, fixed)
    earlier = check_folder(out, manifest, args.resume)          # before the long validation
    projects = validate_points(args, varies, points, fixed)      # before any work is sent
    done = done_points(out, len(points)) if earlier else set()
    todo = [i for i in range(len(points)) if i not in done]
    computed, duplicates, failed = 0, 0, []

    def arrived(i, value):
        nonlocal computed, duplicates
        status, text = value
        if status != "ok":
            failed.append((point_label(varies, points[i]), text))
            return
        path = point_path(out, i)
        if path.exists():                      # each point is written once
            duplicates += 1
            return
        write_atomic(path, text + "\n")
        computed += 1

    if todo:
        try:
            with dask_client(args.workers, args.scheduler, tasks=len(todo)) as client:
                prepare_folder(out, manifest, args.resume)      # once the cluster answers
                run_all(client, appraise_text, ((i, projects[i]) for i in todo), arrived,
                        quiet=args.quiet)
        except KeyboardInterrupt:
            have = len(done) + computed
            _err(f"sweep interrupted: {have} of {len(points)} points are in {out}/points. Fix: "
                 "run the same command with --resume to compute the rest")
            raise
    else:
        prepare_folder(out, manifest, args.resume)
    if failed:
        head = (f"{args.file}: {len(failed)} point{'s' if len(failed) != 1 else ''} could not "
                f"be valued ({len(done) + computed} of {len(points)} are in {out}/points; "
                "--resume retries the others):")
        body = [f"point {label}:\n" + textwrap.indent(msg, "    ") for label, msg in failed[:5]]
        raise RealoptError("\n".join([head] + body))
    text, typed = table(out, varies, points)
    write_atomic(out / "sweep.csv", text.to_csv(index=False))
    _write_parquet(out / "sweep.parquet", typed)
    figure = _figure(out, varies, typed)
    _out(f"{args.file}: {len(points)} points ({computed} computed now, {len(done)} from an "
         f"earlier run) in {out}/: sweep.csv, sweep.parquet, points/"
         + (f", {figure}" if figure else " (a figure is drawn for one or two varied keys)")
         + (f"; {duplicates} duplicate results ignored" if duplicates else ""))
    return 0
