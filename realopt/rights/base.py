"""The hooks every right type answers (defaults here; each type module overrides its own).

A right type is one module of :mod:`realopt.rights` holding a frozen dataclass derived from
:class:`BaseRight` and registered in :mod:`realopt.rights.registry`. Its hooks:

* file: ``KEYS`` (beside the common name/type/window/exercise/dates/requires/excludes),
  ``parse(loader, path, item)`` -> the type's own fields or None (after a located problem was
  recorded on the loader), ``raw()`` -> those keys as a project file writes them;
* state graph: ``moves(used, modes, slot)`` -> the edges out of an invested state,
  ``is_used(...)`` (for requires/excludes), ``scale_fixed(used, mode)`` -> (multiplier, added
  yearly flow) of a state;
* wording: ``what(money)`` (the rule's action), ``input_rows(f, schedule_text)`` (inputs table),
  ``base_part()`` (its share of the base project's description);
* sensitivities: ``money_inputs(at)`` and ``scale_inputs(at)`` (the tornado's inputs as
  dotted-key overrides on the raw tree, ``at`` = "rights.<i>"), ``cost_overrides(at, k)`` (the
  investment-cost break-even's move);
* results: ``primary_states(graph)`` (states its rule is read from), ``chance_of_use(...)``;
* tests: ``example()`` -> a small right of this type for :func:`realopt.rights.registry.
  example_project` (the common checks in tests/test_right_types.py run on it).

Times in years; money in the project's currency and unit; a move's amount is a Schedule of the
exercise date, received with ``sign`` +1 or paid with ``sign`` -1.
"""
from __future__ import annotations

import enum
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from ..model import Right


class Action(str, enum.Enum):
    """What an edge of the state graph does (its label is the wording shown)."""

    COMMIT = "commit"
    EXPAND = "expand"
    CONTRACT = "contract"
    ABANDON = "abandon"
    SWITCH = "switch"

    def __str__(self) -> str:
        return self.value


@dataclass(frozen=True, kw_only=True)
class BaseRight(Right):
    """Default hooks (a one-shot right with no money and no scale)."""

    # ---- file --------------------------------------------------------------------------
    # bounds of the type's own fields, read by realopt.validate for files and Python-built
    # projects alike: field -> keyword arguments of validate.Rule; and the money schedules that
    # must not go below 0: field -> what it is (the loader's words)
    FIELD_RULES: ClassVar[dict] = {}
    NONNEG_SCHEDULES: ClassVar[dict] = {}

    @classmethod
    def parse(cls, ld, path, item) -> dict | None:
        return {}

    def raw(self) -> dict:
        return {}

    @classmethod
    def example(cls):
        raise NotImplementedError(f"the right type {cls.kind!r} supplies no example()")

    # ---- state graph -------------------------------------------------------------------
    def is_used(self, invested, abandoned, used, modes, slot) -> bool:
        return self.name in used

    def moves(self, used, modes, slot) -> list:
        """Edges out of an invested, not abandoned state: (used', modes' or None for the
        closed project, amount Schedule, sign, Action, label)."""
        return []

    def scale_fixed(self, used, mode) -> tuple[float, float]:
        """(multiplier on the base cash flows, added fixed yearly flow) of a state."""
        return 1.0, 0.0

    # ---- wording -----------------------------------------------------------------------
    def what(self, money: str) -> str:
        return self.kind

    def input_rows(self, f, schedule_text) -> list[tuple[str, str]]:
        return []

    def base_part(self) -> str | None:
        return None

    # proceeds received on exercise that end (a share of) the project, e.g. "salvage": warned
    # about when the right is open at the last cash-flow date (see graph.structure_warnings)
    proceeds: ClassVar[str | None] = None

    def terminal_share(self) -> str:
        """What the proceeds do to the terminal value when used at the last cash-flow date."""
        return "replaces the terminal value"

    def action_text(self, edge) -> str:
        """The action named in thresholds: the type's own name (a modal right: the move)."""
        return self.kind

    # ---- sensitivities -----------------------------------------------------------------
    def money_inputs(self, at: str) -> list:
        return []

    def scale_inputs(self, at: str) -> list:
        return []

    def cost_overrides(self, at: str, k: float) -> dict:
        return {}

    # ---- results -----------------------------------------------------------------------
    def primary_states(self, graph, closure) -> list[int]:
        """States from which the rule is read: the project invested, the rights this one
        requires used (``closure``: their names, realopt.rights.requirement_closure less this
        right), every modal right at its start mode."""
        by_name = {r.name: r for r in graph.rights}
        used = frozenset(n for n in closure if by_name[n].one_shot)
        modals = [s for s in graph.rights if s.modal]
        modes = [s.start for s in modals]
        for n in closure:
            s = by_name[n]
            if s.modal:                       # required modal right: read in its first other mode
                modes[modals.index(s)] = next(m.name for m in s.modes if m.name != s.start)
        return self._primary(graph, used, modes, modals)

    def _primary(self, graph, used, modes, modals) -> list[int]:
        idx = graph.index(used=used, modes=tuple(modes))
        return [] if idx is None else [idx]

    def chance_of_use(self, graph, edge_ids, occ, first_uses):
        """(risk-neutral, real-world cumulative chance of use at every step, what it counts,
        mode shares or None). ``occ``: (state_prob at the sampled steps, exercised at every
        step) of the solution's forward pass (realopt.lattice.occupancy), each with a leading
        axis of the two measures (risk-neutral, real-world); ``first_uses(edge_ids)``: the
        exercised array of a pass that drops the paths once they take one of those edges."""
        rn_use = np.cumsum(occ[1][0][:, edge_ids].sum(axis=1))
        rw_use = np.cumsum(occ[1][1][:, edge_ids].sum(axis=1))
        return rn_use, rw_use, "chance that the right has been exercised by each date", None


def threshold_side(thresholds) -> str | None:
    """Where a right's exercise region mostly lies against the state variable: "above" (use it
    when the value exceeds a threshold), "below", "band", or None (never used). ``thresholds``
    have ``lower``/``upper`` bounds (None: unbounded) and ``never``; shared by the lattice and
    the simulation's rules."""
    live = [t for t in thresholds
            if not t.never and (t.lower is not None or t.upper is not None)]
    if not live:
        return None
    ab = sum(1 for t in live if t.lower is not None and t.upper is None)
    be = sum(1 for t in live if t.upper is not None and t.lower is None)
    if ab >= be and ab > 0:
        return "above"
    if be > ab:
        return "below"
    return "band"
