"""Figures of a sweep (``realopt sweep``), from its table (one row a point).

* One varied key: expanded NPV, static NPV and flexibility value against the key; points where
  the decision today is to wait are marked.
* Two varied keys: a heat map of expanded NPV over the grid (first key across, second up), with
  the boundary where the decision today changes (invest now / wait) drawn along the cell edges
  between points on either side of it.

Amounts are those of the table (the project's currency and unit, valued today). Keys whose
values are all numbers get a numeric axis; other values (lists, text) are placed evenly in the
order given and labelled as written.
"""
from __future__ import annotations

import io

import numpy as np

from . import style


def _axis(values):
    """(positions, tick labels or None, numeric?) of a key's distinct values in order."""
    distinct = list(dict.fromkeys(values))
    if all(isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool)
           for v in distinct):
        return np.array(distinct, float), None, True
    return np.arange(len(distinct), dtype=float), [str(v) for v in distinct], False


def _edges(pos):
    """Cell edges around sorted positions (half a spacing beyond each end)."""
    if len(pos) == 1:
        return np.array([pos[0] - 0.5, pos[0] + 0.5])
    mid = (pos[1:] + pos[:-1]) / 2
    return np.concatenate([[pos[0] - (mid[0] - pos[0])], mid, [pos[-1] + (pos[-1] - mid[-1])]])


_LABEL = "decision today changes (invest now / wait)"


def _boundary_style():
    from matplotlib import patheffects

    return {"color": "white", "linewidth": 2.2, "solid_capstyle": "projecting",
            "path_effects": [patheffects.withStroke(linewidth=3.6, foreground=style.INK)]}


def _is_wait(text) -> bool:
    return str(text or "").startswith("wait")


def draw_one(fig, df, key, money: str = "") -> None:
    ax = fig.add_subplot(1, 1, 1)
    x, labels, _ = _axis(df[key].tolist())
    order = np.argsort(x, kind="stable")
    for k, (col, name) in enumerate((("expanded_npv", "expanded NPV"),
                                     ("static_npv", "static NPV"),
                                     ("flexibility_value", "flexibility value"))):
        y = df[col].to_numpy(float)
        ax.plot(x[order], y[order], label=name, marker=style.MARKERS[k], markersize=3.5,
                **style.line_style(k))
    wait = np.array([_is_wait(t) for t in df["decision_today"]])
    if wait.any():
        ax.plot(x[wait], df["expanded_npv"].to_numpy(float)[wait], linestyle="none",
                marker="o", markersize=8, markerfacecolor="none", color=style.INK,
                label="decision today: wait")
    if labels is not None:
        ax.set_xticks(x, labels, rotation=20 if max(len(s) for s in labels) > 6 else 0)
    ax.axhline(0.0, color=style.MUTED, linewidth=0.7)
    ax.set_xlabel(key)
    ax.set_ylabel(f"value today{f' ({money})' if money else ''}")
    ax.set_title(f"Values against {key}")
    ax.legend(loc="best")


