"""Numbers a board can trust on user-style projects (issue 8): one base project in every subset of
rights, no proceeds for nothing after the last cash flow, fixed flows accrued like the project's
own flows, requirements on the defer right, and a switch's chance of use.

Every file in tests/user_projects/ and projects/ is checked against the invariants of the value
bridge. Facts of the trade with no single source are marked common practice."""
from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

import pytest

import realopt
from realopt.model import (Abandon, Contract, Defer, Expand, Investment, LatticeSpec, Market,
                           Mode, Project, Schedule, Switch, Underlying)
from references import bsm, norm_cdf

ROOT = Path(__file__).resolve().parents[1]
FILES = sorted((ROOT / "tests" / "user_projects").glob("*.yaml")) + sorted(
    (ROOT / "projects").glob("*.yaml"))


@pytest.fixture(scope="module")
def appraisals():
    cache = {}

    def get(path):
        if path not in cache:
            cache[path] = realopt.appraise(realopt.load_project(path))
        return cache[path]
    return get


@pytest.mark.parametrize("path", FILES, ids=[f.stem for f in FILES])
def test_value_bridge_invariants(path, appraisals):
    # Common practice: adding a right never lowers the value (flexibility, every marginal
    # contribution and so every Shapley share and standalone value >= 0); Shapley efficiency
    # (Shapley 1953): the shares sum to value(all) - value(none); the bridge adds up.
    # Under valuation: simulation a value is an estimate: >= 0 within three of its standard
    # errors (common practice); the sums below hold exactly on the same paths.
    a = appraisals(path)
    tol = 1e-9 * max(1.0, abs(a.present_value))
    sim = a.method == "simulation"
    assert a.flexibility_value >= -tol - (3 * a.standard_error["flexibility_value"] if sim else 0)
    for r in a.rights:
        assert r.shapley_value >= -tol - (3 * r.shapley_standard_error if sim else 0), r.name
        assert r.standalone_value >= -tol - (3 * r.standalone_standard_error if sim else 0), r.name
    assert sum(r.shapley_value for r in a.rights) == pytest.approx(a.flexibility_value, abs=tol)
    assert a.static_npv + a.flexibility_value == pytest.approx(a.expanded_npv, abs=tol)
    assert sum(r.standalone_value for r in a.rights) + a.interaction == pytest.approx(
        a.flexibility_value, abs=tol)
    assert a.static_npv == pytest.approx(a.present_value - a.investment_pv, abs=tol)
    d = a.to_dict()
    assert isinstance(d["base"], str) and d["base"].startswith("Base project")
    assert all(isinstance(w, str) for w in d["headline_warnings"])


# --- item 1 and 11: one base project -------------------------------------------------------------
def test_start_mode_with_fixed_cost_is_the_base_of_every_subset(appraisals):
    npf = pytest.importorskip("numpy_financial")
    a = appraisals(ROOT / "tests" / "user_projects" / "carton_plant.yaml")
    flows = [9.0, 11.0, 12.0, 12.5, 12.5, 12.0, 11.5, 11.0, 10.5, 10.0]
    # numpy-financial npv: the plain DCF of the file's flows at the discount rate (9%)
    assert a.cash_flow_value == pytest.approx(npf.npv(0.09, [0.0] + flows), rel=1e-12)
    # base = 1.0 x cash flows + the start mode's -1.2 a year at the cash-flow dates, valued at
    # the risk-free rate (3%): an ordinary annuity (numpy-financial pv)
    annuity = -npf.pv(0.03, 10, 1.0)
    assert a.present_value == pytest.approx(a.cash_flow_value - 1.2 * annuity, rel=1e-12)
    assert a.static_npv == pytest.approx(a.present_value - 62.0, rel=1e-12)
    assert "Run one shift or two" in a.base and "two shifts" in a.base
    d = a.to_dict()
    assert d["cash_flow_value"] == a.cash_flow_value and d["base"] == a.base
    # a positive static NPV of the same base: flexibility can only add
    assert a.right("Run one shift or two").standalone_value >= 0.0


