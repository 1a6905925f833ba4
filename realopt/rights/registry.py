"""The registry of right types: one module each, listed once here.

``RIGHT_TYPES`` maps the file's ``type:`` to the dataclass (file order of the list below is the
order shown in messages). Adding a type: write its module (see :mod:`realopt.rights.base` for the
hooks) and add its class to ``_TYPES``; tests/test_right_types.py then runs the common checks on
its ``example()``.
"""
from __future__ import annotations

from .abandon import Abandon
from .contract import Contract
from .defer import Defer
from .expand import Expand
from .shutdown import Shutdown
from .switch import Switch

_TYPES = (Defer, Expand, Contract, Abandon, Switch, Shutdown)

RIGHT_TYPES: dict[str, type] = {cls.kind: cls for cls in _TYPES}


def right_type(kind: str):
    """The dataclass of the right type ``kind`` (KeyError for an unknown kind)."""
    return RIGHT_TYPES[kind]


def right_keys() -> dict[str, tuple[str, ...]]:
    """kind -> the file keys of that type (beside the common ones)."""
    return {kind: cls.KEYS for kind, cls in RIGHT_TYPES.items()}


def example_project(*rights, **changes):
    """The standard test project the types' examples are written for: expected cash flows of 20
    a year for 5 years except -8 in year 3 (an overhaul year, so that a shutdown can pay), no
    terminal value, investment 80 today, volatility 30%, risk-free 5% and discount 10% (annual),
    12 steps a year. ``changes`` replace Project fields."""
    from dataclasses import replace

    from ..model import Investment, LatticeSpec, Market, Project, Underlying

    flows = ((1.0, 20.0), (2.0, 20.0), (3.0, -8.0), (4.0, 20.0), (5.0, 20.0))
    p = Project(name="example", market=Market(0.05, 0.10),
                underlying=Underlying(cash_flows=flows, volatility=0.30),
                investment=Investment(outlays=((0.0, 80.0),)), rights=tuple(rights),
                lattice=LatticeSpec(steps_per_year=12))
    return replace(p, **changes) if changes else p
