"""The shutdown right type (realopt/rights/shutdown.py): a temporary shutdown with a maintenance
cost, which the registry turns into a two-mode switch.

Its value must equal, exactly (==, the same floats through the same lattice), the value of the
switch written by hand: modes operating {scale: 1} (the start) and shut {scale: 0, fixed:
-maintenance}, costs operating->shut: cost and shut->operating: restart_cost. That equality is
the type's definition (docs/file-format.md, "rights"); the switch itself is checked against
outside references in test_valuation_references.py and test_rights_and_policy.py.
"""
from __future__ import annotations

import textwrap

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import realopt
from realopt.model import Shutdown, Switch
from realopt.outputs import sensitivity as S
from realopt.project import loads

HEAD = """\
project: {name: Quarry, currency: EUR, unit: million}
market: {risk_free_rate: 0.04, discount_rate: 0.09}
underlying:
  cash_flows: {1: 6.0, 2: 6.5, 3: -4.0, 4: -3.0, 5: 7.0, 6: 7.0}
  terminal_value: 12.0
  volatility: 0.35
investment: {cost: 20.0}
lattice: {steps_per_year: 8}
rights:
"""
SHUTDOWN = """\
  - name: Mothball
    type: shutdown
    cost: {0: 0.8, 6: 1.2}
    restart_cost: 1.5
    maintenance: 0.6
    window: [0.5, 5]
"""
SWITCH = """\
  - name: Mothball
    type: switch
    modes:
      operating: {scale: 1.0}
      shut: {scale: 0.0, fixed: -0.6}
    start: operating
    costs: {operating->shut: {0: 0.8, 6: 1.2}, shut->operating: 1.5}
    window: [0.5, 5]
"""
SELL = """\
  - name: Sell
    type: abandon
    salvage: 9.0
    window: [1, 5]
"""


def _numbers(a):
    """Every number of the appraisal's JSON except the wording (type name and rule text)."""
    d = a.to_dict()
    for r in d["rights"]:
        r.pop("type")
        r.pop("rule")
    return d


@pytest.mark.parametrize("others", ["", SELL], ids=["alone", "with_abandon"])
@pytest.mark.parametrize("exercise", ["american", "bermudan"])
def test_shutdown_equals_the_hand_written_switch_exactly(others, exercise):
    extra = "    exercise: bermudan\n    dates: [1, 2, 3, 4]\n" if exercise == "bermudan" else ""
    p = loads(HEAD + SHUTDOWN + extra + others, source="shutdown.yaml")
    q = loads(HEAD + SWITCH + extra + others, source="switch.yaml")
    assert type(p.rights[0]) is Shutdown and type(q.rights[0]) is Switch
    assert (p.rights[0].modes, p.rights[0].start, p.rights[0].costs) == \
        (q.rights[0].modes, q.rights[0].start, q.rights[0].costs)
    a, b = realopt.appraise(p), realopt.appraise(q)
    assert a.flexibility_value > 0.05                 # the shutdown is worth something here
    assert a.expanded_npv == b.expanded_npv
    d, e = _numbers(a), _numbers(b)
    d["project"] = e["project"]
    assert d == e                                     # every number, thresholds and use included
    assert a.rights[0].type == "shutdown" and "shut down temporarily" in a.rights[0].rule


def test_shutdown_defaults_and_wording():
    p = loads(HEAD + "  - {name: Pause, type: shutdown, cost: 0.5, window: [0, 4]}\n")
    r = p.rights[0]
    assert (r.restart_cost.at(2.0), r.maintenance) == (0.0, 0.0)
    assert [(m.name, m.scale, m.fixed) for m in r.modes] == [("operating", 1.0, 0.0),
                                                              ("shut", 0.0, 0.0)]
    a = realopt.appraise(p)
    assert a.rights[0].rule.startswith("Pause: shut down temporarily for EUR 0.50 million "
                                       "(restart EUR 0.00 million; maintenance EUR 0.00 "
                                       "million a year while shut)")


