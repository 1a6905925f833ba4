"""What the sensitivity tornado adds to `realopt report` on a simulation result (target: at most
about 15 s on the demo, river_ccgt.yaml, on a quiet 2-core machine). Prints figures; asserts
nothing.

    python tests/benchmarks/bench_sim_report.py [projects/river_ccgt.yaml] [--paths N]

Appraises once, then writes the report twice in this process: as it is, and with the tornado
left out (its start replaced by a stub), printing the wall time and the CPU seconds of this
process and of its worker processes for each, and the tornado alone (its copies in this one
process: CPU seconds, so other load on the machine shows less), with the paths it used and
the copies it valued. The load average is printed alongside: on a busy machine the wall times
grow, the CPU seconds much less.
"""
from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
TARGET = 15.0


def _cpu() -> float:
    me = resource.getrusage(resource.RUSAGE_SELF)
    ch = resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + ch.ru_utime + ch.ru_stime


class _NoTornado:
    def __init__(self, *args, **kwargs):
        pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False

    def result(self):
        return None


def timed_report(a, stub: bool) -> tuple[float, float]:
    from realopt.outputs import sim_sensitivity
    from realopt.outputs.report import write_report

    real = sim_sensitivity.start     # sim_report.write_all imports it when it runs
    if stub:
        sim_sensitivity.start = _NoTornado
    try:
        with tempfile.TemporaryDirectory() as tmp:
            c, t = _cpu(), time.perf_counter()
            write_report(a, Path(tmp) / "report")
            return time.perf_counter() - t, _cpu() - c
    finally:
        sim_sensitivity.start = real


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("file", nargs="?", type=Path,
                        default=ROOT / "projects" / "river_ccgt.yaml")
    parser.add_argument("--paths", type=int, default=None,
                        help="simulation.paths (default: the file's)")
    args = parser.parse_args()
    import realopt
    from realopt.outputs import sim_sensitivity as SS

    over = {"simulation.paths": args.paths} if args.paths else {}
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"cores: {os.cpu_count()}, load average (1 min): {load:.2f}; target: the tornado "
          f"adds at most {TARGET:g} s of wall time")
    p = realopt.load_project(args.file, over)
    c, t = _cpu(), time.perf_counter()
    a = realopt.appraise(p, progress=False)
    print(f"{args.file.name}: appraise {time.perf_counter() - t:.2f} s wall, "
          f"{_cpu() - c:.2f} s CPU ({a.simulation.paths:,} + {a.simulation.paths:,} paths)")
    w_with, c_with = timed_report(a, stub=False)
    w_without, c_without = timed_report(a, stub=True)
    print(f"report with the tornado    {w_with:6.2f} s wall, {c_with:6.2f} s CPU (all processes)")
    print(f"report without the tornado {w_without:6.2f} s wall, {c_without:6.2f} s CPU")
    added = w_with - w_without
    print(f"the tornado adds {added:.2f} s wall ({c_with - c_without:.2f} s CPU): "
          + ("ok" if added <= TARGET else "OVER TARGET"))
    todo, _ = SS.cases(p)
    copies = 1 + 2 * len(todo)
    c = _cpu()
    s = SS.analyse(a, workers=1)
    spent = _cpu() - c
    print(f"tornado alone, one process: {spent:.2f} s CPU for {copies} copies at {s.paths:,} "
          f"paths ({spent / copies:.3f} s a copy); {len(s.rows)} bars; base expanded NPV "
          f"{s.base_expanded:.2f} +- {s.base_expanded_se:.2f} (result "
          f"{a.expanded_npv:.2f} +- {a.standard_error['expanded_npv']:.2f}); median standard "
          f"error of a bar's difference "
          f"{sorted(r.expanded_high_se for r in s.rows)[len(s.rows) // 2]:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
