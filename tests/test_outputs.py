"""Decision-paper outputs and `realopt report` (issue 4).

What is checked, and against what:

* every number shown in report.html and report.md is a formatting (by the one formatter,
  ``realopt.outputs.tables.Fmt``) of a number of the Appraisal result, of the engine runs behind
  the sensitivity figure, or of the project's own inputs; numbered cells carry their exact
  value (``data-value``) and that value must be one of the result's own numbers, bit for bit;
* the CSV tables and results.json hold the Appraisal's numbers exactly (full precision);
* the HTML fetches nothing from the network (no http(s) or protocol-relative src/href/url);
* the PDF has one page per entry of the report's page list, at least the three text sections,
  and embeds every figure once;
* a failure midway (unwritable folder, an error injected while drawing or writing the PDF)
  leaves no partial folder and the previous report byte for byte intact;
* the tornado's moved values are the engine's own for the moved project, and a break-even
  separates two different decisions today;
* `realopt appraise` never imports matplotlib; `realopt report` exits 0, or 1 with a message
  and no traceback.

The sources here are the result object itself (the report must not compute a second version of
any number) and the engine's public functions; no outside reference is needed for formatting.
"""
from __future__ import annotations

import hashlib
import html
import html.parser
import json
import math
import re
import subprocess
import sys
from dataclasses import asdict, replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import realopt
from realopt import CAUTION
from realopt.appraisal import expanded_npv, quick_appraisal
from realopt.model import (Contract, Defer, Expand, Investment, LatticeSpec, Market, Mode,
                           Project, Schedule, Switch, Underlying)
from realopt.outputs import report as report_mod
from realopt.outputs.report import MARKER, ReportError, write_report
from realopt.outputs.sensitivity import DEFAULT_MOVES, analyse
from realopt.outputs.tables import Fmt, inputs_rows, no_negative_zero

ROOT = Path(__file__).resolve().parents[1]
DPI = 72            # small figures keep the tests quick; the format is the same at 300 dpi


def built_project() -> Project:
    """Every kind of right at once, built directly from the dataclasses (invented figures)."""
    return Project(
        name="Test mill, invented figures", currency="EUR", unit="million",
        market=Market(risk_free_rate=0.04, discount_rate=0.10),
        underlying=Underlying(cash_flows=((1, 8.0), (2, 10.0), (3, 11.0), (4, 11.0), (5, 10.0),
                                          (6, 9.0)), terminal_value=30.0, volatility=0.30),
        investment=Investment(outlays=((0.0, 60.0),)),
        lattice=LatticeSpec(steps_per_year=6),
        rights=(
            Defer(name="Wait for the permit", window=(0.0, 1.0)),
            Expand(name="Add a press", window=(1.0, 5.0), scale=0.4,
                   cost=Schedule.constant(18.0)),
            Contract(name="Close one hall", window=(1.0, 6.0), scale=0.3,
                     savings=Schedule.constant(8.0)),
            Switch(name="Mothball the mill", window=(0.0, 6.0),
                   modes=(Mode("run", 1.0, 0.0), Mode("idle", 0.0, -0.8)), start="run",
                   costs=(("run", "idle", Schedule.constant(0.5)),
                          ("idle", "run", Schedule.constant(1.5)))),
        ))


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    a = realopt.appraise(built_project())
    out = tmp_path_factory.mktemp("built") / "report"
    write_report(a, out, dpi=DPI)
    return a, analyse(a), out


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    path = ROOT / "projects" / "coating_line.yaml"
    if not path.exists():
        pytest.skip("demo project projects/coating_line.yaml not in this checkout")
    a = realopt.appraise(realopt.load_project(path))
    out = tmp_path_factory.mktemp("demo") / "report"
    write_report(a, out, source=path, dpi=DPI)
    return a, analyse(a), out


@pytest.fixture(params=["built", "demo"])
def case(request):
    return request.getfixturevalue(request.param)


# ------------------------------------------------------------------------ number checks
def _floats(obj):
    """Every float (and int) inside nested dicts/lists/tuples/arrays/dataclasses."""
    if isinstance(obj, bool) or obj is None or isinstance(obj, str):
        return
    if isinstance(obj, (int, float)):
        if math.isfinite(obj):
            yield float(obj)
        return
    if hasattr(obj, "tolist"):
        yield from _floats(obj.tolist())
        return
    if hasattr(obj, "__dataclass_fields__"):
        yield from _floats(asdict(obj))
        return
    if isinstance(obj, dict):
        for v in obj.values():
            yield from _floats(v)
        return
    if isinstance(obj, (list, tuple)):
        for v in obj:
            yield from _floats(v)


