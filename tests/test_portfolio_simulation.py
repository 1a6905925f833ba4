"""realopt portfolio with ``valuation: simulation`` projects beside lattice ones.

Today's choices of a simulation project (commit now, keep the option) are checked against a
hand computation on deterministic drivers (numpy-financial's npv), against the same file with
the defer right removed, and against the appraisal itself; the budgeted choice of a mixed
portfolio run on a real Dask cluster (a ``dask scheduler`` and two ``dask worker`` processes,
the fixture of tests/test_sweep.py) against brute force; the choices the simulation does not
settle against an enumeration; bad input stays located and nothing is written.
"""
from __future__ import annotations

import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

from realopt.portfolio import (COMMIT, KEEP, PASS, brute_force, choose, close_calls, options,
                               portfolio_table, today_choices)
from test_sweep import _env, dask_cluster  # noqa: F401  (the real cluster of the sweep tests)

ROOT = Path(__file__).resolve().parents[1]
RIVER = ROOT / "projects" / "river_ccgt.yaml"
PATHS = 4000            # the demo's 50,000 paths cut for test time (same seed, same dates)


def _river_text(defer: bool = True) -> str:
    text = RIVER.read_text().replace("paths: 50000 ", f"paths: {PATHS} ")
    assert f"paths: {PATHS} " in text
    if defer:
        return text
    tree = yaml.safe_load(text)             # file order kept: the drivers' order sets the paths
    tree["rights"] = [r for r in tree["rights"] if r["type"] != "defer"]
    return yaml.safe_dump(tree, sort_keys=False)


@pytest.fixture(scope="module")
def river(tmp_path_factory):
    """(file with the defer right, file without it, today_choices of each)."""
    import realopt

    folder = tmp_path_factory.mktemp("river")
    with_defer, without = folder / "river.yaml", folder / "river_committed.yaml"
    with_defer.write_text(_river_text(True))
    without.write_text(_river_text(False))
    return (with_defer, without, today_choices(realopt.load_project(with_defer)),
            today_choices(realopt.load_project(without)))


DETERMINISTIC = """\
project: {{name: Deterministic plant, currency: EUR, unit: million}}
valuation: simulation
simulation: {{paths: 1000, seed: 3}}
market: {{risk_free_rate: 0.05, discount_rate: 0.05}}
underlying:
  years: [1, 3]
  drivers:
    X: {{schedule: {{1: {f1}, 2: {f2}, 3: {f3}}}}}
  cash_flow: X
investment: {{cost: 100}}
rights:
  - {{name: Wait a year, type: defer, window: [0, 1], exercise: bermudan, dates: [0, 1]}}
"""


@pytest.mark.parametrize("flows", [(2, 70, 80), (30, 50, 60)])
def test_deterministic_drivers_give_the_hand_values(write_project, flows):
    import numpy_financial as npf
    import realopt

    # All drivers are schedules: the simulation is exact dynamic programming on one path
    # (docs/design.md section 10), standard errors 0. By hand, with numpy-financial's npv
    # (sum of c_t / 1.05^t from t = 0): committing now pays 100 today for the flows of years
    # 1 to 3; waiting a year loses the year-1 flow and pays the 100 at year 1.
    d = today_choices(realopt.load_project(write_project(DETERMINISTIC.format(
        f1=flows[0], f2=flows[1], f3=flows[2]))))
    commit = npf.npv(0.05, [-100, *flows])
    keep = npf.npv(0.05, [0, -100, flows[1], flows[2]])
    assert d["commit_now_value"] == pytest.approx(commit, abs=1e-9)
    assert d["keep_option_value"] == pytest.approx(keep, abs=1e-9)
    assert d["expanded_npv"] == pytest.approx(max(commit, keep), abs=1e-9)
    assert d["commit_now_se"] == d["keep_option_se"] == d["commit_minus_keep_se"] == 0.0
    assert d["outlay_today"] == 100.0
    # the first case waits (keep 37.36 > commit 34.50), the second commits (25.75 > 1.94)
    assert (keep > commit) == (flows[0] == 2)


