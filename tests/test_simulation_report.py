"""`realopt report` for simulation results (issue 10, item 5).

What is checked, and against what: the source of every number is the SimulationAppraisal itself
(the report must not compute a second version of any number), so the checks are that each
numbered HTML cell carries a value of the result bit for bit and shows it through the one
formatter; that results.json is ``to_dict()``; that the CSVs hold the result's numbers; that the
caution opens and closes the HTML, Markdown and PDF; that each figure is a non-trivial PNG; and
that a failure leaves no folder. The demo runs at reduced paths to keep the test short.
"""
from __future__ import annotations

import html.parser
import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import realopt
from realopt.outputs import sim_report
from realopt.outputs.report import MARKER, ReportError, write_report
from realopt.outputs.tables import Fmt
from realopt.project import load_project
from realopt.simulation.result import CAUTION_SIMULATION

ROOT = Path(__file__).resolve().parents[1]
NUMBER = re.compile(r"-?\d[\d,]*\.\d+%?|-?\d+(?:\.\d+)?%")

ONE_DRIVER = """
project: {name: One-driver plant, currency: EUR, unit: million}
valuation: simulation
simulation: {paths: 2000, seed: 2}
market: {risk_free_rate: 0.05, compounding: continuous, discount_rate: 0.08}
underlying:
  years: [1, 10]
  drivers:
    X: {process: gbm, start: 10, drift: 0.08, volatility: 0.3, risk_neutral: {drift: 0.05}}
  cash_flow: X
investment: {cost: 85}
rights:
  - {name: Sell, type: abandon, salvage: 55, window: [1, 9], exercise: bermudan,
     dates: [1, 2, 3, 4, 5, 6, 7, 8, 9]}
"""


def result_values(a) -> set:
    """Every float of the result's JSON (the numbers the report may show)."""
    out = set()

    def walk(x):
        if isinstance(x, bool):
            return
        if isinstance(x, (int, float)):
            out.add(float(x))
        elif isinstance(x, dict):
            for v in x.values():
                walk(v)
        elif isinstance(x, (list, tuple)):
            for v in x:
                walk(v)

    walk(a.to_dict())
    out.add(-a.investment_pv)              # shown as a negative line of the value table
    return out


def tornado_tokens(out) -> set:
    """The numbers of the report's tornado (its tornado.csv, which tests/test_sim_sensitivity.py
    checks against the engine run on the moved copies) as the report may show them."""
    path = out / "tables" / "tornado.csv"
    if not path.exists():
        return set()
    t = pd.read_csv(path)
    toks = {Fmt.money(float(x)) for c in t.columns if c not in ("input", "low_setting",
                                                                "high_setting", "paths")
            for x in t[c]}
    for c in ("input", "low_setting", "high_setting"):
        for text in t[c]:
            toks |= set(NUMBER.findall(str(text)))
    from realopt.outputs.sensitivity import DEFAULT_MOVES
    from realopt.outputs.sim_sensitivity import SimSensitivity

    moves = SimSensitivity(DEFAULT_MOVES, 0, 0, 0, 0.0, 0.0, 0.0, 0.0, ()).describe_moves()
    return toks | set(NUMBER.findall(moves))


def allowed_tokens(a, out=None) -> set:
    f = Fmt(a.project)
    toks = {f.money(x) for x in result_values(a)} | {f.pct(x) for x in result_values(a)}
    for text in (a.decision_today, a.base, *a.warnings, *a.headline_warnings,
                 *[r.rule for r in a.rights], CAUTION_SIMULATION):
        toks |= set(NUMBER.findall(text))
    return toks | (tornado_tokens(out) if out is not None else set())


class _Cells(html.parser.HTMLParser):
    def __init__(self):
        super().__init__()
        self.cells, self.parts, self._cell, self._skip = [], [], None, 0

    def handle_starttag(self, tag, attrs):
        d = dict(attrs)
        if tag == "style":
            self._skip += 1
        if tag == "td" and "data-value" in d:
            self._cell = [float(d["data-value"]), ""]

    def handle_endtag(self, tag):
        if tag == "style":
            self._skip -= 1
        if tag == "td" and self._cell is not None:
            self.cells.append(tuple(self._cell))
            self._cell = None

    def handle_data(self, data):
        if not self._skip:
            self.parts.append(data)
        if self._cell is not None:
            self._cell[1] += data


