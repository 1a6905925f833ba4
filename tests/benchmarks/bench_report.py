"""Wall time of `realopt report` on the demo projects (target: under 10 s with the default
sensitivity set), and where the time goes. Prints figures; asserts nothing.

    python tests/benchmarks/bench_report.py [projects/coating_line.yaml ...] [--repeat 3]

The first part runs the real command in a fresh interpreter (imports included), as a user
would; the second times each stage in one process (CPU seconds, so other load on the machine
shows less): appraise, sensitivity (tornado, break-evens, convergence), figures, PDF.
The figures are drawn in worker processes where the machine has several cores, so the wall
time also depends on how busy those cores are: the load average is printed alongside.
"""
from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
TARGET = 10.0


def wall(project: Path, repeat: int) -> list[tuple[float, float]]:
    """(wall seconds, CPU seconds of the command and its worker processes) per run."""
    import resource

    out = []
    for _ in range(repeat):
        with tempfile.TemporaryDirectory() as tmp:
            before = resource.getrusage(resource.RUSAGE_CHILDREN)
            t = time.perf_counter()
            r = subprocess.run([sys.executable, "-m", "realopt", "report", str(project), "-o",
                                str(Path(tmp) / "report")], capture_output=True, text=True)
            w = time.perf_counter() - t
            after = resource.getrusage(resource.RUSAGE_CHILDREN)
            cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
            out.append((w, cpu))
            if r.returncode != 0:
                raise SystemExit(f"{project}: realopt report failed:\n{r.stderr}")
    return out


def stages(project: Path) -> dict:
    import realopt
    from realopt.outputs import figures, report, sensitivity
    from realopt.outputs.tables import Fmt

    cpu = time.process_time
    out = {}
    t = cpu()
    a = realopt.appraise(realopt.load_project(project))
    out["appraise"] = cpu() - t
    t = cpu()
    rows, notes = sensitivity.tornado(a)
    out["tornado"] = cpu() - t
    t = cpu()
    sensitivity.breakevens(a)
    out["break-evens"] = cpu() - t
    t = cpu()
    sensitivity.convergence(a)
    out["convergence"] = cpu() - t
    s = sensitivity.analyse(a)
    b = report.Built(a, s, Fmt(a.project), figures.charts(a, s))
    b.drawer = report._Drawer(a, s.moves, 300)          # not entered: draws in this process
    b.drawer.charts = {c.slug: c for c in b.charts}
    t = cpu()
    for c in b.charts:
        b.drawer.get(c.slug)
    out[f"figures ({len(b.charts)}, one process)"] = cpu() - t
    with tempfile.TemporaryDirectory() as tmp:
        t = cpu()
        report.write_pdf(b, Path(tmp) / "report.pdf")
        out[f"pdf ({len(b.pdf_pages)} pages)"] = cpu() - t
        t = cpu()
        report.render_html(b)
        report.render_markdown(b)
        out["html + markdown"] = cpu() - t
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("files", nargs="*", type=Path)
    parser.add_argument("--repeat", type=int, default=1)
    args = parser.parse_args()
    files = args.files or sorted((ROOT / "projects").glob("*.yaml"))
    # the report does not draw simulation results yet (realopt.simulation): lattice demos only
    files = [f for f in files if "\nvaluation: simulation" not in Path(f).read_text()]
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"cores: {os.cpu_count()}, load average (1 min): {load:.2f}; target {TARGET:g} s")
    for f in files:
        runs = wall(f, args.repeat)
        best = min(w for w, _ in runs)
        verdict = "ok" if best < TARGET else "OVER TARGET"
        print(f"{f.name:<22} realopt report wall {best:6.2f} s (best of {len(runs)}; "
              f"all {', '.join(f'{w:.2f}' for w, _ in runs)}; CPU of all processes "
              f"{', '.join(f'{c:.1f}' for _, c in runs)} s) {verdict}")
    print("\nstages, CPU seconds in one process:")
    for f in files:
        parts = stages(f)
        print(f"  {f.name}: " + "; ".join(f"{k} {v:.2f}" for k, v in parts.items()))
    return 0


if __name__ == "__main__":
    sys.exit(main())
