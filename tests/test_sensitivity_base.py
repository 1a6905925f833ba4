"""The sensitivity copies start from the appraisal's own base (realopt.outputs.sensitivity).

Every moved copy is made by the project loader (dotted keys on the raw tree, as ``--set``), so a
move of zero size must reproduce the appraisal's expanded NPV exactly (==), for the demos, for the
user projects in tests/user_projects/ (when that folder exists) and for generated projects of
every underlying form: cash flows, present value, drivers (analytic and simulated expectations;
stated and estimated volatility), both flow timings, a terminal value, and an explicit up/down
lattice; through both routes (the file's own raw tree, and a project built in Python written back
by ``project_tree``). A move of non-zero size must change the input it names by the stated amount
and nothing else. The checks are exact identities of the method (the same floats through the same
code), not outside figures; the facts they rest on are stated beside them.
"""
from __future__ import annotations

import textwrap
from dataclasses import replace
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import realopt
from realopt.appraisal import expanded_npv, quick_appraisal
from realopt.errors import RealoptError
from realopt.model import Contract, Defer, Expand, Switch
from realopt.outputs import sensitivity as S
from realopt.project import loads
from realopt.underlying import resolve

ROOT = Path(__file__).resolve().parents[1]
ZERO = S.Moves(volatility=0.0, rates=0.0, relative=0.0)
MOVES = S.Moves(volatility=0.05, rates=0.01, relative=0.2)


def _files():
    out = sorted((ROOT / "projects").glob("*.yaml"))
    users = ROOT / "tests" / "user_projects"
    if users.is_dir():                      # added by another change; absent is fine
        out += sorted(users.rglob("*.yaml")) + sorted(users.rglob("*.yml"))
    # valuation: simulation has its own tornado and checks (tests/test_sim_sensitivity.py)
    return [f for f in out if "\nvaluation: simulation" not in f.read_text()]


def _routes(p):
    """The project as loaded (its raw tree) and as if built in Python (no raw tree)."""
    return [("file", p), ("values", replace(p, origin=None))]


def _schedule_values(s, dates=(0.0, 0.5, 1.0, 2.0, 3.0, 7.5, 20.0)):
    return [s.at(t) for t in dates]


def check_zero_move(p):
    """A zero-size move of every input, the break-even builders at today's values and the
    convergence copy at the chosen grid all give the appraisal's expanded NPV exactly."""
    a = realopt.appraise(p)
    copier = S.Copier(p)
    assert copier.route is not None, copier.problem
    todo, skipped = S.cases(a, ZERO, copier)
    rows, notes = S.tornado(a, ZERO, copier)
    assert notes == skipped                     # no input failed to move
    assert len(rows) == len(todo) >= 3          # rates (one or two), investment, cash flows
    base = resolve(p)
    for c in todo:
        for side in (c.low, c.high):
            q = copier(side)
            r = resolve(q)
            # the copy's operating asset is the appraisal's: same value, timing, terminal value
            assert r.present_value == base.present_value, c.input
            assert (r.timing, r.terminal_value, r.volatility) == \
                (base.timing, base.terminal_value, base.volatility), c.input
    for row in rows:
        assert row.expanded_low == row.expanded_high == a.expanded_npv, row.input
        assert row.flexibility_low == row.flexibility_high == a.flexibility_value, row.input
    cost_copy = copier(S._cost_overrides(p, 1.0))
    assert quick_appraisal(cost_copy)[1:] == (a.expanded_npv, a.decision_today)
    if not p.lattice.explicit and a.volatility is not None:
        vol_copy = copier(copier.volatility(a.volatility))
        assert quick_appraisal(vol_copy)[1:] == (a.expanded_npv, a.decision_today)
        same_grid = copier({"lattice.steps_per_year": p.lattice.steps_per_year})
        assert expanded_npv(same_grid) == a.expanded_npv
    return a, copier


