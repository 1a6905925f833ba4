"""Load a YAML project file into a validated :class:`realopt.model.Project`.

Validation happens here, once, at the boundary; later stages trust the Project. Every problem
found is reported together in one :class:`realopt.errors.ProjectError`, in file order, each naming
the file, line, column and key path, what was found, what was expected and how to fix it. Paths
inside a file (forecast CSVs, price histories) resolve against the folder of that file.

``overrides`` (the command line's ``--set KEY=VALUE``) are dotted key paths applied to the raw tree
before validation; a list item of ``rights`` is addressed by its index or its name
(``rights.Sell the line.salvage``).

Units and conventions are those of :mod:`realopt.model`: years from today, yearly rates
compounded as ``market.compounding`` says, money in the project's currency and unit.

Modules, in the order the data flows through them:

- ``reading``: bytes -> text -> YAML nodes -> :class:`Tree` (plain data, line/column of each value)
- ``overrides``: ``--set`` key paths applied to the tree (``apply_overrides``, ``parse_value``)
- ``paths``, ``keys``: key paths and descriptions of values; the keys each section accepts
- ``primitives``: locating problems; checked readers of one value (number, schedule, choice, ...)
- ``market``, ``underlying_section``, ``drivers_section``, ``rights_section``: one per section
- ``crosschecks``: links between rights and checks reading several sections
- ``builder``: the builder reading the sections in dependency order

Order in which the sections depend on each other (``builder._Builder.build``):

1. project (name, currency, unit): nothing.
2. the underlying's *form* (cash flows, present value or drivers), read from its keys alone.
3. market: needs the form (``discount_rate`` may be left out with ``present_value``).
4. lattice: nothing (steps per year, or explicit up/down/step_years).
5. underlying: needs the form and the lattice (explicit factors make the volatility unused);
   its drivers form reads the drivers before their correlations and the formula.
6. investment: nothing to read; valued with the market in the cross-checks.
7. rights: need the lattice (dates on an explicit grid); each right's common keys before its
   type's keys; the links between rights (requires/excludes) after all rights.
8. cross-checks: market, underlying, investment, rights and lattice together; they run only when
   every section read without a problem.
"""
from __future__ import annotations

import copy
from dataclasses import replace
from pathlib import Path
from typing import Any, Mapping

from .. import model
from .builder import _Builder
from .keys import (CASH_FLOW_KEYS, COMMON_RIGHT_KEYS, DRIVER_FORM_KEYS, FORECAST_KEYS,
                   LATTICE_KEYS, MARKET_KEYS, PROJECT_KEYS, PV_KEYS, RATE_WARN, RIGHT_KEYS,
                   TOP_KEYS, UNDERLYING_KEYS, VOLATILITY_WARN)
from .overrides import apply_overrides, parse_value
from .paths import Index, describe, format_path
from .reading import MAX_DEPTH, MAX_FILE_BYTES, MAX_NODES, Tree, parse_bytes, parse_text, read_tree

__all__ = [
    "CASH_FLOW_KEYS", "COMMON_RIGHT_KEYS", "DRIVER_FORM_KEYS", "FORECAST_KEYS", "LATTICE_KEYS",
    "MARKET_KEYS", "PROJECT_KEYS", "PV_KEYS", "RATE_WARN", "RIGHT_KEYS", "TOP_KEYS",
    "UNDERLYING_KEYS", "VOLATILITY_WARN", "MAX_DEPTH", "MAX_FILE_BYTES", "MAX_NODES",
    "Index", "Tree", "apply_overrides", "build_project", "describe", "format_path",
    "load_project", "loads", "parse_bytes", "parse_text", "parse_value", "read_tree",
]


# --------------------------------------------------------------------------------------------
# Public entry points


def build_project(tree: Tree, base_dir) -> model.Project:
    """Validate a raw :class:`Tree` into a Project (ProjectError lists every problem); the
    Project keeps a copy of the raw tree as ``origin`` (data, folder) for moved copies."""
    origin = (copy.deepcopy(tree.data), str(Path(base_dir).resolve()))
    return replace(_Builder(tree, Path(base_dir)).build(), origin=origin)


def load_project(path, overrides: Mapping[str, Any] | None = None, *,
                 labels: Mapping[str, str] | None = None) -> model.Project:
    """Read, override (dotted key paths) and validate a YAML project file.

    Raises :class:`realopt.errors.ProjectError` naming every problem with its file, line, column
    and key path. Paths inside the file resolve against the file's folder.
    """
    tree = read_tree(path)
    if overrides:
        apply_overrides(tree, overrides, labels)
    return build_project(tree, Path(path).resolve().parent)


def loads(text: str, source: str = "<text>", base_dir=".",
          overrides: Mapping[str, Any] | None = None) -> model.Project:
    """Like :func:`load_project` for YAML text (tests, notebooks)."""
    tree = parse_text(text, source)
    if overrides:
        apply_overrides(tree, overrides)
    return build_project(tree, Path(base_dir))
