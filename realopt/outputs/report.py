"""``realopt report``: the decision-paper outputs of one appraisal, written atomically.

DIR receives ``report.html`` (self-contained: figures embedded as base64 PNG, no network fetch,
print CSS that fits A4 and Letter), ``report.pdf`` (the same content as A4 pages, matplotlib's
PDF backend), ``report.md`` (for pasting; figures linked from ``figures/``), ``results.json``
(the results contract of docs/design.md, ``Appraisal.to_dict()``), ``tables/*.csv`` (and
``tables.xlsx`` when openpyxl is installed), ``figures/*.png`` at print resolution, and
``.realopt-report`` (a manifest that marks the folder as a report realopt may replace).

Everything is written into a temporary folder beside DIR, renamed to DIR at the end: a failure
at any point leaves no partial DIR and any previous report intact. DIR is never the project file,
never a folder holding it, and never an existing folder that is not a realopt report.
"""
from __future__ import annotations

import base64
import html
import json
import os
import shutil
import tempfile
import textwrap
from dataclasses import dataclass, field
from pathlib import Path

from .. import CAUTION, __version__
from ..errors import RealoptError
from .sensitivity import DEFAULT_MOVES, Moves, analyse
from .tables import (ALONE_COLUMN, VALUE_COLUMN, Fmt, breakeven_text, chance_by_year,
                     csv_tables, inputs_rows, lattice_rows, mode_share_years, mode_shares,
                     is_modal, no_negative_zero)

MARKER = ".realopt-report"
WARN_HEAD = "Read these numbers with the following warnings:"
MIN_FIGURE_SCALE = 0.72           # a figure shrinks this far to stay on a part-filled page
PDF_DPI = 200                      # figures in the PDF (figures/*.png keep print resolution)
CONVENTIONS = (
    "Years are counted from today (t = 0). Cash flows are paid at their dates; a decision at a "
    "date is taken after that date's cash flow, so exercising at t acquires or gives up the flows "
    "after t. Rates are yearly and compound as stated (annual or continuous), for both the "
    "risk-free and the discount rate. Money amounts are valued today in the project's currency "
    "and unit. Salvage does not scale with expansions or contractions. Project value is the "
    "present value of the operating project's expected cash flows; its volatility is the yearly "
    "standard deviation of ln(project value).")


class ReportError(RealoptError):
    """The report could not be written; the message says why and what to change."""


@dataclass
class Built:
    """The report's content, rendered once and shared by every format."""

    appraisal: object
    drawer: object                                     # sensitivity and each figure's pixels
    fmt: Fmt
    charts: list                                       # those known so far, in reading order
    pdf_pages: list = field(default_factory=list)      # page headings, in order
    pdf_fill: list = field(default_factory=list)       # share of each page's height used
    complete: bool = False                              # charts include the sensitivity ones
    extra: list = field(default_factory=list)          # added figures (e.g. a sweep's)

    def sens(self):
        """The sensitivity analysis (waited for on first use), and with it the full list of
        figures, the tornado and convergence ones included."""
        from . import figures

        s = self.drawer.sensitivity()
        if not self.complete:
            self.charts = figures.charts(self.appraisal, s)
            self.drawer.submit(self.charts, s)
            self.complete = True
        return s

    def chart(self, slug: str):
        return next(c for c in self.charts + self.extra if c.slug == slug)

    def png(self, slug: str) -> bytes:
        return self.drawer.get(slug)[0]

    def pixels(self, slug: str):
        return self.drawer.get(slug)[1]


# ------------------------------------------------------------------------ folder safety
def _check_target(out_dir: Path, source) -> None:
    out = out_dir.resolve()
    if source is not None:
        src = Path(source).resolve()
        if out == src:
            raise ReportError(f"The output folder {out_dir} is the project file itself. Fix: "
                              "name another folder with -o DIR.")
        if out in src.parents:
            raise ReportError(f"The output folder {out_dir} holds the project file {source}; "
                              "a report replaces its whole folder. Fix: name a new folder "
                              "with -o DIR.")
    if out.exists() and not out.is_dir():
        raise ReportError(f"{out_dir} exists and is a file, not a folder. Fix: name a folder "
                          "with -o DIR.")
    if out.is_dir() and any(out.iterdir()) and not (out / MARKER).is_file():
        raise ReportError(f"{out_dir} exists and is not a realopt report (no {MARKER} inside); "
                          "realopt replaces a report folder whole and will not delete other "
                          "files. Fix: name a new or empty folder with -o DIR.")
    for parent in out.parents:
        if parent.exists():
            if not parent.is_dir():
                raise ReportError(f"Cannot write {out_dir}: {parent} is a file, not a folder. "
                                  "Fix: choose another output folder with -o DIR.")
            break


