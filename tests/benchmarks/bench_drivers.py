"""Benchmark: driver simulation and volatility estimate, 100,000 paths x 20 years x 3 drivers.

Target (issue 5): under 2 s on the two-core development machine. Prints wall time (best of
``--repeat``) and peak traced memory (tracemalloc, numpy allocations included) for:

* the analytic route (formula linear in the drivers: only year-one values are simulated),
* the regression route (a nonlinear formula with tax: every year of every path is simulated);
* exact V0 with the regression route (an untaxed product of drivers: V0 from lognormal moments,
  every path still simulated for the volatility's regression).

V0 is printed with its standard error (0 when exact).

Run: python tests/benchmarks/bench_drivers.py [--paths 100000] [--repeat 3]
"""
from __future__ import annotations

import argparse
import time
import tracemalloc

from realopt.drivers import simulate_underlying
from realopt.model import Driver, DriverModel, Market, Schedule, VolatilityEstimate

MARKET = Market(risk_free_rate=0.03, discount_rate=0.08, compounding="annual")
DRIVERS = (
    Driver("price", "gbm", start=90.0, drift=0.02, volatility=0.18),
    Driver("unit_cost", "mean_reverting", start=30.0, long_run=32.0, speed=0.4, volatility=0.15),
    Driver("energy", "mean_reverting", start=8.0, long_run=7.0, speed=0.8, volatility=0.30),
    Driver("volume", "schedule", schedule=Schedule.from_points({1: 800, 5: 1000, 20: 900})),
)
CORRELATION = (("price", "unit_cost", 0.6), ("price", "energy", 0.3), ("unit_cost", "energy", 0.4))
CASES = {
    "analytic (linear formula)":
        DriverModel(years=(1, 20), drivers=DRIVERS, correlation=CORRELATION,
                    cash_flow="(price - unit_cost - energy) * volume / 1000 - 4.5"),
    "regression (max() and 25% tax)":
        DriverModel(years=(1, 20), drivers=DRIVERS, correlation=CORRELATION, tax_rate=0.25,
                    cash_flow="(max(price - unit_cost, 0.2 * price) - energy) * volume / 1000 "
                              "- 4.5"),
    "exact V0, regression (products)":
        DriverModel(years=(1, 20), drivers=DRIVERS, correlation=CORRELATION,
                    cash_flow="(price - unit_cost) * volume / 1000 + price * energy / 100 - 4.5"),
}


def run(model, paths: int, repeat: int):
    est = VolatilityEstimate(method="simulation", paths=paths, seed=7)
    simulate_underlying(model, est, MARKET)          # warm-up (imports, thread pools)
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        result = simulate_underlying(model, est, MARKET)
        best = min(best, time.perf_counter() - t0)
    tracemalloc.start()
    simulate_underlying(model, est, MARKET)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return best, peak, result


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--paths", type=int, default=100_000)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    print(f"{args.paths:,} paths x 20 years x 3 stochastic drivers (+1 schedule); target < 2 s")
    for name, model in CASES.items():
        best, peak, r = run(model, args.paths, args.repeat)
        print(f"  {name:32s} {best:6.3f} s   peak {peak / 2**20:6.1f} MiB   "
              f"sigma {r.volatility:.4f} +- {r.volatility_stderr:.4f}   V0 {r.present_value:,.2f} "
              f"+- {r.present_value_stderr:.2f}")


if __name__ == "__main__":
    main()