def result_values(a, s) -> set[float]:
    """The numbers of the result: the Appraisal (JSON contract, summary, fan) and the
    sensitivity runs of the engine."""
    vals = set(_floats(a.to_dict()))
    vals |= set(_floats(a.summary().to_numpy()))
    vals |= set(_floats([a.fan, a.fan_years, a.expected_real_world, a.expected_risk_neutral]))
    vals |= set(_floats([s.rows, s.breakevens, s.convergence, s.base_expanded,
                         s.base_flexibility]))
    return vals


def result_strings(a, s) -> list[str]:
    """Text of the result that carries numbers already formatted by the engine."""
    out = [a.decision_today, a.volatility_method, CAUTION, a.project.name, s.moves.describe(),
           f"realopt {realopt.__version__}"]
    out += list(a.warnings) + list(s.notes)
    out += list(getattr(a, "headline_warnings", ())) + [getattr(a, "base", "") or ""]
    for r in a.rights:
        out += [r.name, r.rule, r.use_measure]
    for row in s.rows:
        out += [row.input, row.low_setting, row.high_setting]
    f = Fmt(a.project)
    out += [v for _, _, v in inputs_rows(a.project, f)] + [k for _, k, _ in inputs_rows(
        a.project, f)]
    return out


NUMBER = re.compile(r"(?<![\w.])-?\d[\d,]*\.\d+%?|(?<![\w.])-?\d[\d,]*%")


def allowed_tokens(a, s) -> set[str]:
    f = Fmt(a.project)
    vals = result_values(a, s) | set(_floats(a.project))
    out = set()
    for x in vals:
        out |= {f.money(x), f.pct(x), f.pct(x, 2), f.number(x), f.year(x), f"{x:g}",
                f"{x * 100:.3g}%", f"{x * 100:g}%"}
    for text in result_strings(a, s):
        out |= set(NUMBER.findall(text)) | set(NUMBER.findall(no_negative_zero(text)))
    return out


class _Text(html.parser.HTMLParser):
    """Visible text of an HTML page (no style, no attributes) and the numbered cells."""

    def __init__(self):
        super().__init__()
        self.parts, self.cells, self._skip, self._cell = [], [], 0, None

    def handle_starttag(self, tag, attrs):
        if tag in ("style", "script"):
            self._skip += 1
        d = dict(attrs)
        if tag == "td" and "data-value" in d:
            self._cell = [float(d["data-value"]), ""]

    def handle_endtag(self, tag):
        if tag in ("style", "script"):
            self._skip -= 1
        if tag == "td" and self._cell is not None:
            self.cells.append(tuple(self._cell))
            self._cell = None

    def handle_data(self, data):
        if not self._skip:
            self.parts.append(data)
            if self._cell is not None:
                self._cell[1] += data


def stray_numbers(text: str, allowed: set[str]) -> list[str]:
    """Numbers in ``text`` (with a decimal point or a percent sign) not drawn from the result."""
    return sorted({t for t in NUMBER.findall(text) if t not in allowed})


def test_every_html_number_is_the_results_own(case):
    a, s, out = case
    page = _Text()
    page.feed((out / "report.html").read_text(encoding="utf-8"))
    values = result_values(a, s)
    f = Fmt(a.project)
    assert len(page.cells) > 20
    for value, text in page.cells:
        assert value in values, f"cell {text!r} carries {value!r}, not a number of the result"
        assert text in (f.money(value), f.pct(value)), (text, value)
    assert stray_numbers(" ".join(page.parts), allowed_tokens(a, s)) == []


def test_headline_numbers_appear_in_every_text_format(case):
    a, s, out = case
    f = Fmt(a.project)
    html_text = (out / "report.html").read_text(encoding="utf-8")
    md = (out / "report.md").read_text(encoding="utf-8")
    for x in (a.present_value, a.static_npv, a.expanded_npv, a.flexibility_value,
              a.interaction, *[r.shapley_value for r in a.rights],
              *[r.standalone_value for r in a.rights]):
        assert f.money(x) in html_text and f.money(x) in md
    assert a.decision_today in md
    for r in a.rights:
        assert r.rule in md and html.escape(r.rule, quote=True) in html_text