def write_report(appraisal, out_dir, *, source=None, moves: Moves = DEFAULT_MOVES,
                 dpi: int = 300, xlsx: bool | None = None, extra_charts=()) -> Path:
    """Write the report of ``appraisal`` into ``out_dir`` (see the module doc); returns DIR.

    ``source``: the project file (refused as, or inside, the output). ``moves``: the tornado's
    input moves. ``xlsx``: write tables.xlsx (default: when openpyxl is installed).
    ``extra_charts``: further figures (e.g. ``sweep_figures.sweep_chart``), in their own section.
    Raises :class:`ReportError` (nothing written, previous report intact) on failure.
    """
    out_dir = Path(out_dir)
    source = source if source is not None else appraisal.project.source
    _check_target(out_dir, source)
    final = out_dir.resolve()
    created = []
    tmp = None
    try:
        for parent in reversed(final.parents):
            if not parent.exists():
                parent.mkdir()
                created.append(parent)
        tmp = Path(tempfile.mkdtemp(prefix=f".{final.name}.tmp-", dir=final.parent))
        umask = os.umask(0)
        os.umask(umask)
        tmp.chmod(0o777 & ~umask)                  # mkdtemp makes it private; a report is not
        _write_all(appraisal, moves, tmp, dpi, xlsx, source, extra_charts)
        _swap(tmp, final)
        tmp = None
    except ReportError:
        raise
    except RealoptError as err:
        raise ReportError(f"The report was not written: {err}") from err
    except OSError as err:
        raise ReportError(
            f"Could not write the report to {out_dir}: {err.strerror or err} "
            f"({err.filename or out_dir}). Nothing was changed; any previous report is intact. "
            "Fix: choose a folder you can write to with -o DIR, or free disk space.") from err
    except Exception as err:
        raise ReportError(
            f"The report was not written ({type(err).__name__}: {err}); nothing was changed and "
            "any previous report is intact. This is a fault in realopt's outputs, not in your "
            "file; please report it with the project file.") from err
    finally:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)
            for d in reversed(created):
                try:
                    d.rmdir()
                except OSError:
                    pass
    return out_dir


def _swap(tmp: Path, final: Path) -> None:
    """Rename tmp to final; a previous report is moved aside first and removed after."""
    old = None
    if final.exists():
        old = Path(tempfile.mkdtemp(prefix=f".{final.name}.old-", dir=final.parent))
        old.rmdir()
        os.rename(final, old)
    try:
        os.rename(tmp, final)
    except OSError:
        if old is not None:
            os.rename(old, final)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


# ------------------------------------------------------------------------ writing
def _write_all(a, moves, tmp: Path, dpi: int, xlsx, source, extra_charts=()) -> None:
    from . import figures

    if getattr(a, "method", "") == "simulation":           # drawn from the one result
        from .sim_report import write_all

        return write_all(a, tmp, dpi, xlsx, source, MARKER, moves)
    f = Fmt(a.project)
    with _Drawer(a, moves, dpi) as drawer:
        b = Built(appraisal=a, drawer=drawer, fmt=f, charts=list(drawer.base),
                  extra=list(extra_charts))
        drawer.charts.update({c.slug: c for c in b.extra})      # drawn here, on demand
        write_pdf(b, tmp / "report.pdf")           # takes each figure as it is drawn
        s = b.sens()
        (tmp / "figures").mkdir()
        for chart in b.charts + b.extra:
            (tmp / "figures" / f"{chart.slug}.png").write_bytes(b.png(chart.slug))
    tables = csv_tables(a, s, f)
    write_tables(tmp, tables, xlsx)
    from ..jsontext import to_json

    (tmp / "results.json").write_text(to_json(a.to_dict()) + "\n", encoding="utf-8")
    (tmp / "report.html").write_text(render_html(b), encoding="utf-8")
    (tmp / "report.md").write_text(render_markdown(b), encoding="utf-8")
    manifest = {"realopt": __version__, "project": a.project.name,
                "source": None if source is None else str(source),
                "figures": [c.slug + ".png" for c in b.charts + b.extra],
                "tables": [t + ".csv" for t in tables], "xlsx": bool(xlsx),
                "pdf_pages": b.pdf_pages, "pdf_fill": b.pdf_fill}
    (tmp / MARKER).write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")


_JOB = None             # (appraisal, moves, dpi) for forked workers (see _Drawer)
_CHARTS = None          # the charts being drawn, for forked workers (see render_all)



def write_tables(tmp: Path, tables: dict, xlsx: bool | None) -> None:
    """Every table as tables/<stem>.csv, and all of them in tables.xlsx when ``xlsx`` (None:
    when openpyxl is installed). Shared by the lattice and the simulation reports."""
    (tmp / "tables").mkdir()
    for stem, df in tables.items():
        df.to_csv(tmp / "tables" / f"{stem}.csv", index=False)
    if xlsx is None:
        try:
            import openpyxl  # noqa: F401
            xlsx = True
        except ImportError:
            xlsx = False
    if xlsx:
        import pandas as pd

        with pd.ExcelWriter(tmp / "tables.xlsx", engine="openpyxl") as xw:
            for stem, df in tables.items():
                df.to_excel(xw, sheet_name=stem[:31], index=False)

def _render_one(k):
    from . import figures

    chart, dpi = _CHARTS[k]
    return figures.render(chart, dpi=dpi, page_dpi=PDF_DPI)


def render_all(charts, dpi: int) -> list[tuple]:
    """(PNG bytes, RGB pixels at PDF_DPI) of each chart, in forked workers where possible."""
    global _CHARTS
    from . import figures

    ctx = _fork_context()
    if ctx is None or len(charts) < 3:
        return [figures.render(c, dpi=dpi, page_dpi=PDF_DPI) for c in charts]
    from concurrent.futures import ProcessPoolExecutor

    _CHARTS = [(c, dpi) for c in charts]
    try:
        with ProcessPoolExecutor(max_workers=min(4, os.cpu_count() or 1), mp_context=ctx) as pool:
            return list(pool.map(_render_one, range(len(charts))))
    finally:
        _CHARTS = None


def _job_sensitivity():
    a, moves, _ = _JOB
    return analyse(a, moves)


