"""State graph, exercise rules, chances of use and the time grid."""
from __future__ import annotations

import math

import networkx as nx
import pytest

import realopt
from realopt.model import (Abandon, Contract, Defer, Expand, Investment, LatticeSpec, Market,
                           Mode, Project, Schedule, Switch, Underlying)
from realopt.rights import build_state_graph
from references import abandon, norm_cdf, pv_project


def _four():
    return (
        Defer(name="wait", window=(0.0, 2.0), cost=Schedule.constant(95.0)),
        Expand(name="shift", window=(1.0, 6.0), scale=0.3, cost=Schedule.constant(22.0)),
        Abandon(name="sell", window=(0.0, 8.0), salvage=Schedule.from_points({0: 60, 8: 35})),
        Switch(name="idle", window=(0.0, 8.0), modes=(Mode("run"), Mode("idle", 0.0, -1.2)),
               start="run", costs=(("run", "idle", Schedule.constant(0.5)),
                                   ("idle", "run", Schedule.constant(2.0)))),
    )


def test_state_graph_of_four_rights():
    g = build_state_graph(_four())
    labels = sorted(s.label for s in g.states)
    assert labels == sorted(["not yet invested", "operating", "operating, shift",
                             "operating, idle mode", "operating, shift, idle mode", "abandoned"])
    assert isinstance(g.graph, nx.DiGraph)
    pre = [k for k, s in enumerate(g.states) if not s.invested][0]
    gone = [k for k, s in enumerate(g.states) if s.abandoned][0]
    assert g.graph.in_degree(pre) == 0 and g.graph.out_degree(gone) == 0
    assert nx.descendants(g.graph, g.initial) | {g.initial} == set(g.graph.nodes)
    shifted_idle = next(s for s in g.states if s.label == "operating, shift, idle mode")
    assert shifted_idle.scale == 0.0 and shifted_idle.fixed == -1.2
    shifted = next(s for s in g.states if s.label == "operating, shift")
    assert shifted.scale == pytest.approx(1.3)


def test_excludes_is_symmetric_and_requires_orders():
    rights = (
        Expand(name="phase 1", window=(0.0, 5.0), scale=0.5, cost=Schedule.constant(10.0)),
        Expand(name="phase 2", window=(0.0, 5.0), scale=0.5, cost=Schedule.constant(10.0),
               requires=("phase 1",)),
        Abandon(name="sell", window=(0.0, 5.0), salvage=Schedule.constant(50.0),
                excludes=("phase 2",)),
    )
    g = build_state_graph(rights)
    for e in g.edges:
        src = g.states[e.source]
        if e.right == "phase 2":
            assert "phase 1" in src.used
        if e.right == "sell":
            assert "phase 2" not in src.used
    # phase 2 only ever after phase 1; selling never after phase 2
    assert {e.right for e in g.edges} == {"phase 1", "phase 2", "sell"}


def test_requires_gives_standalone_with_the_required_right():
    base = dict(market=Market(0.04, 0.09, "continuous"),
                underlying=Underlying(present_value=100.0, payout_yield=0.03, volatility=0.3),
                investment=Investment(((0.0, 90.0),)), lattice=LatticeSpec(steps_per_year=24))
    p1 = Expand(name="p1", window=(0.0, 4.0), scale=0.5, cost=Schedule.constant(45.0))
    p2 = Expand(name="p2", window=(0.0, 4.0), scale=0.5, cost=Schedule.constant(45.0),
                requires=("p1",))
    both = realopt.appraise(Project(name="x", rights=(p1, p2), **base))
    alone1 = realopt.appraise(Project(name="x", rights=(p1,), **base))
    # standalone of p2 = value with p2 and what it requires (p1) = the whole flexibility here
    assert both.right("p2").standalone_value == pytest.approx(both.flexibility_value, abs=1e-12)
    assert both.right("p1").standalone_value == pytest.approx(alone1.flexibility_value,
                                                             abs=1e-12)
    assert both.flexibility_value > alone1.flexibility_value


