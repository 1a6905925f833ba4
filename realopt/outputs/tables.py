"""Tables of an appraisal (pandas DataFrames of raw values) and the one number formatter.

Every table is a selection of fields of the :class:`realopt.appraisal.Appraisal` (or of the
:class:`realopt.outputs.sensitivity.Sensitivity` run on it, or of the project's inputs): nothing is
recomputed here. CSVs keep full precision; the HTML, Markdown and PDF show the same values through
:class:`Fmt`, the only place numbers are turned into text for a reader.

Money is in the project's currency and unit, valued today; years from today; chances as shares
of 1 in the data, percentages on the page.
"""
from __future__ import annotations

import math

import pandas as pd

from ..rights.registry import RIGHT_TYPES
from .text import no_negative_zero  # noqa: F401  (re-exported for the writers)


def is_modal(r) -> bool:
    """Whether a right of the results (RightValue) moves between modes (a switch, a shutdown):
    asked of its registered type."""
    cls = RIGHT_TYPES.get(r.type)
    return bool(cls is not None and cls.modal)


def commits(r) -> bool:
    """Whether a right of the results is the commitment (a defer right), by its type."""
    cls = RIGHT_TYPES.get(r.type)
    return bool(cls is not None and cls.commits)


class Fmt:
    """Number formatting for one project: ``money`` (2 decimals, thousands separated, in the
    project's currency and unit as stated by ``unit_label``), ``pct``, ``year``."""

    def __init__(self, project):
        self.currency = project.currency
        self.unit = project.unit

    @property
    def unit_label(self) -> str:
        """'EUR million' (or 'money' when neither currency nor unit is given)."""
        return " ".join(s for s in (self.currency, self.unit) if s) or "money"

    @staticmethod
    def money(x) -> str:
        if x is None or (isinstance(x, float) and math.isnan(x)):
            return ""
        text = f"{x:,.2f}"
        return "0.00" if text == "-0.00" else text

    def money_unit(self, x) -> str:
        """'EUR 28.24 million'."""
        return " ".join(s for s in (self.currency, self.money(x), self.unit) if s)

    @staticmethod
    def pct(x, digits: int = 1) -> str:
        if x is None or (isinstance(x, float) and math.isnan(x)):
            return ""
        text = f"{x * 100:.{digits}f}%"
        return text[1:] if text.startswith("-") and float(text[:-1]) == 0 else text

    @staticmethod
    def year(x) -> str:
        return f"{x:.4g}"

    @staticmethod
    def number(x) -> str:
        """Plain number for tree factors and probabilities (6 significant digits)."""
        return f"{x:.6g}"


# --------------------------------------------------------------------------------------------
VALUE_COLUMN = "Value; Shapley share for each right"
ALONE_COLUMN = "Value of the right alone"


def value_bridge(a) -> pd.DataFrame:
    """The headline table: the Appraisal's own ``summary()``, its columns named for what they
    hold. Down ``value_or_shapley_share`` the rights add up to the flexibility value; down
    ``value_of_the_right_alone`` the rights plus the interaction between them do too."""
    return a.summary().reset_index().rename(columns={
        "value": "value_or_shapley_share", "standalone_value": "value_of_the_right_alone"})


def rights_table(a) -> pd.DataFrame:
    rows = []
    for r in a.rights:
        rows.append({
            "right": r.name, "type": r.type, "window_start": r.window[0],
            "window_end": r.window[1], "exercise": r.exercise,
            "standalone_value": r.standalone_value, "shapley_value": r.shapley_value,
            "threshold_side": r.side,
            "chance_of_use_real_world": r.use_real_world[-1] if r.use_real_world else None,
            "chance_of_use_risk_neutral": r.use_risk_neutral[-1] if r.use_risk_neutral else None,
            "chance_of_use_by_year": r.use_years[-1] if r.use_years else None,
            "chance_of_use_measure": r.use_measure, "rule": r.rule})
    return pd.DataFrame(rows)