def _job_chart(slug, s):
    from . import figures

    a, _, dpi = _JOB
    chart = next(c for c in figures.charts(a, s) if c.slug == slug)
    return figures.render(chart, dpi=dpi, page_dpi=PDF_DPI)


def _fork_context():
    if (os.cpu_count() or 1) < 2:
        return None
    import multiprocessing

    try:
        return multiprocessing.get_context("fork")
    except ValueError:
        return None


class _Drawer:
    """Runs the sensitivity analysis and draws the figures. Where the platform forks and has
    several cores, both go to worker processes that inherit the appraisal (in reading order),
    while this process writes the PDF as they arrive; otherwise everything runs here, one
    after the other. Results are the same either way."""

    def __init__(self, a, moves, dpi: int):
        self.a, self.moves, self.dpi = a, moves, dpi
        self.done: dict = {}
        self.futures: dict = {}
        self.charts: dict = {}
        self.pool = None
        self.base: list = []
        self._s = None

    def __enter__(self):
        global _JOB
        from . import figures

        base = self.base = figures.charts(self.a, None)
        self.charts = {c.slug: c for c in base}
        ctx = _fork_context()
        if ctx is not None:
            from concurrent.futures import ProcessPoolExecutor

            _JOB = (self.a, self.moves, self.dpi)
            self.pool = ProcessPoolExecutor(max_workers=min(4, os.cpu_count() or 1),
                                            mp_context=ctx)
            self.futures[base[0].slug] = self.pool.submit(_job_chart, base[0].slug, None)
            self._s = self.pool.submit(_job_sensitivity)
            for c in base[1:]:
                self.futures[c.slug] = self.pool.submit(_job_chart, c.slug, None)
        return self

    def __exit__(self, *exc):
        global _JOB
        if self.pool is not None:
            self.pool.shutdown(wait=True, cancel_futures=True)
            self.pool = None
        _JOB = None
        return False

    def sensitivity(self):
        """The Sensitivity of the appraisal (from a worker, or computed here)."""
        if self._s is None:
            self._s = analyse(self.a, self.moves)
        elif hasattr(self._s, "result"):
            self._s = self._s.result()
        return self._s

    def submit(self, charts, s) -> None:
        for c in charts:
            if c.slug in self.charts or c.slug in self.futures:
                continue
            self.charts[c.slug] = c
            if self.pool is not None:
                self.futures[c.slug] = self.pool.submit(_job_chart, c.slug, s)

    def get(self, slug):
        """(PNG bytes, RGB pixels at PDF_DPI) of the figure ``slug``."""
        from . import figures

        if slug not in self.done:
            fut = self.futures.pop(slug, None)
            self.done[slug] = (fut.result() if fut is not None else
                               figures.render(self.charts[slug], dpi=self.dpi,
                                              page_dpi=PDF_DPI))
        return self.done[slug]


# ------------------------------------------------------------------------ shared content
def _headline_rows(a):
    """(label, value, value alone) of the headline table: the Appraisal's own summary()."""
    def val(x):
        return None if x is None or x != x else float(x)

    df = a.summary()
    return [(item, val(row["value"]), val(row["standalone_value"]))
            for item, row in df.iterrows()]


def _headline_blocks(a, f: Fmt) -> list:
    """What page one must say beside the headline numbers: the base project when it is not
    the plain one, the standard error of a simulated V0, and the headline warnings."""
    out = []
    base = (getattr(a, "base", "") or "").strip()
    if base and _base_is_not_plain(a.project):
        out.append(("p", base if base.lower().startswith("base project")
                    else f"Base project: {base}"))
    se = getattr(a, "present_value_stderr", None)
    if se:                                 # 0 or None: V0 is exact
        out.append(("p", f"Present value of the operating project "
                         f"{f.money_unit(a.present_value)} \u00b1 {f.money(se)} (standard "
                         "error of the simulation estimate)."))
    warn = list(getattr(a, "headline_warnings", ()) or ())
    if warn:
        out.append(("warn", warn))
    return out


def _base_is_not_plain(project) -> bool:
    """Whether some switch right starts in a mode other than the plain project (scale 1, no
    fixed yearly flow): then the base every subset values is not the file's cash flows alone
    and page one says what it is."""
    for r in project.rights:
        if r.modal:
            m = next((m for m in r.modes if m.name == r.start), None)
            if m is not None and (m.scale != 1.0 or m.fixed != 0.0):
                return True
    return False


def _right_facts(r, f: Fmt) -> list[tuple[str, str]]:
    facts = [("Window", f"years {f.year(r.window[0])} to {f.year(r.window[1])}, {r.exercise}"),
             ("Shapley share", f.money_unit(r.shapley_value)),
             ("Value of the right alone", f.money_unit(r.standalone_value))]
    if r.use_years:
        what = ("Chance of having switched at least once by year" if is_modal(r)
                and mode_shares(r) else "Chance of use by year")
        facts.append((f"{what} {f.year(r.use_years[-1])}",
                      f"{f.pct(r.use_real_world[-1])} real-world, "
                      f"{f.pct(r.use_risk_neutral[-1])} risk-neutral"))
        for m, (rn, rw) in mode_shares(r).items():
            facts.append((f"Share of paths in mode '{m}' at year {f.year(r.use_years[-1])}",
                          f"{f.pct(rw[-1])} real-world, {f.pct(rn[-1])} risk-neutral"))
    facts.append(("What the chance counts", r.use_measure))
    return facts