def draw_two(fig, df, keys, money: str = "") -> None:
    kx, ky = keys
    x, xl, _ = _axis(df[kx].tolist())
    y, yl, _ = _axis(df[ky].tolist())
    xi = {v: i for i, v in enumerate(dict.fromkeys(df[kx].tolist()))}
    yi = {v: i for i, v in enumerate(dict.fromkeys(df[ky].tolist()))}
    xo, yo = np.argsort(x, kind="stable"), np.argsort(y, kind="stable")
    xrank, yrank = np.empty_like(xo), np.empty_like(yo)
    xrank[xo], yrank[yo] = np.arange(len(x)), np.arange(len(y))
    z = np.full((len(y), len(x)), np.nan)
    wait = np.zeros((len(y), len(x)), bool)
    for vx, vy, val, dec in zip(df[kx], df[ky], df["expanded_npv"], df["decision_today"]):
        r, c = yrank[yi[vy]], xrank[xi[vx]]
        z[r, c] = float(val)
        wait[r, c] = _is_wait(dec)
    xs, ys = x[xo], y[yo]
    ex, ey = _edges(xs), _edges(ys)
    ax = fig.add_subplot(1, 1, 1)
    mesh = ax.pcolormesh(ex, ey, z, cmap="cividis", shading="flat")
    bar = fig.colorbar(mesh, ax=ax)
    bar.set_label(f"expanded NPV{f' ({money})' if money else ''}")
    _BOUNDARY = _boundary_style()
    first = True
    for r in range(len(ys)):          # boundary: cell edges between wait and invest-now points
        for c in range(len(xs)):
            if c + 1 < len(xs) and wait[r, c] != wait[r, c + 1]:
                ax.plot([ex[c + 1]] * 2, [ey[r], ey[r + 1]], label=_LABEL if first else None,
                        **_BOUNDARY)
                first = False
            if r + 1 < len(ys) and wait[r, c] != wait[r + 1, c]:
                ax.plot([ex[c], ex[c + 1]], [ey[r + 1]] * 2, label=_LABEL if first else None,
                        **_BOUNDARY)
                first = False
    bright = mesh.norm(z) > 0.6
    for r in range(len(ys)):
        for c in range(len(xs)):
            if wait[r, c] and len(xs) * len(ys) <= 400:
                ax.text(xs[c], ys[r], "W", ha="center", va="center", fontsize=6,
                        color=style.INK if bright[r, c] else "white")
    if xl is not None:
        ax.set_xticks(xs, [xl[i] for i in xo])
    if yl is not None:
        ax.set_yticks(ys, [yl[i] for i in yo])
    ax.set_xlabel(kx)
    ax.set_ylabel(ky)
    ax.grid(False)
    note = "W: wait (keep the right to invest); other cells: invest now"
    ax.set_title("Expanded NPV over the grid")
    if not first:
        ax.legend(loc="upper left", bbox_to_anchor=(0, -0.12), frameon=False)
    if wait.any():
        fig.text(0.99, 0.005, note, ha="right", va="bottom", fontsize=7, color=style.MUTED)


def sweep_png(df, keys, money: str = "", dpi: int = 200) -> bytes:
    """PNG bytes of the sweep's figure for one or two varied ``keys``."""
    with style.styled():
        fig = style.new_figure(3.6 if len(keys) == 1 else 4.4)
        if len(keys) == 1:
            draw_one(fig, df, keys[0], money)
        else:
            draw_two(fig, df, keys, money)
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=dpi)
    return buf.getvalue()


# ------------------------------------------------------------------------------------------
# A sweep's figure inside ``realopt report`` (``--sweep DIR``)

SWEEP_MANIFEST = ".realopt-sweep"          # written by realopt.sweep


def sweep_chart(folder):
    """The figure of the finished sweep in ``folder`` as a report Chart (slug ``sweep``).
    Raises RealoptError when the folder is not a finished sweep of one or two keys."""
    import json
    from pathlib import Path

    import pandas as pd

    from ..errors import RealoptError
    from .figures import Chart

    folder = Path(folder)
    try:
        manifest = json.loads((folder / SWEEP_MANIFEST).read_text(encoding="utf-8"))
        df = pd.read_parquet(folder / "sweep.parquet")
    except (OSError, ValueError) as err:
        raise RealoptError(f"--sweep {folder}: not a finished realopt sweep ({err}). Fix: run "
                           "`realopt sweep FILE --vary ... -o DIR` (or --resume it) first") \
            from None
    keys = [k for k, _ in manifest.get("vary", [])]
    if len(keys) not in (1, 2) or any(k not in df.columns for k in keys):
        raise RealoptError(f"--sweep {folder}: a figure is drawn for a sweep of one or two "
                           f"keys; this one varies {len(keys)}")
    src = Path(manifest.get("file", "")).name
    if len(keys) == 1:
        title = f"Sweep: values against {keys[0]}"
        caption = (f"From the sweep of {src} in {folder.name}/ ({len(df)} points): expanded "
                   f"NPV, static NPV and flexibility value at each value of {keys[0]}, every "
                   "other input as in that file; circled points are those where the decision "
                   "today is to wait.")
    else:
        title = f"Sweep: expanded NPV over {keys[0]} and {keys[1]}"
        caption = (f"From the sweep of {src} in {folder.name}/ ({len(df)} points): expanded "
                   f"NPV at each pair of values; the outlined line separates the points where "
                   "the decision today is to invest now from those where it is to wait (W).")
    return Chart("sweep", title, caption, 3.6 if len(keys) == 1 else 4.4,
                 lambda fig: (draw_one(fig, df, keys[0]) if len(keys) == 1
                              else draw_two(fig, df, keys)))
