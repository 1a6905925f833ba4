"""report.html in a real browser (Debian's chromium, headless; .ci/run installs it).

Checks (issue 4): every image of the page loads (complete, naturalWidth > 0), nothing is wider
than an A4 page at 96 px per inch (794 px: document.scrollWidth <= 794 in a 794 px window), the
page prints to PDF on A4 and on Letter, and a screenshot is saved in the test's folder. The
browser runs with networking components disabled and every host name unresolvable, so a
fetch from the network would show up as a broken image.
"""
from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest

import realopt
from realopt.outputs.report import write_report

A4_WIDTH_PX = 794           # 210 mm at 96 px per inch
A4_HEIGHT_PX = 1123
ROOT = Path(__file__).resolve().parents[1]

PROBE = """
<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var broken = imgs.filter(function (i) { return !(i.complete && i.naturalWidth > 0); });
  var out = document.createElement('pre');
  out.id = 'realopt-probe';
  out.textContent = 'PROBE' + JSON.stringify({
    images: imgs.length, broken: broken.length,
    scrollWidth: document.documentElement.scrollWidth,
    bodyWidth: document.body.scrollWidth,
    innerWidth: window.innerWidth}) + 'PROBE';
  document.body.appendChild(out);
});
</script>
"""


def _chromium():
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return None


CHROMIUM = _chromium()
pytestmark = pytest.mark.skipif(
    CHROMIUM is None,
    reason="chromium is not installed here (CI installs it in .ci/run: apt-get install -y "
           "chromium); the browser test needs a real browser")


def _run(args, tmp_path, timeout=180):
    profile = tmp_path / "profile"
    profile.mkdir(exist_ok=True)
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
           "--no-first-run", "--disable-background-networking", "--disable-component-update",
           "--disable-sync", "--disable-extensions", "--disable-dev-shm-usage",
           "--host-resolver-rules=MAP * ~NOTFOUND", f"--user-data-dir={profile}",
           f"--window-size={A4_WIDTH_PX},{A4_HEIGHT_PX}", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    path = ROOT / "projects" / "coating_line.yaml"
    if path.exists():
        a = realopt.appraise(realopt.load_project(path))
    else:
        from test_outputs import built_project

        a = realopt.appraise(built_project())
    out = tmp_path_factory.mktemp("browser") / "report"
    write_report(a, out, dpi=150)
    return out


def test_images_load_and_page_fits_a4_width(report, tmp_path):
    page = (report / "report.html").read_text(encoding="utf-8")
    probe = tmp_path / "probe.html"
    probe.write_text(page.replace("</body>", PROBE + "</body>"), encoding="utf-8")
    r = _run(["--virtual-time-budget=15000", "--dump-dom", probe.as_uri()], tmp_path)
    m = re.search(r"PROBE(\{.*?\})PROBE", r.stdout)
    assert m, f"no probe result from chromium (exit {r.returncode}): {r.stderr[-2000:]}"
    seen = json.loads(m.group(1))
    figures = len(list((report / "figures").glob("*.png")))
    assert seen["images"] == figures >= 7
    assert seen["broken"] == 0
    assert seen["innerWidth"] == A4_WIDTH_PX
    assert seen["scrollWidth"] <= A4_WIDTH_PX and seen["bodyWidth"] <= A4_WIDTH_PX

    shot = tmp_path / "report-a4.png"
    r = _run([f"--screenshot={shot}", (report / "report.html").as_uri()], tmp_path)
    assert shot.is_file() and shot.stat().st_size > 10_000, r.stderr[-2000:]
    from PIL import Image

    with Image.open(shot) as im:
        assert im.size == (A4_WIDTH_PX, A4_HEIGHT_PX)
        colours = im.convert("L").getextrema()
    assert colours[0] < 100 < colours[1]          # text on a white page, not a blank capture


@pytest.mark.parametrize("paper", ["A4", "Letter"])
def test_page_prints_on_a4_and_letter(report, tmp_path, paper):
    """Print CSS leaves the paper size to the printer; chromium's print-to-PDF uses Letter by
    default, and A4 through a page-size rule injected here (what a user's print dialog sets)."""
    page = (report / "report.html").read_text(encoding="utf-8")
    if paper == "A4":
        page = page.replace("</style>", "@page { size: A4; }</style>", 1)
    src = tmp_path / f"print-{paper}.html"
    src.write_text(page, encoding="utf-8")
    pdf = tmp_path / f"print-{paper}.pdf"
    r = _run(["--no-pdf-header-footer", f"--print-to-pdf={pdf}", src.as_uri()], tmp_path)
    assert pdf.is_file(), r.stderr[-2000:]
    data = pdf.read_bytes()
    boxes = re.findall(rb"/MediaBox\s*\[\s*0\s+0\s+([\d.]+)\s+([\d.]+)\s*\]", data)
    assert boxes, "no page in the printed PDF"
    want = (595.0, 842.0) if paper == "A4" else (612.0, 792.0)   # points (1/72 inch)
    for w, h in boxes:
        assert abs(float(w) - want[0]) < 2 and abs(float(h) - want[1]) < 2
    assert len(boxes) >= 4