def _mode_share_blocks(a, f: Fmt) -> list:
    """For each switch right with mode shares: a table of the share of paths in each mode at
    each whole year, real-world and risk-neutral, labelled for what it counts."""

    out = []
    for r in a.rights:
        shares = mode_shares(r)
        if not shares:
            continue
        modes = list(shares)
        picks = mode_share_years(r)
        if not picks:
            continue
        out.append(("p", f"{r.name}: share of paths in each mode on each date (the project "
                         "invested and not abandoned), real-world and risk-neutral. This is "
                         "where the paths are, not the chance of having switched:"))
        rows = []
        for k in picks:
            row = [f.year(r.use_years[k])]
            for m in modes:
                rn, rw = shares[m][0][k], shares[m][1][k]
                row += [(rw, f.pct(rw)), (rn, f.pct(rn))]
            rows.append(row)
        heads = ["Year"]
        for m in modes:
            heads += [f"{m}, real-world", f"{m}, risk-neutral"]
        out.append(("table", heads, rows, tuple(range(1, len(heads))), None))
    return out


def _files_text() -> str:
    return ("This folder also holds results.json (the full results), tables/ (every table as "
            "CSV, and tables.xlsx when available), figures/ (every figure as PNG at print "
            "resolution) and report.pdf.")


# ------------------------------------------------------------------------ HTML
CSS = """
@page { margin: 15mm 13mm; }
* { box-sizing: border-box; }
html { background: #ffffff; }
body { font-family: "DejaVu Sans", Verdana, sans-serif; font-size: 10pt; line-height: 1.42;
       color: %(ink)s; max-width: 180mm; margin: 0 auto; padding: 6mm 5mm 12mm; }
h1 { font-size: 17pt; margin: 0 0 2mm; }
h2 { font-size: 13pt; margin: 8mm 0 2mm; border-bottom: 1.5px solid %(accent)s;
     padding-bottom: 1mm; color: %(accent)s; }
h3 { font-size: 10.5pt; margin: 4mm 0 1mm; }
p, li { overflow-wrap: anywhere; }
.meta { color: %(muted)s; font-size: 9pt; margin: 0 0 3mm; }
.caution { border-left: 3px solid %(warn)s; background: #fbf2ea; padding: 2mm 3mm;
           font-size: 9pt; margin: 3mm 0; }
.decision { font-size: 12pt; font-weight: bold; margin: 2mm 0 3mm; }
table { border-collapse: collapse; width: 100%%; margin: 2mm 0 3mm; font-size: 8.8pt; }
th, td { text-align: left; padding: 1.2mm 2mm; border-bottom: 1px solid %(grid)s;
         vertical-align: top; overflow-wrap: anywhere; }
th { border-bottom: 1.5px solid %(muted)s; font-weight: bold; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
td.num { white-space: nowrap; }
th.num { white-space: normal; overflow-wrap: anywhere; }
tr.total td { font-weight: bold; border-top: 1.5px solid %(muted)s; }
.headline-warnings ul { margin: 1mm 0 0; padding-left: 5mm; }
.card { border: 1px solid %(grid)s; border-radius: 2mm; padding: 1mm 3mm 2mm; margin: 2mm 0; }
.card p.rule { margin: 1mm 0; }
.card table { font-size: 8.5pt; margin: 1mm 0 0; }
figure { margin: 4mm 0; }
figure img { display: block; width: 100%%; max-width: 100%%; height: auto; }
figcaption { font-size: 9pt; color: %(ink)s; margin-top: 1mm; }
.note { color: %(muted)s; font-size: 9pt; }
footer { margin-top: 8mm; font-size: 8.5pt; color: %(muted)s; }
@media print {
  body { max-width: none; padding: 0; font-size: 9.5pt; }
  h2 { break-after: avoid; page-break-after: avoid; }
  figure, .card, tr, .caution { break-inside: avoid; page-break-inside: avoid; }
  figure img { max-height: 230mm; object-fit: contain; }
}
"""


def _e(x) -> str:
    return html.escape(no_negative_zero(str(x)), quote=True)


def _num_td(x, text: str) -> str:
    if x is None:
        return '<td class="num"></td>'
    return f'<td class="num" data-value="{float(x)!r}">{_e(text)}</td>'