def test_shutdown_sensitivities_move_its_own_keys():
    p = loads(HEAD + SHUTDOWN, source="shutdown.yaml")
    a = realopt.appraise(p)
    copier = S.Copier(p)
    assert copier.route == "file"
    todo, _ = S.cases(a, S.Moves(), copier)
    by = {c.input: c for c in todo}
    assert {"Mothball: shutdown cost", "Mothball: restart cost", "Mothball: maintenance"} <= set(by)
    hi = copier(by["Mothball: maintenance"].high).rights[0]
    assert hi.maintenance == pytest.approx(0.6 * 1.2, rel=1e-15)
    assert hi.mode("shut").fixed == -hi.maintenance
    hi = copier(by["Mothball: shutdown cost"].high).rights[0]
    assert [hi.cost.at(t) for t in (0.0, 6.0)] == pytest.approx([0.96, 1.44], rel=1e-15)
    rows, notes = S.tornado(a, S.Moves(relative=0.0, volatility=0.0, rates=0.0), copier)
    assert not notes and all(r.expanded_low == r.expanded_high == a.expanded_npv for r in rows)


def test_a_python_built_shutdown_round_trips_through_the_loader():
    p = loads(HEAD + SHUTDOWN + SELL, source="shutdown.yaml")
    from dataclasses import replace

    q = replace(p, origin=None)
    copier = S.Copier(q)
    assert copier.route == "values", copier.problem
    assert S._same(copier(()), q)


def test_bad_shutdown_keys_are_located():
    with pytest.raises(realopt.ProjectError) as err:
        loads(textwrap.dedent(HEAD) + "  - {name: Pause, type: shutdown, window: [0, 4], "
              "modes: {a: {}}}\n", source="bad.yaml")
    text = str(err.value)
    assert "bad.yaml:10:5: rights[0].cost: found no value" in text     # line 10: the right
    assert "modes belongs to switch rights; this is a shutdown right" in text


def test_a_python_built_shutdown_gets_the_files_messages():
    """The bounds are declared once in the type module (FIELD_RULES, NONNEG_SCHEDULES) and read
    by realopt.validate for files and Python-built projects alike."""
    from realopt.model import Schedule
    from realopt.rights import example_project

    bad = Shutdown(name="m", window=(0.0, 3.0), cost=Schedule.constant(-1.0), maintenance=-2.0)
    with pytest.raises(realopt.RealoptError) as err:
        realopt.appraise(example_project(bad))
    text = str(err.value)
    assert ("rights[0].maintenance: found -2; expected the yearly maintenance cost while shut, "
            "0 or more. Fix: a cost is written positive") in text
    assert "rights[0].cost: found -1; expected the cost paid on each shutdown of 0 or more" in text
    with pytest.raises(realopt.ProjectError) as err:
        loads(HEAD + SHUTDOWN.replace("maintenance: 0.6", "maintenance: -2"), source="f.yaml")
    assert ("rights[0].maintenance: found -2; expected the yearly maintenance cost while shut, "
            "0 or more. Fix: a cost is written positive") in str(err.value)


@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(cost=st.floats(0.0, 5.0), restart=st.floats(0.0, 5.0), upkeep=st.floats(0.0, 3.0),
       end=st.sampled_from([2.0, 3.5, 5.0]))
def test_shutdown_equals_its_switch_for_any_costs(cost, restart, upkeep, end):
    """Built in Python: the shutdown and the switch it stands for value the same, exactly."""
    from realopt.model import Mode, Schedule
    from realopt.rights import example_project

    c, rc = Schedule.constant(cost), Schedule.constant(restart)
    sd = Shutdown(name="m", window=(0.0, end), cost=c, restart_cost=rc, maintenance=upkeep)
    sw = Switch(name="m", window=(0.0, end), start="operating",
                modes=(Mode("operating", 1.0, 0.0), Mode("shut", 0.0, -upkeep if upkeep else 0.0)),
                costs=(("operating", "shut", c), ("shut", "operating", rc)))
    a, b = realopt.appraise(example_project(sd)), realopt.appraise(example_project(sw))
    assert a.expanded_npv == b.expanded_npv
    assert a.rights[0].use_real_world == b.rights[0].use_real_world
