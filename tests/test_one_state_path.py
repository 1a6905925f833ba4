"""The one-state path of the lattice (abandonment rights only: one live state, every edge ends the
project) is a faster copy of the general induction over all states: it must give the same
values, exercise policy, thresholds and chances of use.

Invariant (common practice: a fast path checked against the general code it replaces): adding an
expansion right that is never worth using (its cost exceeds any value the tree reaches) sends the
same project through the general multi-state induction and changes nothing for the abandonment.
The values themselves are checked against QuantLib in test_valuation_references.py.
"""
from __future__ import annotations

import math

from hypothesis import given, settings
from hypothesis import strategies as st

import realopt
from realopt.model import (Abandon, Expand, Investment, LatticeSpec, Market, Project, Schedule,
                           Underlying)

NEVER = Expand(name="never worth it", window=(0.0, 1.0), scale=0.1,
               cost=Schedule.constant(1e9))


def _close(a, b, tol=1e-9):
    if a is None or b is None:
        return a is b
    return abs(a - b) <= tol * max(1.0, abs(a), abs(b))


@st.composite
def projects(draw):
    steps = draw(st.integers(3, 41))                      # odd and even trees
    horizon = draw(st.sampled_from([1.0, 2.0, 3.0]))
    if draw(st.booleans()):
        underlying = Underlying(present_value=100.0,
                                payout_yield=draw(st.sampled_from([0.0, 0.03])),
                                volatility=draw(st.sampled_from([0.2, 0.4])))
    else:                                                 # flows, some years negative
        flows = tuple((float(y), draw(st.sampled_from([9.0, 4.0, -2.0])))
                      for y in range(1, int(horizon) + 1)) + ((horizon + 1.0, 9.0),)
        underlying = Underlying(cash_flows=flows, terminal_value=draw(
            st.sampled_from([5.0, 40.0])), volatility=0.3,
            flow_timing=draw(st.sampled_from(["at_dates", "spread"])))
    exercise = draw(st.sampled_from(["american", "european", "bermudan"]))
    rights = [Abandon(name="sell", window=(0.0, horizon), exercise=exercise,
                      dates=(0.5, horizon) if exercise == "bermudan" else (),
                      salvage=Schedule.from_points({0: draw(st.sampled_from([30.0, 80.0])),
                                                    horizon: 60.0}))]
    if draw(st.booleans()):
        rights.append(Abandon(name="scrap", window=(0.5, horizon),
                              salvage=Schedule.constant(draw(st.sampled_from([20.0, 70.0])))))
    return Project(name="one state", market=Market(0.04, 0.09, draw(st.sampled_from(
        ["continuous", "annual"]))), underlying=underlying,
        investment=Investment(((0.0, 50.0),)), rights=tuple(rights),
        lattice=LatticeSpec(steps_per_year=steps))


@settings(max_examples=30, deadline=None)
@given(projects())
def test_one_state_path_matches_the_general_induction(project):
    fast = realopt.appraise(project)
    general = realopt.appraise(Project(
        name=project.name, market=project.market, underlying=project.underlying,
        investment=project.investment, rights=project.rights + (NEVER,),
        lattice=project.lattice))
    assert fast.lattice.states == 2          # operating and abandoned: the one-state path
    assert general.lattice.states > fast.lattice.states      # really the general path
    assert _close(fast.expanded_npv, general.expanded_npv, 1e-12)
    assert fast.decision_today == general.decision_today
    for r in project.rights:
        a, b = fast.right(r.name), general.right(r.name)
        assert len(a.thresholds) == len(b.thresholds)
        for x, y in zip(a.thresholds, b.thresholds):
            assert (x.year, x.never) == (y.year, y.never)
            assert _close(x.lower, y.lower) and _close(x.upper, y.upper)
        for u, v in ((a.use_risk_neutral, b.use_risk_neutral),
                     (a.use_real_world, b.use_real_world)):
            assert all(abs(p - q) <= 1e-12 for p, q in zip(u, v))
        assert a.side == b.side and a.rule == b.rule
    live = {m.state: m for m in general.decision_maps}
    for m in fast.decision_maps:
        other = live[m.state]
        # the never-used expansion takes no node (it adds dates with a choice: carry on)
        assert [other.actions[c] for c, k in zip(other.codes.ravel(), m.codes.ravel())
                if k >= 0] == [m.actions[k] for k in m.codes.ravel() if k >= 0]
        assert "never worth it" not in {other.actions[c] for c in other.codes.ravel() if c >= 0}


def test_put_boundary_is_one_band_of_low_nodes():
    # An American put on V (abandonment for a constant salvage) exercises below a boundary
    # (common practice): the recorded policy is one run of nodes starting at node 0.
    p = Project(name="put", market=Market(0.05, 0.09, "continuous"),
                underlying=Underlying(present_value=100.0, payout_yield=0.02, volatility=0.3),
                investment=Investment(((0.0, 100.0),)),
                rights=(Abandon(name="sell", window=(0.0, 1.0),
                                salvage=Schedule.constant(100.0)),),
                lattice=LatticeSpec(steps_per_year=301))
    from realopt.lattice import build_grid, solve
    from realopt.rights import build_state_graph, prepared_rights
    from realopt.underlying import resolve

    sol = solve(build_grid(p, resolve(p)), build_state_graph(prepared_rights(p)), record=True)
    moves = sol.policy.moves[0]
    assert len(moves) == 302
    used = [runs for runs in moves.values() if runs]
    assert used and all(len(runs) == 1 and runs[0][0] == 0 for runs in used)
    # at the last date the put is exercised exactly where V < 100 (strike)
    last = moves[301][0]
    v = sol.grid.nodes_ex(301)
    assert v[last[1] - 1] < 100.0 <= v[last[1]] and not math.isnan(v[0])