def _html_table(headers, rows, num_cols=(), row_classes=None) -> str:
    out = ["<table><thead><tr>"]
    out += [f'<th class="num">{_e(h)}</th>' if k in num_cols else f"<th>{_e(h)}</th>"
            for k, h in enumerate(headers)]
    out.append("</tr></thead><tbody>")
    for i, row in enumerate(rows):
        cls = f' class="{row_classes[i]}"' if row_classes and row_classes[i] else ""
        out.append(f"<tr{cls}>")
        for k, cell in enumerate(row):
            if isinstance(cell, tuple):            # (value, text): a number
                out.append(_num_td(*cell))
            else:
                out.append(f"<td>{_e(cell)}</td>")
        out.append("</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _figure_html(b: Built, slug: str) -> str:
    chart = b.chart(slug)
    data = base64.b64encode(b.png(slug)).decode("ascii")
    return (f'<figure id="fig-{_e(slug)}"><img alt="{_e(chart.title)}" '
            f'src="data:image/png;base64,{data}"><figcaption><b>{_e(chart.title)}.</b> '
            f"{_e(chart.caption)}</figcaption></figure>")


def _sections(b: Built):
    """The report's sections as (heading, list of blocks); a block is a tuple naming its kind:
    ('p', text), ('decision', text), ('caution', text), ('table', headers, rows, num_cols,
    total_rows), ('card', right), ('figure', slug), ('list', items), ('note', text)."""
    a, f = b.appraisal, b.fmt
    slugs = [c.slug for c in b.charts]
    money = f.unit_label
    rows, totals = [], []
    for label, value, alone in _headline_rows(a):
        rows.append((label, (value, f.money(value)) if value is not None else (None, ""),
                     (alone, f.money(alone)) if alone is not None else (None, "")))
        totals.append(label in ("Static NPV", "Expanded NPV"))
    out = []
    today = [("decision", a.decision_today)] + _headline_blocks(a, f)
    today.append(("table", ["", f"{VALUE_COLUMN} ({money})", f"{ALONE_COLUMN} ({money})"],
                  rows, (1, 2), totals))
    if a.rights:
        today.append(("note", "Reading down either column gives the flexibility value: the "
                              "Shapley shares of the rights add up to it, and so do the "
                              "rights' values alone plus the interaction between them."))
    today.append(("figure", "value_bridge"))
    out.append(("Decision today", today))
    card = [("p", "Each right's rule in plain words, read from the optimal exercise policy on "
                  "the lattice, with the numbers it rests on.")]
    card += [("card", r) for r in a.rights]
    if not a.rights:
        card.append(("p", "The project has no rights: the expanded NPV is the static NPV."))
    cby = chance_by_year(a)
    if len(cby):
        names = list(dict.fromkeys(cby["right"]))
        for measure, label in (("real_world", "real-world (what to expect)"),
                               ("risk_neutral", "risk-neutral (the valuation measure)")):
            card.append(("p", f"Chance that each right has been used by each year, {label}:"))
            rows = []
            for year, grp in cby.groupby("year", sort=True):
                by = dict(zip(grp["right"], grp[measure]))
                rows.append([f.year(year)] + [(by[n], f.pct(by[n])) if n in by else ""
                                              for n in names])
            card.append(("table", ["Year"] + names, rows, tuple(range(1, len(names) + 1)),
                         None))
    card += _mode_share_blocks(a, f)
    out.append(("Decision rule card", card))
    when = [("figure", x) for x in slugs if x.startswith("decision_map_")]
    from .figures import single_action_states

    quiet = single_action_states(a)
    if quiet:
        when.append(("note", "No decision map is drawn for " + "; ".join(
            f"\u201c{q}\u201d" for q in quiet) + ": no right is worth using from that state at "
            "any node of the lattice."))
    when += [("figure", x) for x in ("exercise_thresholds", "chance_of_use", "switch_modes")
             if x in slugs]
    out.append(("When to use each right", when))
    out.append(("Uncertainty in project value", [("figure", "value_fan")]))
    yield from out
    out = []
    s = b.sens()                     # the first sections are written before it is needed
    slugs = [c.slug for c in b.charts]
    sens = []
    if "sensitivity" in slugs:
        sens.append(("figure", "sensitivity"))
        sens.append(("table", ["Input moved (down / up)", f"Expanded NPV down ({money})",
                               "up", "Flexibility value down", "up"],
                     [(f"{r.input} ({r.low_setting} / {r.high_setting})",
                       (r.expanded_low, f.money(r.expanded_low)),
                       (r.expanded_high, f.money(r.expanded_high)),
                       (r.flexibility_low, f.money(r.flexibility_low)),
                       (r.flexibility_high, f.money(r.flexibility_high))) for r in s.rows],
                     (1, 2, 3, 4), None))
    sens.append(("p", f"Moves: {s.moves.describe()}."))
    sens.append(("list", [breakeven_text(x, f, s.decision_today) for x in s.breakevens]))
    for note in s.notes:
        sens.append(("note", note))
    out.append(("Sensitivity and break-evens", sens))
    lat = [("table", ["Lattice", ""], [(k, v) for k, v in lattice_rows(a, f)], (), None)]
    if "convergence" in slugs:
        c = s.convergence
        if not c.settled:
            lat.append(("p", f"Grid not settled: the expanded NPV at {c.chosen} steps a year is "
                             f"{f.pct(c.relative_gap, 2)} from the finest grid shown; use "
                             + (f"--steps-per-year {c.settled_at} or more" if c.settled_at
                                else "more steps per year") + " before quoting it."))
        lat.append(("figure", "convergence"))
    else:
        lat.append(("note", "No convergence figure: the tree's step is fixed by explicit "
                            "up/down factors in the file."))
    out.append(("Lattice used", lat))
    out.append(("Rights and project states", [("figure", "state_diagram")]))
    shown, last = [], None
    for sec, key, value in inputs_rows(a.project, f):     # each section named once
        shown.append((sec if sec != last else "", key, value))
        last = sec
    out.append(("Inputs and assumptions", [
        ("table", ["Section", "Input", "Value"], shown, (), None),
        ("p", CONVENTIONS)]))
    out.append(("Warnings", [("list", list(a.warnings))] if a.warnings
                else [("p", "None.")]))
    if b.extra:
        out.append(("Sweep of inputs", [("figure", c.slug) for c in b.extra]))
    out.append(("Caution", [("caution", CAUTION), ("note", _files_text())]))
    yield from out


def render_html(b: Built) -> str:
    a, f = b.appraisal, b.fmt
    p = a.project
    src = f"; source file: {Path(p.source).name}" if p.source else ""
    body = [f"<h1>{_e(p.name)}</h1>",
            f'<p class="meta">Real-options appraisal by realopt {_e(__version__)}{_e(src)}. '
            f"Money in {_e(f.unit_label)}, valued today; years from today.</p>",
            f'<div class="caution">{_e(CAUTION)}</div>']
    for heading, blocks in _sections(b):
        body.append(f"<h2>{_e(heading)}</h2>")
        for blk in blocks:
            body.append(_html_block(b, blk))
    body.append(f"<footer>realopt {_e(__version__)}. {_e(_files_text())}</footer>")
    css = CSS % _css_colours()
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{_e(p.name)} - real-options appraisal</title><style>{css}</style></head>"
            f"<body>{''.join(body)}</body></html>\n")