def test_every_markdown_number_is_the_results_own(case):
    a, s, out = case
    md = (out / "report.md").read_text(encoding="utf-8")
    md = re.sub(r"!\[[^\]]*\]\([^)]*\)", "", md)            # image links
    assert stray_numbers(md, allowed_tokens(a, s)) == []


def test_the_number_check_catches_a_second_computation(demo):
    """The check above is not vacuous: a number the result does not hold is reported."""
    a, s, out = demo
    f = Fmt(a.project)
    drifted = f.money(a.expanded_npv * 1.001 + 0.013)
    assert stray_numbers(f"Expanded NPV {drifted}", allowed_tokens(a, s)) == [drifted]


def _csv(out, stem):
    return pd.read_csv(out / "tables" / f"{stem}.csv")        # pandas 3 reads floats round-trip


def test_csv_tables_hold_the_results_numbers_exactly(case):
    a, s, out = case
    bridge = _csv(out, "value_bridge")
    summ = a.summary()
    assert list(bridge["item"]) == list(summ.index)
    assert _same(bridge["value_or_shapley_share"], summ["value"])
    assert _same(bridge["value_of_the_right_alone"], summ["standalone_value"])
    rights = _csv(out, "rights")
    assert list(rights["shapley_value"]) == [r.shapley_value for r in a.rights]
    assert list(rights["standalone_value"]) == [r.standalone_value for r in a.rights]
    assert list(rights["rule"]) == [r.rule for r in a.rights]
    thr = _csv(out, "thresholds")
    want = [(t.year, t.lower, t.upper) for r in a.rights for t in r.thresholds]
    got = list(zip(thr["year"], thr["exercise_above"], thr["exercise_below"]))
    assert len(got) == len(want)
    for (y1, lo1, hi1), (y2, lo2, hi2) in zip(got, want):
        assert y1 == y2
        assert (lo2 is None and math.isnan(lo1)) or lo1 == lo2
        assert (hi2 is None and math.isnan(hi1)) or hi1 == hi2
    use = _csv(out, "chance_of_use")
    assert list(use["real_world"]) == [x for r in a.rights for x in r.use_real_world]
    assert list(use["risk_neutral"]) == [x for r in a.rights for x in r.use_risk_neutral]
    fan = _csv(out, "value_fan")
    assert list(fan["p50"]) == list(a.fan[50]) and list(fan["year"]) == list(a.fan_years)
    sens = _csv(out, "sensitivity")
    assert list(sens["expanded_npv_high"]) == [r.expanded_high for r in s.rows]
    assert list(sens["flexibility_value_low"]) == [r.flexibility_low for r in s.rows]
    conv = _csv(out, "convergence")
    assert list(conv["expanded_npv"]) == list(s.convergence.expanded_npv)


def _same(xs, ys, rel=0.0) -> bool:
    """Equal lists of floats (to ``rel``), NaN (an empty cell) equal to NaN."""
    xs, ys = [float(x) for x in xs], [float("nan") if y is None else float(y) for y in ys]
    return len(xs) == len(ys) and all(
        abs(x - y) <= rel * abs(y) or (math.isnan(x) and math.isnan(y)) for x, y in zip(xs, ys))


def _headline_table(out):
    """The first table of report.html (the headline numbers) as rows of (label, value or None,
    value alone or None), read from the cells' exact data-value."""
    page = (out / "report.html").read_text(encoding="utf-8")
    table = page[page.index("<table>"):page.index("</table>")]
    rows = []
    for tr in re.findall(r"<tr[^>]*>(.*?)</tr>", table)[1:]:
        cells = re.findall(r"<td([^>]*)>(.*?)</td>", tr)
        vals = [float(m.group(1)) if (m := re.search(r'data-value="([^"]+)"', attrs)) else None
                for attrs, _ in cells[1:]]
        rows.append((html.unescape(cells[0][1]), *vals))
    return page[page.index("<table>"):page.index("</thead>")], rows


