"""Invariants of the valuation (hypothesis). Facts of the trade with no single source are marked
common practice."""
from __future__ import annotations

import math
from dataclasses import replace

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import realopt
from realopt.appraisal import expanded_npv
from realopt.model import (Abandon, Contract, Defer, Expand, Investment, LatticeSpec, Market,
                           Mode, Project, Schedule, Switch, Underlying)

SETTINGS = settings(max_examples=25, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow])


@st.composite
def projects(draw, max_rights=4):
    horizon = draw(st.integers(2, 6))
    comp = draw(st.sampled_from(["annual", "continuous"]))
    r = draw(st.floats(0.0, 0.08))
    market = Market(r, r + draw(st.floats(0.0, 0.08)), comp)
    sigma = draw(st.floats(0.1, 0.8))
    if draw(st.booleans()):
        n = draw(st.integers(1, 8))
        flows = tuple((float(y), draw(st.floats(1.0, 30.0))) for y in range(1, n + 1))
        under = Underlying(cash_flows=flows, terminal_value=draw(st.floats(0.0, 100.0)),
                           volatility=sigma,
                           flow_timing=draw(st.sampled_from(["at_dates", "spread"])))
    else:
        under = Underlying(present_value=draw(st.floats(20.0, 200.0)),
                           payout_yield=draw(st.floats(0.0, 0.06)), volatility=sigma)
    kinds = draw(st.lists(st.sampled_from(["defer", "expand", "contract", "abandon", "switch"]),
                          min_size=1, max_size=max_rights, unique=True))
    rights = []
    for kind in kinds:
        a = draw(st.integers(0, horizon))
        b = draw(st.integers(a, horizon))
        ex = draw(st.sampled_from(["american", "european"]))
        if kind == "defer":
            rights.append(Defer(name="defer", window=(0.0, float(b)), exercise=ex))
        elif kind == "expand":
            rights.append(Expand(name="expand", window=(a, b), exercise=ex,
                                 scale=draw(st.floats(0.05, 1.0)),
                                 cost=Schedule.constant(draw(st.floats(0.0, 80.0)))))
        elif kind == "contract":
            rights.append(Contract(name="contract", window=(a, b), exercise=ex,
                                   scale=draw(st.floats(0.05, 0.9)),
                                   savings=Schedule.constant(draw(st.floats(0.0, 40.0)))))
        elif kind == "abandon":
            rights.append(Abandon(name="abandon", window=(a, b), exercise=ex,
                                  salvage=Schedule.from_points(
                                      {0: draw(st.floats(0.0, 100.0)),
                                       horizon: draw(st.floats(0.0, 100.0))})))
        else:
            rights.append(Switch(name="switch", window=(a, b), exercise=ex,
                                 modes=(Mode("run"), Mode("idle", 0.0, -draw(st.floats(0, 3)))),
                                 start="run",
                                 costs=(("run", "idle", Schedule.constant(draw(st.floats(0, 3)))),
                                        ("idle", "run", Schedule.constant(draw(st.floats(0, 5)))))))
    return Project(name="generated", market=market, underlying=under,
                   investment=Investment(((0.0, draw(st.floats(10.0, 150.0))),)),
                   rights=tuple(rights),
                   lattice=LatticeSpec(steps_per_year=draw(st.integers(2, 12))))


@SETTINGS
@given(projects())
def test_flexibility_nonnegative_finite_and_shapley_efficient(project):
    # Common practice: flexibility value >= 0 (carrying on is always allowed); no NaN/inf.
    # Shapley efficiency (Shapley 1953): shares sum to value(all) - value(none).
    a = realopt.appraise(project)
    d = a.to_dict()
    nums = [d[k] for k in ("present_value", "investment_pv", "static_npv", "expanded_npv",
                           "flexibility_value", "interaction")]
    nums += [x for r in d["rights"] for x in (r["standalone_value"], r["shapley_value"])]
    nums += [x for r in d["rights"] for x in r["chance_of_use"]["real_world"]]
    assert all(math.isfinite(x) for x in nums)
    scale = max(1.0, abs(a.present_value))
    assert a.flexibility_value >= -1e-9 * scale
    assert sum(r.shapley_value for r in a.rights) == \
        __import__("pytest").approx(a.flexibility_value, abs=1e-9 * scale)
    for r in a.rights:
        assert r.standalone_value >= -1e-9 * scale
        assert all(-1e-12 <= x <= 1 + 1e-12 for x in r.use_real_world + r.use_risk_neutral)


def _single(kind, exercise, dates=(), window=(0.0, 4.0)):
    if kind == "abandon":
        return Abandon(name="r", window=window, exercise=exercise, dates=dates,
                       salvage=Schedule.constant(90.0))
    if kind == "expand":
        return Expand(name="r", window=window, exercise=exercise, dates=dates, scale=0.5,
                      cost=Schedule.constant(50.0))
    return Defer(name="r", window=window, exercise=exercise, dates=dates)


