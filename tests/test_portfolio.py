"""realopt portfolio: today's choices per project and the exact budgeted choice.

The budgeted choice is checked against brute force over every combination (hypothesis), on a
hand case where the greedy ratio rule fails, and on amounts that float addition would round.
Today's choices are checked on a one-step tree computed by hand and against the appraisal.
"""
from __future__ import annotations

import json
from fractions import Fraction
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from realopt.portfolio import (COMMIT, KEEP, PASS, brute_force, choose, options,
                               today_choices)

ROOT = Path(__file__).resolve().parents[1]

money = st.floats(min_value=-50, max_value=200, allow_nan=False).map(lambda x: round(x, 2))
outlay = st.floats(min_value=0, max_value=120, allow_nan=False).map(lambda x: round(x, 2))


@st.composite
def portfolios(draw):
    n = draw(st.integers(1, 6))
    groups = []
    for _ in range(n):
        keep = draw(st.one_of(st.none(), money))
        groups.append(options(draw(money), keep, draw(outlay)))
    budget = draw(st.one_of(st.none(), st.floats(0, 400).map(lambda x: round(x, 2))))
    return groups, budget


@settings(max_examples=300, deadline=None)
@given(portfolios())
def test_budgeted_choice_equals_brute_force(case):
    groups, budget = case
    picked, value, spent = choose(groups, budget)
    _, best_value, _ = brute_force(groups, budget)
    assert value == best_value                        # the optimum, exactly
    assert sum((Fraction(repr(g[k].value)) for g, k in zip(groups, picked)),
               Fraction(0)) == value
    if budget is not None:
        assert spent <= Fraction(repr(budget))
    unconstrained = sum(max(Fraction(repr(o.value)) for o in g) for g in groups)
    assert choose(groups, None)[1] == unconstrained   # no budget: each project's best
    assert value <= unconstrained


def test_exact_choice_beats_the_ratio_rule():
    # 0/1 knapsack counter-example to the greedy value/weight rule (common practice): budget
    # 100; A costs 60 for 12 (ratio 0.2), B and C cost 50 for 9 each (ratio 0.18). Greedy takes
    # A and nothing else fits (12); the exact choice is B and C (18).
    groups = [options(12.0, None, 60.0), options(9.0, None, 50.0), options(9.0, None, 50.0)]
    picked, value, spent = choose(groups, 100.0)
    assert [groups[i][k].decision for i, k in enumerate(picked)] == [PASS, COMMIT, COMMIT]
    assert value == 18 and spent == 100


def test_money_is_not_rounded_by_float_addition():
    # 0.1 + 0.2 > 0.3 in float64 (IEEE 754 rounding, common practice); amounts as written fit
    groups = [options(1.0, None, 0.1), options(1.0, None, 0.2)]
    picked, value, spent = choose(groups, 0.3)
    assert picked == [0, 0] and value == 2 and spent == Fraction(3, 10)
    assert choose(groups, 0.29999)[1] == 1


def test_keep_the_option_needs_no_outlay():
    groups = [options(10.0, 14.0, 80.0), options(-3.0, None, 10.0)]
    picked, value, _ = choose(groups, 0.0)
    assert [groups[i][k].decision for i, k in enumerate(picked)] == [KEEP, PASS]
    assert value == 14


ONE_STEP = """\
project: {name: One-step deferral, currency: USD, unit: million}
market: {risk_free_rate: 0.08, discount_rate: 0.08}
underlying: {present_value: 100.0, volatility: 0.3}
investment: {cost: 104.0}
lattice: {up: 1.8, down: 0.6, step_years: 1}
rights:
  - {name: Wait a year, type: defer, window: [0, 1]}
"""


