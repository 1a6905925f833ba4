"""Valuation on the drivers (``valuation: simulation``): least-squares Monte Carlo.

``paths``: risk-neutral and real-world driver paths with exact transitions; ``lsm``: the
Longstaff-Schwartz policy over the rights' state graph, valued on independent paths, with the dual
upper bound; ``result``: the appraisal result (same headline keys as the lattice's, plus standard
errors). Public entry: :func:`appraise`.
"""
from .result import appraise, plan  # noqa: F401

__all__ = ["appraise", "plan"]