def test_staged_build_out_of_a_partial_scale_mode(appraisals):
    # spread timing: half the flows plus -0.4 a year accruing evenly over years 0..8, valued
    # at the risk-free intensity ln(1.025): the continuous annuity (1 - e^{-rho T}) / rho
    a = appraisals(ROOT / "tests" / "user_projects" / "logistics_hub.yaml")
    rho = math.log(1.025)
    annuity = (1.0 - math.exp(-rho * 8.0)) / rho        # closed form, continuous annuity
    assert a.present_value == pytest.approx(0.5 * a.cash_flow_value - 0.4 * annuity, rel=1e-9)
    build = a.right("Build the second half")
    assert build.standalone_value > 0.0 and build.shapley_value > 0.0
    assert "half" in a.base and "scale 0.5" in a.base


def test_switch_absent_from_a_subset_holds_its_start_mode():
    # two switches, each starting in a costly mode: valuing one alone must keep the other in its
    # start mode, so the value of the pair is at least that of either alone (common practice)
    sw1 = Switch(name="kiln A", window=(0.0, 4.0), start="run",
                 modes=(Mode("run", 0.5, -2.0), Mode("idle", 0.0, 0.0)),
                 costs=(("run", "idle", Schedule.constant(1.0)),
                        ("idle", "run", Schedule.constant(1.0))))
    sw2 = replace(sw1, name="kiln B", modes=(Mode("run", 1.2, -1.0), Mode("idle", 0.0, 0.5)))
    p = Project(name="two kilns", market=Market(0.03, 0.08, "continuous"),
                underlying=Underlying(present_value=60.0, payout_yield=0.05, volatility=0.3),
                investment=Investment(((0.0, 20.0),)), rights=(sw1, sw2),
                lattice=LatticeSpec(steps_per_year=12))
    a = realopt.appraise(p)
    # base: 0.5 * 1.2 * 60 + (-3.0) * continuous annuity over the 4-year horizon (closed form)
    r = 0.03
    assert a.present_value == pytest.approx(0.6 * 60.0 - 3.0 * (1 - math.exp(-4 * r)) / r,
                                            rel=1e-9)
    for rv in a.rights:
        assert rv.shapley_value >= -1e-9 and rv.standalone_value >= -1e-9


def test_defer_commits_today_at_the_investment_present_value(appraisals):
    a = appraisals(ROOT / "tests" / "user_projects" / "bakery_defer_cost.yaml")
    wait = a.right("Wait for the flour contract")
    assert wait.standalone_value >= 0.0 and wait.shapley_value >= 0.0
    # a defer right open only today is the static commitment: nothing added
    p = realopt.load_project(ROOT / "tests" / "user_projects" / "bakery_defer_cost.yaml")
    today = replace(p.rights[0], window=(0.0, 0.0))
    b = realopt.appraise(replace(p, rights=(today,)))
    assert b.expanded_npv == pytest.approx(b.static_npv, abs=1e-12)
    text = [w for w in a.warnings if "Wait for the flour contract" in w and "year 0" in w]
    assert text and "investment's present value" in text[0]


# --- item 3: requires on the defer right --------------------------------------------------------
def test_requirement_on_the_defer_right_moves_no_credit(appraisals):
    path = ROOT / "tests" / "user_projects" / "wind_repower.yaml"
    with_req = appraisals(path)
    p = realopt.load_project(path)
    free = realopt.appraise(replace(p, rights=tuple(replace(r, requires=()) for r in p.rights)))
    # without the defer right the project is committed today, so the requirement holds in every
    # subset: the requirement changes nothing
    for r in with_req.rights:
        assert r.shapley_value == pytest.approx(free.right(r.name).shapley_value, abs=1e-12)
        assert r.standalone_value == pytest.approx(free.right(r.name).standalone_value,
                                                   abs=1e-12)


