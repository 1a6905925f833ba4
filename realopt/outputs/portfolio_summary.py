"""Markdown and HTML summaries of ``realopt portfolio`` (from its table and totals).

Amounts in the projects' money, valued today, two decimals (``tables.Fmt.money``). Both carry
the caution. With a simulation project the table shows the method and each value's standard
error (0 on the lattice), and a sentence names the choices the simulation does not settle
(``totals["close_calls"]``, realopt.portfolio.close_calls). The HTML page is self-contained (no scripts, no network) and marks each number cell
with its exact value (``data-value``), as the report does.
"""
from __future__ import annotations

import html

from .. import CAUTION
from .tables import Fmt

_COLUMNS = (("project", "Project", False), ("method", "Valued by", False),
            ("expanded_npv", "Expanded NPV", True),
            ("expanded_npv_se", "Standard error", True),
            ("commit_now_value", "Value if committed today", True),
            ("commit_now_se", "Standard error", True),
            ("keep_option_value", "Value of keeping the option", True),
            ("keep_option_se", "Standard error", True),
            ("outlay_today", "Outlay today", True),
            ("value_per_outlay", "Expanded NPV per unit of outlay", True),
            ("decision_without_budget", "Best decision, no budget", False),
            ("decision_under_budget", "Decision within the budget", False))


def _cells(df):
    cols = [c for c in _COLUMNS if c[0] in df.columns]
    rows = []
    for _, r in df.iterrows():
        row = []
        for key, _, num in cols:
            x = r[key]
            if num:
                x = None if x is None or x != x else float(x)
                row.append((Fmt.money(x) if x is not None else "", x))
            else:
                row.append((str(x), None))
        rows.append(row)
    return cols, rows


def _totals_lines(totals, money):
    m = f" {money}" if money else ""
    out = [f"Sum of the best values without a budget: {Fmt.money(totals['value_without_budget'])}"
           f"{m}, paying out {Fmt.money(totals['outlay_without_budget'])}{m} today."]
    if totals.get("budget") is not None:
        out.append(f"Within today's budget of {Fmt.money(totals['budget'])}{m}: sum of values "
                   f"{Fmt.money(totals['value_under_budget'])}{m}, paying out "
                   f"{Fmt.money(totals['outlay_under_budget'])}{m} today. Value given up by the "
                   f"budget: {Fmt.money(totals['value_given_up'])}{m}.")
        out.append("The budgeted choice is exact: the largest sum of values over every "
                   "combination of decisions whose outlays today fit the budget.")
    close = totals.get("close_calls")
    if close is not None:
        budgeted = totals.get("budget") is not None
        if close["without_budget"] and not (budgeted and totals["value_given_up"] == 0):
            out.append(_close_sentence(close["without_budget"], "Without a budget", m))
        if budgeted and close["under_budget"]:
            out.append(_close_sentence(close["under_budget"], "Within the budget", m))
        if not close["without_budget"] and not close["under_budget"]:
            out.append("Every choice above is settled by the simulation: no other decision "
                       "comes within two standard errors of the one chosen.")
    return out


def _close_sentence(calls, head: str, m: str) -> str:
    """One sentence: the closest alternative to the chosen decisions (``calls`` closest first,
    realopt.portfolio.close_calls) and how many others are as close."""
    c = calls[0]
    moves = "; ".join(f"{name}: {new} instead of {old}" for name, new, old in c["changes"])
    more = len(calls) - 1
    tail = (f"; {more} other set{'s' if more > 1 else ''} of decisions "
            f"{'are' if more > 1 else 'is'} as close" if more else "")
    return (f"{head}, the simulation does not settle the choice: the decisions chosen (sum "
            f"{Fmt.money(c['chosen'])}{m}) and those with {moves} (sum "
            f"{Fmt.money(c['value'])}{m}) are within two standard errors of each other "
            f"(difference {Fmt.money(c['difference'])} +- {Fmt.money(c['se'])}{m}){tail}; "
            "more paths would separate them.")


