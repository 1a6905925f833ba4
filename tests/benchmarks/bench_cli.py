"""Wall time of the command line, interpreter start included; prints figures (not a test).

    python tests/benchmarks/bench_cli.py [--repeat N]

For each demo project in projects/: ``python -m realopt appraise FILE`` and ``realopt check FILE``
(the console script, when installed) in a fresh interpreter, best / median / worst of N runs
after one warm-up run. Target (issue 11): ``realopt appraise`` on every lattice demo project in
0.5 s wall time or less (median of 5). Also shows a bare interpreter start for comparison, the
time to import the command line and the engine, and whether the run imported matplotlib (it must
not), pandas (it should not: about half a second) or networkx (only the outputs need it).

Bytecode caching is switched on for the runs (PYTHONDONTWRITEBYTECODE is dropped), as for an
installed copy, whose .pyc files pip writes; ``--no-bytecode`` measures the uncached case.
The figures depend on the machine's load: run it on a quiet machine.
"""
from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
TARGET = 0.5


ENV = dict(os.environ)


def wall(cmd, repeat):
    subprocess.run(cmd, cwd=ROOT, capture_output=True, env=ENV)      # warm disk and bytecode
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        r = subprocess.run(cmd, cwd=ROOT, capture_output=True, text=True, env=ENV)
        times.append(time.perf_counter() - t)
        if r.returncode != 0:
            raise SystemExit(f"{' '.join(map(str, cmd))} failed ({r.returncode}):\n{r.stderr}")
    return min(times), statistics.median(times), max(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--no-bytecode", action="store_true", help="keep Python from caching .pyc")
    opts = ap.parse_args()
    n = opts.repeat
    if opts.no_bytecode:
        ENV["PYTHONDONTWRITEBYTECODE"] = "1"
    else:
        ENV.pop("PYTHONDONTWRITEBYTECODE", None)
    py = sys.executable
    script = shutil.which("realopt")
    print(f"wall time, best / median / worst of {n} runs (target for appraise: < {TARGET} s)")
    print(f"{'bare interpreter start':<52}" + "%7.3f %7.3f %7.3f" % wall([py, "-c", "pass"], n))
    probe = ("import time, sys; t = time.perf_counter(); import realopt.cli; "
             "a = time.perf_counter(); import realopt.appraisal, realopt.project; "
             "b = time.perf_counter(); print(f'{a - t:.3f} {b - a:.3f}')")
    r = subprocess.run([py, "-c", probe], cwd=ROOT, capture_output=True, text=True, check=True,
                       env=ENV)
    cli_s, engine_s = r.stdout.split()
    print(f"{'import realopt.cli / then engine + loader':<52}{cli_s:>7} {engine_s:>7}")
    worst_median = 0.0
    for demo in sorted((ROOT / "projects").glob("*.yaml")):
        if "\nvaluation: simulation" in demo.read_text():
            continue        # simulation demos: timed by bench_simulation.py (seconds, not 1.5 s)
        rel = demo.relative_to(ROOT)
        best, med, worst = wall([py, "-m", "realopt", "appraise", str(rel)], n)
        worst_median = max(worst_median, med)
        flag = "ok" if med <= TARGET else "SLOW"
        print(f"{'python -m realopt appraise ' + rel.name:<52}{best:7.3f} {med:7.3f} {worst:7.3f}"
              f"  {flag}")
        if script:
            best, med, worst = wall([script, "appraise", str(rel)], n)
            worst_median = max(worst_median, med)
            print(f"{'realopt appraise ' + rel.name:<52}{best:7.3f} {med:7.3f} {worst:7.3f}"
                  f"  {'ok' if med <= TARGET else 'SLOW'}")
            best, med, worst = wall([script, "check", str(rel)], n)
            print(f"{'realopt check ' + rel.name:<52}{best:7.3f} {med:7.3f} {worst:7.3f}")
    modules = ("import sys; from realopt.cli import main; main(['appraise', "
               "'projects/coating_line.yaml']); "
               "print('matplotlib', any(m.startswith('matplotlib') for m in sys.modules), "
               "'pandas', 'pandas' in sys.modules, 'networkx', 'networkx' in sys.modules, "
               "file=sys.stderr)")
    r = subprocess.run([py, "-c", modules], cwd=ROOT, capture_output=True, text=True, check=True,
                       env=ENV)
    print("imported during appraise:", r.stderr.strip().splitlines()[-1])
    print(f"slowest median appraise: {worst_median:.3f} s "
          f"({'meets' if worst_median <= TARGET else 'MISSES'} the {TARGET} s target)")


if __name__ == "__main__":
    main()
