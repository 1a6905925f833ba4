"""The report's figures, drawn from an Appraisal (and the Sensitivity run on it).

Each :class:`Chart` has a file name, a title, a one-sentence caption that says what to read off
it (numbers formatted by :class:`realopt.outputs.tables.Fmt` from the result, never recomputed)
and a ``draw(fig)`` that draws into a matplotlib Figure or SubFigure (the same drawing serves the
PNG file and the PDF page). Project values are after that date's cash flow, as the decisions see
them; money in the project's currency and unit; time in years from today.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ..rights import Action
from . import style
from .sensitivity import SETTLED
from .tables import Fmt, breakeven_text, commits, is_modal, mode_shares

# matplotlib is imported through .style (Agg) and only inside this module's functions below.


PNG_COMPRESSION = 1    # zlib level: half the encoding time of the default 6, files ~20% larger


@dataclass(frozen=True)
class Chart:
    slug: str
    title: str
    caption: str
    height: float                  # inches, at the report width
    draw: Callable


def _slug(text: str) -> str:
    return re.sub(r"[^a-z0-9]+", "_", text.lower()).strip("_")[:48] or "x"


def _log_axis(ax, lo, hi):
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    ax.set_yscale("log")
    ax.set_ylim(lo, hi)
    subs = (1.0, 2.0, 5.0) if hi / lo > 30 else (1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0)
    ax.yaxis.set_major_locator(LogLocator(base=10, subs=subs))
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:,.4g}"))
    ax.yaxis.set_minor_formatter(NullFormatter())


def _today_marker(ax, v0, f: Fmt, text_side="right"):
    ax.plot([0], [v0], marker="o", markersize=6, color=style.INK, zorder=6, clip_on=False,
            linestyle="none")
    ax.annotate(f"today {f.money(v0)}", (0, v0), xytext=(7, -4), textcoords="offset points",
                va="top",
                fontsize=7.5, color=style.INK, zorder=7,
                bbox={"boxstyle": "round,pad=0.2", "fc": "white", "ec": "none", "alpha": 0.8})


def _action_styles(a) -> dict:
    """One fill and hatch per action across every decision map (by right, in file order), so a
    right keeps its colour from map to map. Each map's first action is the no-exercise one
    ('carry on', or 'wait' before investing): it always gets the near-white first fill."""
    order = {r.name: k for k, r in enumerate(a.rights)}
    labels = {lab for dm in a.decision_maps for lab in dm.actions[1:]}
    rest = sorted(labels, key=lambda lab: (order.get(lab.split(": ")[0], 99), lab))
    out = {}
    for k, lab in enumerate(rest):
        i = 1 + k % (len(style.FILLS) - 1)
        out[lab] = (style.FILLS[i], style.HATCHES[i])
    return out


def _action_text(a, label: str) -> str:
    """A decision map's action label for a reader: exercising a defer right means investing."""
    for r in a.rights:
        if commits(r) and label == r.name:
            return f"invest now ({r.name})"
    return label


def _map_style(styles, dm, k):
    return (style.FILLS[0], style.HATCHES[0]) if k == 0 else styles[dm.actions[k]]


def _flow_years(project) -> list[float]:
    """Cash-flow dates of the project where project value drops by a whole year's flow (none
    when the flows accrue through the year, ``flow_timing: spread``)."""
    u = project.underlying
    if getattr(u, "flow_timing", "at_dates") == "spread":
        return []
    if u.cash_flows:
        return [float(y) for y, _ in u.cash_flows]
    if u.drivers is not None:
        return [float(y) for y in range(u.drivers.years[0], u.drivers.years[1] + 1)]
    return []


def _threshold_lines(a, state=None):
    """Each threshold line of the result, in the order of the rights: (label of the action,
    'above'/'below', the (year, value) points, and the x/y arrays broken at cash-flow dates).
    ``state``: only the thresholds read from that state (decision maps)."""
    breaks = _flow_years(a.project)
    for r in a.rights:
        ts = [t for t in r.thresholds if not t.never and (state is None or t.state == state)]
        for action in dict.fromkeys(t.action for t in ts):
            tt = [t for t in ts if t.action == action]
            for attr, word in (("lower", "above"), ("upper", "below")):
                pts = [(t.year, getattr(t, attr)) for t in tt if getattr(t, attr) is not None]
                if not pts:
                    continue
                xs, ys = _broken(*zip(*pts), breaks)
                right = a.project.right(r.name)       # its type: modal moves are named
                what = r.name if not right.modal else f"{r.name}: {action}"
                what = f"invest ({r.name})" if right.commits else what
                yield what, word, pts, xs, ys