def check_moves_change_their_input(a, copier):
    """Each non-zero move changes what it names, by the stated amount, and nothing else."""
    p = a.project
    k_lo, k_hi = 1.0 - MOVES.relative, 1.0 + MOVES.relative
    todo, _ = S.cases(a, MOVES, copier)
    base = resolve(p)
    labels = {c.input for c in todo}
    assert "Investment cost" in labels
    assert "Expected cash flows" in labels or "Present value of the project" in labels
    for c in todo:
        lo, hi = copier(c.low), copier(c.high)
        for q, k in ((lo, k_lo), (hi, k_hi)):
            r = resolve(q)
            assert r.timing == base.timing, c.input          # the lost flow_timing of before
            if c.input == "Volatility":
                want = max(0.01, a.volatility - MOVES.volatility) if k < 1 \
                    else a.volatility + MOVES.volatility
                assert r.volatility == want
                assert r.present_value == base.present_value
            elif c.input in ("Risk-free rate", "Discount rate"):
                key = "risk_free_rate" if c.input == "Risk-free rate" else "discount_rate"
                step = -MOVES.rates if k < 1 else MOVES.rates
                assert getattr(q.market, key) == getattr(p.market, key) + step
                assert S._same(replace(q, market=p.market), p)
            elif c.input == "Investment cost":
                assert q.investment.present_value(q.market) == pytest.approx(
                    k * a.investment_pv, rel=1e-12)
                assert S._same(replace(q, investment=p.investment), p)
            elif c.input in ("Expected cash flows", "Present value of the project"):
                # every flow (and the terminal value) times k: V0 times k (common practice:
                # a present value is linear in the flows)
                assert r.present_value == pytest.approx(k * base.present_value, rel=1e-9)
                assert r.terminal_value == pytest.approx(k * base.terminal_value, rel=1e-12)
                assert q.rights == p.rights and q.investment == p.investment
            else:
                check_right_move(p, q, c, k)


def check_right_move(p, q, c, k):
    name, _, what = c.input.partition(": ")
    i = next(j for j, r in enumerate(p.rights) if r.name == name)
    r0, r1 = p.rights[i], q.rights[i]
    assert S._same(replace(q, rights=p.rights[:i] + (r0,) + p.rights[i + 1:]), p), c.input
    approx = lambda xs: pytest.approx([k * x for x in xs], rel=1e-12)  # noqa: E731
    if what == "cost":
        assert _schedule_values(r1.cost) == approx(_schedule_values(r0.cost))
    elif what == "savings":
        assert _schedule_values(r1.savings) == approx(_schedule_values(r0.savings))
    elif what == "salvage":
        assert _schedule_values(r1.salvage) == approx(_schedule_values(r0.salvage))
    elif what == "switching costs":
        for (_, _, s0), (_, _, s1) in zip(r0.costs, r1.costs):
            assert _schedule_values(s1) == approx(_schedule_values(s0))
    elif what == "fixed flows of the modes":
        assert [m.fixed for m in r1.modes] == approx([m.fixed for m in r0.modes])
    elif what == "scale" and isinstance(r0, Contract):
        assert r1.scale == min(S.CONTRACT_CAP, r0.scale * k)
    elif what == "scale":
        assert r1.scale == r0.scale * k
    else:
        assert what.startswith("scale of mode")
        mode = what.split("'")[1]
        assert r1.mode(mode).scale == r0.mode(mode).scale * k
        assert [m.fixed for m in r1.modes] == [m.fixed for m in r0.modes]


def check_round_trip(p):
    """A project built in Python is written back as a raw tree that the loader turns into an
    equal project (every field)."""
    q = S.Copier(replace(p, origin=None))
    assert q.route == "values", q.problem
    assert S._same(q(()), p)


# ------------------------------------------------------------------ demos and user projects
@pytest.mark.parametrize("path", _files(), ids=lambda f: f.name)
def test_files_zero_move_reproduces_the_appraisal(path):
    try:
        p = realopt.load_project(path)
        realopt.appraise(p)
    except RealoptError as err:               # a user file that is meant to be refused
        pytest.skip(f"{path.name} does not appraise: {str(err).splitlines()[0]}")
    check_round_trip(p)
    a, copier = check_zero_move(p)
    check_moves_change_their_input(a, copier)
    check_zero_move(replace(p, origin=None))


def test_the_driver_demo_keeps_its_spread_timing():
    """The fault this guards against: the volatility and cash-flow copies of the recycled-flake
    demo (drivers, flow_timing: spread) were rebuilt at year-end timing, so those tornado bars
    started 3.4% above the appraisal's expanded NPV."""
    path = ROOT / "projects" / "flake_line.yaml"
    if not path.exists():
        pytest.skip("demo not in this checkout")
    p = realopt.load_project(path)
    assert p.underlying.flow_timing == "spread"
    a = realopt.appraise(p)
    rows, _ = S.tornado(a, ZERO)
    for label in ("Volatility", "Expected cash flows"):
        row = next(r for r in rows if r.input == label)
        assert row.expanded_low == a.expanded_npv


# ------------------------------------------------------------------ generated projects
RIGHTS = """\
rights:
  - name: Wait
    type: defer
    window: [0, 1]
  - name: Grow
    type: expand
    scale: 0.4
    cost: {start: 9.0, growth: 0.02}
    window: [0.5, 2]
    requires: [Wait]
  - name: Exit
    type: abandon
    salvage: {0: 30.0, 3: 18.0}
    window: [0.5, 3]
"""