def test_the_value_table_adds_up_down_both_columns(case, tmp_path):
    """Issue 8 item 4: reading down the Shapley column gives the flexibility value (the
    interaction between the rights is not in it); the interaction sits beside the values of
    the rights alone, which with it also add up to the flexibility value. Same in the CSV and
    report.md. (An additive identity of Shapley shares: efficiency, common practice.)"""
    a, s, out = case
    head, rows = _headline_table(out)
    assert "Shapley share" in head and "Value of the right alone" in head
    by = {label: (v, alone) for label, v, alone in rows}
    names = [f"{r.name} ({r.type})" for r in a.rights]
    inter = by["Interaction between rights"]
    assert inter[0] is None and inter[1] == a.interaction
    flex = by["Flexibility value"]
    assert flex == (a.flexibility_value, a.flexibility_value)
    assert sum(by[n][0] for n in names) == pytest.approx(a.flexibility_value, abs=1e-9)
    assert sum(by[n][1] for n in names) + inter[1] == pytest.approx(a.flexibility_value,
                                                                     abs=1e-9)
    bridge = _csv(out, "value_bridge").set_index("item")
    assert math.isnan(bridge.loc["Interaction between rights", "value_or_shapley_share"])
    assert bridge.loc[names, "value_or_shapley_share"].sum() == pytest.approx(
        a.flexibility_value, abs=1e-9)
    md = (out / "report.md").read_text(encoding="utf-8")
    line = next(x for x in md.splitlines() if x.startswith("| Interaction between rights"))
    cells = [c.strip() for c in line.strip("|").split("|")]
    assert cells[1] == "" and cells[2] == Fmt(a.project).money(a.interaction)


def test_results_json_is_the_contract(case):
    a, s, out = case
    from realopt.cli import to_json

    assert (out / "results.json").read_text(encoding="utf-8") == to_json(a.to_dict()) + "\n"
    data = json.loads((out / "results.json").read_text(encoding="utf-8"))
    assert data["expanded_npv"] == a.expanded_npv and data["caution"] == CAUTION


def test_workbook_has_every_table(case):
    pytest.importorskip("openpyxl")
    a, s, out = case
    book = pd.read_excel(out / "tables.xlsx", sheet_name=None)
    stems = {p.stem for p in (out / "tables").glob("*.csv")}
    assert set(book) == stems
    assert _same(book["value_bridge"]["value_or_shapley_share"], a.summary()["value"], 1e-15)


# ------------------------------------------------------------------------ self-contained HTML
def test_html_fetches_nothing_and_embeds_every_figure(case):
    a, s, out = case
    text = (out / "report.html").read_text(encoding="utf-8")
    assert not re.search(r"""(?i)\b(src|href)\s*=\s*["']?\s*(https?:|//|ftp:)""", text)
    assert not re.search(r"(?i)url\(\s*['\"]?\s*(https?:|//)", text)
    assert not re.search(r"(?i)@import|<link\b|<script\b|<iframe\b|<object\b", text)
    srcs = re.findall(r'<img\b[^>]*\bsrc="([^"]*)"', text)
    pngs = sorted((out / "figures").glob("*.png"))
    assert len(srcs) == len(pngs) >= 7
    assert all(src.startswith("data:image/png;base64,") for src in srcs)
    manifest = json.loads((out / MARKER).read_text(encoding="utf-8"))
    assert sorted(manifest["figures"]) == [p.name for p in pngs]
    import base64

    embedded = {hashlib.sha256(base64.b64decode(src.split(",", 1)[1])).hexdigest()
                for src in srcs}
    assert embedded == {hashlib.sha256(p.read_bytes()).hexdigest() for p in pngs}


def test_caution_in_every_report_format(case):
    a, s, out = case
    assert CAUTION in (out / "report.md").read_text(encoding="utf-8")
    page = _Text()
    page.feed((out / "report.html").read_text(encoding="utf-8"))
    assert CAUTION in " ".join(page.parts)
    assert json.loads((out / "results.json").read_text())["caution"] == CAUTION


def test_pngs_are_print_resolution_by_default(tmp_path):
    from PIL import Image

    from realopt.outputs import figures

    a = realopt.appraise(built_project())
    chart = figures.charts(a, analyse(a))[0]
    png, pixels = figures.render(chart)
    img = Image.open(__import__("io").BytesIO(png))
    assert round(img.info["dpi"][0]) == 300 and img.width >= 6.5 * 300