def _broken(xs, ys, breaks):
    """xs, ys with NaN inserted where a cash-flow date falls in (x[k], x[k+1]]: the value the
    decisions look at drops there, so a threshold line is not joined across it."""
    out_x, out_y = [], []
    for k, (x, y) in enumerate(zip(xs, ys)):
        if k and any(xs[k - 1] < b <= x + 1e-9 for b in breaks):
            out_x.append(np.nan)
            out_y.append(np.nan)
        out_x.append(x)
        out_y.append(y)
    return out_x, out_y


def _isolated_mask(ys) -> list[bool]:
    """True at points of a NaN-broken line with no neighbour on their segment: a line cannot
    show them, so they get a marker."""
    y = np.asarray(ys, float)
    ok = ~np.isnan(y)
    left = np.concatenate([[False], ok[:-1]])
    right = np.concatenate([ok[1:], [False]])
    return list(ok & ~left & ~right)


# ------------------------------------------------------------------------ value bridge
def _draw_bridge(fig, a, f: Fmt):
    ax = fig.subplots()
    labels = ["Static NPV"] + [r.name for r in a.rights] + ["Expanded NPV"]
    n = len(labels)
    y = np.arange(n)[::-1]
    ax.barh(y[0], a.static_npv, color=style.TOTAL, height=0.6, zorder=3)
    ax.barh(y[-1], a.expanded_npv, color=style.TOTAL, height=0.6, zorder=3)
    run = a.static_npv
    values = [a.static_npv]
    for k, r in enumerate(a.rights):
        yy = y[k + 1]
        share = r.shapley_value
        colour = style.POSITIVE if share >= 0 else style.NEGATIVE
        ax.barh(yy, r.standalone_value, left=run, height=0.72, fill=False,
                edgecolor=style.MUTED, linestyle=(0, (3, 2)), linewidth=0.9, zorder=2)
        ax.barh(yy, share, left=run, color=colour, height=0.5, zorder=3)
        ax.plot([run, run], [y[k] - 0.3, yy + 0.36], color=style.MUTED, linewidth=0.6, zorder=1)
        run += share
        values.append(share)
    ax.plot([run, run], [y[-2] - 0.3, y[-1] + 0.3], color=style.MUTED, linewidth=0.6, zorder=1)
    values.append(a.expanded_npv)
    ax.set_yticks(y, [_wrap(t, 30) for t in labels])
    ax.axvline(0, color=style.INK, linewidth=0.8, zorder=2)
    lo = min([0.0, a.static_npv, a.expanded_npv] + [a.static_npv + min(0, r.standalone_value)
                                                     for r in a.rights])
    hi = max([0.0, a.static_npv, a.expanded_npv] + [a.static_npv + r.standalone_value
                                                     for r in a.rights] + [run])
    cum = a.static_npv
    for k, r in enumerate(a.rights):
        hi = max(hi, cum + r.standalone_value, cum + r.shapley_value)
        lo = min(lo, cum + r.standalone_value, cum + r.shapley_value)
        cum += r.shapley_value
    pad = 0.22 * (hi - lo or 1.0)
    ax.set_xlim(lo - 0.04 * (hi - lo or 1.0), hi + pad)
    ends = [a.static_npv]
    cum = a.static_npv
    for r in a.rights:
        ends.append(max(cum + r.shapley_value, cum + r.standalone_value, cum))
        cum += r.shapley_value
    ends.append(a.expanded_npv)
    for k, (yy, v) in enumerate(zip(y, values)):
        text = f.money(v) if k in (0, n - 1) else f"{'+' if v >= 0 else ''}{f.money(v)}"
        if 0 < k < n - 1:
            text += f"  (alone {f.money(a.rights[k - 1].standalone_value)})"
        x = max(ends[k], 0.0) if k in (0, n - 1) else ends[k]
        ax.text(x + 0.01 * (hi - lo or 1.0), yy, " " + text, va="center", fontsize=7.5,
                color=style.INK)
    ax.set_xlabel(f"Value today ({f.unit_label})")
    ax.grid(axis="y", visible=False)
    from matplotlib.patches import Patch

    ax.legend(handles=[Patch(color=style.POSITIVE, label="Shapley share of the right"),
                       Patch(fill=False, edgecolor=style.MUTED, linestyle="--",
                             label="value of the right alone"),
                       Patch(color=style.TOTAL, label="NPV")],
              loc="lower right", ncols=3, bbox_to_anchor=(1.0, -0.32))


def _wrap(text: str, width: int) -> str:
    import textwrap

    return "\n".join(textwrap.wrap(text, width, break_on_hyphens=False)) or text