def test_one_step_deferral_by_hand(write_project):
    import realopt

    # One-step binomial tree in the style of Trigeorgis (1996): V0 = 100, u = 1.8, d = 0.6,
    # r = 8%, I = 104 (numbers recalled from memory). By hand: p = (1.08 - 0.6) / 1.2 = 0.4;
    # commit now 100 - 104 = -4; wait: 0.4 * (180 - 104) / 1.08 = 28.148148...
    d = today_choices(realopt.load_project(write_project(ONE_STEP)))
    assert d["commit_now_value"] == pytest.approx(-4.0, abs=1e-12)
    assert d["keep_option_value"] == pytest.approx(0.4 * 76 / 1.08, rel=1e-12)
    assert d["expanded_npv"] == pytest.approx(0.4 * 76 / 1.08, rel=1e-12)
    assert d["outlay_today"] == 104.0


@pytest.mark.parametrize("name", ["coating_line", "peaking_unit", "staged_field"])
def test_today_choices_agree_with_the_appraisal(name):
    import realopt

    project = realopt.load_project(ROOT / "projects" / f"{name}.yaml")
    a = realopt.appraise(project)
    d = today_choices(project)
    assert d["expanded_npv"] == a.expanded_npv
    if d["keep_option_value"] is None:               # no defer right: committed today
        assert d["commit_now_value"] == a.expanded_npv
    else:                                            # the decision today is the larger one
        assert max(d["commit_now_value"], d["keep_option_value"]) == a.expanded_npv
        waits = a.decision_today.startswith("wait")
        assert waits == (d["keep_option_value"] >= d["commit_now_value"])


def test_portfolio_command(cli, tmp_path):
    out = tmp_path / "pf"
    files = [ROOT / "projects" / "coating_line.yaml", ROOT / "projects" / "peaking_unit.yaml"]
    r = cli("portfolio", *files, "--budget", "30", "-o", out, "--workers", "2", "--quiet")
    assert r.code == 0, r.err
    import pandas as pd

    df = pd.read_csv(out / "portfolio.csv")
    for col in ("project", "file", "expanded_npv", "commit_now_value", "keep_option_value",
                "outlay_today", "decision_under_budget"):
        assert col in df.columns
    ratio = df["expanded_npv"] / df["outlay_today"]
    assert list(ratio) == sorted(ratio, reverse=True)
    by_file = {Path(f).stem: row for f, row in zip(df["file"], df.to_dict("records"))}
    coat, peak = by_file["coating_line"], by_file["peaking_unit"]
    assert coat["outlay_today"] == 38.0 and pd.isna(coat["keep_option_value"])
    # the coating line's 38 does not fit 30; the peaking unit waits (no outlay)
    assert coat["decision_under_budget"] == PASS and peak["decision_under_budget"] == KEEP
    groups = [options(x["commit_now_value"], None if pd.isna(x["keep_option_value"])
                      else x["keep_option_value"], x["outlay_today"]) for x in (coat, peak)]
    given_up = float(brute_force(groups, None)[1] - brute_force(groups, 30.0)[1])
    assert f"given up {given_up:,.2f}" in r.out
    import realopt

    for name in ("portfolio.md", "portfolio.html"):
        text = (out / name).read_text()
        assert realopt.CAUTION.split(";")[0].replace("'", "&#x27;" if name.endswith("html")
                                                     else "'") in text
        assert "Value given up by the budget" in text
    assert json.loads((out / ".realopt-portfolio").read_text())["kind"] == "realopt portfolio"


def test_portfolio_refuses_bad_input_before_any_work(cli, tmp_path, write_project):
    bad = write_project("project: {name: x}\n", "bad.yaml")
    r = cli("portfolio", ROOT / "projects" / "coating_line.yaml", bad, "-o", tmp_path / "pf")
    assert r.code == 1 and "bad.yaml" in r.err and "Nothing was run" in r.err
    assert not (tmp_path / "pf").exists()
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "keep.txt").write_text("x")
    r = cli("portfolio", ROOT / "projects" / "coating_line.yaml", "-o", tmp_path / "other")
    assert r.code == 1 and "not a realopt portfolio" in r.err
    r = cli("portfolio", ROOT / "projects" / "coating_line.yaml", "--budget", "-5")
    assert r.code == 2