# ------------------------------------------------------------------------ PDF
def _pdf_pages(data: bytes) -> int:
    return len(re.findall(rb"/Type\s*/Page(?![a-zA-Z])", data))


def test_pdf_has_the_expected_pages(case):
    a, s, out = case
    data = (out / "report.pdf").read_bytes()
    assert data.startswith(b"%PDF-") and data.rstrip().endswith(b"%%EOF")
    manifest = json.loads((out / MARKER).read_text(encoding="utf-8"))
    pages = manifest["pdf_pages"]
    assert _pdf_pages(data) == len(pages)
    assert pages[0] == a.project.name
    assert {"Decision rule card", "Inputs and assumptions"} <= set(pages)
    # every figure embedded once, as an image
    n_images = len(re.findall(rb"/Subtype\s*/Image", data))
    assert n_images == len(manifest["figures"])
    assert len(pages) <= len(manifest["figures"]) + 6


# ------------------------------------------------------------------------ atomic writing
def _snapshot(folder: Path) -> dict:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def small():
    return realopt.appraise(replace(built_project(), rights=built_project().rights[1:3]))


def test_unwritable_folder_leaves_nothing(tmp_path, small):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    with pytest.raises(ReportError, match="is a file"):
        write_report(small, blocker / "report", dpi=DPI)
    assert blocker.read_text() == "not a folder"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a-file"]


def test_failure_while_drawing_keeps_the_previous_report(tmp_path, small, monkeypatch):
    out = tmp_path / "report"
    write_report(small, out, dpi=DPI)
    before = _snapshot(out)
    from realopt.outputs import figures

    def broken(*args, **kwargs):
        raise RuntimeError("injected failure while drawing the fan")

    monkeypatch.setattr(figures, "_draw_fan", broken)
    with pytest.raises(ReportError, match="injected failure"):
        write_report(small, out, dpi=DPI)
    assert _snapshot(out) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]


def test_failure_while_writing_the_pdf_keeps_the_previous_report(tmp_path, small, monkeypatch):
    out = tmp_path / "report"
    write_report(small, out, dpi=DPI)
    before = _snapshot(out)

    def broken(*args, **kwargs):
        raise OSError(28, "No space left on device", "report.pdf")

    monkeypatch.setattr(report_mod, "write_pdf", broken)
    with pytest.raises(ReportError, match="No space left"):
        write_report(small, out, dpi=DPI)
    assert _snapshot(out) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]


def test_failure_in_a_new_nested_folder_removes_what_it_created(tmp_path, small, monkeypatch):
    monkeypatch.setattr(report_mod, "write_pdf", lambda *a, **k: 1 / 0)
    with pytest.raises(ReportError):
        write_report(small, tmp_path / "new" / "deeper" / "report", dpi=DPI)
    assert list(tmp_path.iterdir()) == []


def test_a_second_report_replaces_the_first_whole(tmp_path, small):
    out = tmp_path / "report"
    write_report(small, out, dpi=DPI)
    (out / "figures" / "stale.png").write_bytes(b"old")
    write_report(small, out, dpi=DPI)
    assert not (out / "figures" / "stale.png").exists()
    assert (out / "report.html").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report"]


def test_refuses_a_folder_that_is_not_a_report(tmp_path, small):
    out = tmp_path / "papers"
    out.mkdir()
    (out / "board-paper.docx").write_bytes(b"mine")
    with pytest.raises(ReportError, match="not a realopt report"):
        write_report(small, out, dpi=DPI)
    assert [p.name for p in out.iterdir()] == ["board-paper.docx"]


def test_never_over_or_around_the_input_file(tmp_path, small):
    src = tmp_path / "plant.yaml"
    src.write_text("project: {}\n")
    with pytest.raises(ReportError, match="project file itself"):
        write_report(small, src, source=src, dpi=DPI)
    with pytest.raises(ReportError, match="holds the project file"):
        write_report(small, tmp_path, source=src, dpi=DPI)
    assert src.read_text() == "project: {}\n"


