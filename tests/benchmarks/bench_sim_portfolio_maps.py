"""What the portfolio's today-values and the decision-map dates add to a simulation appraisal;
prints figures and ratios (not a test).

    python tests/benchmarks/bench_sim_portfolio_maps.py [--paths N]

On projects/river_ccgt.yaml (three drivers, a defer right and a mothball switch, 15 years, 12
decision dates a year; 50,000 + 50,000 paths unless --paths):

1. the appraisal's CPU seconds (``appraise(progress=False)``);
2. the choice of the decision-map dates (``result._map_dates``, every state with a choice):
   CPU seconds and share of the appraisal. Target: small against the appraisal;
3. ``appraise(today=True)`` (realopt portfolio): the extra forward pass that values the decision
   the fitted policy does not take today (``result._today_choices``): CPU seconds and share.

CPU seconds (process time) are steadier than wall seconds on the shared machine; the load
average is printed.
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

import realopt  # noqa: E402
from realopt.simulation import result  # noqa: E402


def _timed(name, spent):
    orig = getattr(result, name)

    def wrapper(*a, **k):
        t = time.process_time()
        try:
            return orig(*a, **k)
        finally:
            spent[name] = spent.get(name, 0.0) + time.process_time() - t

    setattr(result, name, wrapper)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--paths", type=int, default=None)
    args = ap.parse_args()
    over = {"simulation.paths": args.paths} if args.paths else None
    project = realopt.load_project(ROOT / "projects" / "river_ccgt.yaml", over)
    print(f"load average {os.getloadavg()[0]:.2f}; {project.simulation.paths:,} + "
          f"{project.simulation.paths:,} paths")
    spent: dict = {}
    _timed("_map_dates", spent)
    _timed("_today_choices", spent)
    t = time.process_time()
    a = result.appraise(project, progress=False)
    plain = time.process_time() - t
    maps = spent.pop("_map_dates")
    print(f"appraisal: {plain:.2f} CPU s; choosing the map dates: {maps:.3f} CPU s "
          f"({100 * maps / plain:.2f}% of the appraisal); {len(a.driver_maps)} maps")
    t = time.process_time()
    b = result.appraise(project, progress=False, today=True)
    today = time.process_time() - t
    extra = spent["_today_choices"]
    print(f"appraisal with today's choices: {today:.2f} CPU s; the choices: {extra:.3f} CPU s "
          f"({100 * extra / plain:.1f}% of the appraisal)")
    tc = b.today_choices
    print(f"commit now {tc['commit_now_value']:.2f} +- {tc['commit_now_se']:.2f}, keep the "
          f"option {tc['keep_option_value']:.2f} +- {tc['keep_option_se']:.2f} (difference +- "
          f"{tc['commit_minus_keep_se']:.2f}); expanded NPV {b.expanded_npv:.2f}")


if __name__ == "__main__":
    main()
