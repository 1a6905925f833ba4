"""The keys a project file may hold, section by section (unknown keys are refused), and the
thresholds above which the loader warns."""
from __future__ import annotations

from ..rights.registry import right_keys

VOLATILITY_WARN = 1.5             # yearly sigma above which the loader warns
RATE_WARN = 1.0                   # a yearly rate above 100% is a percentage typo: refused

TOP_KEYS = ("project", "market", "underlying", "investment", "lattice", "rights",
            "valuation", "simulation")
PROJECT_KEYS = ("name", "currency", "unit")
MARKET_KEYS = ("risk_free_rate", "compounding", "discount_rate")
CASH_FLOW_KEYS = ("cash_flows", "terminal_value", "flow_timing")
PV_KEYS = ("present_value", "payout_yield")
DRIVER_FORM_KEYS = ("years", "drivers", "correlation", "cash_flow", "tax_rate")
UNDERLYING_KEYS = CASH_FLOW_KEYS + PV_KEYS + DRIVER_FORM_KEYS + ("volatility",)
LATTICE_KEYS = ("steps_per_year", "up", "down", "step_years")
COMMON_RIGHT_KEYS = ("name", "type", "window", "exercise", "dates", "requires", "excludes")
RIGHT_KEYS = right_keys()         # kind -> its keys, from the registry (realopt.rights)
FORECAST_KEYS = ("file", "year", "value", "sheet")