# ------------------------------------------------------------------------ sensitivity
def test_tornado_values_are_the_engines_for_the_moved_project():
    p = built_project()
    a = realopt.appraise(p)
    s = analyse(a)
    rows = {r.input: r for r in s.rows}
    sigma = p.underlying.volatility + DEFAULT_MOVES.volatility
    up = replace(p, underlying=replace(p.underlying, volatility=sigma))
    assert rows["Volatility"].expanded_high == expanded_npv(up)
    cheap = replace(p, rights=tuple(replace(r, cost=Schedule.constant(18.0 * 0.8))
                                    if r.name == "Add a press" else r for r in p.rights))
    static, full, _ = quick_appraisal(cheap)
    assert rows["Add a press: cost"].expanded_low == full
    assert rows["Add a press: cost"].flexibility_low == full - static
    assert s.base_expanded == a.expanded_npv and s.base_flexibility == a.flexibility_value
    # common practice: a larger expansion never lowers the expanded NPV
    assert rows["Add a press: scale"].expanded_high >= rows["Add a press: scale"].expanded_low
    c = s.convergence
    assert c.expanded_npv[c.steps_per_year.index(c.chosen)] == a.expanded_npv


def test_break_even_separates_two_decisions():
    """A project whose decision today flips with volatility (defer on a value paying out
    continuously): just inside the break-even the decision is today's, just beyond it the
    other one."""
    p = Project(
        name="Break-even check", market=Market(0.04, 0.04, "continuous"),
        underlying=Underlying(present_value=100.0, payout_yield=0.08, volatility=0.25),
        investment=Investment(outlays=((0.0, 90.0),)), lattice=LatticeSpec(steps_per_year=12),
        rights=(Defer(name="Wait", window=(0.0, 2.0)),))
    a = realopt.appraise(p)
    s = analyse(a)
    vol = next(b for b in s.breakevens if b.input == "Volatility")
    crossing = vol.below if vol.below is not None else vol.above
    assert crossing is not None, "this project's decision must change inside the search range"
    other = vol.decision_below if vol.below is not None else vol.decision_above
    assert other != a.decision_today
    side = -1 if vol.below is not None else 1

    def decision(sigma):
        return quick_appraisal(replace(p, underlying=replace(p.underlying, volatility=sigma)))[2]

    assert decision(crossing - side * 0.01) == a.decision_today
    assert decision(crossing + side * 0.01) == other


# ------------------------------------------------------------------------ formatting
@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=-1e9, max_value=1e9, allow_nan=False))
def test_money_format_round_trips_to_a_cent(x):
    text = Fmt.money(x)
    assert text != "-0.00"
    assert abs(float(text.replace(",", "")) - x) <= 0.005 + 1e-9 * abs(x)


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=0, max_value=1))
def test_percent_format_round_trips(x):
    text = Fmt.pct(x)
    assert text.endswith("%") and abs(float(text[:-1]) / 100 - x) <= 0.0005 + 1e-12


# ------------------------------------------------------------------------ command line
def test_appraise_never_imports_matplotlib():
    path = ROOT / "projects" / "coating_line.yaml"
    if not path.exists():
        pytest.skip("demo project not in this checkout")
    code = ("import sys, io, contextlib\n"
            "from realopt.cli import main\n"
            "with contextlib.redirect_stdout(io.StringIO()):\n"
            f"    rc = main(['appraise', {str(path)!r}])\n"
            "assert rc == 0, rc\n"
            "bad = [m for m in sys.modules if m.split('.')[0] in ('matplotlib', 'PIL')]\n"
            "print(','.join(bad))\n")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == ""


def test_report_command_writes_the_folder(tmp_path, cli):
    path = ROOT / "projects" / "coating_line.yaml"
    if not path.exists():
        pytest.skip("demo project not in this checkout")
    out = tmp_path / "paper"
    r = cli("report", path, "-o", out, "--set", "lattice.steps_per_year=4",
            "--moves", "volatility=0.1,relative=0.3")
    assert r.code == 0, r.text
    assert "report written to" in r.out
    for name in ("report.html", "report.pdf", "report.md", "results.json", MARKER):
        assert (out / name).is_file()
    data = json.loads((out / "results.json").read_text())
    assert data["lattice"]["steps"] == 4 * data["lattice"]["horizon"]
    assert "volatility +-10 points" in (out / "report.md").read_text()


