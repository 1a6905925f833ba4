"""Numbers a board can trust under valuation: simulation, on projects written the way users write
them (tests/user_projects/sim_*.yaml: three rights combined with an exclusion, a switch of three
modes with costs both ways, a defer right with a rising cost and a right that requires it, sale
windows reaching the last cash flow, spread and year-end flows, formulas for salvage).

The value-bridge invariants of every file (flexibility and every share >= 0, the sums) are in
tests/test_trust.py, which reads these files too; here: comparisons a user would make by hand on
the same paths (common random numbers), closed forms, and the wording of the rules."""
from __future__ import annotations

import math
import re
from pathlib import Path

import pytest
import yaml

import realopt

ROOT = Path(__file__).resolve().parents[1]
USER = ROOT / "tests" / "user_projects"
FILES = sorted(USER.glob("sim_*.yaml"))
BOILER = USER / "sim_boiler_switch.yaml"
COPPER = USER / "sim_copper_mine.yaml"
RESIN = USER / "sim_resin_spread.yaml"
WOOD = "0.4 * (heat - 1.3 * chips) - 1.6"


@pytest.fixture(scope="module")
def appraisals():
    cache = {}

    def get(path, overrides=None):
        key = (path, repr(overrides))
        if key not in cache:
            cache[key] = realopt.appraise(realopt.load_project(path, overrides))
        return cache[key]
    return get


def test_the_user_files_are_simulation_projects():
    assert len(FILES) == 3
    for f in FILES:
        assert realopt.load_project(f).valuation == "simulation", f.name


@pytest.mark.parametrize("path", FILES, ids=[f.stem for f in FILES])
def test_a_zero_move_reproduces_the_base(path, appraisals):
    # common practice: restating a key at its own value changes nothing, bit for bit (same seed)
    a = appraisals(path)
    b = appraisals(path, {"investment.cost": yaml.safe_load(path.read_text())["investment"]
                          ["cost"]})
    da, db = a.to_dict(), b.to_dict()
    da["simulation"].pop("seconds"), db["simulation"].pop("seconds")
    assert db == da


@pytest.mark.parametrize("path", FILES, ids=[f.stem for f in FILES])
def test_tables_add_up(path, appraisals):
    # Shapley (1953) efficiency: the shares sum to the flexibility; standalone values plus the
    # interaction give it too; static NPV = present value - investment; on the same paths these
    # hold to rounding, not merely within standard errors.
    from realopt.outputs import sim_report

    a = appraisals(path)
    d = a.to_dict()
    tol = 1e-9 * max(1.0, abs(a.present_value))
    assert sum(r["shapley_value"] for r in d["rights"]) == pytest.approx(
        d["flexibility_value"], abs=tol)
    assert sum(r["standalone_value"] for r in d["rights"]) + a.interaction == pytest.approx(
        d["flexibility_value"], abs=tol)
    assert d["static_npv"] + d["flexibility_value"] == pytest.approx(d["expanded_npv"], abs=tol)
    rows = {item: v for item, v, _ in sim_report.value_rows(a)}
    shares = [v for item, v in rows.items() if "Shapley share" in item]
    assert len(shares) == len(a.rights)
    assert rows["Static NPV"] + sum(shares) == pytest.approx(rows["Expanded NPV"], abs=tol)


# --- a switch of three modes with costs -------------------------------------------------------

def _two_modes(other: str, cash_flow: str, there: float, back: float) -> dict:
    return {"rights.Choose the fuel.modes": {"gas": {}, other: {"cash_flow": cash_flow}},
            "rights.Choose the fuel.costs": {f"gas->{other}": there, f"{other}->gas": back}}


def test_fewer_modes_or_dearer_moves_never_add_value(appraisals):
    # common practice: a switch that can do less (a mode removed) or pays more for each move is
    # worth no more; same seed, same paths, so the comparison holds within a few standard errors
    a = appraisals(BOILER)
    se = a.standard_error["flexibility_value"]
    for ov in (_two_modes("wood", WOOD, 0.6, 0.3), _two_modes("idle", "-0.8", 0.2, 0.5)):
        b = appraisals(BOILER, ov)
        assert b.flexibility_value <= a.flexibility_value + 3 * se
        assert b.flexibility_value > 0.0
    free = {f"{x}->{y}": 0.0 for x in ("gas", "wood", "idle") for y in ("gas", "wood", "idle")
            if x != y}
    c = appraisals(BOILER, {"rights.Choose the fuel.costs": free})
    assert c.flexibility_value >= a.flexibility_value - 3 * se
    assert c.flexibility_value > a.flexibility_value      # costs of 0.2-0.8 a move do bite


def test_a_mode_that_earns_the_same_adds_exactly_nothing(appraisals):
    # a second mode with the base state's own cash flow: switching can only cost, so the fitted
    # policy never switches and the flexibility is 0 exactly (not merely within noise)
    b = appraisals(BOILER, _two_modes("wood", "0.4 * (heat - 1.1 * gas) - 1.0", 0.6, 0.3))
    assert b.flexibility_value == 0.0
    assert b.standard_error["flexibility_value"] == 0.0
    assert b.expanded_npv == b.static_npv


