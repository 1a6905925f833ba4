"""The report of a simulation appraisal (``valuation: simulation``), written into a folder.

Called by :func:`realopt.outputs.report.write_report` (which owns the atomic temp-folder +
rename) with a :class:`realopt.simulation.result.SimulationAppraisal`. Every figure and table is
drawn from the one result object, except the convergence figure (it re-appraises copies of the
file at paths/16 and paths/4, same seed, via the sensitivity copier, beside the result itself)
and the tornado (moved copies valued on the same random numbers as a base valued again with
them: :mod:`realopt.outputs.sim_sensitivity`, started first so that its copies run in worker
processes while the other figures are drawn). Money is in the project's currency
and unit, valued today (risk-neutral on the drivers); years from today; driver values in the
units the project file gives them (the file does not name the units). Every number shown is a
field of the result, formatted by :class:`realopt.outputs.tables.Fmt`; numbered HTML cells carry
their exact value in ``data-value``.
"""
from __future__ import annotations

import base64
import html
import io
import json
from pathlib import Path

import numpy as np
import pandas as pd

from .. import __version__
from ..rights.registry import RIGHT_TYPES
from ..simulation.result import CAUTION_SIMULATION, MAP_DATES
from .tables import Fmt

CONVERGENCE_FRACTIONS = (16, 4)     # re-appraise at paths/16 and paths/4 beside the result
FIGURES = ("value_bridge", "decision_maps", "thresholds", "chance_of_use", "fan",
           "cash_flow_fan", "tornado", "convergence")
TITLES = {"value_bridge": "Value bridge (error bars: one standard error)",
          "decision_maps": "Decision maps in the plane of two drivers",
          "thresholds": "Exercise thresholds in the driver's units",
          "chance_of_use": "Chance of use",
          "fan": "Fan of the drivers (real-world paths)",
          "cash_flow_fan": "Fan of the base cash flow per year (real-world paths)",
          "tornado": "Sensitivity of the expanded NPV and the flexibility value "
                     "(whiskers: one standard error of the difference)",
          "convergence": "Expanded NPV against paths (error bars: one standard error)"}
CAPTIONS = {"cash_flow_fan": (
    "Percentiles 5, 25, 50, 75 and 95 of the yearly cash flow of the project as given (no "
    "right used, before tax) over the real-world valuing paths. Where a band lies below the "
    "zero line, at least that share of paths has a negative margin that year: below zero at "
    "the 5th percentile means more than one year in twenty loses money, at the median more "
    "than half."),
    "thresholds": (
    "The driver's level at which each right is used, by date, read from the fitted policy with "
    "the other drivers at their medians. With cash flows paid at each year's end, using a right "
    "just after a payment earns nothing until the next one, so a threshold is highest just "
    "after a payment date and falls towards the next: the saw-tooth is the timing of the flows, "
    "not noise. Where the rule is one-sided at most dates, a far bound at a few dates in the "
    "tail of the paths (where the regression rests on few of them) is left out."),
    "chance_of_use": (
    "Solid lines follow the fitted policy on real-world paths (the chances to expect), dashed "
    "lines on the risk-neutral paths that value it. A switch's shares count the paths in each "
    "mode among all paths: before the investment is committed a path is in no mode yet, so the "
    "shares add up to the chance of having invested."),
    "convergence": (
    "The expanded NPV re-appraised at a sixteenth and a quarter of the file's paths (same "
    "seed; the full set of rights only, without the Shapley subsets, whose control variates "
    "the result also uses) beside the result itself (the rightmost point), each with one "
    "standard error. The "
    "fitted exercise policy is one feasible policy, so each value is low-biased: it should "
    "settle as paths grow, and a rise beyond the error bars means more paths would still add "
    "value.")}

CAPTIONS["decision_maps"] = (
    "The best action of the fitted policy from each state, between the 1st and 99th "
    "percentiles of the fitting paths at each date, the other drivers at their median. Dates: "
    + MAP_DATES + "; a date whose drivers are known (today) has no plane and is left out.")


def tornado_caption(s, a, f: Fmt) -> str:
    """What to read off the tornado, with the paths and the base it is measured from."""
    same = s.paths == s.result_paths
    return (
        "Each bar is the expanded NPV (left) or the flexibility value (right) with one input "
        "moved down (orange) or up (navy, hatched), every other input as in the file; the "
        "longest bars mark the inputs the value depends on most. The base and every moved copy "
        f"are valued with the full set of rights on {s.paths:,} paths (as many again fit the "
        f"policy, seed {s.seed})"
        + ("" if same else f", fewer than the result's {s.result_paths:,} to keep the report "
           "quick, so the base is valued again at those paths")
        + f": base expanded NPV {f.money(s.base_expanded)} (standard error "
        f"{f.money(s.base_expanded_se)}), flexibility value {f.money(s.base_flexibility)} "
        f"(standard error {f.money(s.base_flexibility_se)}); the result itself shows "
        f"{f.money(a.expanded_npv)}. Every copy draws the same random numbers as the base, so "
        "each bar is a difference taken path by path, and the whisker at its end is one "
        "standard error of that difference (the policy is fitted again for each copy; that "
        "refit adds a little low-biased noise the whisker does not count). A bar shorter than "
        "about two whiskers is not told apart from no change.")