def test_report_command_fails_cleanly(tmp_path, cli):
    path = ROOT / "projects" / "coating_line.yaml"
    if not path.exists():
        pytest.skip("demo project not in this checkout")
    blocker = tmp_path / "blocker"
    blocker.write_text("x")
    r = cli("report", path, "-o", blocker / "out")
    assert r.code == 1
    assert "Traceback" not in r.text and "is a file" in r.err
    r = cli("report", path, "--moves", "volatility=2")
    assert r.code == 2 and "between 0 and 1" in r.err
    bad = tmp_path / "bad.yaml"
    bad.write_text("project: {name: x}\n")
    r = cli("report", bad, "-o", tmp_path / "never")
    assert r.code == 1 and "Traceback" not in r.text
    assert not (tmp_path / "never").exists()


# ------------------------------------------------------------------------ decision maps (issue 8)
BERMUDAN_MILL = """
project: {name: "Bermudan mill (invented figures)", currency: EUR, unit: million}
market: {risk_free_rate: 0.04, discount_rate: 0.10}
underlying:
  cash_flows: {1: 8, 2: 10, 3: 11, 4: 11, 5: 10, 6: 9}
  terminal_value: 30
  volatility: 0.3
investment: {cost: 50}
lattice: {steps_per_year: 200}
rights:
  - {name: Add a press, type: expand, scale: 0.4, cost: 12, window: [1, 5],
     exercise: bermudan, dates: [1, 2, 3, 4, 5]}
  - {name: Sell the mill, type: abandon, salvage: {0: 30, 6: 12}, window: [0, 6]}
"""


@pytest.fixture(scope="module")
def bermudan_200():
    from realopt.project import loads

    return realopt.appraise(loads(BERMUDAN_MILL))


def _policy_regions(a):
    """(state label, action label) of every action the recorded policy uses, read from a
    fresh solve of the same project (the engine's own policy, not the map)."""
    from realopt.appraisal import _Valuer
    from realopt.lattice import solve
    from realopt.rights import build_state_graph

    v = _Valuer(a.project)
    graph = build_state_graph(v.rights)
    sol = solve(v.grid, graph, record=True)
    from realopt.appraisal import _policy_runs

    out = set()
    for s, runs in _policy_runs(sol.policy).items():
        for starts, codes in runs.values():
            for c in set(codes) - {0}:
                e = graph.edges[c - 1]
                out.add((graph.states[s].label,
                         e.right if e.kind != "switch" else f"{e.right}: {e.label}"))
    return out


def test_every_exercise_region_is_on_the_decision_maps_at_200_steps_a_year(bermudan_200):
    """Issue 8 item 5: one-step-wide bermudan dates (1/200 of a year) and regions far below
    today's value keep their cells on the map, and every threshold read from a state lies
    inside the value axis of that state's map."""
    a = bermudan_200
    regions = _policy_regions(a)
    assert ("operating", "Add a press") in regions and ("operating", "Sell the mill") in regions
    maps = {dm.state: dm for dm in a.decision_maps}
    for state, action in regions:
        dm = maps[state]
        k = dm.actions.index(action)
        assert np.any(dm.codes == k), (state, action)
    from realopt.appraisal import _Valuer, _plausible

    grid = _Valuer(a.project).grid
    for r in a.rights:
        for t in r.thresholds:
            dm = maps.get(t.state)
            if not _plausible(grid, t):     # beyond 5 standard deviations: table only
                continue
            for b in (t.lower, t.upper):
                if dm is not None and b is not None and not t.never:
                    assert dm.values[0] <= b <= dm.values[-1], (r.name, t)
    # each bermudan date has its own column (the even sample alone would miss most of them)
    op = maps["operating"]
    k = op.actions.index("Add a press")
    dates = {round(float(t), 6) for t, col in zip(op.times, op.codes.T) if np.any(col == k)}
    assert dates == {1.0, 2.0, 3.0, 4.0, 5.0}


def test_one_step_dates_are_drawn_wide_enough_to_see(bermudan_200):
    """The drawn map holds the fill of every action on it (pixels of that colour), and a
    one-step date's column is at least MIN_COLUMN of the time axis wide."""
    from realopt.outputs import figures, style

    a = bermudan_200
    chart = next(c for c in figures.charts(a, None) if c.slug.startswith("decision_map_1"))
    _, rgb = figures.render(chart, dpi=100)
    styles = figures._action_styles(a)
    dm = a.decision_maps[0]
    for label in dm.actions[1:]:
        fill = styles[label][0]
        want = np.array([int(fill[i:i + 2], 16) for i in (1, 3, 5)])
        hits = np.all(np.abs(rgb.astype(int) - want) <= 2, axis=-1).sum()
        assert hits > 60, (label, hits)
    assert figures.MIN_COLUMN >= 0.01