def test_commit_now_is_the_file_without_the_defer_right(river):
    _, _, with_defer, committed = river
    # Committing today is the project with the defer right used at t = 0 and the mothball right
    # still held: the same file without the defer right (investment kept, paid today). Same
    # seed and dates, so the same fitting and valuing paths: the invested states' fitted policy
    # is the same and the pathwise values are identical (next test); the two estimates differ
    # only by the control variates each appraisal fits (the defer file has four subsets of
    # rights, the other two), well within one standard error.
    se = math.hypot(with_defer["commit_now_se"], committed["expanded_npv_se"])
    assert abs(with_defer["commit_now_value"] - committed["expanded_npv"]) < 0.5 * se
    assert with_defer["commit_now_se"] > 0 and committed["expanded_npv_se"] > 0
    # waiting is worth more than committing now by many standard errors of the difference
    # (the static NPV is negative; a mothballed unit and three years of waiting both help)
    gap = with_defer["keep_option_value"] - with_defer["commit_now_value"]
    assert gap > 4 * with_defer["commit_minus_keep_se"]
    assert with_defer["expanded_npv"] == with_defer["keep_option_value"]     # waits today


def test_commit_now_paths_are_those_of_the_committed_file(river):
    from dataclasses import replace

    import realopt
    from realopt.rights import Action, build_state_graph, prepared_rights
    from realopt.simulation import lsm
    from realopt.simulation.paths import dynamics, simulate

    with_defer, without, _, _ = river

    def fitted(path):
        p = realopt.load_project(path)
        prob = lsm.Problem(p)
        rights = prepared_rights(p)
        spy = p.simulation.steps_per_year
        opened = {r.name: lsm.open_mask(r, prob.times, spy) for r in rights}
        dyn = dynamics(prob.model, "risk_neutral")
        x_fit = simulate(dyn, prob.times, PATHS, p.simulation.seed, "fit", True)
        stats = [prob.basis.stats(x_fit[k]) for k in range(prob.T)]
        pol = lsm.fit(prob, build_state_graph(rights), x_fit, stats, opened)
        x_val = simulate(dyn, prob.times, PATHS, p.simulation.seed, "value", True)
        return prob, pol, x_val

    prob, pol, x_val = fitted(with_defer)
    g = pol.graph
    e = next(e for e in g.edges if e.source == g.initial and e.action == Action.COMMIT)
    start = replace(pol, graph=replace(g, initial=e.target))
    commit = lsm.run(prob, start, x_val).values + prob.money(e, 0, x_val[0])
    prob2, pol2, x_val2 = fitted(without)
    assert np.array_equal(x_val, x_val2)
    committed = lsm.run(prob2, pol2, x_val2).values - prob2.project.investment.present_value(
        prob2.project.market)
    assert np.array_equal(commit, committed)          # path by path, bit for bit


def test_without_a_defer_right_commit_now_is_the_expanded_npv(river):
    _, _, _, committed = river
    assert committed["commit_now_value"] == committed["expanded_npv"]       # exactly
    assert committed["commit_now_se"] == committed["expanded_npv_se"]
    assert committed["keep_option_value"] is None and committed["keep_option_se"] is None
    assert committed["outlay_today"] == 95.0


def test_the_appraisal_is_unchanged_by_valuing_today(river):
    import realopt
    from realopt.simulation.result import appraise

    with_defer, _, d, _ = river
    d = dict(d)
    plain = appraise(realopt.load_project(with_defer), progress=False).to_dict()
    for x in (plain, d):
        x["simulation"] = dict(x["simulation"], seconds=None)
    assert {k: d[k] for k in plain} == plain
    assert d["expanded_npv"] in (d["commit_now_value"], d["keep_option_value"])


# ------------------------------------------------------------------------------------------
# A mixed portfolio on a real cluster


DET = DETERMINISTIC.format(f1=30, f2=50, f3=60)      # commit now 25.75 (outlay 100), keep 1.94