# ------------------------------------------------------------------------ decision maps
def _map_edges(x):
    x = np.asarray(x, float)
    mid = 0.5 * (x[1:] + x[:-1])
    return np.concatenate([[x[0] - (mid[0] - x[0])], mid, [x[-1] + (x[-1] - mid[-1])]])


def _draw_decision_map(fig, a, dm, f: Fmt):
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Patch

    ax = fig.subplots()
    styles = _action_styles(a)
    n = len(dm.actions)
    codes = np.ma.masked_less(dm.codes, 0)
    t_edges = _map_edges(dm.times)
    t_edges[0] = max(t_edges[0], dm.times[0])
    v_edges = np.exp(_map_edges(np.log(dm.values)))
    looks = [_map_style(styles, dm, k) for k in range(n)]
    cmap = ListedColormap([fill for fill, _ in looks])
    ax.pcolormesh(t_edges, v_edges, codes, cmap=cmap, vmin=-0.5, vmax=n - 0.5,
                  shading="flat", rasterized=True, zorder=1)
    for k in range(n):
        hatch = looks[k][1]
        if not hatch or not np.any(dm.codes == k):
            continue
        ax.contourf(dm.times, dm.values, np.where(dm.codes == k, 1.0, 0.0), levels=[0.5, 1.5],
                    colors="none", hatches=[hatch], zorder=2)
    thin = _thin_columns(ax, dm, looks, t_edges, v_edges)
    handles = [Patch(facecolor=looks[k][0], edgecolor=style.MUTED, hatch=looks[k][1],
                     label=_wrap(_action_text(a, lab), 34)) for k, lab in enumerate(dm.actions)]
    handles.append(Patch(facecolor="white", edgecolor=style.MUTED,
                         label=_wrap("no choice here (outside the rights' windows or the "
                                     "tree)", 34)))
    if thin:
        from matplotlib.lines import Line2D

        handles.append(Line2D([], [], marker="v", markersize=3.5, color=style.INK,
                              linestyle="none", label=_wrap("a single exercise date (its column "
                                                            "drawn wider than one step)", 34)))
    for k_line, (what, word, pts, xs, ys) in enumerate(_threshold_lines(a, dm.state)):
        line, = ax.plot(xs, ys, color=style.INK, linewidth=1.1,
                        linestyle=style.DASHES[(k_line + 1) % len(style.DASHES)],
                        marker=style.MARKERS[k_line % len(style.MARKERS)],
                        markevery=_isolated_mask(ys), markersize=3.5, zorder=4,
                        label=_wrap(f"threshold: {what} (use if value is {word})", 36))
        handles.append(line)
    _today_marker(ax, a.present_value, f)
    cols = np.flatnonzero((dm.codes >= 0).any(axis=0))
    last = float(dm.times[cols[-1]]) if cols.size else float(dm.times[-1])
    right = min(float(dm.times[-1]), last + max(0.25, 0.04 * last))
    if cols.size:                          # the last column with a choice drawn whole
        right = max(right, float(t_edges[cols[-1] + 1]))
        if thin and cols[-1] == len(dm.times) - 1:
            right = max(right, last + 0.5 * max(MIN_COLUMN * (t_edges[-1] - t_edges[0]),
                                                float(np.median(np.diff(t_edges)))))
    ax.set_xlim(0, right)
    _log_axis(ax, dm.values[0], dm.values[-1])
    ax.set_xlabel("Years from today")
    ax.set_ylabel(f"Project value ({f.unit_label}, log scale)")
    ax.grid(False)
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0)


MIN_COLUMN = 0.012     # share of the time axis: the narrowest a date with an exercise is drawn


def _thin_columns(ax, dm, looks, t_edges, v_edges):
    """Dates whose column is narrower than MIN_COLUMN of the time axis (a one-step bermudan
    date on a fine grid) and that hold an exercise are drawn again as bars of that width, fill
    and hatch, above the mesh, with a tick on the top edge: they stay visible at any
    steps_per_year."""
    span = float(t_edges[-1] - t_edges[0]) or 1.0
    widths = np.diff(t_edges)
    typical = float(np.median(widths)) if widths.size else span
    w = max(MIN_COLUMN * span, typical)
    drawn = False
    for col in np.flatnonzero(widths < min(w, 0.75 * typical)):
        column = dm.codes[:, col]
        if not np.any(column > 0):
            continue
        if any(0 <= c < dm.codes.shape[1] and widths[c] >= 0.75 * typical
               and np.array_equal(dm.codes[:, c], column) for c in (col - 1, col + 1)):
            continue                      # a wide neighbour shows the same decisions
        t = float(dm.times[col])
        start = 0
        for r in range(1, len(column) + 1):
            if r < len(column) and column[r] == column[start]:
                continue
            k = int(column[start])
            if k > 0:
                fill, hatch = looks[k]
                ax.bar(t, v_edges[r] - v_edges[start], bottom=v_edges[start], width=w,
                       color=fill, hatch=hatch or None, edgecolor="#555555", linewidth=0.3,
                       zorder=3)
            start = r
        ax.plot([t], [1.0], marker="v", markersize=3.5, color=style.INK, linestyle="none",
                transform=ax.get_xaxis_transform(), clip_on=False, zorder=5)
        drawn = True
    return drawn


