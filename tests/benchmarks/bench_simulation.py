"""Speed, memory and accuracy of valuation: simulation; prints figures and ratios (not a test).

    python tests/benchmarks/bench_simulation.py [--quick]

1. The Bermudan put of Longstaff & Schwartz (2001), Table 1 (S = 36, K = 40, r = 6%, sigma = 0.2,
   T = 1, 50 dates a year; 4.478 recalled from memory) as a sale right on a project worth one
   driver: the full appraisal with 50,000 paths to fit and 50,000 to value, against QuantLib's
   MCAmericanEngine with the same samples (50,000 calibration + 50,000 pricing, antithetic), dates
   (50 steps) and polynomial order (3, monomials). Target: no slower than QuantLib and no larger
   standard error (aim: half its time).
2. The three-driver plant projects/river_ccgt.yaml (build-timing defer right and a mothball
   switch, 15 years, 12 decision dates a year, 50,000 + 50,000 paths): the full appraisal with
   Shapley shares, run as `realopt appraise` in a child process: wall and CPU seconds and peak
   resident memory. Target: 20 s or less on 2 cores, 2 GB or less.

3. The dual upper bound (Andersen & Broadie 2004, nested simulation; realopt/simulation/bound.py)
   on the Bermudan put with 1,000 outer x 100 inner paths (the gap to the lower estimate as a
   share of the option value, against the fitted value function's bound lsm.upper_bound on the
   same outer paths, 2.7% before), and on projects/river_ccgt.yaml with 100 x 20 (target: the
   whole appraisal with the bound under about 60 s); CPU seconds beside `realopt check`'s
   estimate.

The machine is shared by several engineers: wall times move with its load (the load average is
printed); CPU seconds are steadier.
"""
from __future__ import annotations

import os
import resource
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

import realopt  # noqa: E402
from realopt.project import loads  # noqa: E402

PUT = """
project: {{name: Bermudan put as a sale right}}
valuation: simulation
simulation: {{paths: {paths}, seed: 3, steps_per_year: 50, basis: 3}}
market: {{risk_free_rate: 0.06, compounding: continuous, discount_rate: 0.06}}
underlying:
  years: [2, 2]
  drivers:
    S: {{process: gbm, start: 36, drift: 0.06, volatility: 0.2, risk_neutral: {{drift: 0.06}}}}
  cash_flow: S
investment: {{cost: 0}}
rights:
  - {{name: Sell, type: abandon, salvage: 40, window: [0, 1], exercise: bermudan,
     dates: [{dates}]}}
"""


def quantlib_put(paths: int, seed: int = 42):
    import QuantLib as ql

    today = ql.Date(15, 1, 2026)
    ql.Settings.instance().evaluationDate = today
    dc = ql.Actual365Fixed()
    maturity = today + 365
    spot = ql.QuoteHandle(ql.SimpleQuote(36.0))
    rts = ql.YieldTermStructureHandle(ql.FlatForward(today, 0.06, dc))
    qts = ql.YieldTermStructureHandle(ql.FlatForward(today, 0.0, dc))
    vol = ql.BlackVolTermStructureHandle(ql.BlackConstantVol(today, ql.NullCalendar(), 0.2, dc))
    process = ql.BlackScholesMertonProcess(spot, qts, rts, vol)
    option = ql.VanillaOption(ql.PlainVanillaPayoff(ql.Option.Put, 40.0),
                              ql.AmericanExercise(today, maturity))
    engine = ql.MCAmericanEngine(process, "pseudorandom", timeSteps=50, antitheticVariate=True,
                                 requiredSamples=paths, nCalibrationSamples=2 * paths, seed=seed,
                                 polynomOrder=3, polynomType=ql.LsmBasisSystem.Monomial)
    option.setPricingEngine(engine)
    t = time.perf_counter()
    npv = option.NPV()
    return time.perf_counter() - t, npv, option.errorEstimate()


def ours_put(paths: int):
    p = loads(PUT.format(paths=paths, dates=", ".join(f"{k / 50:g}" for k in range(1, 51))))
    t = time.perf_counter()
    a = realopt.appraise(p)
    return time.perf_counter() - t, a


def plant(paths: int, extra=()):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    res = subprocess.run([sys.executable, "-m", "realopt", "appraise",
                          str(ROOT / "projects" / "river_ccgt.yaml"), "--json",
                          "--set", f"simulation.paths={paths}", *extra],
                         capture_output=True, text=True, env=env)
    wall = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if res.returncode:
        raise SystemExit(res.stderr)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    import json

    return wall, cpu, after.ru_maxrss * 1024, json.loads(res.stdout)