@SETTINGS
@given(kind=st.sampled_from(["abandon", "expand", "defer"]),
       sigma=st.floats(0.1, 0.7), q=st.floats(0.0, 0.08), r=st.floats(0.0, 0.08),
       v0=st.floats(50.0, 150.0), spy=st.integers(2, 24))
def test_american_ge_bermudan_ge_european(kind, sigma, q, r, v0, spy):
    # Common practice: more exercise dates never lower a right's value (American >= bermudan
    # >= European, the bermudan dates including the window's end).
    def value(right):
        p = Project(name="x", market=Market(r, r + 0.04, "continuous"),
                    underlying=Underlying(present_value=v0, payout_yield=q, volatility=sigma),
                    investment=Investment(((0.0, 100.0),)), rights=(right,),
                    lattice=LatticeSpec(steps_per_year=spy))
        return expanded_npv(p)
    am = value(_single(kind, "american"))
    be = value(_single(kind, "bermudan", dates=(0.0, 1.0, 2.0, 3.0, 4.0)))
    eu = value(_single(kind, "european"))
    tol = 1e-9 * v0
    assert am >= be - tol and be >= eu - tol


@SETTINGS
@given(projects(max_rights=3))
def test_right_without_exercise_dates_is_worth_nothing(project):
    # A right that can never be exercised (bermudan with no date in its window) adds nothing
    # (follows from the definition; common practice).
    dead = Abandon(name="never", window=(1.0, 2.0), exercise="bermudan", dates=(),
                   salvage=Schedule.constant(1e6))
    a = realopt.appraise(replace(project, rights=project.rights + (dead,)))
    assert a.right("never").standalone_value == 0.0
    assert abs(a.right("never").shapley_value) <= 1e-9 * max(1.0, a.present_value)


@SETTINGS
@given(kind=st.sampled_from(["abandon", "expand", "defer", "contract"]),
       s1=st.floats(0.1, 0.6), ds=st.floats(0.01, 0.5), q=st.floats(0.0, 0.06),
       r=st.floats(0.0, 0.06), spy=st.integers(4, 50))
def test_one_shot_right_value_never_falls_with_volatility(kind, s1, ds, q, r, spy):
    # Common practice: more volatility never lowers the value of a one-shot right (convex payoff).
    if kind == "contract":
        right = Contract(name="r", window=(0.0, 3.0), scale=0.4, savings=Schedule.constant(35.0))
    else:
        right = _single(kind, "american", window=(0.0, 3.0))

    def flex(sigma):
        p = Project(name="x", market=Market(r, r + 0.04, "continuous"),
                    underlying=Underlying(present_value=100.0, payout_yield=q, volatility=sigma),
                    investment=Investment(((0.0, 100.0),)), rights=(right,),
                    lattice=LatticeSpec(steps_per_year=spy))
        return expanded_npv(p)
    assert flex(s1 + ds) >= flex(s1) - 1e-9


@st.composite
def projects_free_start(draw):
    """Like ``projects`` but with a switch whose start mode (and the other mode) is drawn freely:
    scale in [0, 1.5], fixed in [-3, 3] a year; the switch is always among the rights."""
    p = draw(projects(max_rights=3))
    horizon = max(2, int(max(r.window[1] for r in p.rights)))
    a = draw(st.integers(0, horizon))
    b = draw(st.integers(a, horizon))

    def mode(name):
        return Mode(name, draw(st.floats(0.0, 1.5)), draw(st.floats(-3.0, 3.0)))
    sw = Switch(name="free switch", window=(float(a), float(b)),
                exercise=draw(st.sampled_from(["american", "european"])),
                modes=(mode("start"), mode("other")), start="start",
                costs=(("start", "other", Schedule.constant(draw(st.floats(0, 3)))),
                       ("other", "start", Schedule.constant(draw(st.floats(0, 5))))))
    others = tuple(r for r in p.rights if r.name != "switch")
    return replace(p, rights=others + (sw,))


@SETTINGS
@given(projects_free_start())
def test_every_share_nonnegative_with_free_start_modes(project):
    # Common practice: adding a right never lowers the value, so every marginal contribution is
    # >= 0 and with it every standalone value and every Shapley share (a weighted average of
    # marginal contributions, Shapley 1953), whatever the switch's start mode.
    a = realopt.appraise(project)
    tol = 1e-7 * max(1.0, abs(a.present_value), abs(a.investment_pv))
    for r in a.rights:
        assert r.standalone_value >= -tol, (r.name, r.standalone_value)
        assert r.shapley_value >= -tol, (r.name, r.shapley_value)
    assert a.static_npv == __import__("pytest").approx(a.present_value - a.investment_pv,
                                                       abs=1e-9 * max(1.0, abs(a.present_value)))