def tornado_table(s) -> pd.DataFrame:
    """tornado.csv: one row an input, the moved values and the standard errors of their
    differences to the base, and the base (valued again at the tornado's paths)."""
    cols = ["input", "low_setting", "high_setting", "expanded_npv_low",
            "expanded_npv_low_se_of_difference", "expanded_npv_high",
            "expanded_npv_high_se_of_difference", "flexibility_value_low",
            "flexibility_value_low_se_of_difference", "flexibility_value_high",
            "flexibility_value_high_se_of_difference", "paths", "base_expanded_npv",
            "base_expanded_npv_se", "base_flexibility_value", "base_flexibility_value_se"]
    rows = [[r.input, r.low_setting, r.high_setting, r.expanded_low, r.expanded_low_se,
             r.expanded_high, r.expanded_high_se, r.flexibility_low, r.flexibility_low_se,
             r.flexibility_high, r.flexibility_high_se, s.paths, s.base_expanded,
             s.base_expanded_se, s.base_flexibility, s.base_flexibility_se] for r in s.rows]
    return pd.DataFrame(rows, columns=cols)


def tornado_cells(s):
    """(label, [(value, is a standard error)]) of the report's tornado table."""
    return [(f"{r.input} ({r.low_setting} / {r.high_setting})",
             [r.expanded_low, r.expanded_low_se, r.expanded_high, r.expanded_high_se,
              r.flexibility_low, r.flexibility_low_se, r.flexibility_high,
              r.flexibility_high_se]) for r in s.rows]


TORNADO_HEAD = ["Input moved (down / up)", "Expanded NPV down", "+-", "up", "+-",
                "Flexibility value down", "+-", "up", "+-"]


def fig_tornado(s, f: Fmt):
    """Bars from the base to the moved values, whiskers +- one standard error of the
    difference at the bar ends; a grey band +- the base's own standard error."""
    from matplotlib.patches import Patch

    rows = list(s.rows)
    fig = _fig(max(2.4, 0.36 * len(rows) + 1.3))
    axes = fig.subplots(1, 2, sharey=True)
    y = np.arange(len(rows))[::-1]
    labels = [textwrap_label(f"{r.input} ({r.low_setting} / {r.high_setting})", 34)
              for r in rows]
    down, up = "#e3a33b", "#4a6fa5"
    for ax, base, base_se, key, title in (
            (axes[0], s.base_expanded, s.base_expanded_se, "expanded", "Expanded NPV"),
            (axes[1], s.base_flexibility, s.base_flexibility_se, "flexibility",
             "Flexibility value")):
        for yy, r in zip(y, rows):
            lo, hi = getattr(r, f"{key}_low"), getattr(r, f"{key}_high")
            bars = [(lo, getattr(r, f"{key}_low_se"), {"color": down}),
                    (hi, getattr(r, f"{key}_high_se"), {"color": up, "hatch": "//",
                                                         "edgecolor": "white",
                                                         "linewidth": 0})]
            bars.sort(key=lambda b: -abs(b[0] - base))     # the shorter bar on top
            for end, se, look in bars:
                ax.barh(yy, end - base, left=base, height=0.62, zorder=3, **look)
            for end, se, _ in bars:
                if se > 0:
                    ax.errorbar(end, yy, xerr=se, color="black", capsize=2.5, lw=0.8,
                                zorder=5)
        if base_se > 0:
            ax.axvspan(base - base_se, base + base_se, color="#d9d9d9", zorder=1, lw=0)
        ax.axvline(base, color="black", linewidth=0.9, zorder=4)
        at = (f"\nat {s.paths:,} paths" if s.paths != s.result_paths else "")
        ax.set_title(f"{title} (base {f.money(base)}{at})", fontsize=8, loc="left")
        ax.set_xlabel(f.unit_label, fontsize=7)
        ax.tick_params(labelsize=6.5)
    axes[0].set_yticks(y, labels, fontsize=6.5)
    fig.legend(handles=[Patch(color=down, label="input moved down"),
                        Patch(facecolor=up, hatch="//", edgecolor="white",
                              label="input moved up"),
                        Patch(color="#d9d9d9", label="base +- one standard error")],
               loc="outside lower right", ncols=3, fontsize=6.5)
    return fig