@pytest.fixture(scope="module")
def river(tmp_path_factory):
    # 4 decision dates a year (the file has 12) keep the report's tornado copies quick
    p = load_project(ROOT / "projects" / "river_ccgt.yaml", {"simulation.paths": 3000,
                                                             "simulation.steps_per_year": 4})
    a = realopt.appraise(p, progress=False)
    out = tmp_path_factory.mktemp("rep") / "river-report"
    write_report(a, out, dpi=72)
    return a, out


def test_every_html_cell_is_a_number_of_the_result(river):
    a, out = river
    page = _Cells()
    page.feed((out / "report.html").read_text(encoding="utf-8"))
    values, f = result_values(a), Fmt(a.project)
    t = pd.read_csv(out / "tables" / "tornado.csv")
    tornado = {float(x) for c in t.columns if c.startswith(("expanded_npv_", "flexibility_"))
               for x in t[c]}
    assert len(page.cells) >= 15
    for value, text in page.cells:
        assert value in values or value in tornado, (text, value)
        # a standard error of 0 (a value in closed form) reads "exact"
        assert text == f.money(value) or (text == "exact" and value == 0.0), (text, value)
    assert "exact" in [t for _, t in page.cells]     # the present value here is in closed form
    tornado = tornado_tokens(out)
    assert len(tornado) > 20                 # the tornado's table is on the page
    stray = set(NUMBER.findall(" ".join(page.parts))) - allowed_tokens(a, out)
    assert not stray


def test_markdown_numbers_are_the_results_and_the_check_can_fail(river):
    a, out = river
    md = re.sub(r"!\[[^\]]*\]\([^)]*\)", "", (out / "report.md").read_text(encoding="utf-8"))
    allowed = allowed_tokens(a, out)
    assert not set(NUMBER.findall(md)) - allowed
    f = Fmt(a.project)
    # a second computation of the headline (the tornado's own numbers aside)
    assert f.money(a.expanded_npv * 1.001 + 0.013) not in allowed_tokens(a)


def test_headline_and_dcf_beside_the_risk_neutral_value(river):
    a, out = river
    f = Fmt(a.project)
    text = (out / "report.md").read_text(encoding="utf-8")
    for x in (a.present_value, a.static_npv, a.expanded_npv, a.flexibility_value,
              a.real_world_dcf["value"], a.standard_error["expanded_npv"],
              *[r.shapley_value for r in a.rights], *[r.shapley_standard_error for r in a.rights]):
        assert f.money(x) in text
    assert "price of the drivers' risk" in text
    assert "not drawn" not in text                     # every figure is drawn (issue 10)


def test_caution_first_and_last_in_every_format(river):
    a, out = river
    for name in ("report.html", "report.md"):
        t = (out / name).read_text(encoding="utf-8")
        first, last = t.find("Caution"), t.rfind("Caution")
        assert first != last and first < 600 and len(t) - last < len(CAUTION_SIMULATION) + 80
    pdf = (out / "report.pdf").read_bytes()
    assert pdf.startswith(b"%PDF")
    manifest = json.loads((out / MARKER).read_text())
    assert manifest["pdf_pages"][0] == "Values and rules" and manifest["pdf_pages"][-1] == "Caution"
    assert sum(p in sim_report.TITLES.values() for p in manifest["pdf_pages"]) == len(
        manifest["figures"])


def test_results_json_and_csvs_hold_the_result(river):
    a, out = river
    assert json.loads((out / "results.json").read_text()) == json.loads(
        realopt.jsontext.to_json(a.to_dict()))
    vb = pd.read_csv(out / "tables" / "value_bridge.csv")
    assert vb["value"].tolist() == [v for _, v, _ in sim_report.value_rows(a)]
    cu = pd.read_csv(out / "tables" / "chance_of_use.csv")
    r = a.rights[-1]
    got = cu[cu.right == r.name]
    assert np.array_equal(got["chance_real_world"].to_numpy(), np.asarray(r.use_real_world))
    assert {f"share_{m}_real_world" for m in r.mode_shares} <= set(cu.columns)