def main():
    quick = "--quick" in sys.argv
    n = 10000 if quick else 50000
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    print(f"\n1. Bermudan put (Longstaff & Schwartz 2001, Table 1; 4.478 recalled from memory), "
          f"{n:,} + {n:,} paths, 50 dates")
    # QuantLib counts an antithetic pair as one sample: n/2 samples are n paths, as ours
    ql_t, ql_v, ql_se = min((quantlib_put(n // 2) for _ in range(2)), key=lambda r: r[0])
    ql2_t, ql2_v, ql2_se = min((quantlib_put(n) for _ in range(2)), key=lambda r: r[0])
    our_t, a = min((ours_put(n) for _ in range(2)), key=lambda r: r[0])
    se = a.standard_error["flexibility_value"]
    print(f"   realopt  : put {a.flexibility_value:.4f} +- {se:.4f}  ({our_t:.2f} s, full "
          f"appraisal: both subsets, rules, chances of use)")
    print(f"   QuantLib : put {ql_v:.4f} +- {ql_se:.4f}  ({ql_t:.2f} s, MCAmericanEngine, "
          f"{n // 2:,} antithetic samples = {n:,} paths to price, {n // 2:,} to calibrate)")
    print(f"   QuantLib : put {ql2_v:.4f} +- {ql2_se:.4f}  ({ql2_t:.2f} s, {n:,} antithetic "
          f"samples = {2 * n:,} paths; twice ours)")
    print(f"   time ratio realopt/QuantLib {our_t / ql_t:.2f} (target <= 1, aim 0.5); "
          f"standard-error ratio {se / ql_se:.2f} (target <= 1)")
    print(f"\n2. Three-driver plant (projects/river_ccgt.yaml), {n:,} + {n:,} paths, "
          "12 dates a year, 15 years")
    wall, cpu, rss, d = plant(n)
    se = d["standard_error"]
    print(f"   expanded NPV {d['expanded_npv']:.2f} +- {se['expanded_npv']:.2f}, flexibility "
          f"{d['flexibility_value']:.2f} +- {se['flexibility_value']:.2f}; "
          + "; ".join(f"{r['name']}: Shapley {r['shapley_value']:.2f} +- "
                      f"{r['shapley_standard_error']:.2f}" for r in d["rights"]))
    print(f"   wall {wall:.1f} s (target <= 20 s), CPU {cpu:.1f} s, peak memory "
          f"{rss / 1e9:.2f} GB (target <= 2 GB); load average now {os.getloadavg()[0]:.1f}")


def put_bounds(n: int, outer: int, inner: int):
    """The nested bound and the fitted value function's bound on the same outer paths."""
    import numpy as np

    from realopt.rights import build_state_graph, prepared_rights
    from realopt.simulation import bound, lsm
    from realopt.simulation.paths import dynamics, simulate

    p = loads(PUT.format(paths=n, dates=", ".join(f"{k / 50:g}" for k in range(1, 51))))
    prob = lsm.Problem(p)
    rights = prepared_rights(p)
    graph = build_state_graph(rights)
    open_by = {r.name: lsm.open_mask(r, prob.times, 50) for r in rights}
    dyn = dynamics(prob.model)
    x_fit = simulate(dyn, prob.times, n, 3, "fit", True)
    pol = lsm.fit(prob, graph, x_fit, [prob.basis.stats(x) for x in x_fit], open_by,
                  all_states=True)
    del x_fit
    x_val = simulate(dyn, prob.times, n, 3, "value", True)
    mart = lsm.martingale_increments(prob, dyn, x_val)
    res = lsm.run(prob, pol, x_val, mart=mart)
    low = res.values - res.correction
    low = 0.5 * (low[: n // 2] + low[n // 2:])
    del x_val
    outer_x = simulate(dyn, prob.times, outer, 3, "upper", True)
    out = {}
    for name, fn in (("nested", bound.nested_upper_bound), ("fitted", lsm.upper_bound)):
        c, t = time.process_time(), time.perf_counter()
        z = fn(prob, pol, dyn, outer_x, inner, 3)
        z = 0.5 * (z[: outer // 2] + z[outer // 2:])
        out[name] = (float(z.mean()), float(z.std(ddof=1) / np.sqrt(z.size)),
                     time.perf_counter() - t, time.process_time() - c)
    est = bound.plan(prob, graph, open_by, outer, inner).seconds_estimate
    return float(low.mean()), float(low.std(ddof=1) / np.sqrt(low.size)), out, est


def bounds(quick: bool):
    outer, inner = (200, 50) if quick else (1000, 100)
    print(f"\n3. Dual upper bound, Bermudan put: {outer:,} outer x {inner} inner paths "
          "(policy fitted on 50,000 paths, lower estimate on 50,000 more)")
    low, low_se, out, est = put_bounds(50000, outer, inner)
    option = low - 36.0
    for name, label in (("nested", "nested (Andersen & Broadie 2004)"),
                        ("fitted", "fitted value function, one-step")):
        v, e, wall, cpu = out[name]
        print(f"   {label:34s}: {v:.4f} +- {e:.4f}; gap {v - low:.4f} = "
              f"{100 * (v - low) / option:.2f}% of the option value {option:.4f} "
              f"({wall:.1f} s wall, {cpu:.1f} s CPU)")
    print(f"   lower estimate {low:.4f} +- {low_se:.4f}; lattice Bermudan value 40.4784 (the "
          f"project's own lattice, 1,000 steps a year); check's time estimate for the nested "
          f"bound {est:.1f} s (an upper estimate: sale paths end early)")
    n = 10000 if quick else 50000
    o2, i2 = (40, 10) if quick else (100, 20)
    print(f"\n   projects/river_ccgt.yaml, {n:,} + {n:,} paths, bound {o2} x {i2}:")
    wall, cpu, rss, d = plant(n, ("--set", f"simulation.upper_bound={{paths: {o2}, inner: {i2}}}"))
    ub = d["upper_bound"]
    share = ub["gap_share"]
    print(f"   expanded NPV {d['expanded_npv']:.2f} +- {d['standard_error']['expanded_npv']:.2f}, "
          f"bound {ub['value']:.2f} +- {ub['standard_error']:.2f}, gap {ub['gap']:.2f}"
          + (f" = {100 * share:.1f}% of the flexibility value" if share is not None else "")
          + f"; wall {wall:.1f} s (target about 60 s), CPU {cpu:.1f} s, peak memory "
          f"{rss / 1e9:.2f} GB")


if __name__ == "__main__":
    main()
    bounds("--quick" in sys.argv)