def _map_has_thresholds(a, dm) -> bool:
    return any(t.state == dm.state and not t.never and (t.lower is not None
                                                         or t.upper is not None)
               for r in a.rights for t in r.thresholds)


# ------------------------------------------------------------------------ thresholds
def _draw_thresholds(fig, a, f: Fmt):
    ax = fig.subplots()
    years = np.asarray(a.fan_years)
    ax.fill_between(years, a.fan[25], a.fan[75], color="#e4e4e4", linewidth=0,
                    zorder=1, label="middle half of project value (25-75%, real-world)")
    ax.plot(a.fan_years, a.expected_real_world, color=style.MUTED, linewidth=1.2, zorder=2,
            label="expected project value (real-world)")
    ys_all = [a.present_value, *a.fan[25], *a.fan[75]]
    for k, (what, word, pts, xs, ys) in enumerate(_threshold_lines(a)):
        ys_all += [y for _, y in pts]
        st = style.line_style(k)
        every = _isolated_mask(ys)
        if not any(every):
            every = max(1, len(xs) // 8)
        ax.plot(xs, ys, **st, marker=style.MARKERS[k % len(style.MARKERS)],
                markevery=every, markersize=3.5, zorder=3,
                label=_wrap(f"{what}: use if value is {word}", 52))
    _today_marker(ax, a.present_value, f)
    pos = [v for v in ys_all if v and v > 0]
    _log_axis(ax, min(pos) / 1.3, max(pos) * 1.3)
    ax.set_xlim(0, a.lattice.horizon)
    ax.set_xlabel("Years from today")
    ax.set_ylabel(f"Project value ({f.unit_label}, log scale)")
    fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2)


# ------------------------------------------------------------------------ chance of use
def _draw_chance(fig, a, f: Fmt):
    axes = fig.subplots(1, 2, sharey=True)
    for ax, attr, title in ((axes[0], "use_real_world", "Real-world (expected drift)"),
                            (axes[1], "use_risk_neutral", "Risk-neutral (pricing measure)")):
        for k, r in enumerate(a.rights):
            xs, ys = r.use_years, np.asarray(getattr(r, attr)) * 100.0
            ax.plot(xs, ys, **style.line_style(k), marker=style.MARKERS[k % len(style.MARKERS)],
                    markevery=max(1, len(xs) // 8), markersize=3.5,
                    label=_wrap(r.name + _chance_note(r), 52))
        ax.set_title(title, fontsize=8.5, loc="left")
        ax.set_xlim(0, a.lattice.horizon)
        ax.set_ylim(-2, 102)
        ax.set_xlabel("Years from today")
    axes[0].set_ylabel("Chance the right has been used (%)")
    fig.legend(*axes[0].get_legend_handles_labels(), loc="outside lower center", ncols=2)


def _chance_note(r) -> str:
    """What a switch's line counts: switched at least once (results with mode shares), else
    the older measure, the chance of being away from the start mode."""
    if not is_modal(r):
        return ""
    return " (switched at least once)" if mode_shares(r) else " (in another mode)"


def _draw_modes(fig, a, f: Fmt):
    """One row per switch right: the share of paths in each mode over time, real-world on the
    left, risk-neutral on the right, stacked (they add up to the chance of operating)."""
    switches = [r for r in a.rights if mode_shares(r)]
    axes = fig.subplots(len(switches), 2, sharex=True, sharey=True, squeeze=False)
    for row, r in zip(axes, switches):
        shares = mode_shares(r)
        xs = np.asarray(r.use_years)
        for ax, pick, title in ((row[0], 1, "real-world"), (row[1], 0, "risk-neutral")):
            ys = [np.asarray(shares[m][pick]) * 100.0 for m in shares]
            rest = np.clip(100.0 - np.sum(ys, axis=0), 0.0, 100.0)
            polys = ax.stackplot(xs, *ys, rest,
                                 labels=list(shares) + ["not operating (not yet invested, "
                                                        "or abandoned)"],
                                 linewidth=0.4, edgecolor="white",
                                 colors=[style.FILLS[1 + k % (len(style.FILLS) - 1)]
                                         for k in range(len(ys))] + ["#e9e9e9"])
            for k, poly in enumerate(polys[:-1]):
                poly.set_hatch(style.HATCHES[1 + k % (len(style.HATCHES) - 1)])
            ax.set_title(_wrap(f"{r.name}: {title}", 48), fontsize=8.5, loc="left")
            ax.set_xlim(0, a.lattice.horizon)
            ax.set_ylim(0, 100)
        row[0].set_ylabel("Chance of being in mode (%)")
        handles, labels = row[1].get_legend_handles_labels()
        row[1].legend(handles, [_wrap(t, 18) for t in labels], loc="upper left",
                      bbox_to_anchor=(1.01, 1.0), borderaxespad=0, title="mode",
                      title_fontsize=7.5)
    for ax in axes[-1]:
        ax.set_xlabel("Years from today")


def _modes_height(a) -> float:
    return 0.4 + 2.1 * sum(1 for r in a.rights if mode_shares(r))


# ------------------------------------------------------------------------ value fan
def _draw_fan(fig, a, f: Fmt):
    ax = fig.subplots()
    x = np.asarray(a.fan_years)
    ax.fill_between(x, a.fan[5], a.fan[95], color="#dbe5f1", linewidth=0,
                    label="5-95% of outcomes")
    ax.fill_between(x, a.fan[25], a.fan[75], color="#9fbadb", linewidth=0,
                    label="25-75% of outcomes")
    ax.plot(x, a.fan[50], color=style.NAVY, linewidth=1.4, label="median")
    ax.plot(a.fan_years, a.expected_real_world, color=style.ORANGE, linestyle="--",
            linewidth=1.4, label="expected value")
    _today_marker(ax, a.present_value, f)
    ax.set_xlim(0, a.fan_years[-1])
    top = float(np.max(a.fan[95]))
    ax.set_ylim(0, top * 1.08)
    from matplotlib.ticker import FuncFormatter

    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:,.4g}"))
    ax.set_xlabel("Years from today")
    ax.set_ylabel(f"Project value ({f.unit_label})")
    fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2)


