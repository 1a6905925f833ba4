"""How good is the guard's time estimate (``realopt.lattice.plan``)? Prints, for each demo
project at several grids, the estimated and the measured wall time of ``realopt.appraise`` and
their ratio (estimate / actual; near 1 is right, above 1 pessimistic). Not a test.

    python tests/benchmarks/bench_plan.py [steps_per_year ...]

The measurement is one run. "cpu s" is the process time (what the estimate models: an unloaded
machine); "wall s" is the elapsed time, longer when other work shares the cores.
"""
from __future__ import annotations

import os
import sys
import time
from dataclasses import replace
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

import realopt  # noqa: E402
from realopt.lattice import plan  # noqa: E402


def main(argv):
    sizes = [int(x) for x in argv] or [100, 500, 1000, 2000]
    print(f"{'project':<22}{'steps/yr':>9}{'steps':>8}{'solves':>7}{'estimate s':>12}"
          f"{'cpu s':>9}{'ratio':>7}{'wall s':>9}{'ratio':>7}")
    extra = [Path(x) for x in os.environ.get("BENCH_PLAN_FILES", "").split(os.pathsep) if x]
    for path in sorted((ROOT / "projects").glob("*.yaml")) + extra:
        base = realopt.load_project(path)
        if base.lattice.explicit:
            continue
        for n in sizes:
            p = replace(base, lattice=replace(base.lattice, steps_per_year=n))
            pl = plan(p)
            if pl.seconds_estimate > 240:
                print(f"{path.stem:<22}{n:>9}{pl.steps:>8}{pl.solves:>7}"
                      f"{pl.seconds_estimate:>12.2f}{'skipped':>10}")
                continue
            t, c = time.perf_counter(), time.process_time()
            realopt.appraise(p)
            dt, dc = time.perf_counter() - t, time.process_time() - c
            e = pl.seconds_estimate
            print(f"{path.stem:<22}{n:>9}{pl.steps:>8}{pl.solves:>7}{e:>12.2f}"
                  f"{dc:>9.2f}{e / dc:>7.2f}{dt:>9.2f}{e / dt:>7.2f}", flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