def test_chance_of_use_of_european_abandonment_matches_closed_form():
    # Closed form (lognormal V, Black-Scholes-Merton): a European put is exercised iff V_T < K;
    # P(V_T < K) = N(-d2) with the drift of the measure: r - q (risk-neutral), k - q (real-world,
    # k = discount rate, continuous).
    r, k, q, sigma, t, salvage = 0.04, 0.10, 0.02, 0.3, 3.0, 95.0
    a = realopt.appraise(pv_project(abandon(t=t, salvage=salvage, exercise="european"),
                                    r=r, q=q, sigma=sigma, discount=k, steps_per_year=400))
    use = a.right("sell out")
    for drift, got in ((r, use.use_risk_neutral[-1]), (k, use.use_real_world[-1])):
        d2 = (math.log(100.0 / salvage) + (drift - q - 0.5 * sigma ** 2) * t) / (sigma * math.sqrt(t))
        assert got == pytest.approx(norm_cdf(-d2), abs=5e-3)
    assert use.use_real_world[-1] < use.use_risk_neutral[-1]   # higher drift, fewer sell-outs
    assert use.use_risk_neutral[0] == 0.0


def test_fan_median_follows_real_world_drift():
    # Lognormal median V0 exp((k - q - sigma^2/2) t) under the real-world drift k (continuous).
    k, q, sigma = 0.10, 0.02, 0.3
    a = realopt.appraise(pv_project(abandon(t=4.0, salvage=10.0), r=0.03, q=q, sigma=sigma,
                                    discount=k, steps_per_year=200))
    t = a.fan_years[-1]
    median = 100.0 * math.exp((k - q - 0.5 * sigma ** 2) * t)
    step = sigma * math.sqrt(a.lattice.step_years)
    assert a.fan[50][-1] == pytest.approx(median, rel=2.5 * step)
    assert a.expected_real_world[-1] == pytest.approx(100.0 * math.exp((k - q) * t), rel=1e-6)
    assert a.fan[5][-1] < a.fan[50][-1] < a.fan[95][-1]


def test_dates_between_steps_are_moved_and_reported():
    # horizon 2 years at 4 steps a year: a window opening at 0.3 falls between steps 1 and 2
    p = pv_project(Expand(name="late", window=(0.3, 2.0), scale=0.2,
                          cost=Schedule.constant(10.0)), steps_per_year=4)
    a = realopt.appraise(p)
    assert any("moved to the nearest step" in w and "year 0.3" in w and "0.25" in w
               for w in a.warnings)
    p2 = pv_project(Expand(name="on grid", window=(0.5, 2.0), scale=0.2,
                           cost=Schedule.constant(10.0)), steps_per_year=4)
    assert not any("moved" in w for w in realopt.appraise(p2).warnings)


def test_contract_value_matches_put_on_scaled_value():
    # Contracting by c for savings S is a put on c*V with strike S (same tree): equal to
    # abandonment of a c-scaled project. Checked against QuantLib's pinned CRR engine.
    from references import quantlib_binomial
    pytest.importorskip("QuantLib")
    right = Contract(name="cut", window=(0.0, 2.0), scale=0.4, savings=Schedule.constant(36.0))
    a = realopt.appraise(pv_project(right, r=0.05, q=0.02, sigma=0.3, steps_per_year=100))
    ref = 0.4 * quantlib_binomial("put", 100.0, 90.0, 0.05, 0.02, 0.3, 2.0, a.lattice.steps,
                                  pin_p=a.lattice.probability)
    assert a.flexibility_value == pytest.approx(ref, abs=1e-8)


def test_json_contract_keys():
    a = realopt.appraise(pv_project(abandon(t=2.0, salvage=90.0), steps_per_year=12))
    d = a.to_dict()
    for key in ("present_value", "investment_pv", "static_npv", "expanded_npv",
                "flexibility_value", "rights", "lattice"):
        assert key in d
    assert set(d["lattice"]) >= {"steps", "step_years", "up", "down", "probability"}
    assert set(d["rights"][0]) >= {"name", "type", "standalone_value", "shapley_value"}
    assert d["static_npv"] == pytest.approx(d["present_value"] - d["investment_pv"], abs=1e-12)
    assert d["flexibility_value"] == pytest.approx(d["expanded_npv"] - d["static_npv"], abs=1e-12)
    assert "judgement" in d["caution"]


def test_more_than_ten_rights_refused():
    rights = tuple(Expand(name=f"e{k}", window=(0.0, 1.0), scale=0.1,
                          cost=Schedule.constant(5.0)) for k in range(11))
    p = pv_project(None)
    from dataclasses import replace
    with pytest.raises(realopt.ValuationError, match="above 10 rights"):
        realopt.appraise(replace(p, rights=rights))