# ------------------------------------------------------------------------ sensitivity
def _draw_tornado(fig, a, s, f: Fmt):
    from matplotlib.patches import Patch

    rows = list(s.rows)
    top, bottom = fig.subfigures(2, 1, height_ratios=[_tornado_height(s), _notes_height(s, f)])
    axes = top.subplots(1, 2, sharey=True)
    y = np.arange(len(rows))[::-1]
    labels = [_wrap(f"{r.input} ({r.low_setting} / {r.high_setting})", 34) for r in rows]
    for ax, base, lo_attr, hi_attr, title in (
            (axes[0], s.base_expanded, "expanded_low", "expanded_high", "Expanded NPV"),
            (axes[1], s.base_flexibility, "flexibility_low", "flexibility_high",
             "Flexibility value")):
        for yy, r in zip(y, rows):
            lo, hi = getattr(r, lo_attr), getattr(r, hi_attr)
            bars = [(lo - base, {"color": style.ORANGE}),
                    (hi - base, {"color": style.NAVY, "hatch": "//", "edgecolor": "white",
                                 "linewidth": 0})]
            bars.sort(key=lambda b: -abs(b[0]))       # the shorter bar on top stays visible
            for width, look in bars:
                ax.barh(yy, width, left=base, height=0.62, zorder=3, **look)
        ax.axvline(base, color=style.INK, linewidth=0.9, zorder=4)
        ax.set_title(f"{title} (base {f.money(base)})", fontsize=8.5, loc="left")
        ax.set_xlabel(f"{f.unit_label}")
        ax.grid(axis="y", visible=False)
    axes[0].set_yticks(y, labels)
    axes[0].tick_params(axis="y", labelsize=7.5)
    top.legend(handles=[Patch(color=style.ORANGE, label="input moved down"),
                        Patch(facecolor=style.NAVY, hatch="//", edgecolor="white",
                              label="input moved up")],
               loc="outside lower right", ncols=2, fontsize=7.5)
    bottom.text(0.0, 1.0, _notes_text(s, f), va="top", ha="left", fontsize=7.2,
                color=style.INK, transform=bottom.transSubfigure)


def _notes_text(s, f: Fmt) -> str:
    lines = [f"Moves: {s.moves.describe()}."]
    lines += [breakeven_text(b, f, s.decision_today) for b in s.breakevens]
    lines += list(s.notes)
    return "\n".join(_wrap(t, 118) for t in lines)


def _tornado_height(s) -> float:
    return max(2.2, 0.34 * len(s.rows) + 0.9)


def _notes_height(s, f: Fmt) -> float:
    return 0.14 * (_notes_text(s, f).count("\n") + 1) + 0.1