SHRINK_SWITCH = """\
rights:
  - name: Shrink
    type: contract
    scale: 0.3
    savings: 6.0
    window: [1, 2]
    exercise: bermudan
    dates: [1, 1.5, 2]
  - name: Modes
    type: switch
    modes: {run: {scale: 1.0}, low: {scale: 0.5, fixed: -0.4}, idle: {scale: 0.0, fixed: -1.0}}
    start: run
    costs: {run->low: 0.5, low->run: 0.8, run->idle: 1.0, idle->run: {0: 2.0, 3: 3.0}}
    window: [0, 3]
"""


def _underlying(form, timing, terminal, volatility):
    tv = f"  terminal_value: {terminal}\n" if terminal else ""
    ft = f"  flow_timing: {timing}\n"
    if form == "cash_flows":
        return ("underlying:\n  cash_flows: {1: 6.0, 2: 8.5, 3: 9.0, 4: 8.0}\n" + tv + ft
                + f"  volatility: {volatility}\n")
    if form == "present_value":
        return ("underlying:\n  present_value: 40.0\n  payout_yield: 0.06\n"
                f"  volatility: {volatility}\n")
    affine = form == "drivers_analytic"
    vol = ("{estimate: simulation, paths: 2000, seed: 3}" if form != "drivers_stated"
           else volatility)
    return textwrap.dedent(f"""\
        underlying:
          years: [1, 4]
          drivers:
            price: {{process: gbm, start: 1.5, drift: 0.01, volatility: 0.2}}
            cost: {{process: mean_reverting, start: 0.5, long_run: 0.55, speed: 0.6,
                    volatility: 0.15}}
            volume: {{schedule: {{1: 8, 3: 10}}}}
          correlation: [[price, cost, 0.4]]
          cash_flow: (price - cost) * volume - 1.5
          tax_rate: {0.0 if affine else 0.25}
        """) + tv + ft + f"  volatility: {vol}\n"


def generated(form, timing="at_dates", terminal=0.0, lattice="crr", rights=RIGHTS,
              volatility=0.3, rf=0.04, dr=0.09, compounding="annual"):
    lat = ("lattice: {steps_per_year: 4}\n" if lattice == "crr"
           else "lattice: {up: 1.15, down: 0.87, step_years: 0.5}\n")
    text = (f"project: {{name: Generated, currency: EUR, unit: million}}\n"
            f"market: {{risk_free_rate: {rf}, discount_rate: {dr}, compounding: {compounding}}}\n"
            + _underlying(form, timing, terminal, volatility)
            + "investment:\n  cost: {0: 20.0, 1: 6.0}\n" + lat + rights)
    return loads(text, source="generated.yaml")


FORMS = ["cash_flows", "present_value", "drivers_analytic", "drivers_simulated",
         "drivers_stated"]


@pytest.mark.parametrize("form", FORMS)
@pytest.mark.parametrize("timing", ["at_dates", "spread"])
@pytest.mark.parametrize("terminal", [0.0, 25.0])
@pytest.mark.parametrize("lattice", ["crr", "explicit"])
def test_generated_zero_move_reproduces_the_appraisal(form, timing, terminal, lattice):
    if form == "present_value" and (timing == "spread" or terminal):
        pytest.skip("the present-value form has no flow timing or terminal value")
    p = generated(form, timing, terminal, lattice)
    assert p.underlying.flow_timing == (timing if form != "present_value" else "at_dates")
    check_round_trip(p)
    for _, q in _routes(p):
        a, copier = check_zero_move(q)
        check_moves_change_their_input(a, copier)


@pytest.mark.parametrize("form", ["cash_flows", "present_value", "drivers_simulated"])
def test_every_right_type_moves_through_its_keys(form):
    p = generated(form, "spread", 10.0, rights=SHRINK_SWITCH)
    assert {type(r) for r in p.rights} == {Contract, Switch}
    check_round_trip(p)
    a, copier = check_zero_move(p)
    labels = {c.input for c in S.cases(a, MOVES, copier)[0]}
    assert {"Shrink: savings", "Shrink: scale", "Modes: switching costs",
            "Modes: fixed flows of the modes", "Modes: scale of mode 'low'"} <= labels
    check_moves_change_their_input(a, copier)


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(form=st.sampled_from(["cash_flows", "present_value", "drivers_stated"]),
       timing=st.sampled_from(["at_dates", "spread"]),
       terminal=st.sampled_from([0.0, 12.5]),
       volatility=st.floats(0.05, 0.9),
       rf=st.floats(-0.01, 0.08), spread=st.floats(0.0, 0.08),
       compounding=st.sampled_from(["annual", "continuous"]))