TABLE_PROBE = """
<script>
window.addEventListener('load', function () {
  var bad = [];
  Array.prototype.slice.call(document.querySelectorAll('table')).forEach(function (t, k) {
    var box = t.parentElement.getBoundingClientRect();
    var r = t.getBoundingClientRect();
    if (t.scrollWidth > t.clientWidth + 1 || r.right > box.right + 1)
      bad.push({table: k, width: t.scrollWidth, room: box.width});
  });
  var out = document.createElement('pre');
  out.id = 'realopt-probe';
  out.textContent = 'PROBE' + JSON.stringify({bad: bad,
    scrollWidth: document.documentElement.scrollWidth, innerWidth: window.innerWidth}) + 'PROBE';
  document.body.appendChild(out);
});
</script>
"""


def test_tables_fit_900_px_with_four_long_right_names(tmp_path):
    """Issue 8 item 9: at 900 px wide, the chance-of-use table (a column per right) and every
    other table stay inside the page with four long right names."""
    from dataclasses import replace

    from test_outputs import built_project

    p = built_project()
    long = ["Wait for the regional permit and the grid connection offer",
            "Add a second press line in the east hall when demand allows",
            "Close one of the two finishing halls and sublet the space",
            "Mothball the whole mill during a prolonged downturn in demand"]
    p = replace(p, rights=tuple(replace(r, name=n) for r, n in zip(p.rights, long)))
    a = realopt.appraise(p)
    out = tmp_path / "report"
    write_report(a, out, dpi=72)
    page = (out / "report.html").read_text(encoding="utf-8")
    probe = tmp_path / "probe.html"
    probe.write_text(page.replace("</body>", TABLE_PROBE + "</body>"), encoding="utf-8")
    profile = tmp_path / "profile"
    profile.mkdir()
    r = subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu",
                        "--no-first-run", "--disable-background-networking",
                        "--host-resolver-rules=MAP * ~NOTFOUND", f"--user-data-dir={profile}",
                        "--window-size=900,1200", "--virtual-time-budget=15000", "--dump-dom",
                        probe.as_uri()], capture_output=True, text=True, timeout=180)
    m = re.search(r"PROBE(\{.*?\})PROBE", r.stdout)
    assert m, f"no probe result from chromium (exit {r.returncode}): {r.stderr[-2000:]}"
    seen = json.loads(m.group(1))
    assert seen["innerWidth"] == 900
    assert seen["bad"] == [] and seen["scrollWidth"] <= 900, seen


@pytest.fixture(scope="module")
def sim_report(tmp_path_factory):
    """The simulation report of the river demo (fewer paths and dates than the file, so the
    tornado's copies are quick; every figure and table of the full report is there)."""
    p = realopt.load_project(ROOT / "projects" / "river_ccgt.yaml",
                             {"simulation.paths": 3000, "simulation.steps_per_year": 4,
                              "simulation.upper_bound": {"paths": 30, "inner": 4}})
    a = realopt.appraise(p, progress=False)
    out = tmp_path_factory.mktemp("browser-sim") / "report"
    write_report(a, out, dpi=100)
    return out


def test_simulation_report_loads_and_fits_a4_width(sim_report, tmp_path):
    # the simulation report has its own tables (standard errors, tornado with nine columns,
    # the dual bound): every image loads and every table stays inside an A4-wide window
    page = (sim_report / "report.html").read_text(encoding="utf-8")
    probe = tmp_path / "probe.html"
    probe.write_text(page.replace("</body>", PROBE + TABLE_PROBE + "</body>"), encoding="utf-8")
    r = _run(["--virtual-time-budget=15000", "--dump-dom", probe.as_uri()], tmp_path)
    found = re.findall(r"PROBE(\{.*?\})PROBE", r.stdout)
    assert len(found) == 2, f"no probe result from chromium (exit {r.returncode}): " \
                            f"{r.stderr[-2000:]}"
    seen = {**json.loads(found[0]), **json.loads(found[1])}
    figures = len(list((sim_report / "figures").glob("*.png")))
    assert seen["images"] == figures >= 6
    assert seen["broken"] == 0
    assert seen["innerWidth"] == A4_WIDTH_PX
    assert seen["bad"] == [], seen
    assert seen["scrollWidth"] <= A4_WIDTH_PX and seen["bodyWidth"] <= A4_WIDTH_PX
    assert "exact" in page and "a gap of" in page and "Sensitivity of the expanded NPV" in page
