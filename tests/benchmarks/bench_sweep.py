"""Sweep on Dask vs the same appraisals one after another; prints figures (not a test).

    python tests/benchmarks/bench_sweep.py [--points 16] [--workers 2] [--steps-per-year 150]

Both sides value the same validated, resolved projects (coating-line demo, volatility from 0.2
to 0.5, ``--steps-per-year`` lattice steps a year) and make the same JSON text:

* serial: one process, one appraisal after another (after one warm-up appraisal);
* sweep: an embedded LocalCluster of ``--workers`` processes started from nothing, the points
  sent as tasks, results gathered as they arrive, the cluster closed: wall time of all of it.

Target (issue 12): sweep / serial <= 0.8 with 16 points on 2 workers, cluster start-up included.
The overhead per point is (workers x (sweep time - start-up) - serial time) / points: worker
time spent on anything but appraising (sending the project, serialising, scheduling).
The figures move with the machine's load: on a shared machine run it several times.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--points", type=int, default=16)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--steps-per-year", type=int, default=150)
    args = ap.parse_args()

    from realopt.fanout import appraise_text, dask_client, resolve_for_workers, run_all
    from realopt.project import load_project
    from realopt.sweep import parse_vary

    values = parse_vary(f"v=0.2:0.5:{args.points}").values
    path = ROOT / "projects" / "coating_line.yaml"
    projects = [resolve_for_workers(load_project(path, {
        "underlying.volatility": float(v), "lattice.steps_per_year": args.steps_per_year}))
        for v in values]
    appraise_text(projects[0])                      # warm-up (imports, caches)

    t = time.perf_counter()
    serial = [appraise_text(p)[1] for p in projects]
    t_serial = time.perf_counter() - t

    got = {}
    t = time.perf_counter()
    with dask_client(args.workers, None, tasks=len(projects)) as client:
        t_up = time.perf_counter() - t
        t1 = time.perf_counter()
        run_all(client, appraise_text, enumerate(projects),
                lambda i, v: got.__setitem__(i, v[1]), quiet=True)
        t_run = time.perf_counter() - t1
    t_sweep = time.perf_counter() - t
    assert [got[i] for i in range(len(projects))] == serial, "results differ"

    per = t_serial / len(projects)
    overhead = (args.workers * t_run - t_serial) / len(projects)
    ratio = t_sweep / t_serial
    print(f"{len(projects)} points, coating-line demo at {args.steps_per_year} steps a year "
          f"(one appraisal {per:.3f} s)")
    print(f"  serial, one process:           {t_serial:7.2f} s")
    print(f"  sweep on {args.workers} local workers:      {t_sweep:7.2f} s  (cluster start "
          f"{t_up:.2f} s, points {t_run:.2f} s, close {t_sweep - t_up - t_run:.2f} s)")
    print(f"  ratio sweep / serial:          {ratio:7.2f}  (target <= 0.8) "
          f"{'ok' if ratio <= 0.8 else 'ABOVE TARGET'}")
    print(f"  overhead per point:            {overhead * 1000:7.1f} ms of worker time")
    print("  results identical to the serial run: yes")


if __name__ == "__main__":
    main()