def test_zero_move_invariant_over_inputs(form, timing, terminal, volatility, rf, spread,
                                         compounding):
    """Invariant (hypothesis): whatever the numbers, the zero move is the appraisal exactly."""
    if form == "present_value":
        timing, terminal = "at_dates", 0.0
    p = generated(form, timing, terminal, volatility=volatility, rf=rf, dr=rf + spread,
                  compounding=compounding)
    check_zero_move(p)
    check_zero_move(replace(p, origin=None))


def test_a_project_changed_after_loading_is_rebuilt_from_its_values():
    p = generated("cash_flows", "spread", 25.0)
    changed = replace(p, market=replace(p.market, risk_free_rate=0.05))
    copier = S.Copier(changed)
    assert copier.route == "values"            # the raw tree no longer matches: not used
    a = realopt.appraise(changed)
    s = S.analyse(a)
    assert any("changed after it was loaded" in n for n in s.notes)
    assert all(r.expanded_low == r.expanded_high == a.expanded_npv
               for r in S.tornado(a, ZERO, copier)[0])


def test_a_project_no_file_can_state_gets_no_sensitivity():
    """A project built in Python with a value the loader refuses (an expansion of -50%) has no
    exact copy through the loader, and appraise refuses it with the loader's message (the
    model's rules in realopt.validate), so no sensitivity is ever computed from it."""
    from realopt.errors import ModelError

    p = generated("cash_flows")
    odd = replace(p, rights=(Defer(name="Wait", window=(0.0, 1.0)),
                             Expand(name="Grow", window=(0.5, 2.0), scale=-0.5)))
    copier = S.Copier(odd)
    assert copier.route is None and copier.problem
    with pytest.raises(ModelError, match=r"rights\[1\]\.scale: found -0.5; expected the added "
                       "fraction of the current scale, above 0"):
        realopt.appraise(odd)



# ------------------------------------------------------------------ the documents cited
def test_code_and_docs_cite_only_documents_in_the_repository():
    """Help text, docstrings and guides cite docs/*.md, which must exist; no other design file."""
    texts = {f: f.read_text(encoding="utf-8") for f in
             list((ROOT / "realopt").rglob("*.py")) + list((ROOT / "tests").rglob("*.py"))
             + [ROOT / "README.md", ROOT / "DEVELOPERS.md"] + list((ROOT / "docs").glob("*.md"))
             if f.exists()}
    design = "DESIGN" + ".md"                   # split so this file does not cite it either
    shared = "../" + "shared/"
    assert not [f.name for f, t in texts.items() if design in t or shared in t]
    import re
    cited = {m for t in texts.values() for m in re.findall(r"docs/([\w-]+\.md)", t)}
    assert cited >= {"design.md", "file-format.md"}
    assert all((ROOT / "docs" / name).is_file() for name in cited), cited


def test_results_contract_keys_are_documented():
    """docs/design.md names every key of Appraisal.to_dict() (top level, rights[], lattice)."""
    doc = (ROOT / "docs" / "design.md").read_text(encoding="utf-8")
    a = realopt.appraise(generated("cash_flows"))
    d = a.to_dict()
    right = d["rights"][0]
    keys = (set(d) | set(right) | set(d["lattice"]) | set(right["thresholds"][0])
            | set(right["chance_of_use"]))
    assert not [k for k in sorted(keys) if f"`{k}`" not in doc and f"`{k}[]`" not in doc]


def test_file_format_names_every_key_the_loader_accepts():
    """docs/file-format.md names every key of the loader's key lists."""
    from realopt import project as loader

    doc = (ROOT / "docs" / "file-format.md").read_text(encoding="utf-8")
    keys = set(loader.TOP_KEYS + loader.PROJECT_KEYS + loader.MARKET_KEYS + loader.UNDERLYING_KEYS
               + loader.LATTICE_KEYS + loader.COMMON_RIGHT_KEYS + loader.FORECAST_KEYS)
    keys |= {k for ks in loader.RIGHT_KEYS.values() for k in ks} | set(loader.RIGHT_KEYS)
    keys |= {"estimate", "paths", "seed", "column", "periods_per_year", "process", "start",
             "drift", "volatility", "long_run", "speed", "schedule", "growth", "fixed"}
    assert not [k for k in sorted(keys) if k not in doc]
