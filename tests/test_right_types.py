"""Common checks run for every registered right type (realopt.rights.registry.RIGHT_TYPES).

Each type module supplies ``example()``: a small right of its type for the standard test project
(``registry.example_project``). A type registered without an example fails here. The checks are
identities of the method or facts of the trade, stated beside each:

* flexibility >= 0: a right need not be used, so it cannot lower the value (common practice);
  each example is also worth something (> 1e-3), so the checks below are not vacuous;
* Shapley shares add up to the flexibility value (efficiency of the Shapley value: Shapley 1953,
  "A value for n-person games"), with a partner right so that interaction is non-zero;
* a zero-size sensitivity move reproduces the base value exactly (the moved copy goes through
  the loader, as --set does; see realopt/outputs/sensitivity.py);
* a window after the last cash-flow date adds exactly 0 (the project has ended; a commit right
  then leaves only the choice today: invest now or never, worth max(static NPV, 0));
* American >= Bermudan >= European within 1e-9, the Bermudan dates holding the window's end
  (more exercise dates cannot lower the value of an optimally used right; common practice).
"""
from __future__ import annotations

from dataclasses import dataclass, replace
from typing import ClassVar

import pytest

import realopt
from realopt.outputs import sensitivity as S
from realopt.rights import base, registry

TYPES = list(registry.RIGHT_TYPES.items())
IDS = [k for k, _ in TYPES]
ZERO = S.Moves(volatility=0.0, rates=0.0, relative=0.0)


def _example(cls):
    r = cls.example()
    assert type(r) is cls, f"{cls.kind}.example() returns a {type(r).__name__}"
    return r


def _partner(r):
    """Another type's example to value beside ``r`` (abandon, or expand beside an abandon)."""
    other = registry.right_type("expand" if r.ends else "abandon").example()
    return other if other.name != r.name else replace(other, name=other.name + " 2")


@pytest.mark.parametrize("kind,cls", TYPES, ids=IDS)
def test_the_type_answers_every_hook(kind, cls):
    assert issubclass(cls, base.BaseRight) and cls.kind == kind
    assert registry.right_type(kind) is cls
    assert set(cls.KEYS).isdisjoint({"name", "type", "window", "exercise", "dates", "requires",
                                     "excludes"})
    r = _example(cls)
    assert set(r.raw()) <= set(cls.KEYS)            # written back under its own keys only
    assert isinstance(r.what("{:,.2f}"), str) and r.what("{:,.2f}")


@pytest.mark.parametrize("kind,cls", TYPES, ids=IDS)
def test_flexibility_is_not_negative_and_the_example_is_worth_something(kind, cls):
    a = realopt.appraise(registry.example_project(_example(cls)))
    assert a.flexibility_value >= 0.0
    assert a.flexibility_value > 1e-3, f"{kind}.example() is worth nothing: the checks are vacuous"
    assert a.expanded_npv == pytest.approx(a.static_npv + a.flexibility_value, abs=1e-12)


@pytest.mark.parametrize("kind,cls", TYPES, ids=IDS)
def test_shapley_shares_add_up_to_the_flexibility(kind, cls):
    r = _example(cls)
    a = realopt.appraise(registry.example_project(r, _partner(r)))
    shares = [x.shapley_value for x in a.rights]
    assert sum(shares) == pytest.approx(a.flexibility_value, rel=1e-12, abs=1e-12)
    assert a.interaction != 0.0                      # the pair interacts: the sum is not trivial
    # interaction = flexibility - sum of standalone values (the definition in realopt.appraisal)
    assert a.interaction == pytest.approx(
        a.flexibility_value - sum(x.standalone_value for x in a.rights), abs=1e-12)


@pytest.mark.parametrize("kind,cls", TYPES, ids=IDS)
def test_a_zero_size_move_reproduces_the_base_value(kind, cls):
    r = _example(cls)
    p = registry.example_project(r, _partner(r))
    a = realopt.appraise(p)
    copier = S.Copier(p)
    assert copier.route == "values", copier.problem   # written back and loaded again, equal
    todo, skipped = S.cases(a, ZERO, copier)
    rows, notes = S.tornado(a, ZERO, copier)
    assert notes == skipped
    own = [label for label, _ in r.money_inputs("rights.0")] + [
        s[0] for s in r.scale_inputs("rights.0")]
    assert set(own) <= {row.input for row in rows}  # the type's own inputs are moved
    assert len(rows) == len(todo) >= 4
    for row in rows:
        assert row.expanded_low == row.expanded_high == a.expanded_npv, row.input
        assert row.flexibility_low == row.flexibility_high == a.flexibility_value, row.input
    cost_copy = copier(S._cost_overrides(p, 1.0))
    assert realopt.appraise(cost_copy).expanded_npv == a.expanded_npv


@pytest.mark.parametrize("kind,cls", TYPES, ids=IDS)
@pytest.mark.parametrize("exercise", ["american", "european", "bermudan"])
def test_a_window_after_the_last_cash_flow_adds_exactly_zero(kind, cls, exercise):
    r = _example(cls)
    last = max(y for y, _ in registry.example_project().underlying.cash_flows)
    late = replace(r, window=(last + 0.5, last + 2.0), exercise=exercise,
                   dates=(last + 1.0, last + 2.0) if exercise == "bermudan" else ())
    a = realopt.appraise(registry.example_project(late))
    expected = max(0.0, -a.static_npv) if r.commits else 0.0
    assert a.flexibility_value == expected


@pytest.mark.parametrize("kind,cls", TYPES, ids=IDS)
def test_american_at_least_bermudan_at_least_european(kind, cls):
    r = _example(cls)
    a0, b0 = r.window
    values = {}
    for exercise in ("american", "bermudan", "european"):
        dates = (a0, (a0 + b0) / 2, b0) if exercise == "bermudan" else ()
        q = replace(r, exercise=exercise, dates=dates)
        values[exercise] = realopt.appraise(registry.example_project(q)).expanded_npv
    assert values["american"] >= values["bermudan"] - 1e-9
    assert values["bermudan"] >= values["european"] - 1e-9
    assert values["american"] > values["european"] + 1e-6   # the example's window matters


def test_every_example_together():
    """All the examples in one project: Shapley shares still add up, and each right is read."""
    rights = [cls.example() for cls in registry.RIGHT_TYPES.values()]
    assert len({r.name for r in rights}) == len(rights)
    a = realopt.appraise(registry.example_project(*rights))
    assert sum(x.shapley_value for x in a.rights) == pytest.approx(a.flexibility_value,
                                                                   rel=1e-12)
    assert [x.type for x in a.rights] == list(registry.RIGHT_TYPES)


def test_a_type_without_an_example_fails_the_common_checks():
    @dataclass(frozen=True, kw_only=True)
    class Staged(base.BaseRight):
        kind: ClassVar[str] = "staged"

    with pytest.raises(NotImplementedError, match="supplies no example"):
        _example(Staged)
