"""The dates of a simulation result's decision maps: where the fitted policy changes most.

A project whose expansion right is open only in a narrow window (years 2 to 2.5 of 5) must get
a map inside that window, which evenly spaced dates miss; the first decision date is always
drawn; and a date's map is the same whichever dates are chosen (the same map at the same date
as when every date is drawn).
"""
from __future__ import annotations

import functools

import numpy as np
import pytest

import realopt
from realopt.simulation import result

WINDOW = """\
project: {name: Window plant}
valuation: simulation
simulation: {paths: 4000, seed: 5, steps_per_year: 12, basis: 2}
market: {risk_free_rate: 0.04, discount_rate: 0.07}
underlying:
  years: [1, 5]
  flow_timing: spread
  drivers:
    P: {process: gbm, start: 10, drift: 0.02, volatility: 0.3, risk_neutral: {drift: 0.01}}
    C: {process: gbm, start: 4, drift: 0.0, volatility: 0.2, risk_neutral: {drift: 0.0}}
  correlation: [[P, C, 0.3]]
  cash_flow: 5 * (P - C)
investment: {cost: 60}
rights:
  - {name: Sell, type: abandon, salvage: 40, window: [0, 5]}
  - {name: Grow, type: expand, scale: 0.5, cost: 15, window: [2, 2.5]}
"""


@pytest.fixture(scope="module")
def window(tmp_path_factory):
    path = tmp_path_factory.mktemp("maps") / "window.yaml"
    path.write_text(WINDOW)
    project = realopt.load_project(path)
    return project, realopt.appraise(project, progress=False)


def test_a_map_falls_inside_the_narrow_window(window):
    _, a = window
    dates = [m.year for m in a.driver_maps if m.state == "operating"]
    assert len(dates) == 4 and dates == sorted(dates)
    assert dates[0] == 0.0                                  # the first decision date
    inside = [t for t in dates if 2.0 - 1e-9 <= t <= 2.5 + 1e-9]
    assert inside, dates
    # the expansion appears on the map there, and nowhere outside its window
    for m in a.driver_maps:
        if m.state == "operating":
            has_grow = any("Grow" in x for x in m.actions) and (m.codes == 2).any()
            assert has_grow == (m.year in inside)
    # evenly spaced dates (the rule before: 0, 1.67, 3.33, 5 of the 61 monthly dates) miss it
    ks = np.arange(61) / 12
    even = ks[np.round(np.linspace(0, 60, 4)).astype(int)]
    assert not any(2.0 <= t <= 2.5 for t in even)
    # every chosen date after the first carries the change that chose it
    for m in a.driver_maps:
        assert (m.change is None) == (m.year == 0.0)
        assert m.change is None or 0 < m.change <= 1


def test_a_dates_map_does_not_depend_on_the_dates_chosen(window, monkeypatch):
    project, a = window
    monkeypatch.setattr(result, "_maps", functools.partial(result._maps, n_dates=10 ** 6))
    every = realopt.appraise(project, progress=False).driver_maps
    by_date = {(m.state, m.year): m for m in every}
    assert len(every) > len(a.driver_maps)
    for m in a.driver_maps:
        full = by_date[(m.state, m.year)]
        assert np.array_equal(m.codes, full.codes)
        assert np.array_equal(m.x_values, full.x_values)
        assert np.array_equal(m.y_values, full.y_values)
        assert m.actions == full.actions and m.others == full.others
    # the values do not depend on the maps at all
    assert realopt.appraise(project, progress=False).expanded_npv == a.expanded_npv


def test_chosen_dates_are_the_largest_changes(window):
    from realopt.simulation import lsm
    from realopt.simulation.paths import dynamics, simulate
    from realopt.rights import build_state_graph, prepared_rights

    project, a = window
    prob = lsm.Problem(project)
    rights = prepared_rights(project)
    opened = {r.name: lsm.open_mask(r, prob.times, 12) for r in rights}
    dyn = dynamics(prob.model, "risk_neutral")
    x = simulate(dyn, prob.times, 4000, 5, "fit", True)
    stats = [prob.basis.stats(x[k]) for k in range(prob.T)]
    pol = lsm.fit(prob, build_state_graph(rights), x, stats, opened)
    med, lo, hi = {}, {}, {}
    for k in sorted(pol.open_edges):
        lo[k], med[k], hi[k] = np.percentile(x[k][:, :20000], [1, 50, 99], axis=1)
    ks = sorted(pol.open_edges)
    pick, score = result._map_dates(prob, pol, 0, ks, 0, 1, med, lo, hi, 4)
    assert pick[0] == ks[0] and pick == sorted(pick) and len(pick) == 4
    left = [score.get(k, 0.0) for k in ks if k not in pick]
    assert min(score[k] for k in pick[1:]) >= max(left)     # no unchosen date changes more
    # the maps drawn are those dates
    assert [prob.times[k] for k in pick] == [m.year for m in a.driver_maps
                                            if m.state == "operating"]