def test_switch_shows_chance_of_first_switch_and_mode_shares(tmp_path):
    """Issue 8 item 6: a switch right's chance of use is the chance of having switched at
    least once (it never falls) and, separately, the share of paths in each mode; each is
    drawn and tabulated under its own label. Where the engine does not provide mode shares
    yet, invented ones are attached to the result so the outputs can be checked."""
    a = realopt.appraise(built_project())
    r = next(x for x in a.rights if x.type == "switch")
    if not getattr(r, "mode_shares", None):
        n = len(r.use_years)
        idle = (tuple(np.linspace(0.0, 0.3, n)), tuple(np.linspace(0.0, 0.4, n)))
        run = tuple(tuple(1.0 - x for x in t) for t in idle)
        object.__setattr__(r, "mode_shares", {"run": run, "idle": idle})
    shares = r.mode_shares
    out = tmp_path / "report"
    write_report(a, out, dpi=DPI)
    assert (out / "figures" / "switch_modes.png").is_file()
    table = _csv(out, "mode_shares")
    got = table[table["mode"] == "idle"]
    assert list(got["real_world"]) == list(shares["idle"][1])
    assert list(got["risk_neutral"]) == list(shares["idle"][0])
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "Share of paths in each mode of a switch right" in page
    assert "not the chance of having switched" in page
    assert "Chance of having switched at least once by year" in page
    md = (out / "report.md").read_text(encoding="utf-8")
    assert "Share of paths in mode &#x27;idle&#x27;" in page or "mode 'idle'" in md


def test_first_pdf_page_is_full_with_five_rights(tmp_path):
    """Issue 8 item 9: with five rights the headline table grew and the value bridge moved
    to page 2, leaving page 1 half empty (0.45 of its height used); the bridge now shrinks a
    little to stay beside the headline numbers, or where page-one warnings leave no room, the
    rule card follows it on page 2 (the manifest records the share of each page used)."""
    from realopt.model import Abandon

    p = built_project()
    p = replace(p, rights=p.rights + (Abandon(name="Sell the mill to a rival",
                                              window=(1.0, 6.0),
                                              salvage=Schedule.constant(35.0)),))
    a = realopt.appraise(p)
    out = tmp_path / "report"
    write_report(a, out, dpi=DPI)
    manifest = json.loads((out / MARKER).read_text(encoding="utf-8"))
    fill = manifest["pdf_fill"]
    assert fill[0] >= 0.65 and fill[1] >= 0.7, fill         # no half-empty page at the start
    assert len(manifest["pdf_fill"]) == len(manifest["pdf_pages"])


def test_page_one_shows_headline_warnings_base_and_stderr(tmp_path, monkeypatch):
    """Issue 8: the warnings that bear on the headline numbers, the base project (where a
    switch starts outside the plain project) and V0's standard error sit with the headline
    numbers on page one of the HTML, Markdown and PDF (values attached here by hand where the
    engine does not provide them yet)."""
    a = realopt.appraise(built_project())
    warning = "Close one hall: can be used at the last cash-flow year, check the savings"
    object.__setattr__(a, "headline_warnings", (warning,))
    object.__setattr__(a, "base", "Base project: the cash flows as given, with the mill idle")
    object.__setattr__(a, "present_value_stderr", 0.25)
    monkeypatch.setattr(report_mod, "_base_is_not_plain", lambda project: True)
    out = tmp_path / "report"
    write_report(a, out, dpi=DPI)
    page = (out / "report.html").read_text(encoding="utf-8")
    first = page[:page.index("Decision rule card")]
    assert html.escape(warning, quote=True) in first and "with the mill idle" in first
    assert "\u00b1 0.25" in first
    assert first.index(html.escape(warning, quote=True)) < first.index("<table>")
    md = (out / "report.md").read_text(encoding="utf-8")
    assert warning in md[:md.index("## Decision rule card")]
    assert "Base project: Base project" not in page + md