def _css_colours():
    from .style import CSS_COLOURS

    return CSS_COLOURS


def _html_block(b: Built, blk) -> str:
    kind = blk[0]
    f = b.fmt
    if kind == "p":
        return f"<p>{_e(blk[1])}</p>"
    if kind == "note":
        return f'<p class="note">{_e(blk[1])}</p>'
    if kind == "decision":
        return f'<p class="decision">{_e(blk[1])}</p>'
    if kind == "caution":
        return f'<div class="caution">{_e(blk[1])}</div>'
    if kind == "list":
        return "<ul>" + "".join(f"<li>{_e(x)}</li>" for x in blk[1]) + "</ul>"
    if kind == "warn":
        return (f'<div class="caution headline-warnings"><b>{_e(WARN_HEAD)}</b><ul>'
                + "".join(f"<li>{_e(x)}</li>" for x in blk[1]) + "</ul></div>")
    if kind == "figure":
        return _figure_html(b, blk[1])
    if kind == "table":
        _, headers, rows, num_cols, totals = blk
        classes = ["total" if t else "" for t in totals] if totals else None
        return _html_table(headers, rows, num_cols, classes)
    if kind == "card":
        r = blk[1]
        facts = _right_facts(r, f)
        return (f'<div class="card"><h3>{_e(r.name)} ({_e(r.type)})</h3>'
                f'<p class="rule">{_e(r.rule)}</p>'
                + _html_table(["", ""], facts) + "</div>")
    raise ValueError(kind)


# ------------------------------------------------------------------------ Markdown
def _md_cell(x) -> str:
    if isinstance(x, tuple):
        x = x[1]
    return str(x).replace("|", "\\|").replace("\n", " ")


def _md_table(headers, rows, num_cols=()) -> str:
    head = "| " + " | ".join(_md_cell(h) or " " for h in headers) + " |"
    sep = "| " + " | ".join("---:" if k in num_cols else "---" for k in range(len(headers))) + " |"
    body = ["| " + " | ".join(_md_cell(c) for c in row) + " |" for row in rows]
    return "\n".join([head, sep] + body)


def render_markdown(b: Built) -> str:
    a, f = b.appraisal, b.fmt
    p = a.project
    src = f"; source file: {Path(p.source).name}" if p.source else ""
    out = [f"# {p.name}", "",
           f"Real-options appraisal by realopt {__version__}{src}. Money in {f.unit_label}, "
           "valued today; years from today.", "", f"> {CAUTION}", ""]
    for heading, blocks in _sections(b):
        out += [f"## {heading}", ""]
        for blk in blocks:
            kind = blk[0]
            if kind in ("p", "note"):
                out += [blk[1], ""]
            elif kind == "decision":
                out += [f"**{blk[1]}**", ""]
            elif kind == "caution":
                out += [f"> {blk[1]}", ""]
            elif kind == "list":
                out += [f"- {x}" for x in blk[1]] + [""]
            elif kind == "warn":
                out += [f"> **{WARN_HEAD}**", ">"] + [f"> - {x}" for x in blk[1]] + [""]
            elif kind == "figure":
                chart = b.chart(blk[1])
                out += [f"![{chart.title}](figures/{chart.slug}.png)", "",
                        f"*{chart.title}.* {chart.caption}", ""]
            elif kind == "table":
                _, headers, rows, num_cols, _t = blk
                out += [_md_table(headers, rows, num_cols), ""]
            elif kind == "card":
                r = blk[1]
                out += [f"### {r.name} ({r.type})", "", r.rule, "",
                        _md_table(["", ""], _right_facts(r, f)), ""]
    return no_negative_zero("\n".join(out).rstrip() + "\n")


# ------------------------------------------------------------------------ PDF
A4 = (8.27, 11.69)
MARGIN = 0.75                      # inches
LINE = 0.165                       # inches per line of 8.5 pt text ...
SPACING = 1.18                     # ... matplotlib's linespacing giving that advance