def convergence(a) -> list | None:
    """[(paths, expanded NPV, standard error)] at paths/16, paths/4 and the result's own paths
    (the last point is the result's, bit for bit); None when the file cannot be copied or
    fewer than two points can be appraised. Points below the loader's fewest paths are left
    out. The smaller runs value the full set of rights only (simulation.quick: the same
    set-up, streams and estimate as the appraisal, without its Shapley subsets)."""
    from ..errors import RealoptError
    from ..simulation.quick import path_values
    from .sensitivity import Copier

    n = a.simulation.paths
    cp = Copier(a.project)
    if cp.route is None:
        return None
    pts = []
    for d in CONVERGENCE_FRACTIONS:
        m = n // d
        if m < 2:
            continue
        try:
            b = path_values(cp({"simulation.paths": m}))
        except RealoptError:
            continue
        pts.append((b.paths, *b.estimate()["expanded_npv"]))
    pts.append((n, a.expanded_npv, a.standard_error["expanded_npv"]))
    return pts if len(pts) >= 2 else None


def fig_convergence(pts, f: Fmt):
    n, v, e = (np.array(c, dtype=float) for c in zip(*pts))
    fig = _fig(2.6)
    ax = fig.add_subplot(1, 1, 1)
    ax.errorbar(n, v, yerr=e, fmt="o-", color="#4a6fa5", capsize=3)
    ax.set_xscale("log")
    ax.set_xticks(n, [f"{int(k):,}" for k in n])           # the path counts, as a reader counts
    ax.minorticks_off()
    ax.set_xlabel("paths (to fit the policy; as many again value it)", fontsize=7)
    ax.set_ylabel(f"expanded NPV ({f.unit_label}, today)", fontsize=7)
    ax.tick_params(which="both", labelsize=6)
    return fig


# ------------------------------------------------------------------------ tables
def value_rows(a):
    """(item, value, standard error or None) of the value table, top to bottom."""
    se = a.standard_error
    rows = [("Present value of the operating project", a.present_value, se["present_value"]),
            ("Investment (present value)", -a.investment_pv, None),
            ("Static NPV", a.static_npv, se["present_value"])]
    rows += [(f"{r.name} ({r.type}), Shapley share", r.shapley_value, r.shapley_standard_error)
             for r in a.rights]
    # the Shapley shares add up to the flexibility value: the interaction between the rights
    # belongs beside the values alone (the rights table), not in this column
    rows += [("Flexibility value", a.flexibility_value, se["flexibility_value"]),
             ("Expanded NPV", a.expanded_npv, se["expanded_npv"])]
    return rows


def right_rows(a):
    """(right, type, standalone, its se, Shapley share, its se)."""
    return [(r.name, r.type, r.standalone_value, r.standalone_standard_error, r.shapley_value,
             r.shapley_standard_error) for r in a.rights]


INTERACTION = "Interaction between the rights"   # flexibility less the values alone


def csv_tables(a, sens=None) -> dict:
    t = {"value_bridge": pd.DataFrame(value_rows(a),
                                      columns=["item", "value", "standard_error"]),
         "rights": pd.DataFrame(right_rows(a), columns=[
             "right", "type", "standalone_value", "standalone_standard_error",
             "shapley_value", "shapley_standard_error"])}
    t["rights"].loc[len(t["rights"])] = [INTERACTION, "", a.interaction, None, None, None]
    rows = []
    for r in a.rights:
        for k, y in enumerate(r.use_years):
            row = {"right": r.name, "year": y, "chance_real_world": r.use_real_world[k],
                   "chance_risk_neutral": r.use_risk_neutral[k]}
            for m, (rn, rw) in (r.mode_shares or {}).items():
                row[f"share_{m}_risk_neutral"] = rn[k]
                row[f"share_{m}_real_world"] = rw[k]
            rows.append(row)
    t["chance_of_use"] = pd.DataFrame(rows)
    fan = {"year": a.fan_years}
    for d, qs in a.fan.items():
        for q, v in qs.items():
            fan[f"{d}_p{q}"] = v
    t["fan"] = pd.DataFrame(fan)
    t["real_world_dcf"] = pd.DataFrame([a.real_world_dcf])
    t["warnings"] = pd.DataFrame({"warning": list(a.warnings)})
    if sens is not None:
        t["tornado"] = tornado_table(sens)
    return t


# ------------------------------------------------------------------------ figures
def _fig(h, w=7.0):
    from matplotlib.figure import Figure

    return Figure(figsize=(w, h), layout="constrained")