def test_mixed_portfolio_on_a_real_cluster_matches_brute_force(dask_cluster, tmp_path):
    import pandas as pd
    import realopt

    address, _ = dask_cluster
    river, det = tmp_path / "river.yaml", tmp_path / "det.yaml"
    river.write_text(_river_text(True))
    det.write_text(DET)
    files = [river, ROOT / "projects" / "coating_line.yaml", det,
             ROOT / "projects" / "peaking_unit.yaml"]
    out = tmp_path / "pf"
    r = subprocess.run([sys.executable, "-m", "realopt", "portfolio", *map(str, files),
                        "--budget", "120", "--scheduler", address, "-o", str(out), "--quiet"],
                       capture_output=True, text=True, env=_env(), cwd=tmp_path, timeout=300)
    assert r.returncode == 0, r.stderr
    df = pd.read_csv(out / "portfolio.csv")
    assert list(df.columns) == [
        "project", "file", "method", "expanded_npv", "expanded_npv_se", "static_npv",
        "commit_now_value", "commit_now_se", "keep_option_value", "keep_option_se",
        "commit_minus_keep_se", "outlay_today", "value_per_outlay", "decision_today",
        "decision_without_budget", "decision_under_budget"]
    rows = {Path(f).stem: x for f, x in zip(df["file"], df.to_dict("records"))}
    # the workers' numbers are this machine's, bit for bit (same seed, resolved projects)
    here = today_choices(realopt.load_project(river))
    for key in ("expanded_npv", "expanded_npv_se", "commit_now_value", "commit_now_se",
                "keep_option_value", "keep_option_se", "commit_minus_keep_se"):
        assert rows["river"][key] == here[key]
    assert rows["river"]["method"] == "simulation" and rows["river"]["expanded_npv_se"] > 0
    assert rows["coating_line"]["method"] == "lattice"
    assert rows["coating_line"]["commit_now_se"] == 0 and rows["coating_line"]["expanded_npv_se"] == 0
    assert pd.isna(rows["coating_line"]["keep_option_se"])
    assert rows["peaking_unit"]["keep_option_se"] == 0
    # the budgeted choice is the best of every combination (brute force, exact sums)
    names = list(rows)
    groups = [options(rows[n]["commit_now_value"],
                      None if pd.isna(rows[n]["keep_option_value"])
                      else rows[n]["keep_option_value"], rows[n]["outlay_today"])
              for n in names]
    picked, best, _ = brute_force(groups, 120.0)
    assert [groups[i][k].decision for i, k in enumerate(picked)] == [
        rows[n]["decision_under_budget"] for n in names]
    # 120 holds the deterministic plant (100) or the coating line (38) with the peaking unit's
    # 42 not both: committing the plant (25.75) beats the coating line (16.88) with the plant's
    # keep (1.94); the river unit and the peaking unit wait at no outlay
    assert rows["det"]["decision_under_budget"] == COMMIT
    assert rows["coating_line"]["decision_under_budget"] == PASS
    assert rows["river"]["decision_under_budget"] == KEEP
    free = float(brute_force(groups, None)[1])
    assert f"given up {free - float(best):,.2f}" in r.stdout
    md = (out / "portfolio.md").read_text()
    assert "Standard error" in md and "Valued by" in md
    assert "settled by the simulation" in md
    from realopt.simulation.result import CAUTION_SIMULATION

    for name in ("portfolio.md", "portfolio.html"):
        text = (out / name).read_text()
        assert realopt.CAUTION.split(";")[0].replace("'", "&#x27;" if name.endswith("html")
                                                     else "'") in text
        assert CAUTION_SIMULATION.split("(")[0].replace(
            "'", "&#x27;" if name.endswith("html") else "'") in text


# ------------------------------------------------------------------------------------------
# Choices the simulation does not settle


def _result(name, commit, keep, outlay, method="simulation", **se):
    return dict({"project": name, "expanded_npv": max(commit, keep if keep is not None else
                                                      -math.inf),
                 "static_npv": commit, "commit_now_value": commit, "keep_option_value": keep,
                 "outlay_today": outlay, "decision_today": "", "method": method,
                 "currency": "EUR", "unit": "million"}, **se)


def _markdown(results, budget=None):
    from realopt.outputs.portfolio_summary import markdown_summary

    df, totals = portfolio_table([f"{r['project']}.yaml" for r in results], results, budget)
    return markdown_summary(df, totals, "EUR million"), totals


