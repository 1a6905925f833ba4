"""Simulation project texts shared by the tests (tests/test_simulation.py at the paths its
references need; tests/test_sim_sensitivity.py at fewer, through :func:`at_paths`)."""
from __future__ import annotations

import re


def at_paths(text: str, paths: int) -> str:
    """``text`` with its ``simulation.paths`` set to ``paths`` (the first ``paths:`` key)."""
    return re.sub(r"paths: \d+", f"paths: {paths}", text, count=1)


# a one-time switch between two gbm drivers: Margrabe's exchange option
EXCHANGE = """
project: {name: exchange}
valuation: simulation
simulation: {paths: 40000, seed: 5, basis: 2}
market: {risk_free_rate: 0.05, compounding: continuous, discount_rate: 0.05}
underlying:
  years: [2, 2]
  drivers:
    A: {process: gbm, start: 100, volatility: 0.3, risk_neutral: {drift: 0.05}}
    B: {process: gbm, start: 95, volatility: 0.2,
        risk_neutral: {forward: {1: 99.87075415572, 2: 104.99123721719}}}
  correlation: [[A, B, 0.4]]
  cash_flow: A
investment: {cost: 0}
rights:
  - name: Change over
    type: switch
    modes: {first: {}, second: {cash_flow: B}}
    costs: {first->second: 0}
    window: [1, 1]
    exercise: european
"""

# the whole state graph; GRAPH.format(valuation=..., vol=...) for either method
GRAPH = """
project: {{name: graph}}
{valuation}
market: {{risk_free_rate: 0.05, compounding: continuous, discount_rate: 0.08}}
underlying:
  years: [1, 8]
  drivers:
    X: {{process: gbm, start: 12, drift: 0.08, volatility: 0.35, risk_neutral: {{drift: 0.05}}}}
  cash_flow: X
{vol}investment: {{cost: 80}}
rights:
  - {{name: Wait, type: defer, window: [0, 3], exercise: bermudan, dates: [0, 1, 2, 3]}}
  - {{name: Grow, type: expand, scale: 0.4, cost: 30, window: [1, 6], exercise: bermudan,
     dates: [1, 2, 3, 4, 5, 6], requires: [Wait]}}
  - {{name: Idle, type: switch, modes: {{run: {{}}, idle: {{scale: 0, fixed: -1.0}}}},
     costs: {{run->idle: 0.5, idle->run: 1.5}}, window: [1, 7], exercise: bermudan,
     dates: [1, 2, 3, 4, 5, 6, 7]}}
  - {{name: Sell, type: abandon, salvage: 35, window: [1, 7], exercise: bermudan,
     dates: [1, 2, 3, 4, 5, 6, 7], excludes: [Grow]}}
"""

# a salvage formula over the driver: half a European put struck at 50
FORMULA = """
project: {name: formula salvage}
valuation: simulation
simulation: {paths: 20000, seed: 1}
market: {risk_free_rate: 0.06, compounding: continuous, discount_rate: 0.06}
underlying:
  years: [2, 2]
  drivers:
    S: {process: gbm, start: 36, volatility: 0.2, risk_neutral: {drift: 0.06}}
  cash_flow: S
investment: {cost: 0}
rights:
  - {name: Sell, type: abandon, salvage: 0.5 * S + 25, window: [1, 1], exercise: european}
"""

# spread timing on one gbm driver
SPREAD = """
project: {name: spread}
valuation: simulation
simulation: {paths: 2000, steps_per_year: 4}
market: {risk_free_rate: 0.04, compounding: continuous, discount_rate: 0.04}
underlying:
  years: [1, 3]
  flow_timing: spread
  drivers:
    X: {process: gbm, start: 10, volatility: 0.3, risk_neutral: {drift: 0.04}}
  cash_flow: X
investment: {cost: 0}
rights:
  - {name: Sell, type: abandon, salvage: 0, window: [0, 3]}
"""

# drivers that are all schedules: exact dynamic programming
SCHEDULES = """
project: {name: schedules}
valuation: simulation
simulation: {paths: 5000, steps_per_year: 1}
market: {risk_free_rate: 0.04, compounding: continuous, discount_rate: 0.04}
underlying:
  years: [1, 12]
  drivers:
    price: {schedule: {0: 40, 12: 70}}
    cost: {schedule: {0: 50, 12: 45}}
  cash_flow: price - cost
investment: {cost: 30}
rights:
  - {name: Wait, type: defer, window: [0, 6]}
"""