def thresholds_table(a) -> pd.DataFrame:
    rows = [{"right": r.name, "year": t.year, "state": t.state, "action": t.action,
             "exercise_above": t.lower, "exercise_below": t.upper, "never": t.never}
            for r in a.rights for t in r.thresholds]
    return pd.DataFrame(rows, columns=["right", "year", "state", "action", "exercise_above",
                                       "exercise_below", "never"])


def chance_of_use_table(a) -> pd.DataFrame:
    rows = [{"right": r.name, "year": y, "real_world": rw, "risk_neutral": rn}
            for r in a.rights for y, rw, rn in zip(r.use_years, r.use_real_world,
                                                   r.use_risk_neutral)]
    return pd.DataFrame(rows, columns=["right", "year", "real_world", "risk_neutral"])


def mode_shares(r) -> dict:
    """A switch right's share of paths in each mode at its use_years: mode -> (risk-neutral,
    real-world) tuples; {} for other rights (and for results that do not carry them)."""
    return dict(getattr(r, "mode_shares", None) or {})


def mode_share_table(a) -> pd.DataFrame:
    """Share of paths in each mode of each switch right at each sampled date (the project
    operating); not the chance of having switched, which is in chance_of_use."""
    rows = [{"right": r.name, "mode": m, "year": y, "real_world": rw_k, "risk_neutral": rn_k}
            for r in a.rights for m, (rn, rw) in mode_shares(r).items()
            for y, rn_k, rw_k in zip(r.use_years, rn, rw)]
    return pd.DataFrame(rows, columns=["right", "mode", "year", "real_world", "risk_neutral"])


def mode_share_years(r) -> list[int]:
    """Indices into r.use_years of the sampled date nearest each whole year."""
    years = list(r.use_years)
    if not years:
        return []
    out = []
    for whole in range(1, int(math.floor(years[-1] + 1e-9)) + 1):
        k = min(range(len(years)), key=lambda i: abs(years[i] - whole))
        if k not in out:
            out.append(k)
    return out


def chance_by_year(a) -> pd.DataFrame:
    """Chance of use at the sampled date nearest each whole year (a selection, for the page)."""
    rows = []
    for r in a.rights:
        years = list(r.use_years)
        if not years:
            continue
        for whole in range(1, int(math.floor(years[-1] + 1e-9)) + 1):
            k = min(range(len(years)), key=lambda i: abs(years[i] - whole))
            rows.append({"right": r.name, "year": years[k], "real_world": r.use_real_world[k],
                         "risk_neutral": r.use_risk_neutral[k]})
    return pd.DataFrame(rows, columns=["right", "year", "real_world", "risk_neutral"])


def fan_table(a) -> pd.DataFrame:
    data = {"year": a.fan_years}
    for q in sorted(a.fan):
        data[f"p{q}"] = a.fan[q]
    data["expected_real_world"] = a.expected_real_world
    data["expected_risk_neutral"] = a.expected_risk_neutral
    return pd.DataFrame(data)


def lattice_table(a) -> pd.DataFrame:
    L = a.lattice
    rows = [("tree", L.tree), ("steps", L.steps), ("step_years", L.step_years),
            ("horizon_years", L.horizon), ("up", L.up), ("down", L.down),
            ("probability_risk_neutral", L.probability),
            ("probability_real_world", L.real_world_probability),
            ("compounding", L.compounding), ("states", L.states),
            ("volatility", a.volatility), ("volatility_stderr", a.volatility_stderr),
            ("volatility_method", a.volatility_method)]
    return pd.DataFrame(rows, columns=["key", "value"])