def fig_bridge(a, f: Fmt):
    rows = [("Static NPV", a.static_npv, a.standard_error["present_value"])]
    rows += [(r.name, r.shapley_value, r.shapley_standard_error) for r in a.rights]
    rows += [("Expanded NPV", a.expanded_npv, a.standard_error["expanded_npv"])]
    alone = {r.name: r.standalone_value for r in a.rights}
    fig = _fig(3.6)
    ax = fig.add_subplot()
    base, x = 0.0, np.arange(len(rows))
    for k, (name, v, e) in enumerate(rows):
        total = k in (0, len(rows) - 1)
        bottom = 0.0 if total else base
        colour = "#4a6fa5" if total else ("#5a9e6f" if v >= 0 else "#c0504d")
        ax.bar(k, v, bottom=bottom, color=colour, width=0.6)
        top = bottom + v
        if e:
            ax.errorbar(k, top, yerr=e, color="black", capsize=4, lw=1)
        label = f.money(v) if total else f"{f.money(v)}\n(alone {f.money(alone[name])})"
        ax.annotate(label, (k, max(top, bottom)), ha="center", va="bottom", fontsize=7,
                    xytext=(0, 3), textcoords="offset points")
        base = top if not total else v
    ax.axhline(0, color="grey", lw=0.8)
    ax.use_sticky_edges = False               # a floating bar's base must not clip the axis
    ax.margins(y=0.16)                        # room for the two-line labels above the bars
    ax.set_xticks(x, [textwrap_label(n) for n, _, _ in rows], fontsize=7)
    ax.set_ylabel(f"{f.unit_label} (today)")
    ax.set_title("Static NPV, each right's Shapley share, expanded NPV (+- one standard error)",
                 fontsize=9)
    return fig


def textwrap_label(s: str, width: int = 16) -> str:
    import textwrap

    return "\n".join(textwrap.wrap(s, width)) or s


def fig_maps(a):
    """One row per state, one panel per date; colours index the state's actions. A date where
    the grid has no spread (today: the drivers are known) is left out of the figure."""
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Patch

    maps = [m for m in a.driver_maps
            if np.ptp(np.asarray(m.x_values)) > 0 and np.ptp(np.asarray(m.y_values)) > 0]
    states = list(dict.fromkeys(m.state for m in maps))
    ncol = max(sum(m.state == s for m in maps) for s in states)
    fig = _fig(2.5 * len(states) + 0.5)
    colours = ["#d9d9d9", "#4a6fa5", "#e3a33b", "#5a9e6f", "#c0504d", "#8064a2"]
    grid = fig.add_gridspec(len(states), ncol + 1, width_ratios=[1] * ncol + [1.1])
    for i, s in enumerate(states):
        row = [m for m in maps if m.state == s]
        for j, m in enumerate(row):
            ax = fig.add_subplot(grid[i, j])
            n = len(m.actions)
            ax.pcolormesh(np.asarray(m.x_values), np.asarray(m.y_values), m.codes,
                          cmap=ListedColormap(colours[:n]), vmin=-0.5, vmax=n - 0.5,
                          shading="nearest")
            ax.set_title(f"year {round(m.year, 2):g}", fontsize=7)
            ax.set_xlabel(m.x_driver, fontsize=7)
            ax.set_ylabel(m.y_driver if j == 0 else "", fontsize=7)
            ax.tick_params(labelsize=6)
        key = fig.add_subplot(grid[i, ncol])
        key.axis("off")
        handles = [Patch(color=colours[k], label=textwrap_label(act, 30))
                   for k, act in enumerate(row[0].actions)]
        others = "\n".join(f"{k} at its median" for k in row[0].others)
        key.legend(handles=handles, fontsize=6, loc="center left",
                   title=textwrap_label(f"from: {s}", 30) + (f"\n{others}" if others else ""),
                   title_fontsize=6)
    fig.suptitle("Best action by driver values (fitted policy), drivers in the file's units",
                 fontsize=9)
    return fig


def fig_thresholds(a):
    """Exercise thresholds in the one stochastic driver's units, one panel per right."""
    from matplotlib.ticker import FuncFormatter

    rights = [r for r in a.rights if r.thresholds]
    fig = _fig(2.4 * len(rights) + 0.4)
    for i, r in enumerate(rights):
        ax = fig.add_subplot(len(rights), 1, i + 1)
        keys = list(dict.fromkeys((t.state, t.action) for t in r.thresholds))
        for k, (state, action) in enumerate(keys):
            ts = [t for t in r.thresholds if (t.state, t.action) == (state, action)
                  and not t.never]
            y = [t.year for t in ts]
            lo = [np.nan if t.lower is None else t.lower for t in ts]
            hi = [np.nan if t.upper is None else t.upper for t in ts]
            c = ["#4a6fa5", "#c0504d", "#5a9e6f", "#e3a33b"][k % 4]
            d = r.thresholds[0].driver
            if not np.all(np.isnan(lo)):
                ax.plot(y, lo, color=c, marker="o", ms=3,
                        label=f"{action} from {state} when {d} is above the line")
            if not np.all(np.isnan(hi)):
                ax.plot(y, hi, color=c, ls="--", marker="o", ms=3,
                        label=f"{action} from {state} when {d} is below the line")
        ax.set_ylabel(r.thresholds[0].driver, fontsize=7)
        ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:,.6g}"))    # 14,000
        ax.set_title(r.name, fontsize=8)
        ax.legend(fontsize=6, loc="best")
        ax.tick_params(labelsize=6)
    fig.axes[-1].set_xlabel("years from today", fontsize=7)
    return fig