class _Pages:
    """Text pages laid out top to bottom with a cursor; a new page when one is full."""

    def __init__(self, pdf, b: Built):
        self.pdf, self.b = pdf, b
        self.fig = None
        self.y = 0.0

    def _new(self, heading: str):
        from . import style

        self.close()
        self.fig = style.new_figure(A4[1], A4[0])
        self.fig.set_layout_engine("none")
        self.y = A4[1] - MARGIN
        self.b.pdf_pages.append(heading)

    def close(self):
        if self.fig is not None:
            self.b.pdf_fill.append(round((A4[1] - MARGIN - self.y) / (A4[1] - 2 * MARGIN), 3))
            self._footer(self.fig)
            self.pdf.savefig(self.fig)
            self.fig = None

    def _footer(self, fig):
        n = len(self.b.pdf_pages)
        fig.text(MARGIN / A4[0], 0.45 / A4[1], f"{self.b.appraisal.project.name} - realopt "
                 f"{__version__}", fontsize=7, color="#6b6b6b")
        fig.text(1 - MARGIN / A4[0], 0.45 / A4[1], f"page {n}", fontsize=7, color="#6b6b6b",
                 ha="right")

    def room(self) -> float:
        """Inches left on the current page (0 before the first)."""
        return 0.0 if self.fig is None else self.y - (MARGIN + 0.3)

    def need(self, height: float, heading: str):
        if self.fig is None or self.y - height < MARGIN + 0.3:
            self._new(heading)

    def text(self, x: float, txt: str, size=8.5, weight="normal", color="#222222",
             ha="left", width_chars=None):
        """A wrapped paragraph, one text object per page it spans."""
        lines = textwrap.wrap(no_negative_zero(txt), width_chars or int(100 * 8.5 / size)) or [""]
        h = LINE * size / 8.5
        while lines:
            self.need(h, self.b.pdf_pages[-1] if self.b.pdf_pages else "")
            room = max(1, int((self.y - MARGIN - 0.3) / h))
            chunk, lines = lines[:room], lines[room:]
            self.fig.text(x / A4[0], self.y / A4[1], "\n".join(chunk), fontsize=size,
                          fontweight=weight, color=color, ha=ha, va="top",
                          linespacing=SPACING)
            self.y -= h * len(chunk)

    def gap(self, h=0.08):
        self.y -= h

    def _figure_size(self, chart):
        """(width, height) in inches of the figure on the page, and its caption lines."""
        hpx, wpx = self.b.pixels(chart.slug).shape[:2]
        w = A4[0] - 2 * MARGIN
        h = w * hpx / wpx
        h_max = A4[1] - 2 * MARGIN - 1.4
        if h > h_max:
            w, h = w * h_max / h, h_max
        return w, h, textwrap.wrap(no_negative_zero(f"{chart.title}. {chart.caption}"), 112)

    def _shrink(self, chart) -> float:
        """The scale (MIN_FIGURE_SCALE to 1) at which the figure and its caption fit in what
        is left of this page; 0 when even the smallest does not (a new page then)."""
        if self.fig is None:
            return 0.0
        w, h, caption = self._figure_size(chart)
        room = self.y - (MARGIN + 0.3) - (0.15 + LINE * len(caption) + 0.15)
        if room >= h:
            return 1.0
        k = room / h
        return k if k >= MIN_FIGURE_SCALE else 0.0

    def figure_need(self, chart) -> float:
        """The least height the figure needs to stay on this page (it may shrink to
        MIN_FIGURE_SCALE where that keeps most of a page from being left empty)."""
        w, h, caption = self._figure_size(chart)
        return h * MIN_FIGURE_SCALE + 0.15 + LINE * len(caption) + 0.15

    def figure(self, chart):
        """The figure's PNG (figures/*.png, resampled to PDF_DPI) and its caption below it;
        shrunk (down to MIN_FIGURE_SCALE, left-aligned) rather than leave most of a page
        empty, else on a new page."""
        img = self.b.pixels(chart.slug)
        w, h, caption = self._figure_size(chart)
        k = self._shrink(chart)
        if not k:
            self._new(chart.title)
        else:
            w, h = w * k, h * k
        ax = self.fig.add_axes((MARGIN / A4[0], (self.y - h) / A4[1], w / A4[0], h / A4[1]))
        ax.imshow(img, interpolation="none")
        ax.set_axis_off()
        self.y -= h + 0.12
        self.fig.text(MARGIN / A4[0], self.y / A4[1], "\n".join(caption), fontsize=8.2,
                      va="top", linespacing=SPACING, color="#222222")
        self.y -= LINE * len(caption) + 0.2

    def heading(self, txt: str, new_page: bool = False, keep: float = 0.9):
        """A section heading, kept on one page with the next ``keep`` inches of content."""
        if new_page or self.fig is None:
            self._new(txt)
        else:
            self.need(0.35 + keep, txt)
        self.gap(0.05)
        self.text(MARGIN, txt, size=12, weight="bold", color="#1d3f6e")
        self.gap(0.06)

    def table(self, headers, rows, widths, num_cols=()):
        """Rows of cells (text, or (value, text) for numbers); widths in inches. Each column
        of a page is one text object (rows padded to a common height, thin rules between
        them): far fewer objects than one per cell, which is what a PDF page costs to draw."""
        from matplotlib.lines import Line2D

        xs = [MARGIN]
        for w in widths[:-1]:
            xs.append(xs[-1] + w)
        size = 7.8
        h = _line_pitch(self.fig, size)
        gap = h * 0.35

        def cells(row, bold=False):
            out = []
            for k, c in enumerate(row):
                t = no_negative_zero(c[1] if isinstance(c, tuple) else str(c))
                chars = max(8, int(widths[k] * 72 / (size * (0.64 if bold else 0.56))))
                out.append(textwrap.wrap(t, chars) or [""])
            return out

        def flush(chunk, weight):
            """Draw rows [(cells, n lines)] from self.y down; returns the height used."""
            if not chunk:
                return 0.0
            top = self.y
            for k in range(len(widths)):
                lines = []
                for cs, n in chunk:
                    lines += cs[k] + [""] * (n - len(cs[k]))
                    lines.append("")                            # the gap between rows
                right = k in num_cols
                x = xs[k] + widths[k] - 0.05 if right else xs[k]
                self.fig.text(x / A4[0], top / A4[1], "\n".join(lines[:-1]), fontsize=size,
                              fontweight=weight, ha="right" if right else "left", va="top",
                              color="#222222", linespacing=SPACING,
                              multialignment="right" if right else "left")
            y = top
            for cs, n in chunk[:-1]:
                y -= (n + 1) * h
                yy = (y + h * 0.55) / A4[1]
                self.fig.add_artist(Line2D([MARGIN / A4[0], 1 - MARGIN / A4[0]], [yy, yy],
                                           lw=0.3, color="#dddddd"))
            used = sum((n + 1) * h for _, n in chunk) - h
            self.y -= used + gap
            return used

        head = cells(headers, bold=True) if any(headers) else None
        head_n = max(len(c) for c in head) if head else 0
        chunk = []
        started = False
        for row in rows:
            cs = cells(row)
            n = max(len(c) for c in cs)
            need = sum((m + 1) * h for _, m in chunk) + (n + 1) * h
            if not started or self.y - need - (head_n + 1) * h < MARGIN + 0.3:
                flush(chunk, "normal")
                chunk = []
                self.need((n + 1 + head_n + 1) * h, self.b.pdf_pages[-1])
                if head:
                    flush([(head, head_n)], "bold")
                started = True
            chunk.append((cs, n))
        flush(chunk, "normal")
        self.gap()