def lattice_rows(a, f: Fmt) -> list[tuple[str, str]]:
    """The lattice as (label, text) for the page."""
    L = a.lattice
    rows = [("Tree", L.tree), ("Steps", f"{L.steps}"),
            ("Step", f"{f.number(L.step_years)} years"), ("Horizon", f"{f.year(L.horizon)} years"),
            ("Up factor u", f.number(L.up)), ("Down factor d", f.number(L.down)),
            ("Up probability, risk-neutral", f.number(L.probability)),
            ("Up probability, real-world", f.number(L.real_world_probability)),
            ("Compounding", L.compounding), ("Project states", f"{L.states}")]
    if a.volatility is not None:
        vol = f.pct(a.volatility)
        if a.volatility_stderr is not None:
            vol += f" (standard error {f.pct(a.volatility_stderr, 2)})"
        rows.append(("Volatility (yearly)", vol))
    rows.append(("Volatility source", a.volatility_method))
    return rows


def _schedule_text(s, f: Fmt) -> str:
    if s is None:
        return "the investment plan, started at the exercise date"
    if s.start is not None:
        return f"{f.money(s.start)} growing {f.pct(s.growth)} a year"
    if s.is_constant:
        return f.money(s.points[0][1])
    return "; ".join(f"{f.money(v)} at year {f.year(y)}" for y, v in s.points)


def _window_text(r, f: Fmt) -> str:
    text = f"years {f.year(r.window[0])} to {f.year(r.window[1])}, {r.exercise}"
    if r.exercise == "bermudan":
        text += " on " + ", ".join(f.year(t) for t in r.dates)
    return text


def inputs_rows(project, f: Fmt) -> list[tuple[str, str, str]]:
    """The project's inputs and assumptions as (section, input, value text), echoed from the
    validated project (what the valuation used, overrides included)."""
    p, m, u = project, project.market, project.underlying
    rows = [("Project", "Name", p.name)]
    if p.source:
        rows.append(("Project", "File", str(p.source)))
    rows.append(("Project", "Money", f"{f.unit_label}, valued today"))
    rows += [("Market", "Risk-free rate", f"{f.pct(m.risk_free_rate, 2)} a year"),
             ("Market", "Discount rate (risk-adjusted)", f"{f.pct(m.discount_rate, 2)} a year"),
             ("Market", "Compounding", m.compounding)]
    if u.cash_flows:
        for y, c in u.cash_flows:
            rows.append(("Underlying", f"Expected cash flow, year {f.year(y)}", f.money(c)))
        if u.terminal_value:
            rows.append(("Underlying", "Terminal value (at the last year)",
                         f.money(u.terminal_value)))
        rows.append(("Underlying", "Cash-flow timing",
                     "each year's flow accrues evenly through that year"
                     if getattr(u, "flow_timing", "at_dates") == "spread"
                     else "each year's flow is paid at its date"))
    elif u.drivers is not None:
        d = u.drivers
        rows.append(("Underlying", "Cash-flow years", f"{d.years[0]} to {d.years[1]}"))
        rows.append(("Underlying", "Cash flow formula", d.cash_flow))
        for drv in d.drivers:
            rows.append(("Underlying", f"Driver '{drv.name}'", drv.process))
        if d.tax_rate:
            rows.append(("Underlying", "Tax rate", f.pct(d.tax_rate)))
    elif u.present_value is not None:
        rows.append(("Underlying", "Present value", f.money(u.present_value)))
        rows.append(("Underlying", "Payout yield (continuous)", f"{f.pct(u.payout_yield, 2)} a year"))
    if u.volatility_estimate is not None:
        rows.append(("Underlying", "Volatility", f"estimated ({u.volatility_estimate.method})"))
    elif u.volatility is not None:
        rows.append(("Underlying", "Volatility (yearly sigma of ln V)", f.pct(u.volatility)))
    for y, c in p.investment.outlays:
        rows.append(("Investment", f"Outlay at year {f.year(y)}", f.money(c)))
    lat = p.lattice
    if lat.explicit:
        rows.append(("Lattice", "Explicit factors", f"up {f.number(lat.up)}, down "
                     f"{f.number(lat.down)}, step {f.number(lat.step_years or 1.0)} years"))
    else:
        rows.append(("Lattice", "Steps per year", f"{lat.steps_per_year}"))
    for r in p.rights:
        sec = f"Right: {r.name}"
        rows.append((sec, "Type and window", f"{r.kind}; {_window_text(r, f)}"))
        rows += [(sec, k, v) for k, v in r.input_rows(f, _schedule_text)]   # the type's own
        if r.requires:
            rows.append((sec, "Requires", ", ".join(r.requires)))
        if r.excludes:
            rows.append((sec, "Excludes", ", ".join(r.excludes)))
    return rows