# --- item 10: fixed flows accrue over the time spent in a mode -----------------------------------
def test_idle_mode_losing_money_is_worth_about_nothing(appraisals):
    # the kiln: idling gives up 6 a year of payout to save 4.5 a year; at 1% volatility the
    # project value stays far above the 75 where idling would pay (risk-neutral drift -2% a year:
    # 100 e^{-0.2} = 81.9 at year 10), so the right is worth about nothing (closed-form reasoning)
    a = appraisals(ROOT / "tests" / "user_projects" / "kiln_idle.yaml")
    assert 0.0 <= a.flexibility_value < 1e-3


def test_fixed_flow_of_the_start_mode_in_the_present_value_form():
    # continuous payout: a fixed flow f a year accrues continuously to the horizon, worth
    # f (1 - e^{-rT}) / r (closed form, continuous annuity) whatever the steps per year
    sw = Switch(name="mode", window=(0.0, 5.0), start="a",
                modes=(Mode("a", 1.0, -2.0), Mode("b", 0.3, 0.0)),
                costs=(("a", "b", Schedule.constant(100.0)),))
    for spy in (3, 12, 50):
        p = Project(name="x", market=Market(0.05, 0.09, "continuous"),
                    underlying=Underlying(present_value=100.0, payout_yield=0.04, volatility=0.2),
                    investment=Investment(((0.0, 50.0),)), rights=(sw,),
                    lattice=LatticeSpec(steps_per_year=spy))
        a = realopt.appraise(p)
        assert a.present_value == pytest.approx(100.0 - 2.0 * (1 - math.exp(-0.25)) / 0.05,
                                                rel=1e-12)


# --- item 2: no proceeds for nothing at the end of the cash flows --------------------------------
def _flows_project(right, tv, steps_per_year=12, timing="at_dates"):
    return Project(name="x", market=Market(0.04, 0.09, "continuous"),
                   underlying=Underlying(cash_flows=((1.0, 5.0), (2.0, 5.0), (3.0, 5.0)),
                                         terminal_value=tv, volatility=0.3, flow_timing=timing),
                   investment=Investment(((0.0, 40.0),)), rights=(right,),
                   lattice=LatticeSpec(steps_per_year=steps_per_year))


def test_sale_at_the_last_date_replaces_the_terminal_value():
    # A European sale at the last cash-flow date (year 3), decided after that year's flow and
    # before the terminal value: a put on the terminal value with strike the salvage. Under the
    # payout model the terminal value is worth TV e^{-k T} today (k the discount rate), so the
    # reference is Black-Scholes-Merton's put on that asset (no payout before T).
    tv, salvage = 45.0, 40.0
    sell = Abandon(name="sell", window=(3.0, 3.0), exercise="european",
                   salvage=Schedule.constant(salvage))
    a = realopt.appraise(_flows_project(sell, tv, steps_per_year=400))
    s0 = tv * math.exp(-0.09 * 3.0)
    ref = bsm("put", s0, salvage, 0.04, 0.0, 0.3, 3.0)
    assert a.flexibility_value == pytest.approx(ref, rel=2e-3)
    assert any("sell" in w and "terminal value" in w for w in a.headline_warnings)


def test_proceeds_for_nothing_are_named_on_the_headline():
    cut = Contract(name="Close the annex", window=(1.0, 3.0), scale=0.3,
                   savings=Schedule.constant(2.0))
    a = realopt.appraise(_flows_project(cut, 0.0))
    assert any("Close the annex" in w and "nothing" in w for w in a.headline_warnings)
    assert a.to_dict()["headline_warnings"] == list(a.headline_warnings)


@pytest.mark.parametrize("timing", ["at_dates", "spread"])
def test_windows_past_the_last_date_are_cut_there(timing):
    early = Abandon(name="Close early", window=(1.0, 3.0), salvage=Schedule.constant(8.0))
    late = replace(early, window=(1.0, 6.0))
    a = realopt.appraise(_flows_project(early, 10.0, timing=timing))
    b = realopt.appraise(_flows_project(late, 10.0, timing=timing))
    # the project ends at year 3: a window to year 6 adds nothing to one ending at year 3
    assert b.right("Close early").standalone_value == pytest.approx(
        a.right("Close early").standalone_value, abs=1e-12)
    assert any("Close early" in w and "after" in w for w in b.headline_warnings)


