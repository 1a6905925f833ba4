"""The one visual style of realopt's figures (and the page colours of the HTML report).

Palette: five colours of distinct lightness (they stay apart when printed in greyscale) and of
blue/orange hues (apart for the common red-green colour-vision deficiencies). Lines also differ
by dash pattern and marker, region fills by hatching, so no reading depends on colour alone.
One font family, DejaVu Sans (shipped with matplotlib, so figures look the same everywhere).

Figures are drawn on ``matplotlib.figure.Figure`` objects with the Agg canvas: no pyplot, no
global backend state. Import this module only when drawing (it imports matplotlib).
"""
from __future__ import annotations

from contextlib import contextmanager

import matplotlib

matplotlib.use("Agg", force=False)

from matplotlib.figure import Figure  # noqa: E402

FONT = "DejaVu Sans"
INK = "#222222"
MUTED = "#6b6b6b"
GRID = "#dddddd"
PAPER = "#ffffff"

# Series colours in SERIES order; grey lightness (Rec. 709 luma) 23, 46, 57, 31, 76 %.
NAVY = "#1d3f6e"
PLUM = "#7b3f73"
ORANGE = "#c2661c"
SKY = "#5b9bd5"
SAND = "#e7c35a"
SERIES = (NAVY, ORANGE, SKY, PLUM, SAND)
DASHES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1, 1, 1)))
MARKERS = ("o", "s", "^", "D", "v")

# Region fills of the decision maps: "carry on" is the near-white first entry; the others are
# far apart in lightness and carry a hatch as a second cue.
FILLS = ("#f3f3f3", "#f2d48a", "#7fb0dc", "#c77c3e", "#2e4f80", "#b48ab0")   # luma 95 84 66 53 30 59
HATCHES = ("", "//", "\\\\", "xx", "..", "++")

POSITIVE = NAVY          # value bridge: value added
NEGATIVE = ORANGE        # value bridge: value lost
TOTAL = "#4d4d4d"        # value bridge: totals (static and expanded NPV)

WIDTH = 6.7              # inches: 170 mm, the text width of an A4 or Letter page
DPI = 300                # print resolution of the PNG files

RC = {
    "font.family": "sans-serif",
    "font.sans-serif": [FONT],
    "font.size": 8.5,
    "axes.titlesize": 10,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.labelsize": 8.5,
    "axes.edgecolor": MUTED,
    "axes.labelcolor": INK,
    "axes.linewidth": 0.7,
    "axes.grid": True,
    "axes.axisbelow": True,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "grid.color": GRID,
    "grid.linewidth": 0.5,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "xtick.labelcolor": INK,
    "ytick.labelcolor": INK,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "legend.fontsize": 7.5,
    "legend.frameon": False,
    "lines.linewidth": 1.6,
    "figure.facecolor": PAPER,
    "savefig.facecolor": PAPER,
    "hatch.linewidth": 0.6,
    "hatch.color": "#555555",
    "pdf.fonttype": 42,
    "svg.fonttype": "none",
}


@contextmanager
def styled():
    """Apply the style while drawing (rc settings are read when artists are created)."""
    with matplotlib.rc_context(RC):
        yield


def new_figure(height: float, width: float = WIDTH) -> Figure:
    """A figure of the report's width, drawn with the Agg canvas."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def line_style(k: int) -> dict:
    """Colour, dash and marker of the k-th series (cycled)."""
    return {"color": SERIES[k % len(SERIES)], "linestyle": DASHES[k % len(DASHES)]}


CSS_COLOURS = {"ink": INK, "muted": MUTED, "grid": GRID, "accent": NAVY, "warn": ORANGE}