def fig_chance(a):
    rights = list(a.rights)
    fig = _fig(2.4 * len(rights) + 0.4)
    for i, r in enumerate(rights):
        ax = fig.add_subplot(len(rights), 1, i + 1)
        y = np.asarray(r.use_years)
        label = ("switched at least once" if r.mode_shares is not None else
                 "invested by this date" if RIGHT_TYPES[r.type].commits else
                 "exercised by this date")
        ax.plot(y, r.use_real_world, color="#4a6fa5", label=f"{label}, real-world")
        ax.plot(y, r.use_risk_neutral, color="#4a6fa5", ls="--",
                label=f"{label}, risk-neutral")
        for k, (m, (rn, rw)) in enumerate((r.mode_shares or {}).items()):
            c = ["#5a9e6f", "#e3a33b", "#c0504d", "#8064a2"][k % 4]
            ax.plot(y, rw, color=c, label=f"share in '{m}', real-world")
            ax.plot(y, rn, color=c, ls="--", label=f"share in '{m}', risk-neutral")
        ax.set_ylim(-0.02, 1.02)
        ax.set_ylabel("chance", fontsize=7)
        ax.set_title(r.name, fontsize=8)
        if r.mode_shares:            # six lines: the legend beside the panel, off the curves
            ax.legend(fontsize=6, loc="upper left", bbox_to_anchor=(1.01, 1.0))
        else:
            ax.legend(fontsize=6, loc="best")
        ax.tick_params(labelsize=6)
    fig.axes[-1].set_xlabel("years from today", fontsize=7)
    return fig


def fig_fan(a):
    names = list(a.fan)
    fig = _fig(2.2 * len(names) + 0.3)
    y = np.asarray(a.fan_years)
    for i, d in enumerate(names):
        q = a.fan[d]
        ax = fig.add_subplot(len(names), 1, i + 1)
        ax.fill_between(y, q[5], q[95], color="#4a6fa5", alpha=0.2, label="5-95th percentile")
        ax.fill_between(y, q[25], q[75], color="#4a6fa5", alpha=0.4, label="25-75th percentile")
        ax.plot(y, q[50], color="#4a6fa5", label="median")
        ax.set_ylabel(d, fontsize=7)
        ax.tick_params(labelsize=6)
        ax.legend(fontsize=6, loc="upper left")
    fig.axes[-1].set_xlabel("years from today", fontsize=7)
    return fig


def fig_cash_flow_fan(a):
    """Percentiles of the base state's yearly cash flow at the fan's dates (NaN: no flow)."""
    q = a.cash_flow_fan
    y = np.asarray(a.fan_years)
    ok = np.isfinite(q[50])
    fig = _fig(2.6)
    ax = fig.add_subplot(1, 1, 1)
    ax.fill_between(y[ok], q[5][ok], q[95][ok], color="#a5674a", alpha=0.2,
                    label="5-95th percentile")
    ax.fill_between(y[ok], q[25][ok], q[75][ok], color="#a5674a", alpha=0.4,
                    label="25-75th percentile")
    ax.plot(y[ok], q[50][ok], color="#a5674a", label="median")
    ax.axhline(0.0, color="black", lw=0.8)
    ax.set_ylabel(f"cash flow per year ({a.project.currency} {a.project.unit})", fontsize=7)
    ax.set_xlabel("years from today", fontsize=7)
    ax.tick_params(labelsize=6)
    ax.legend(fontsize=6, loc="upper left")
    return fig


def draw(a, f: Fmt, dpi: int, tornado=None) -> dict:
    """slug -> (PNG bytes, figure), each figure drawn once. ``tornado``: the
    :class:`sim_sensitivity.Pending` tornado (waited for when its figure comes), or None."""
    sens = [None]
    makers = {"value_bridge": lambda: fig_bridge(a, f), "decision_maps": lambda: fig_maps(a),
              "thresholds": lambda: fig_thresholds(a),
              "chance_of_use": lambda: fig_chance(a), "fan": lambda: fig_fan(a),
              "cash_flow_fan": lambda: fig_cash_flow_fan(a),
              "tornado": lambda: fig_tornado(sens[0], f),
              "convergence": lambda: fig_convergence(conv, f)}
    conv = convergence(a)
    out = {}
    for slug in FIGURES:
        if slug == "tornado":
            sens[0] = tornado.result() if tornado is not None else None
            if sens[0] is None or not sens[0].rows:
                continue
        if slug == "decision_maps" and not any(
                np.ptp(np.asarray(m.x_values)) > 0 for m in a.driver_maps):
            continue
        if slug == "thresholds" and not any(r.thresholds for r in a.rights):
            continue
        if slug == "chance_of_use" and not a.rights:
            continue
        if slug == "fan" and not a.fan:
            continue
        if slug == "cash_flow_fan" and not np.isfinite(
                np.asarray(a.cash_flow_fan.get(50, [np.nan]))).any():
            continue
        if slug == "convergence" and conv is None:
            continue
        fig = makers[slug]()
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=dpi)
        out[slug] = (buf.getvalue(), fig)
    return out