def test_each_figure_is_a_non_trivial_png(river):
    a, out = river
    import matplotlib.image as mpimg

    names = sorted(p.name for p in (out / "figures").glob("*.png"))
    assert names == ["cash_flow_fan.png", "chance_of_use.png", "convergence.png",
                     "decision_maps.png", "fan.png", "tornado.png", "value_bridge.png"]
    for n in names:
        img = mpimg.imread(out / "figures" / n)
        assert img.shape[0] > 150 and img.shape[1] > 300
        assert np.unique(img.reshape(-1, img.shape[-1]), axis=0).shape[0] > 20   # not blank
    page = (out / "report.html").read_text(encoding="utf-8")
    assert page.count("data:image/png;base64,") == len(names)
    assert "http://" not in page and "https://" not in page


def test_one_driver_draws_thresholds(tmp_path):
    f = tmp_path / "plant.yaml"
    f.write_text(ONE_DRIVER)
    a = realopt.appraise(load_project(f), progress=False)
    assert any(r.thresholds for r in a.rights)
    write_report(a, tmp_path / "rep", dpi=72)
    assert (tmp_path / "rep" / "figures" / "thresholds.png").stat().st_size > 5000
    assert not (tmp_path / "rep" / "figures" / "decision_maps.png").exists()


def test_failure_while_drawing_leaves_nothing(tmp_path, monkeypatch):
    f = tmp_path / "plant.yaml"
    f.write_text(ONE_DRIVER)
    a = realopt.appraise(load_project(f), progress=False)

    def boom(*_):
        raise RuntimeError("injected")

    monkeypatch.setattr(sim_report, "fig_fan", boom)
    with pytest.raises(ReportError):
        write_report(a, tmp_path / "rep", dpi=72)
    assert not (tmp_path / "rep").exists()
    assert [p.name for p in tmp_path.iterdir()] == ["plant.yaml"]


def test_report_command_on_the_simulation_demo(tmp_path):
    env = {"PYTHONPATH": str(ROOT)}
    r = subprocess.run([sys.executable, "-m", "realopt", "report",
                        str(ROOT / "projects" / "river_ccgt.yaml"), "--set",
                        "simulation.paths=2000", "--steps-per-year", "4",
                        "-o", str(tmp_path / "out")],
                       capture_output=True, text=True, env=env)
    assert r.returncode == 0, r.stderr
    assert "Traceback" not in r.stderr
    d = json.loads((tmp_path / "out" / "results.json").read_text())
    assert d["method"] == "simulation" and d["simulation"]["paths"] == 2000
    assert d["simulation"]["steps_per_year"] == 4 and d["warnings"] == []
    assert (tmp_path / "out" / "figures" / "tornado.png").stat().st_size > 5000


def test_value_table_and_bridge_add_up_down_each_column(river):
    """Reading down the value table (and the bridge) gives the totals: the Shapley shares add
    up to the flexibility value, so the interaction between the rights sits beside the values
    alone in the rights table, never among the shares (common practice for a value bridge)."""
    from realopt.outputs.sim_report import INTERACTION, csv_tables, value_rows

    a, _ = river
    rows = {item: v for item, v, _ in value_rows(a)}
    assert not any("nteraction" in item for item in rows)
    shares = sum(v for item, v in rows.items() if item.endswith("Shapley share"))
    assert shares == pytest.approx(rows["Flexibility value"], abs=1e-9)
    assert rows["Static NPV"] + rows["Flexibility value"] == pytest.approx(
        rows["Expanded NPV"], abs=1e-9)
    rights = csv_tables(a)["rights"]
    alone = rights["standalone_value"].sum()          # values alone + the interaction row
    assert INTERACTION in set(rights["right"])
    assert alone == pytest.approx(a.flexibility_value, abs=1e-9)