# ------------------------------------------------------------------------ convergence
def _draw_convergence(fig, a, s, f: Fmt):
    c = s.convergence
    ax = fig.subplots()
    ax.plot(c.steps_per_year, c.expanded_npv, color=style.NAVY, marker="o", markersize=4,
            label="expanded NPV")
    k = c.steps_per_year.index(c.chosen)
    ax.plot([c.chosen], [c.expanded_npv[k]], marker="D", markersize=8, color=style.ORANGE,
            linestyle="none", zorder=5, label=f"chosen grid: {c.chosen} steps a year")
    fine = c.expanded_npv[-1]
    ax.axhline(fine, color=style.MUTED, linestyle=":", linewidth=1,
               label=f"finest grid: {c.steps_per_year[-1]} steps a year")
    tol = abs(fine) * SETTLED if fine else SETTLED
    ax.axhspan(fine - tol, fine + tol, color="#e4e4e4", zorder=0, linewidth=0,
               label=f"within {SETTLED:.1%} of the finest grid")
    lo, hi = min(c.expanded_npv + (fine - 2 * tol,)), max(c.expanded_npv + (fine + 2 * tol,))
    pad = 0.08 * (hi - lo)
    ax.set_ylim(lo - pad, hi + pad)
    ax.set_xscale("log", base=2)
    from matplotlib.ticker import FixedLocator, FuncFormatter, NullLocator

    ax.xaxis.set_major_locator(FixedLocator(c.steps_per_year))
    ax.xaxis.set_minor_locator(NullLocator())
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f.money(v)))
    ax.set_xlabel("Lattice steps per year (log scale)")
    ax.set_ylabel(f"Expanded NPV ({f.unit_label})")
    ax.legend(loc="best")


# ------------------------------------------------------------------------ state diagram
def _state_layout(a):
    """Rows by distance from the initial state (top to bottom); 'abandoned' in its own column
    at the right, where every abandonment arrow ends."""
    import networkx as nx

    sg = a.state_graph
    g = sg.graph
    depth = nx.single_source_shortest_path_length(g, sg.initial)
    sink = [k for k in g.nodes if g.nodes[k]["abandoned"]]
    rows: dict[int, list] = {}
    for k in g.nodes:
        if k not in sink:
            rows.setdefault(depth[k], []).append(k)
    moves = {}
    for u, v, e in g.edges(data=True):
        verb = "pays" if e["sign"] < 0 else "receives"
        name = ", ".join(e["rights"])
        what = ("invest, " if e["action"] == Action.COMMIT else f"{e['label']}: "
                if e["action"] == Action.SWITCH else "")
        moves.setdefault(f"{name}: {what}{verb} {e['amount']}", None)
    return g, rows, sink, list(moves)


def _states_height(a) -> float:
    g, rows, sink, key = _state_layout(a)
    return 1.05 * max(1, len(rows)) + 0.2 + 0.16 * len(key) + 0.2