_PITCH: dict = {}


def _line_pitch(fig, size: float) -> float:
    """Inches from one line to the next of a multi-line text at ``size`` points (measured
    once with the figure's renderer, so table rules stay between the rows)."""
    if size not in _PITCH:
        r = fig.canvas.get_renderer()
        one = fig.text(0, 0, "Xg", fontsize=size, linespacing=SPACING)
        many = fig.text(0, 0, "\n".join(["Xg"] * 21), fontsize=size, linespacing=SPACING)
        dpi = fig.dpi
        _PITCH[size] = (many.get_window_extent(r).height - one.get_window_extent(r).height) \
            / 20 / dpi
        one.remove()
        many.remove()
    return _PITCH[size]


def write_pdf(b: Built, path: Path) -> None:
    """The report as A4 pages, in the order of the HTML: text and figures flow down the page
    (a figure with its caption moves to the next page when it does not fit)."""
    from matplotlib.backends.backend_pdf import PdfPages

    from . import style

    a, f = b.appraisal, b.fmt
    p = a.project
    meta = {"Title": f"{p.name} - real-options appraisal", "Creator": f"realopt {__version__}",
            "Producer": f"realopt {__version__}", "CreationDate": None}
    full = A4[0] - 2 * MARGIN
    import matplotlib

    # Type 3 embedding of DejaVu Sans: same family as the figures and the HTML, and no
    # TrueType subsetting pass (a second or so on a long report).
    with style.styled(), matplotlib.rc_context({"pdf.fonttype": 3}), \
            PdfPages(path, metadata=meta) as pdf:
        pg = _Pages(pdf, b)
        pg.heading(p.name, new_page=True)
        pg.text(MARGIN, f"Real-options appraisal by realopt {__version__}. Money in "
                        f"{f.unit_label}, valued today; years from today.", size=8.5,
                color="#6b6b6b")
        pg.gap(0.1)
        pg.text(MARGIN, CAUTION, size=8.5)
        for heading, blocks in _sections(b):
            first = blocks[0] if blocks else None
            keep = (pg.figure_need(b.chart(first[1]))
                    if first and first[0] == "figure" else 0.9)
            fresh = heading == "Inputs and assumptions" or (
                heading == "Decision rule card" and pg.room() < 0.4 * (A4[1] - 2 * MARGIN))
            pg.heading(heading, new_page=fresh, keep=keep)
            for blk in blocks:
                if blk[0] == "figure":
                    pg.figure(b.chart(blk[1]))
                else:
                    _pdf_block(pg, blk, f, full)
        pg.close()


def _pdf_block(pg: _Pages, blk, f: Fmt, full: float) -> None:
    kind = blk[0]
    if kind in ("p", "note", "caution"):
        pg.text(MARGIN, blk[1], size=8.5, color="#6b6b6b" if kind == "note" else "#222222")
        pg.gap()
    elif kind == "decision":
        pg.text(MARGIN, blk[1], size=10.5, weight="bold")
        pg.gap()
    elif kind == "list":
        for item in blk[1]:
            pg.text(MARGIN, "- " + item, size=8.5)
        pg.gap()
    elif kind == "warn":
        pg.text(MARGIN, WARN_HEAD, size=8.5, weight="bold", color="#c2661c")
        for item in blk[1]:
            pg.text(MARGIN, "- " + item, size=8.5)
        pg.gap()
    elif kind == "table":
        _, headers, rows, num_cols, _t = blk
        n = len(headers)
        if headers[0] == "Year":
            widths = [0.7] + [(full - 0.7) / (n - 1)] * (n - 1)
        elif n == 3 and not num_cols:
            widths = [1.5, 2.1, full - 3.6]
        elif n == 2:
            widths = [2.4, full - 2.4]
        elif n == 3 and tuple(num_cols) == (1, 2):          # the headline table
            widths = [full - 2 * 1.9, 1.9, 1.9]
        else:
            first = full - 1.25 * (n - 1)
            widths = [first] + [1.25] * (n - 1)
        pg.table(headers, rows, widths, num_cols)
    elif kind == "card":
        r = blk[1]
        pg.need(0.8, pg.b.pdf_pages[-1])
        pg.text(MARGIN, f"{r.name} ({r.type})", size=9.5, weight="bold")
        pg.text(MARGIN, r.rule, size=8.5)
        pg.table(["", ""], _right_facts(r, f), [2.4, full - 2.4])