def test_two_choices_within_two_standard_errors_are_named():
    # keep 10.5 against commit 10.0: a difference of 0.5 with a standard error of the pathwise
    # difference of 0.3 is within two standard errors (0.6) ...
    close = _result("Unit A", 10.0, 10.5, 40.0, expanded_npv_se=0.4, commit_now_se=0.4,
                    keep_option_se=0.4, commit_minus_keep_se=0.3)
    text, totals = _markdown([close])
    assert ("Without a budget, the simulation does not settle the choice: the decisions chosen "
            "(sum 10.50 EUR million) and those with Unit A: commit now instead of keep the "
            "option (sum 10.00 EUR million) are within two standard errors of each other "
            "(difference 0.50 +- 0.30 EUR million)") in " ".join(text.split())
    # ... and not with 0.2 (0.5 > 0.4): the choice is settled
    far = dict(close, commit_minus_keep_se=0.2)
    text, totals = _markdown([far])
    assert totals["close_calls"]["without_budget"] == []
    assert "Every choice above is settled by the simulation" in text


def test_a_budgeted_choice_between_two_projects_not_settled():
    # budget 50 holds one of two projects of outlay 50: the simulated one (20 +- 1) is chosen
    # over the lattice one (19, exact); 20 - 19 = 1 < 2 x 1: not settled
    s = _result("Sim", 20.0, None, 50.0, expanded_npv_se=1.0, commit_now_se=1.0,
                keep_option_se=None, commit_minus_keep_se=None)
    lat = _result("Lat", 19.0, None, 50.0, method="lattice")
    text, totals = _markdown([s, lat], budget=50.0)
    calls = totals["close_calls"]["under_budget"]
    assert len(calls) == 1
    assert calls[0]["changes"] == [("Sim", PASS, COMMIT), ("Lat", COMMIT, PASS)]
    assert calls[0]["difference"] == pytest.approx(1.0) and calls[0]["se"] == 1.0
    assert "Within the budget, the simulation does not settle the choice" in text
    # no budget: both are committed, and each is far from passing (20 > 2 x 1; 19 exact)
    assert totals["close_calls"]["without_budget"] == []


group = st.tuples(st.floats(-20, 40).map(lambda x: round(x, 2)),
                  st.one_of(st.none(), st.floats(-20, 40).map(lambda x: round(x, 2))),
                  st.floats(0, 60).map(lambda x: round(x, 1)),
                  st.floats(0, 3).map(lambda x: round(x, 2)))


@settings(max_examples=200, deadline=None)
@given(st.lists(group, min_size=1, max_size=5))
def test_close_calls_without_a_budget_are_every_near_single_change(case):
    # Without a budget the projects do not interact: an alternative is one project's other
    # decision, the others kept. Enumerated here by hand against close_calls.
    from fractions import Fraction

    groups = [options(c, k, o) for c, k, o, _ in case]
    ses = [s for *_, s in case]
    picked = choose(groups, None)[0]
    found = close_calls(groups, lambda p, i, j: 0.0 if i == j else ses[p], picked, None)
    expected = set()
    for p, g in enumerate(groups):
        for k, o in enumerate(g):
            gap = Fraction(repr(g[picked[p]].value)) - Fraction(repr(o.value))
            if k != picked[p] and ses[p] > 0 and float(gap) < 2 * ses[p]:
                expected.add((p, k))
    got = set()
    for c in found:
        moved = [q for q, k in enumerate(c["alternative"]) if k != picked[q]]
        assert len(moved) == 1
        got.add((moved[0], c["alternative"][moved[0]]))
        assert c["difference"] >= 0 and c["difference"] < 2 * c["se"]
    assert got == expected


# ------------------------------------------------------------------------------------------
# Bad input


def test_bad_simulation_input_is_located_and_nothing_is_run(cli, tmp_path, write_project):
    typo = write_project(_river_text(True).replace("  seed: 11", "  sed: 11"), "typo.yaml")
    r = cli("portfolio", ROOT / "projects" / "coating_line.yaml", typo, "-o", tmp_path / "pf")
    assert r.code == 1 and "Nothing was run" in r.err and "Traceback" not in r.err
    assert "typo.yaml" in r.err and "sed" in r.err and "seed" in r.err     # did you mean
    line = _river_text(True).splitlines().index("  seed: 11") + 1
    assert f":{line}" in r.err
    big = write_project(_river_text(True).replace(f"paths: {PATHS} ", "paths: 4000000 "),
                        "big.yaml")
    r = cli("portfolio", big, "-o", tmp_path / "pf")
    assert r.code == 1 and "big.yaml" in r.err and "--allow-large" in r.err
    assert "simulation.paths=" in r.err and "Nothing was run" in r.err
    assert not (tmp_path / "pf").exists()