def _draw_states(fig, a, f: Fmt):
    from matplotlib.patches import FancyArrowPatch, FancyBboxPatch

    g, rows, sink, key = _state_layout(a)
    W = fig.get_figwidth()
    H = _states_height(a)
    fig.set_layout_engine("none")                         # placed by hand, in inches
    ax = fig.add_axes((0.0, 0.0, 1.0, H / (H + 0.35)))   # data units: inches
    ax.set_xlim(0, W)
    ax.set_ylim(0, H)
    ax.set_axis_off()
    key_h = 0.16 * len(key) + 0.2
    main_w = 0.74 * W if sink else W
    top = H - 0.1
    row_h = (H - key_h - 0.1) / max(1, len(rows))
    pos = {}
    for d, ks in rows.items():
        y = top - row_h * (d + 0.5)
        for i, k in enumerate(sorted(ks)):
            pos[k] = (main_w * (i + 0.5) / len(ks), y)
    for k in sink:
        pos[k] = (0.89 * W, key_h + (H - key_h) / 2)
    size = 7.3
    boxes = {}
    for k, (x, y) in pos.items():
        nd = g.nodes[k]
        lines = _wrap(nd["label"], 34).split("\n")
        if nd["invested"] and not nd["abandoned"]:
            lines.append(f"scale {nd['scale']:g}" + (f", fixed {f.money(nd['fixed'])} a year"
                                                      if nd["fixed"] else ""))
        w = max(len(t) for t in lines) * size * 0.55 / 72 + 0.2
        h = len(lines) * size * 1.3 / 72 + 0.12
        fc = "#f3f3f3" if nd["abandoned"] else (
            "#fdf3d8" if not nd["invested"] else "#e3ecf7")
        box = FancyBboxPatch((x - w / 2, y - h / 2), w, h,
                             boxstyle="round,pad=0.02,rounding_size=0.06", fc=fc,
                             ec=style.MUTED, lw=0.8, zorder=3)
        ax.add_patch(box)
        boxes[k] = box
        ax.text(x, y, "\n".join(lines), ha="center", va="center", fontsize=size, zorder=4,
                color=style.INK, linespacing=1.15)
    into_sink: dict[str, int] = {}
    for u, v, e in g.edges(data=True):
        rad = 0.3 if g.has_edge(v, u) else 0.0
        ax.add_patch(FancyArrowPatch(pos[u], pos[v], connectionstyle=f"arc3,rad={rad}",
                                     arrowstyle="-|>", mutation_scale=9, color=style.NAVY,
                                     lw=0.9, patchA=boxes[u], patchB=boxes[v], zorder=2))
        name = ", ".join(e["rights"])
        if e["label"] == "commit":
            name = f"invest ({name})"
        elif e["label"] not in ("expand", "contract", "abandon"):
            name = e["label"]
        if v in sink:
            into_sink[name] = into_sink.get(name, 0) + 1
            continue
        (x0, y0), (x1, y1) = pos[u], pos[v]
        mx, my = (x0 + x1) / 2, (y0 + y1) / 2
        ha = "center"
        if rad:                                # beside its own arc of a two-way pair
            dx, dy = rad * (y1 - y0) / 2, -rad * (x1 - x0) / 2
            mx, my = mx + dx, my + dy
            if abs(dx) >= abs(dy):
                ha = "left" if dx > 0 else "right"
                mx += 0.06 if dx > 0 else -0.06
        ax.text(mx, my, _wrap(name, 26), ha=ha, va="center", fontsize=6.6,
                color=style.INK, zorder=5, bbox={"boxstyle": "round,pad=0.15", "fc": "white",
                                                 "ec": "none", "alpha": 0.92})
    for k in sink:
        x, y = pos[k]
        label = "\n".join(_wrap(n, 24) + (f" (from {c} states)" if c > 1 else "")
                          for n, c in into_sink.items())
        ax.text(x, y + boxes[k].get_height() / 2 + 0.08, label, ha="center", va="bottom",
                fontsize=6.6, color=style.INK, zorder=5)
    ax.text(0.05, key_h - 0.12, "On exercise:\n" + "\n".join(key), ha="left", va="top",
            fontsize=6.8, color=style.INK, linespacing=1.35)