def test_the_switch_present_value_against_the_closed_form(appraisals):
    # the base state fires gas: 0.4 (heat - 1.1 gas) - 1.0 at each year end 1..12. Risk-neutral
    # means: heat is gbm with drift 0.01 (E*[X_t] = 62 e^{0.01 t}); gas follows its forward curve
    # (33 at year 1, 30 from year 4, log-linear between, flat beyond; F(0) = start 34). Yearly
    # compounding at 3%. Exact, so the standard error is 0.
    a = appraisals(BOILER)

    def gas(t):
        pts = [(0.0, 34.0), (1.0, 33.0), (4.0, 30.0)]
        if t >= 4.0:
            return 30.0
        for (t0, f0), (t1, f1) in zip(pts, pts[1:]):
            if t0 <= t <= t1:
                w = (t - t0) / (t1 - t0)
                return math.exp((1 - w) * math.log(f0) + w * math.log(f1))
    pv = sum((0.4 * (62.0 * math.exp(0.01 * t) - 1.1 * gas(t)) - 1.0) / 1.03 ** t
             for t in range(1, 13))
    assert a.present_value == pytest.approx(pv, rel=1e-10)
    assert a.standard_error["present_value"] == 0.0


# --- a defer right with a rising cost, an expansion that requires it, a closure ---------------

def test_copper_present_value_against_the_closed_form(appraisals):
    # gbm with risk-neutral drift 0.01 (continuous): E*[copper_t] = 8600 e^{0.01 t}; flows
    # 0.012 copper - 80 at year ends 1..12, discounted at 4% a year (numpy-financial npv).
    npf = pytest.importorskip("numpy_financial")
    a = appraisals(COPPER)
    flows = [0.0] + [0.012 * 8600 * math.exp(0.01 * t) - 80 for t in range(1, 13)]
    assert a.present_value == pytest.approx(npf.npv(0.04, flows), rel=1e-12)
    assert a.static_npv == pytest.approx(a.present_value - 160.0, rel=1e-12)


def test_a_required_right_counts_in_the_standalone_value(appraisals):
    # the second pit requires the development right: its standalone value is the flexibility
    # of both together, so it cannot fall below the development right's alone (adding a right
    # never lowers the value; common practice)
    a = appraisals(COPPER)
    wait, pit = a.right("Wait to develop"), a.right("Second pit")
    assert pit.standalone_value >= wait.standalone_value - 3 * (
        pit.standalone_standard_error + wait.standalone_standard_error)


def test_rules_read_in_prices(appraisals):
    # a board reads "invest once copper exceeds 9,190", not "defer once ... 9.19e+03"
    a = appraisals(COPPER)
    rule = a.right("Wait to develop").rule
    assert "invest once copper exceeds" in rule and "defer once" not in rule
    for r in a.rights:
        assert not re.search(r"\de[+-]\d", r.rule), r.rule
    m = re.search(r"exceeds ([\d,]+) \(year", a.right("Second pit").rule)
    assert m and "," in m.group(1)
    assert any("invest" == t.action for t in a.right("Wait to develop").thresholds)


def test_windows_to_the_last_flow_are_named(appraisals):
    # a sale at the last cash-flow year collects its salvage for giving up nothing: said once
    # per right, in a sentence that reads
    a = appraisals(RESIN)
    named = [w for w in a.warnings if "last cash-flow year" in w]
    assert any("'Sell the line'" in w for w in named)
    assert any("'Run at half rate'" in w for w in named)
    assert all("there are collected" not in w for w in a.warnings)
    ended = appraisals(RESIN, {"rights.Sell the line.window": [0, 9.75],
                               "rights.Run at half rate.window": [0, 9.75]})
    assert not [w for w in ended.warnings if "last cash-flow year" in w]
    # ending a window earlier can only lower the value of that right (common practice)
    assert ended.flexibility_value <= a.flexibility_value + 3 * a.standard_error[
        "flexibility_value"]


def test_user_slips_get_located_messages(tmp_path):
    # a misspelt risk-neutral key and a misspelt driver in a salvage formula: every problem at
    # its line, with the fix; a formula is never checked against an empty list of drivers
    from realopt.errors import ProjectError

    text = RESIN.read_text()
    f = tmp_path / "slip.yaml"
    f.write_text(text.replace("0.03 * resin + 10", "0.03 * rezin + 10"))
    with pytest.raises(ProjectError) as err:
        realopt.load_project(f)
    assert "slip.yaml:" in str(err.value) and "did you mean resin?" in str(err.value)
    f.write_text(text.replace("0.03 * resin + 10", "0.03 * rezin + 10").replace(
        "{risk_premium: 0.05}", "{premium: 0.05}"))
    with pytest.raises(ProjectError) as err:
        realopt.load_project(f)
    msg = str(err.value)
    assert "did you mean risk_premium?" in msg
    assert "no driver could be read" in msg and "(no drivers)" not in msg
    assert msg.count("slip.yaml:") == 2


def test_rules_in_one_driver_read_one_way(appraisals):
    # common practice: invest or expand when the price is high, close when it is low. The fitted
    # policy had bands at a few dates whose far bound sat in the tail of the paths (invest only
    # below 15,000 at year 1.25); the stated thresholds read one way, the side of most dates.
    a = appraisals(COPPER)
    sides = {"Wait to develop": "above", "Second pit": "above", "Close the pit": "below"}
    for r in a.rights:
        live = [t for t in r.thresholds if not t.never]
        assert live, r.name
        assert r.side == sides[r.name], r.name
        for t in live:
            assert (t.lower is None) != (t.upper is None), (r.name, t)