# ------------------------------------------------------------------------ text
def dcf_sentence(a, f: Fmt) -> str:
    rw = a.real_world_dcf
    return (f"The DCF of the real-world expected base flows at the discount rate is "
            f"{f.money(rw['value'])} (standard error {f.money(rw['standard_error'])}), beside "
            f"the risk-neutral present value of {f.money(a.present_value)}: the difference is "
            "the price of the drivers' risk, charged one way by the single discount rate and "
            "another by the risk-neutral description (forward curves, risk premia); the values "
            "of the rights rest on the risk-neutral one.")


def bound_sentence(a, f: Fmt) -> str:
    """What the dual upper bound says, in one sentence (empty without a bound)."""
    ub = a.upper_bound
    if not ub:
        return ""
    share = ub.get("gap_share")
    return (f"The value of the best exercise policy lies between the expanded NPV "
            f"({f.money(a.expanded_npv)}, the fitted policy's value, low-biased) and the dual "
            f"upper bound ({f.money(ub['value'])}), within their standard errors: a gap of "
            f"{f.money(ub['gap'])}" + (f", {100 * share:.1f}% of the flexibility value"
                                        if share is not None else "")
            + ". A small gap means the fitted rules are close to the best; a large one, that "
            f"more paths or a richer basis may add value (nested simulation, "
            f"{ub['paths']:,} outer x {ub['inner']:,} inner paths; Andersen & Broadie 2004).")


def sim_sentence(a) -> str:
    s = a.simulation
    return (f"Least-squares Monte Carlo: {s.paths:,} paths fit the policy and as many "
            f"independent paths value it (seed {s.seed}); {s.dates} dates, "
            f"{s.decision_dates} with a decision; {s.regression_terms} regression terms; "
            f"{s.states} states.")


def _e(x) -> str:
    return html.escape(str(x), quote=True)


def _td(x, f: Fmt) -> str:
    if x is None:
        return "<td></td>"
    return f'<td class="num" data-value="{float(x)!r}">{_e(f.money(x))}</td>'


def _se(e, f: Fmt) -> str:
    """A standard error as shown: "exact" for a value in closed form (0), else the money."""
    return "exact" if e is not None and e == 0 else f.money(e)


def _td_se(e, f: Fmt) -> str:
    if e is None:
        return "<td></td>"
    return f'<td class="num" data-value="{float(e)!r}">{_e(_se(e, f))}</td>'


def _img(png: bytes, alt: str) -> str:
    return (f'<figure><img alt="{_e(alt)}" style="max-width:100%" '
            f'src="data:image/png;base64,{base64.b64encode(png).decode()}"></figure>')


def render_html(a, f: Fmt, pngs, sens=None) -> str:
    p = a.project
    h = [f"<!DOCTYPE html><html><head><meta charset='utf-8'><title>{_e(p.name)}</title>",
         "<style>body{font-family:sans-serif;max-width:60em;margin:auto}"
         "td.num{text-align:right}table{border-collapse:collapse}td,th{padding:2px 8px;"
         "border-bottom:1px solid #ccc}.caution{border:1px solid #999;padding:6px}"
         "@page{size:A4;margin:15mm}</style></head><body>",
         f"<h1>{_e(p.name)}</h1>", f'<p class="caution">{_e(CAUTION_SIMULATION)}</p>']
    for w in a.headline_warnings:
        h.append(f"<p><strong>Warning:</strong> {_e(w)}</p>")
    h.append(f"<p>{_e(a.base)}. Money in {_e(f.unit_label)}, valued today.</p>")
    h.append("<h2>Values</h2><table><tr><th>Item</th><th>Value</th>"
             "<th>Standard error</th></tr>")
    for item, v, e in value_rows(a):
        h.append(f"<tr><td>{_e(item)}</td>{_td(v, f)}{_td_se(e, f)}</tr>")
    h.append("</table>")
    if a.upper_bound:
        h.append("<table><tr><td>Dual upper bound on the expanded NPV</td>"
                 f"{_td(a.upper_bound['value'], f)}{_td(a.upper_bound['standard_error'], f)}"
                 f"</tr></table><p>{_e(bound_sentence(a, f))}</p>")
    h.append(f"<p><strong>Decision today:</strong> {_e(a.decision_today)}</p>")
    h.append("<h2>Rights</h2><table><tr><th>Right</th><th>Type</th><th>Standalone</th>"
             "<th>Standard error</th><th>Shapley share</th><th>Standard error</th></tr>")
    for name, typ, sv, se, sh, she in right_rows(a):
        h.append(f"<tr><td>{_e(name)}</td><td>{_e(typ)}</td>{_td(sv, f)}{_td(se, f)}"
                 f"{_td(sh, f)}{_td(she, f)}</tr>")
    h.append(f"<tr><td>{INTERACTION}</td><td></td>{_td(a.interaction, f)}<td></td><td></td>"
             "<td></td></tr>")
    h.append("</table><h2>When to use each right</h2><ul>")
    h += [f"<li>{_e(r.rule)}</li>" for r in a.rights]
    h.append("</ul><h2>Risk-neutral value and the real-world DCF</h2>")
    h.append("<table><tr><td>Real-world DCF of the base flows</td>"
             f"{_td(a.real_world_dcf['value'], f)}{_td(a.real_world_dcf['standard_error'], f)}"
             f"</tr><tr><td>Risk-neutral present value</td>{_td(a.present_value, f)}"
             f"{_td_se(a.standard_error['present_value'], f)}</tr></table>")
    h.append(f"<p>{_e(dcf_sentence(a, f))}</p><h2>Figures</h2>")
    for slug, (png, _) in pngs.items():
        h.append(f"<h3>{_e(TITLES[slug])}</h3>{_img(png, TITLES[slug])}")
        if slug in CAPTIONS:
            h.append(f"<p>{_e(CAPTIONS[slug])}</p>")
        if slug == "tornado":
            h.append(f"<p>{_e(tornado_caption(sens, a, f))}</p>")
            h.append("<table><tr>" + "".join(f"<th>{_e(x)}</th>" for x in TORNADO_HEAD)
                     + "</tr>")
            for label, vals in tornado_cells(sens):
                h.append(f"<tr><td>{_e(label)}</td>" + "".join(_td(v, f) for v in vals)
                         + "</tr>")
            h.append("</table>")
    h += [f"<p>{_e(x)}</p>" for x in sens_notes(sens, a)]
    h.append(f"<p>{_e(sim_sentence(a))}</p>")
    if a.warnings:
        h.append("<h2>Warnings</h2><ul>" + "".join(f"<li>{_e(w)}</li>" for w in a.warnings)
                 + "</ul>")
    h.append(f'<p class="caution">{_e(CAUTION_SIMULATION)}</p></body></html>')
    return "\n".join(h) + "\n"