# ------------------------------------------------------------------------ the list
def charts(a, s) -> list[Chart]:
    """The report's figures in reading order; with ``s`` None, only those that do not need
    the sensitivity runs (same slugs and captions as in the full list)."""
    f = Fmt(a.project)
    money = f.money_unit
    out = [Chart(
        "value_bridge", "Value bridge: static NPV to expanded NPV",
        f"Static NPV {money(a.static_npv)} plus each right's Shapley share gives the expanded NPV "
        f"{money(a.expanded_npv)}; dashed outlines show each right valued alone (with any right "
        f"it requires), and the "
        f"interaction between the rights is {money(a.interaction)}.",
        max(2.4, 0.36 * (len(a.rights) + 2) + 1.0), lambda fig: _draw_bridge(fig, a, f))]
    flows = bool(_flow_years(a.project))
    k_map = 0
    for dm in a.decision_maps:
        if len(dm.actions) < 2:
            continue
        k_map += 1
        lines = (" the black lines are the exercise thresholds;" if _map_has_thresholds(a, dm)
                 else "")
        yearly = (" Decisions look at project value after each date's cash flow, so regions "
                  "repeat from year to year: just before a cash-flow date it pays to wait for "
                  "the flow." if flows else "")
        out.append(Chart(
            f"decision_map_{k_map}_{_slug(dm.state)}", f"Decision map: project {dm.state}",
            f"Read off the best action when the project is \u201c{dm.state}\u201d, for each date "
            f"and project value: each shaded region is where that action is best;{lines} the dot "
            f"is today's project value {money(a.present_value)}.{yearly}",
            3.4, lambda fig, dm=dm: _draw_decision_map(fig, a, dm, f)))
    out.append(Chart(
        "exercise_thresholds", "Exercise thresholds over time",
        "Each right is used when project value crosses its line (from above for a 'below' "
        "threshold, from below for an 'above' one); the grey line and band show where project "
        f"value is expected to go from today's {money(a.present_value)} (real-world).",
        3.3 + 0.22 * math.ceil((2 + len(a.rights)) / 2),
        lambda fig: _draw_thresholds(fig, a, f)))
    if a.rights:
        out.append(Chart(
            "chance_of_use", "Chance that each right has been used",
            "Read the chance that each right has been used by each date: on the left under the "
            "real-world drift (what to expect), on the right under the risk-neutral measure "
            "used for valuation (not a forecast)." + _switch_caption(a),
            2.8 + 0.22 * math.ceil(len(a.rights) / 2), lambda fig: _draw_chance(fig, a, f)))
    if any(mode_shares(r) for r in a.rights):
        out.append(Chart(
            "switch_modes", "Share of paths in each mode of a switch right",
            "Read the chance of being in each mode on each date, on the left under the "
            "real-world drift, on the right risk-neutral; the grey band on top is the chance "
            "that the project is not operating (not yet invested, or abandoned). The "
            "chance-of-use figure shows instead the chance of having switched at least once, "
            "which never falls.",
            _modes_height(a), lambda fig: _draw_modes(fig, a, f)))
    out.append(Chart(
        "value_fan", "Project value fan (real-world)",
        "Percentile bands of project value over time under the real-world drift, from today's "
        f"{money(a.present_value)}; " + (
            "values fall at each cash-flow date as the year's flow is paid out." if flows else
            "values fall over time as the project pays out its cash flows."),
        3.3, lambda fig: _draw_fan(fig, a, f)))
    if s is None:                  # the figures that do not need the sensitivity runs
        out.append(_states_chart(a, f))
        return out
    if s.rows:
        out.append(Chart(
            "sensitivity", "Sensitivity of expanded NPV and flexibility value",
            "Longer bars mark the inputs the result depends on most; break-evens below the "
            "tornado give the volatility and investment cost at which today's decision "
            f"(\u201c{a.decision_today}\u201d) changes.",
            _tornado_height(s) + _notes_height(s, f), lambda fig: _draw_tornado(fig, a, s, f)))
    if s.convergence is not None:
        c = s.convergence
        gap = f.pct(c.relative_gap, 2) if c.relative_gap is not None else "n/a"
        out.append(Chart(
            "convergence", "Convergence of the expanded NPV over the lattice grid",
            f"The chosen grid ({c.chosen} steps a year) gives {money(a.expanded_npv)}, within "
            f"{gap} of the finest grid shown; " + (
                "it lies in the grey band, so the grid has settled." if c.settled else
                "it lies outside the grey band, so the grid has not settled: use "
                + (f"--steps-per-year {c.settled_at} or more" if c.settled_at else
                   "more steps per year") + " for a number to quote."),
            2.8, lambda fig: _draw_convergence(fig, a, s, f)))
    out.append(_states_chart(a, f))
    return out


def _switch_caption(a) -> str:
    sw = [r for r in a.rights if is_modal(r)]
    if not sw:
        return ""
    if all(mode_shares(r) for r in sw):
        return (" A switch right counts as used once it has left its start mode at least once "
                "(the line never falls); where each path is on each date is in the figure of "
                "mode shares.")
    return " A switch right's line is the chance of being in a mode other than its start mode."


def _states_chart(a, f: Fmt) -> Chart:
    return Chart(
        "state_diagram", "States of the project and the rights that move between them",
        "Each box is a situation of the project (with its scale on the base cash flows); each "
        "arrow is a right, and the key below says what each one pays or receives on exercise.",
        _states_height(a), lambda fig: _draw_states(fig, a, f))


def single_action_states(a) -> list[str]:
    """States with choices in which carrying on is best everywhere (no map is drawn)."""
    return [dm.state for dm in a.decision_maps if len(dm.actions) < 2]


def render(chart: Chart, dpi: int = style.DPI, page_dpi: int | None = None):
    """Draw ``chart`` (title included) once at ``dpi``; returns (PNG bytes, RGB pixels), the
    pixels resampled to ``page_dpi`` when given (for the PDF page), else at ``dpi``. The same
    drawing serves figures/*.png, the HTML and the PDF."""
    import io

    from PIL import Image

    with style.styled():
        fig = style.new_figure(chart.height + 0.35)
        fig.suptitle(chart.title, x=0.01, ha="left", fontsize=10, fontweight="bold",
                     color=style.INK)
        chart.draw(fig)
        fig.set_dpi(dpi)
        fig.canvas.draw()
        rgb = np.asarray(fig.canvas.buffer_rgba())[..., :3].copy()
    img = Image.fromarray(rgb)
    buf = io.BytesIO()
    img.save(buf, format="png", dpi=(dpi, dpi), compress_level=PNG_COMPRESSION)
    if page_dpi is not None and page_dpi < dpi:
        k = page_dpi / dpi
        rgb = np.asarray(img.resize((round(img.width * k), round(img.height * k)), Image.BOX))
    return buf.getvalue(), rgb