def test_rule_states_the_first_date_of_use_found():
    # salvage 6 beats a terminal value of 0 at the last date, and nothing before it (the
    # project is worth far more than 6 until then): used at year 3 only, at every value
    sell = Abandon(name="scrap", window=(1.0, 3.0), salvage=Schedule.constant(6.0))
    a = realopt.appraise(_flows_project(sell, 0.0, timing="spread"))
    rule = a.right("scrap").rule
    assert "at year 3, at every project value" in rule
    assert "first date allowed" not in rule


# --- item 6: a switch's chance of use ----------------------------------------------------------
def test_switch_chance_of_use_counts_first_switches_and_mode_shares():
    sw = Switch(name="idle", window=(0.0, 6.0), start="run",
                modes=(Mode("run"), Mode("idle", 0.0, 2.0)),
                costs=(("run", "idle", Schedule.constant(0.2)),
                       ("idle", "run", Schedule.constant(0.2))))
    p = Project(name="x", market=Market(0.04, 0.08, "continuous"),
                underlying=Underlying(present_value=40.0, payout_yield=0.06, volatility=0.4),
                investment=Investment(((0.0, 20.0),)), rights=(sw,),
                lattice=LatticeSpec(steps_per_year=24))
    r = realopt.appraise(p).right("idle")
    for use in (r.use_risk_neutral, r.use_real_world):
        assert all(b >= a - 1e-12 for a, b in zip(use, use[1:]))          # never falls
    rn, rw = r.mode_shares["idle"]
    run_rn, _ = r.mode_shares["run"]
    assert all(x <= u + 1e-12 for x, u in zip(rn, r.use_risk_neutral))   # in idle => switched
    assert all(abs(a + b - 1.0) < 1e-9 for a, b in zip(rn, run_rn))      # operating throughout
    assert max(rn) > 0.05 and rn[-1] < r.use_risk_neutral[-1]            # some restart
    d = realopt.appraise(p).to_dict()["rights"][0]["chance_of_use"]
    assert set(d["modes"]) == {"run", "idle"} and len(d["modes"]["idle"]["real_world"]) == len(
        d["years"])
    assert "at least once" in r.use_measure


def test_one_date_switch_chance_matches_closed_form():
    # A switch open at year 3 only into an idle mode paying f a year to year 5: switching is a
    # European put on V_3 with strike f * annuity(3 -> 5), so the chance of having switched by
    # year 3 is P(V_3 < K) = N(-d2) under each measure (Black-Scholes-Merton, lognormal V).
    r, k, q, sigma, f = 0.04, 0.10, 0.05, 0.3, 20.0
    sw = Switch(name="idle", window=(3.0, 3.0), exercise="european", start="run",
                modes=(Mode("run"), Mode("idle", 0.0, f)),
                costs=(("run", "idle", Schedule.constant(0.0)),))
    hold = Expand(name="hold", window=(5.0, 5.0), exercise="european", scale=0.1,
                  cost=Schedule.constant(1e9))            # only stretches the horizon to year 5
    p = Project(name="x", market=Market(r, k, "continuous"),
                underlying=Underlying(present_value=100.0, payout_yield=q, volatility=sigma),
                investment=Investment(((0.0, 20.0),)), rights=(sw, hold),
                lattice=LatticeSpec(steps_per_year=200))
    a = realopt.appraise(p)
    use = a.right("idle")
    strike = f * (1 - math.exp(-2 * r)) / r
    # no move back to run: the chance by year 5 is the chance of switching at year 3
    for drift, got, m in ((r, use.use_risk_neutral[-1], 0), (k, use.use_real_world[-1], 1)):
        d2 = (math.log(100.0 / strike) + (drift - q - 0.5 * sigma ** 2) * 3.0) / (
            sigma * math.sqrt(3.0))
        assert got == pytest.approx(norm_cdf(-d2), abs=5e-3)
        assert use.mode_shares["idle"][m][-1] == pytest.approx(norm_cdf(-d2), abs=5e-3)