_READ = ("Value if committed today: the expanded NPV when the project is committed now (its "
         "other rights kept). Value of keeping the option: the value of holding the right to "
         "wait, with no outlay today (projects with a defer right). Pass: value 0. Outlay today: "
         "the cash paid at year 0 on committing now.")
_READ_SIMULATION = (
    "Projects valued by simulation: each value is an estimate with its standard error; "
    "committing now and keeping the option are valued on the same paths with the same fitted "
    "policy, and the expanded NPV is the value of the decision that policy takes today. The "
    "decisions use the estimates as they stand.")


def _cautions(df) -> list[str]:
    """The caution of each method in the table (the lattice's alone for lattice projects)."""
    methods = set(df["method"]) if "method" in df.columns else {"lattice"}
    if "simulation" not in methods:
        return [CAUTION]
    from ..simulation.result import CAUTION_SIMULATION

    return ([CAUTION] if methods - {"simulation"} else []) + [CAUTION_SIMULATION]


def _read(df) -> str:
    return _READ + (" " + _READ_SIMULATION if "method" in df.columns else "")


def markdown_summary(df, totals, money: str = "", notes=()) -> str:
    cols, rows = _cells(df)
    lines = ["# Portfolio of projects", "",
             f"Amounts in {money or 'the projects’ money'}, valued today; rows sorted by "
             "expanded NPV per unit of today's outlay.", ""]
    lines.append("| " + " | ".join(c[1] for c in cols) + " |")
    lines.append("|" + "|".join("---:" if c[2] else "---" for c in cols) + "|")
    for row in rows:
        lines.append("| " + " | ".join(t.replace("|", "\\|") for t, _ in row) + " |")
    lines += [""] + _totals_lines(totals, money) + [""] + [_read(df)] + [""]
    lines += [f"Note: {n}" for n in notes] + ([""] if notes else [])
    for c in _cautions(df):
        lines += [c, ""]
    return "\n".join(lines)


def html_summary(df, totals, money: str = "", notes=()) -> str:
    cols, rows = _cells(df)
    e = html.escape
    head = "".join(f"<th>{e(c[1])}</th>" for c in cols)
    body = []
    for row in rows:
        tds = []
        for (text, value), c in zip(row, cols):
            if c[2] and value is not None:
                tds.append(f'<td class="num" data-value="{value!r}">{e(text)}</td>')
            elif c[2]:
                tds.append('<td class="num"></td>')
            else:
                tds.append(f"<td>{e(text)}</td>")
        body.append("<tr>" + "".join(tds) + "</tr>")
    paras = "".join(f"<p>{e(t)}</p>" for t in _totals_lines(totals, money))
    note = "".join(f"<p class=\"note\">Note: {e(n)}</p>" for n in notes)
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>Portfolio of projects</title>
<style>
body {{ font-family: "DejaVu Sans", Arial, sans-serif; color: #222; max-width: 60em;
       margin: 2em auto; padding: 0 1em; font-size: 10.5pt; }}
table {{ border-collapse: collapse; width: 100%; }}
th, td {{ border-bottom: 1px solid #ddd; padding: 0.3em 0.5em; text-align: left;
          vertical-align: top; }}
th {{ border-bottom: 2px solid #6b6b6b; }}
td.num {{ text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }}
.caution {{ border-left: 3px solid #c2661c; padding-left: 0.8em; color: #444; }}
</style></head><body>
<h1>Portfolio of projects</h1>
<p>Amounts in {e(money or "the projects' money")}, valued today; rows sorted by expanded NPV per
unit of today's outlay.</p>
<table><thead><tr>{head}</tr></thead><tbody>
{chr(10).join(body)}
</tbody></table>
{paras}
<p>{e(_read(df))}</p>
{note}
{"".join(f'<p class="caution">{e(c)}</p>' for c in _cautions(df))}
</body></html>
"""