def render_markdown(a, f: Fmt, pngs, sens=None) -> str:
    p = a.project
    m = [f"# {p.name}", "", f"> {CAUTION_SIMULATION}", ""]
    m += [f"**Warning:** {w}\n" for w in a.headline_warnings]
    m += [f"{a.base}. Money in {f.unit_label}, valued today.", "", "## Values", "",
          "| Item | Value | Standard error |", "|---|---:|---:|"]
    m += [f"| {i} | {f.money(v)} | {_se(e, f)} |" for i, v, e in value_rows(a)]
    if a.upper_bound:
        m += [f"| Dual upper bound on the expanded NPV | {f.money(a.upper_bound['value'])} | "
              f"{f.money(a.upper_bound['standard_error'])} |", "", bound_sentence(a, f)]
    m += ["", f"**Decision today:** {a.decision_today}", "", "## Rights", "",
          "| Right | Type | Standalone | Standard error | Shapley share | Standard error |",
          "|---|---|---:|---:|---:|---:|"]
    m += [f"| {n} | {t} | {f.money(sv)} | {f.money(se)} | {f.money(sh)} | {f.money(she)} |"
          for n, t, sv, se, sh, she in right_rows(a)]
    m += [f"| {INTERACTION} |  | {f.money(a.interaction)} |  |  |  |"]
    m += ["", "## When to use each right", ""] + [f"- {r.rule}" for r in a.rights]
    m += ["", "## Risk-neutral value and the real-world DCF", "", dcf_sentence(a, f), "",
          "## Figures", ""]
    for s in pngs:
        m += [f"![{TITLES[s]}](figures/{s}.png)\n"] + ([CAPTIONS[s], ""] if s in CAPTIONS else [])
        if s == "tornado":
            m += [tornado_caption(sens, a, f), "", "| " + " | ".join(TORNADO_HEAD) + " |",
                  "|---" + "|---:" * (len(TORNADO_HEAD) - 1) + "|"]
            m += [f"| {label} | " + " | ".join(f.money(v) for v in vals) + " |"
                  for label, vals in tornado_cells(sens)]
            m += [""]
    for x in sens_notes(sens, a):
        m += [x, ""]
    m += [sim_sentence(a), ""]
    if a.warnings:
        m += ["## Warnings", ""] + [f"- {w}" for w in a.warnings] + [""]
    m += [f"> {CAUTION_SIMULATION}", ""]
    return "\n".join(m)