def test_cash_flow_fan_matches_the_lognormal_quantiles(tmp_path):
    # cash_flow = X - K with X a real-world gbm: the q-th percentile of the flow at t is
    # start*exp((drift - vol^2/2) t + z_q vol sqrt(t)) - K (lognormal quantile, closed form).
    f = tmp_path / "p.yaml"
    f.write_text(ONE_DRIVER.replace("cash_flow: X", "cash_flow: X - 12")
                 .replace("paths: 2000", "paths: 8000"))
    a = realopt.appraise(load_project(f), progress=False)
    from statistics import NormalDist
    t = np.asarray(a.fan_years)
    ok = np.isfinite(a.cash_flow_fan[50])
    assert ok.sum() >= 5
    for q in (5, 25, 50, 75, 95):
        z = NormalDist().inv_cdf(q / 100)
        exact = 10 * np.exp((0.08 - 0.045) * t + z * 0.3 * np.sqrt(t)) - 12
        # sampling tolerance: a sample quantile's se is sqrt(p(1-p)/n)/density; at n = 8000
        # (antithetic pairs or not) and the 5th/95th percentile the relative se of the
        # lognormal quantile is below 0.3*sqrt(t)*0.0024/0.103 ~ 0.7% * sqrt(t); 6% of the
        # price (about 8 se at t = 10 years) cannot be met by a wrong drift or volatility.
        price = exact[ok] + 12
        assert np.all(np.abs(a.cash_flow_fan[q][ok] - exact[ok]) < 0.06 * price), q
    stack = np.array([a.cash_flow_fan[q][ok] for q in (5, 25, 50, 75, 95)])
    assert np.all(np.diff(stack, axis=0) >= 0)
    assert (a.cash_flow_fan[5][ok] < 0).any()     # the band crosses zero: a case to read off
    write_report(a, tmp_path / "rep", dpi=72)
    assert (tmp_path / "rep" / "figures" / "cash_flow_fan.png").stat().st_size > 2000


def test_convergence_ends_on_the_result_itself(tmp_path, monkeypatch):
    f = tmp_path / "p.yaml"
    f.write_text(ONE_DRIVER.replace("paths: 2000", "paths: 1600"))
    a = realopt.appraise(load_project(f), progress=False)
    pts = sim_report.convergence(a)
    # paths/16 = 100 and paths/4 = 400, seeded as the file; the last point is the result's
    assert [p for p, _, _ in pts] == [100, 400, 1600]
    assert pts[-1][1] == a.expanded_npv and pts[-1][2] == a.standard_error["expanded_npv"]
    assert all(e > 0 for _, _, e in pts)
    again = realopt.appraise(load_project(f, {"simulation.paths": 400}), progress=False)
    assert pts[1][1] == again.expanded_npv            # the copy is the file with paths moved
    drawn = []
    real = sim_report.fig_convergence
    monkeypatch.setattr(sim_report, "fig_convergence", lambda p, fm: drawn.append(p) or real(p, fm))
    write_report(a, tmp_path / "rep", dpi=72)
    assert drawn == [pts]
    assert (tmp_path / "rep" / "figures" / "convergence.png").stat().st_size > 2000
    assert "figures/tornado.png" in (tmp_path / "rep" / "report.md").read_text()


def test_the_dual_bound_and_its_gap_are_on_the_page(tmp_path):
    # the interval a reader needs (Andersen & Broadie 2004): the lower estimate, the bound and
    # their gap, stated in the Markdown and HTML report, and the bound's row in the PDF's text
    p = load_project(ROOT / "tests" / "user_projects" / "sim_copper_mine.yaml",
                     {"simulation.upper_bound": {"paths": 60, "inner": 6},
                      "simulation.steps_per_year": 2, "simulation.paths": 3000})
    a = realopt.appraise(p, progress=False)
    ub, f = a.upper_bound, Fmt(a.project)
    write_report(a, tmp_path / "rep", dpi=72)
    md = (tmp_path / "rep" / "report.md").read_text(encoding="utf-8")
    page = (tmp_path / "rep" / "report.html").read_text(encoding="utf-8")
    sentence = sim_report.bound_sentence(a, f)
    assert f"a gap of {f.money(ub['value'] - a.expanded_npv)}" in sentence
    assert f"| Dual upper bound on the expanded NPV | {f.money(ub['value'])} |" in md
    assert sentence in md
    assert "a gap of" in page and f.money(ub["value"]) in page
    assert sim_report.bound_sentence(realopt.appraise(load_project(
        ROOT / "tests" / "user_projects" / "sim_copper_mine.yaml",
        {"simulation.paths": 3000, "simulation.steps_per_year": 2}), progress=False), f) == ""
