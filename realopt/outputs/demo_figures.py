"""Regenerate figures/ from the demo projects: ``python -m realopt.outputs.demo_figures``.

For every ``projects/*.yaml`` (or the files named on the command line) the project is valued
and its report figures are written to ``figures/<file stem>/<figure>.png`` (150 dpi by default,
``--dpi 300`` for print). Each project's folder is replaced whole, through a temporary folder,
so an interrupted run leaves the previous figures as they were.
"""
from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


class _Slug:
    def __init__(self, slug):
        self.slug = slug


def regenerate(project_file: Path, out_root: Path, dpi: int) -> list[Path]:
    import realopt

    from .figures import charts
    from .report import render_all
    from .sensitivity import analyse

    a = realopt.appraise(realopt.load_project(project_file))
    if getattr(a, "method", "") == "simulation":        # the simulation report's figures
        from .sim_report import draw
        from .sim_sensitivity import start
        from .tables import Fmt

        with start(a) as tornado:                       # its copies run while others draw
            pngs = draw(a, Fmt(a.project), dpi, tornado)
        cs = [_Slug(s) for s in pngs]
        drawn = [(pngs[s][0], None) for s in pngs]
    else:
        cs = charts(a, analyse(a))
        drawn = render_all(cs, dpi)
    final = out_root / project_file.stem
    out_root.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{final.name}.tmp-", dir=out_root))
    try:
        tmp.chmod(0o755)
        for chart, (png, _) in zip(cs, drawn):
            (tmp / f"{chart.slug}.png").write_bytes(png)
        old = None
        if final.exists():
            old = out_root / f".{final.name}.old-{os.getpid()}"
            os.rename(final, old)
        os.rename(tmp, final)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return sorted(final.glob("*.png"))


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m realopt.outputs.demo_figures",
        description="Regenerate figures/<project>/*.png from the demo projects.")
    parser.add_argument("files", nargs="*", type=Path,
                        help="project files (default: projects/*.yaml of this checkout)")
    parser.add_argument("--out", type=Path, default=ROOT / "figures",
                        help="output folder (default: figures/ of this checkout)")
    parser.add_argument("--dpi", type=int, default=150, help="resolution (default 150)")
    args = parser.parse_args(argv)
    files = args.files or sorted((ROOT / "projects").glob("*.yaml"))
    if not files:
        print("no project files found", file=sys.stderr)
        return 1
    from ..errors import RealoptError

    status = 0
    for f in files:
        t = time.perf_counter()
        try:
            pngs = regenerate(f, args.out, args.dpi)
        except RealoptError as err:
            print(f"{f}: {err}", file=sys.stderr)
            status = 1
            continue
        print(f"{f.name}: {len(pngs)} figures in {args.out / f.stem} "
              f"({time.perf_counter() - t:.1f} s)")
    return status


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