def write_pdf(a, f: Fmt, pngs, path: Path, sens=None) -> list:
    """A4 pages: the text (caution first), one page per figure, the caution last."""
    import textwrap

    from matplotlib.backends.backend_pdf import PdfPages
    from matplotlib.figure import Figure

    pages = []
    A4 = (8.27, 11.69)
    lines = textwrap.wrap(CAUTION_SIMULATION, 95) + [""]
    lines += [f"Warning: {x}" for w in a.headline_warnings for x in textwrap.wrap(w, 95)]
    lines += [a.project.name, f"Money in {f.unit_label}, valued today.", ""]
    lines += [f"{i[:58]:<60}{f.money(v):>14}  "
              + ("(exact)" if e == 0 else f"+- {f.money(e)}" if e is not None else "")
              for i, v, e in value_rows(a)]
    if a.upper_bound:
        lines += [f"{'Dual upper bound on the expanded NPV':<60}"
                  f"{f.money(a.upper_bound['value']):>14}  +- "
                  f"{f.money(a.upper_bound['standard_error'])}"]
        lines += textwrap.wrap(bound_sentence(a, f), 95)
    lines += ["", "Standalone value of each right (alone on the static project):"]
    lines += [f"  {n[:56]:<58}{f.money(sv):>14}  +- {f.money(se)}"
              for n, _, sv, se, _, _ in right_rows(a)]
    lines += [f"  {INTERACTION:<58}{f.money(a.interaction):>14}"]
    lines += [""] + textwrap.wrap(f"Decision today: {a.decision_today}", 95) + [""]
    for r in a.rights:
        lines += textwrap.wrap(f"- {r.rule}", 95)
    lines += [""] + textwrap.wrap(dcf_sentence(a, f), 95) + [""]
    if sens is not None and sens.rows:
        lines += textwrap.wrap("Sensitivity: each input moved down / up, the values with +- one "
                               "standard error of the difference to the base:", 95)
        for label, v in tornado_cells(sens):
            pm = [f"{f.money(v[k])} +- {f.money(v[k + 1])}" for k in range(0, 8, 2)]
            lines += textwrap.wrap(label, 93, initial_indent="  ", subsequent_indent="    ")
            lines += [f"      expanded NPV {pm[0]:>17} / {pm[1]:<17}  flexibility "
                      f"{pm[2]:>17} / {pm[3]}"]
        lines += [""] + textwrap.wrap(tornado_caption(sens, a, f), 95) + [""]
    for x in sens_notes(sens, a):
        lines += textwrap.wrap(x, 95)
    lines += textwrap.wrap(sim_sentence(a), 95)
    with PdfPages(path) as pdf:
        per_page = 72
        for start in range(0, len(lines), per_page):          # text runs on, never cut
            fig = Figure(figsize=A4)
            for k, line in enumerate(lines[start:start + per_page]):
                fig.text(0.06, 0.95 - k * 0.0125, line, fontsize=7, family="monospace",
                         va="top")
            pdf.savefig(fig)
            pages.append("Values and rules" if start == 0 else "Values and rules (cont.)")
        for slug, (_, fg) in pngs.items():
            pdf.savefig(fg)
            pages.append(TITLES[slug])
        fig = Figure(figsize=A4)
        for k, line in enumerate(textwrap.wrap(CAUTION_SIMULATION, 95)):
            fig.text(0.06, 0.95 - k * 0.0125, line, fontsize=7, family="monospace", va="top")
        pdf.savefig(fig)
        pages.append("Caution")
    return pages


def sens_notes(sens, a) -> list[str]:
    """The sentences beside the tornado: what was not moved, or why there is no tornado."""
    from .sim_sensitivity import why_not

    if sens is None:
        return [why_not(a)]
    out = [f"Moves: {sens.describe_moves()}."] + list(sens.notes)
    if not sens.rows:
        out.insert(0, "No tornado is drawn: the project has no input to move.")
    return out


def write_all(a, tmp: Path, dpi: int, xlsx, source, marker: str, moves=None) -> None:
    """Write every file of the simulation report into ``tmp`` (the caller renames it).
    ``moves``: the tornado's moves (default :data:`sensitivity.DEFAULT_MOVES`)."""
    from ..jsontext import to_json
    from .sensitivity import DEFAULT_MOVES
    from .sim_sensitivity import start

    f = Fmt(a.project)
    with start(a, moves or DEFAULT_MOVES) as pending:   # its copies run while others draw
        pngs = draw(a, f, dpi, pending)
        sens = pending.result()
    (tmp / "figures").mkdir()
    for slug, (png, _) in pngs.items():
        (tmp / "figures" / f"{slug}.png").write_bytes(png)
    pages = write_pdf(a, f, pngs, tmp / "report.pdf", sens)
    tables = csv_tables(a, sens)
    from .report import write_tables

    write_tables(tmp, tables, xlsx)
    (tmp / "results.json").write_text(to_json(a.to_dict()) + "\n", encoding="utf-8")
    (tmp / "report.html").write_text(render_html(a, f, pngs, sens), encoding="utf-8")
    (tmp / "report.md").write_text(render_markdown(a, f, pngs, sens), encoding="utf-8")
    manifest = {"realopt": __version__, "project": a.project.name,
                "source": None if source is None else str(source),
                "figures": [s + ".png" for s in pngs], "tables": [t + ".csv" for t in tables],
                "xlsx": bool(xlsx), "pdf_pages": pages}
    (tmp / marker).write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