def inputs_table(project, f: Fmt) -> pd.DataFrame:
    return pd.DataFrame(inputs_rows(project, f), columns=["section", "input", "value"])


def sensitivity_table(s) -> pd.DataFrame:
    rows = [{"input": r.input, "low_setting": r.low_setting, "high_setting": r.high_setting,
             "expanded_npv_low": r.expanded_low, "expanded_npv_high": r.expanded_high,
             "flexibility_value_low": r.flexibility_low,
             "flexibility_value_high": r.flexibility_high} for r in s.rows]
    return pd.DataFrame(rows, columns=["input", "low_setting", "high_setting", "expanded_npv_low",
                                       "expanded_npv_high", "flexibility_value_low",
                                       "flexibility_value_high"])


def breakeven_table(s) -> pd.DataFrame:
    rows = [{"input": b.input, "today": b.today, "below": b.below,
             "decision_below": b.decision_below, "above": b.above,
             "decision_above": b.decision_above, "searched_from": b.searched[0],
             "searched_to": b.searched[1]} for b in s.breakevens]
    return pd.DataFrame(rows, columns=["input", "today", "below", "decision_below", "above",
                                       "decision_above", "searched_from", "searched_to"])


def breakeven_text(b, f: Fmt, decision_today: str) -> str:
    """One sentence per break-even, e.g. 'Volatility: today 30.0%; below 14.7% the decision
    becomes "invest now (...)"; no change up to 150.0%.'"""
    show = f.pct if b.unit == "sigma" else f.money_unit
    what = b.input if b.unit == "sigma" else f"{b.input} (present value)"
    parts = [f"{what}: today {show(b.today)} ({decision_today})"]
    if b.below is not None:
        parts.append(f"below {show(b.below)} the decision becomes \u201c{b.decision_below}\u201d")
    else:
        parts.append(f"no change down to {show(b.searched[0])}")
    if b.above is not None:
        parts.append(f"above {show(b.above)} it becomes \u201c{b.decision_above}\u201d")
    else:
        parts.append(f"no change up to {show(b.searched[1])}")
    return "; ".join(parts) + "."


def convergence_table(s) -> pd.DataFrame:
    c = s.convergence
    if c is None:
        return pd.DataFrame(columns=["steps_per_year", "expanded_npv", "chosen"])
    return pd.DataFrame({"steps_per_year": c.steps_per_year, "expanded_npv": c.expanded_npv,
                         "chosen": [n == c.chosen for n in c.steps_per_year]})


def warnings_table(a) -> pd.DataFrame:
    return pd.DataFrame({"warning": list(a.warnings)})


def csv_tables(a, s, f: Fmt) -> dict[str, pd.DataFrame]:
    """Every table written as CSV (and as a sheet of the workbook), by file stem."""
    return {
        "value_bridge": value_bridge(a),
        "rights": rights_table(a),
        "thresholds": thresholds_table(a),
        "chance_of_use": chance_of_use_table(a),
        **({"mode_shares": mode_share_table(a)} if any(mode_shares(r) for r in a.rights)
           else {}),
        "value_fan": fan_table(a),
        "sensitivity": sensitivity_table(s),
        "break_even": breakeven_table(s),
        "convergence": convergence_table(s),
        "lattice": lattice_table(a),
        "inputs": inputs_table(a.project, f),
        "warnings": warnings_table(a),
    }