def test_build_staged_out_of_a_zero_scale_mode_is_an_american_call():
    # Source: QuantLib BinomialVanillaEngine("crr") with the probability pinned to ours
    # (references.quantlib_binomial): building at cost K out of a mode with no flows, at any
    # time to year 4, is the American call on V with strike K; the base (nothing built) is worth 0.
    ql = pytest.importorskip("QuantLib")  # noqa: F841
    from references import quantlib_binomial
    build = Switch(name="build", window=(0.0, 4.0), start="nothing",
                   modes=(Mode("nothing", 0.0, 0.0), Mode("built", 1.0, 0.0)),
                   costs=(("nothing", "built", Schedule.constant(110.0)),))
    p = Project(name="x", market=Market(0.03, 0.08, "continuous"),
                underlying=Underlying(present_value=100.0, payout_yield=0.05, volatility=0.35),
                investment=Investment(((0.0, 0.0),)), rights=(build,),
                lattice=LatticeSpec(steps_per_year=100))
    a = realopt.appraise(p)
    ref = quantlib_binomial("call", 100.0, 110.0, 0.03, 0.05, 0.35, 4.0, a.lattice.steps,
                            pin_p=a.lattice.probability)
    assert a.present_value == 0.0 and a.static_npv == 0.0
    assert a.expanded_npv == pytest.approx(ref, abs=1e-8)
    assert a.right("build").shapley_value == pytest.approx(ref, abs=1e-8)
    assert "scale 0" in a.base


def test_commit_and_use_a_right_at_the_same_date():
    # Adding the defer right never lowers the value (common practice): committing today through
    # it and switching out of a costly start mode at once is worth what the committed project
    # with the switch alone is worth; the decision today says both.
    sw = Switch(name="leave the costly mode", window=(0.0, 3.0), start="costly",
                modes=(Mode("costly", 1.0, -3.0), Mode("lean", 1.0, 0.0)),
                costs=(("costly", "lean", Schedule.constant(0.0)),))
    now = Defer(name="commit", window=(0.0, 0.0))
    base = Project(name="x", market=Market(0.03, 0.08, "continuous"),
                   underlying=Underlying(present_value=100.0, payout_yield=0.05, volatility=0.3),
                   investment=Investment(((0.0, 60.0),)), rights=(sw,),
                   lattice=LatticeSpec(steps_per_year=12))
    alone = realopt.appraise(base)
    both = realopt.appraise(replace(base, rights=(now, sw)))
    assert both.expanded_npv == pytest.approx(alone.expanded_npv, abs=1e-12)
    assert both.right("commit").shapley_value == pytest.approx(0.0, abs=1e-12)
    assert both.decision_today == "invest now (commit), and use 'leave the costly mode' at once"
    # the switch is worth its saved fixed flows: 3 (1 - e^{-3r}) / r (closed form, annuity)
    assert alone.flexibility_value == pytest.approx(3.0 * (1 - math.exp(-0.09)) / 0.03,
                                                    rel=1e-12)


def test_exclusion_with_the_defer_right_holds_in_every_subset():
    # The project is committed from the start with the defer right or without it (committed
    # today), so a right excluded with the defer right can never be used, in any subset; it adds
    # nothing and takes nothing (Shapley 1953: a null player gets 0).
    from realopt.project import loads
    p = loads("""
        project: {name: Excluded sale}
        market: {risk_free_rate: 0.03, discount_rate: 0.08}
        underlying: {cash_flows: {1: 10, 2: 10, 3: 10}, terminal_value: 50, volatility: 0.3}
        investment: {cost: 60}
        rights:
          - {name: wait, type: defer, window: [0, 2]}
          - {name: sell, type: abandon, salvage: 55, window: [0, 3], excludes: [wait]}
        """.replace("\\n        ", "\\n"))
    a = realopt.appraise(p)
    assert a.right("sell").standalone_value == 0.0 and a.right("sell").shapley_value == 0.0
    assert a.right("wait").shapley_value == pytest.approx(a.flexibility_value, abs=1e-12)
    assert any("'sell' can never be used" in w for w in a.headline_warnings)
