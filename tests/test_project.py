"""The project loader: what it builds, where it points, what it warns about.

Contract under test: docs/file-format.md (keys, schedules, conventions) and issue 3.
Outside references are named beside each check.
"""
from __future__ import annotations

import textwrap

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import realopt
from realopt import model
from realopt.errors import ProjectError
from realopt.project import format_path, load_project, loads

from conftest import MINIMAL_PROJECT


def _problems(text, **kw):
    with pytest.raises(ProjectError) as info:
        loads(textwrap.dedent(text), source="p.yaml", **kw)
    return info.value.problems


def _one(text, **kw):
    probs = _problems(text, **kw)
    assert len(probs) == 1, "\n".join(map(str, probs))
    return probs[0]


# ---- what the loader builds --------------------------------------------------------------------


def test_minimal_project(minimal_project_text):
    p = loads(minimal_project_text)
    assert p.name == "Test plant" and p.currency == "EUR" and p.unit == "million"
    assert p.market == model.Market(risk_free_rate=0.04, discount_rate=0.10,
                                    compounding="annual")
    assert p.underlying.cash_flows == ((1.0, 10.0), (2.0, 12.0), (3.0, 12.0))
    assert p.underlying.terminal_value == 60.0 and p.underlying.volatility == 0.25
    assert p.investment.outlays == ((0.0, 70.0),)
    assert p.lattice == model.LatticeSpec(steps_per_year=12)
    expand, sell = p.rights
    assert isinstance(expand, model.Expand) and expand.exercise == "american"
    assert expand.scale == 0.5 and expand.cost == model.Schedule.constant(30.0)
    assert isinstance(sell, model.Abandon)
    assert sell.salvage == model.Schedule.from_points({0: 50.0, 3: 40.0})
    assert p.warnings == () and p.horizon == 3.0


def test_schedule_forms():
    p = loads("""
        project: {name: s}
        market: {risk_free_rate: 0.03, discount_rate: 0.08}
        underlying: {cash_flows: {1: 5, 2: 5}, volatility: 0.2}
        investment: {cost: {0: 60, 1: 40}}
        rights:
          - {name: a, type: expand, scale: 0.2, cost: {start: 10, growth: 0.05}, window: [0, 2]}
          - {name: b, type: abandon, salvage: {0: 30, 2: 10}, window: [0, 2]}
          - {name: c, type: contract, scale: 0.5, savings: 4, window: [1, 2]}
        """)
    a, b, c = p.rights
    assert a.cost.at(2.0) == pytest.approx(10 * 1.05 ** 2)        # docs/file-format.md: X * (1 + g)^t
    assert b.salvage.at(1.0) == pytest.approx(20.0)               # linear between points
    assert b.salvage.at(5.0) == pytest.approx(10.0)               # flat beyond the last
    assert c.savings.is_constant and c.savings.at(1.5) == 4.0


def test_investment_mapping_present_value():
    """numpy-financial's npv discounts the first value at t = 0, like an outlay plan {0:, 1:}."""
    npf = pytest.importorskip("numpy_financial")
    p = loads("""
        project: {name: s}
        market: {risk_free_rate: 0.035, discount_rate: 0.09}
        underlying: {cash_flows: {1: 5}, volatility: 0.2}
        investment: {cost: {0: 60, 1: 40}}
        """)
    assert p.investment.outlays == ((0.0, 60.0), (1.0, 40.0))
    assert p.investment.present_value(p.market) == pytest.approx(npf.npv(0.035, [60, 40]))


def test_present_value_form_defaults_discount_rate_and_reads_explicit_tree():
    p = loads("""
        project: {name: Textbook}
        market: {risk_free_rate: 0.08}
        underlying: {present_value: 100, payout_yield: 0.0}
        investment: {cost: 104}
        lattice: {up: 1.8, down: 0.6, step_years: 1}
        rights: [{name: Wait, type: defer, window: [0, 1], exercise: european}]
        """)
    assert p.market.discount_rate == 0.08
    assert p.underlying.volatility is None and p.lattice.explicit
    assert p.lattice == model.LatticeSpec(up=1.8, down=0.6, step_years=1.0)
    assert isinstance(p.rights[0], model.Defer) and p.rights[0].cost is None


def test_switch_modes_keep_yaml_yes_no_words_as_names():
    """YAML 1.1 reads on/off/yes/no as booleans (yaml.org/type/bool, recalled from memory);
    as mode names they must stay text."""
    p = loads("""
        project: {name: s}
        market: {risk_free_rate: 0.03, discount_rate: 0.08}
        underlying: {cash_flows: {1: 5, 2: 5}, volatility: 0.2}
        investment: {cost: 5}
        rights:
          - name: Toggle
            type: switch
            modes: {on: {scale: 1}, off: {scale: 0, fixed: 0.5}}
            costs: {on->off: 0.1, off->on: 0.2}
            window: [0, 2]
        """)
    sw = p.rights[0]
    assert [m.name for m in sw.modes] == ["on", "off"] and sw.start == "on"
    assert sw.mode("off").fixed == 0.5
    assert [(a, b) for a, b, _ in sw.costs] == [("on", "off"), ("off", "on")]


def test_exponent_numbers_read_as_numbers(minimal_project_text):
    """PyYAML's YAML 1.1 resolver reads 25e-2 as text (it wants a dot); the loader reads an
    unquoted exponent number as a number, a quoted one stays text and is refused."""
    p = loads(minimal_project_text.replace("volatility: 0.25", "volatility: 25e-2"))
    assert p.underlying.volatility == 0.25
    prob = _one(minimal_project_text.replace("volatility: 0.25", "volatility: '25e-2'"))
    assert "a number in quotes" in prob.found


def test_merge_keys():
    p = loads("""
        project: {name: s}
        market: &m {risk_free_rate: 0.03, discount_rate: 0.08}
        underlying: {cash_flows: {1: 5, 2: 5}, volatility: 0.2}
        investment: {cost: 5}
        rights:
          - &sell {name: Sell early, type: abandon, salvage: 3, window: [0, 1]}
          - {<<: *sell, name: Sell late, window: [1, 2]}
        """)
    early, late = p.rights
    assert late.name == "Sell late" and late.window == (1.0, 2.0)
    assert late.salvage == early.salvage


def test_drivers_form(tmp_path):
    pytest.importorskip("realopt.formula")
    p = tmp_path / "d.yaml"
    p.write_text(textwrap.dedent("""
        project: {name: Driven}
        market: {risk_free_rate: 0.03, discount_rate: 0.09}
        underlying:
          years: [1, 10]
          drivers:
            price: {process: gbm, start: 52.0, drift: 0.02, volatility: 0.25}
            unit_cost: {process: mean_reverting, start: 30, long_run: 32, speed: 0.4, volatility: 0.15}
            volume: {schedule: {1: 800, 5: 1000}}
          correlation: [[price, unit_cost, 0.6]]
          cash_flow: (price - unit_cost) * volume / 1000 - 4.5
          tax_rate: 0.25
          volatility: {estimate: simulation, paths: 5000, seed: 7}
        investment: {cost: 20}
        """))
    proj = load_project(p)
    dm = proj.underlying.drivers
    assert dm.years == (1, 10) and dm.tax_rate == 0.25
    assert dm.cash_flow == "(price - unit_cost) * volume / 1000 - 4.5"
    assert dm.correlation == (("price", "unit_cost", 0.6),)
    price, cost, volume = dm.drivers
    assert price == model.Driver(name="price", process="gbm", start=52.0, drift=0.02,
                                 volatility=0.25)
    assert cost.process == "mean_reverting" and cost.long_run == 32.0 and cost.speed == 0.4
    assert volume.process == "schedule" and volume.schedule.at(3) == pytest.approx(900.0)
    assert proj.underlying.volatility_estimate == model.VolatilityEstimate(
        method="simulation", paths=5000, seed=7)


DRIVEN = """
    project: {name: Driven}
    market: {risk_free_rate: 0.03, discount_rate: 0.09}
    underlying:
      years: [1, 10]
      drivers:
        price: {process: gbm, start: 52.0, volatility: 0.25}
        unit_cost: {process: gbm, start: 30, volatility: 0.15}
        fuel: {process: gbm, start: 10, volatility: 0.3}
      correlation: [[price, unit_cost, 0.95], [price, fuel, 0.95], [unit_cost, fuel, -0.95]]
      cash_flow: (price - unit_cost) * 10
      volatility: 0.3
    investment: {cost: 20}
    """


def test_driver_errors_are_located():
    pytest.importorskip("realopt.formula")
    prob = _one(DRIVEN)
    assert prob.key == "underlying.correlation" and "positive semi-definite" in prob.found
    text = DRIVEN.replace("[unit_cost, fuel, -0.95]", "[unit_cost, fuel, 0.9]")
    assert loads(textwrap.dedent(text)).underlying.drivers.correlation[2][2] == 0.9
    prob = _one(text.replace("(price - unit_cost) * 10", "(price - unit_cots) * 10"))
    assert prob.key == "underlying.cash_flow" and prob.line == 11
    assert "did you mean unit_cost?" in prob.fix
    prob = _one(text.replace("(price - unit_cost) * 10", "(price - unit_cost) ** * 10"))
    assert prob.key == "underlying.cash_flow" and "cannot be used" in prob.found
    prob = _one(text.replace("fuel: {process: gbm", "2fuel: {process: gbm"))
    assert prob.key == "underlying.drivers.2fuel"


def test_forecast_and_history_files_resolve_against_the_project_folder(tmp_path, monkeypatch):
    pytest.importorskip("realopt.forecast")
    folder = tmp_path / "case"
    (folder / "data").mkdir(parents=True)
    (folder / "data" / "forecast.csv").write_text("year,cf\n1,5.5\n2,6.5\n3,7\n")
    (folder / "data" / "prices.csv").write_text("month,price\n1,10\n2,11\n3,10.5\n")
    (folder / "p.yaml").write_text(textwrap.dedent("""
        project: {name: Files}
        market: {risk_free_rate: 0.03, discount_rate: 0.09}
        underlying:
          cash_flows: {file: data/forecast.csv, year: year, value: cf}
          volatility: {estimate: history, file: data/prices.csv, column: price, periods_per_year: 12}
        investment: {cost: 15}
        """))
    monkeypatch.chdir(tmp_path)          # somewhere else than the project's folder
    proj = load_project("case/p.yaml")
    assert proj.underlying.cash_flows == ((1.0, 5.5), (2.0, 6.5), (3.0, 7.0))
    est = proj.underlying.volatility_estimate
    assert est.method == "history" and est.column == "price" and est.periods_per_year == 12
    assert est.file == str((folder / "data" / "prices.csv").resolve())
    (folder / "data" / "forecast.csv").write_text("year,cf\n1,5.5\n1,6.5\n")
    with pytest.raises(ProjectError) as info:
        load_project("case/p.yaml")
    assert info.value.problems[0].key == "underlying.cash_flows.file"
    assert "appears twice" in info.value.problems[0].found


# ---- where problems point ------------------------------------------------------------------------


def test_every_problem_is_located_and_sorted(minimal_project_text):
    text = (minimal_project_text.replace("discount_rate: 0.10", "discount_rate: ten")
            .replace("window: [1, 3]", "window: [3, 1]").replace("scale: 0.5", "scale: -2"))
    probs = _problems(text)
    assert [p.key for p in probs] == ["market.discount_rate", "rights[0].scale",
                                      "rights[0].window"]
    assert [p.line for p in probs] == [7, 17, 19]
    assert all(p.file == "p.yaml" and p.column for p in probs)
    assert probs[1].found == "-2" and "above 0" in probs[1].expected
    msg = str(ProjectError(probs))
    assert msg.startswith("3 problems in the project file:")
    assert "p.yaml:7:18: market.discount_rate: found the text \"ten\"" in msg


def test_unknown_keys_get_a_hint(minimal_project_text):
    prob = _one(minimal_project_text.replace("risk_free_rate", "riskfree_rate"))
    assert prob.key == "market.riskfree_rate" and prob.fix == "did you mean risk_free_rate?"
    assert (prob.line, prob.column) == (6, 3)              # the key itself
    prob = _one(minimal_project_text.replace("    salvage:", "    savings:"))
    assert prob.key == "rights[1].savings" and "belongs to contract rights" in prob.fix


def test_payout_yield_with_cash_flows_is_refused(minimal_project_text):
    prob = _one(minimal_project_text.replace("  volatility: 0.25", "  volatility: 0.25\n"
                                             "  payout_yield: 0.02"))
    assert prob.key == "underlying.payout_yield" and "goes with present_value" in prob.fix


def test_explicit_tree_dates_must_sit_on_its_grid():
    prob = _one("""
        project: {name: Textbook}
        market: {risk_free_rate: 0.08}
        underlying: {present_value: 100}
        investment: {cost: 104}
        lattice: {up: 1.8, down: 0.6, step_years: 1}
        rights: [{name: Wait, type: defer, window: [0, 1.5]}]
        """)
    assert prob.key == "rights[0].window" and "multiples of step_years" in prob.expected


def test_switch_mode_never_reached():
    prob = _one("""
        project: {name: s}
        market: {risk_free_rate: 0.03, discount_rate: 0.08}
        underlying: {cash_flows: {1: 5, 2: 5}, volatility: 0.2}
        investment: {cost: 5}
        rights:
          - name: Modes
            type: switch
            modes: {run: {}, idle: {scale: 0}, mothball: {scale: 0, fixed: 1}}
            costs: {run->idle: 0.1, idle->run: 0.2}
            window: [0, 2]
        """)
    assert prob.key == "rights[0].modes.mothball" and "run->mothball" in prob.fix


def test_defer_requires_nothing_and_requires_chain_is_fine():
    base = """
        project: {name: s}
        market: {risk_free_rate: 0.03, discount_rate: 0.08}
        underlying: {cash_flows: {1: 5, 2: 5, 3: 5}, volatility: 0.2}
        investment: {cost: 10}
        rights:
          - {name: Go, type: defer, window: [0, 1]}
          - {name: Phase 2, type: expand, scale: 0.5, cost: 3, window: [1, 3], requires: [Go]}
          - {name: Phase 3, type: expand, scale: 0.5, cost: 3, window: [2, 3],
             requires: [Phase 2]}
        """
    p = loads(textwrap.dedent(base))
    assert p.right("Phase 3").requires == ("Phase 2",)
    probs = _problems(base.replace("{name: Go, type: defer, window: [0, 1]}",
                                   "{name: Go, type: defer, window: [0, 1], requires: [Phase 2]}"))
    assert probs[0].key == "rights[0].requires"
    assert "no requires on a defer right" in probs[0].expected
    assert "a cycle: Go -> Phase 2 -> Go" in probs[1].found


# ---- warnings ------------------------------------------------------------------------------------


def test_warnings(minimal_project_text):
    p = loads(minimal_project_text.replace("volatility: 0.25", "volatility: 1.8"))
    assert len(p.warnings) == 1 and "very high" in p.warnings[0]
    assert p.warnings[0].startswith("<text>:11: underlying.volatility")
    text = minimal_project_text.replace("rights:\n", "rights:\n  - {name: Wait, type: defer, "
                                        "window: [0, 2], cost: 75}\n")
    p = loads(text)
    assert len(p.warnings) == 1 and "costs the investment's present value" in p.warnings[0]
    assert "75" in p.warnings[0] and "70" in p.warnings[0]
    assert loads(text.replace("cost: 75}", "cost: 70}")).warnings == ()
    p = loads("""
        project: {name: Textbook}
        market: {risk_free_rate: 0.08}
        underlying: {present_value: 100, volatility: 0.3}
        investment: {cost: 104}
        lattice: {up: 1.8, down: 0.6, step_years: 1}
        """)
    assert len(p.warnings) == 1 and "ignored" in p.warnings[0]


def test_percentage_typo_is_refused_at_the_key(minimal_project_text):
    """A rate of 4 is 4% written without its sign: refused at the key with the fraction
    (before, a warning that the lattice's p-out-of-range error hid)."""
    with pytest.raises(ProjectError) as err:
        loads(minimal_project_text.replace("risk_free_rate: 0.04", "risk_free_rate: 4"))
    assert "market.risk_free_rate" in str(err.value) and "did you mean 0.04?" in str(err.value)
    assert loads(minimal_project_text.replace("risk_free_rate: 0.04", "risk_free_rate: 1")
                 ).market.risk_free_rate == 1.0       # 100% a year is still a rate


# ---- overrides -----------------------------------------------------------------------------------


def test_overrides_by_path_index_and_name(minimal_project_text):
    p = loads(minimal_project_text, overrides={
        "underlying.volatility": 0.4,
        "lattice.steps_per_year": 50,                 # creates the missing section
        "rights.0.cost": 25.0,
        "rights.Sell the plant.salvage": {0: 45, 3: 35},
        "underlying.cash_flows.2": 13.0,              # an existing numeric key
        "underlying.cash_flows.4": 12.5,              # a new year
    })
    assert p.underlying.volatility == 0.4 and p.lattice.steps_per_year == 50
    assert p.rights[0].cost.at(0) == 25.0
    assert p.rights[1].salvage.at(3) == 35.0
    assert p.underlying.cash_flows == ((1, 10.0), (2, 13.0), (3, 12.0), (4, 12.5))


def test_override_names_with_dots(minimal_project_text):
    text = minimal_project_text.replace("Sell the plant", "Sell to Co. Ltd.")
    p = loads(text, overrides={"rights.Sell to Co. Ltd..window": [0, 2]})
    assert p.rights[1].window == (0.0, 2.0)


def test_override_problems_name_the_override(minimal_project_text):
    prob = _one(minimal_project_text, overrides={"rights.Sell the plnt.salvage": 3})
    assert prob.key == "--set rights.Sell the plnt.salvage" and prob.line is None
    assert prob.fix == "did you mean Sell the plant?"
    prob = _one(minimal_project_text, overrides={"underlying.volatility": "30%"})
    assert prob.key == "underlying.volatility" and prob.line is None
    assert "(from --set underlying.volatility)" in prob.found and "0.3" in prob.fix
    prob = _one(minimal_project_text, overrides={"rights.7.cost": 3})
    assert "an index 0 to 1" in prob.expected


def test_public_api(repo_root):
    path = repo_root / "projects" / "coating_line.yaml"
    p = realopt.load_project(path, {"lattice.steps_per_year": 24})
    assert p.lattice.steps_per_year == 24 and p.source == str(path)
    assert realopt.load_project(str(path)) == load_project(path)


def test_format_path():
    from realopt.project import Index

    assert format_path(("rights", Index(2), "costs", "run->idle")) == "rights[2].costs.run->idle"
    assert format_path(()) == "(top level)"


# ---- properties ----------------------------------------------------------------------------------

VALUES = st.one_of(
    st.none(), st.booleans(), st.integers(-10**6, 10**6),
    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=12),
    st.lists(st.one_of(st.integers(-5, 20), st.floats(-5, 20), st.text(max_size=4)), max_size=4),
    st.dictionaries(st.one_of(st.integers(-2, 12), st.text(max_size=5)),
                    st.one_of(st.floats(-50, 50), st.text(max_size=4)), max_size=3),
)
KEYS = st.sampled_from([
    "project", "project.name", "market.risk_free_rate", "market.compounding",
    "market.discount_rate", "underlying", "underlying.cash_flows", "underlying.cash_flows.1",
    "underlying.terminal_value", "underlying.volatility", "underlying.present_value",
    "underlying.payout_yield", "investment.cost", "lattice", "lattice.steps_per_year",
    "lattice.up", "rights", "rights.0", "rights.0.window", "rights.0.type", "rights.0.scale",
    "rights.0.requires", "rights.1.salvage", "rights.1.exercise", "rights.1.dates",
    "rights.Sell the plant.excludes", "rights.0.name", "rights.1.name", "extra",
])


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.dictionaries(KEYS, VALUES, min_size=1, max_size=4))
def test_any_edit_gives_a_project_or_located_problems(edits):
    """Invariant: whatever is written where, the loader returns a Project or raises
    ProjectError whose every problem has a key, a 'found' and an 'expected' (never anything
    else)."""
    try:
        p = loads(MINIMAL_PROJECT, overrides=edits)
    except ProjectError as err:
        assert err.problems
        for prob in err.problems:
            assert prob.key and prob.found and prob.expected
            assert (prob.line is None) == (prob.column is None)
    else:
        assert isinstance(p, model.Project)
        assert all(r.window[0] <= r.window[1] for r in p.rights)
        assert p.underlying.volatility is None or p.underlying.volatility > 0


@settings(max_examples=300, deadline=None)
@given(st.text(max_size=200))
def test_any_text_gives_a_project_or_problems(text):
    try:
        loads(text)
    except ProjectError as err:
        assert str(err)


def test_loader_warnings_name_the_right_they_concern(minimal_project_text):
    """Issue 8 item 9: a warning located in a right's entry starts with that right's name
    (the file line and key path alone made the reader count list items)."""
    from realopt.project import Index, _Builder, parse_text

    text = minimal_project_text.replace("rights:\n", "rights:\n  - {name: Wait for the permit, "
                                        "type: defer, window: [0, 2]}\n")
    b = _Builder(parse_text(text, "<text>"), ".")
    b.warn(("rights", Index(0), "window"), "a window past the last cash flow")
    b.warn(("rights", Index(0), "cost"), "Wait for the permit: already named")
    b.warn(("market", "risk_free_rate"), "not about a right")
    assert b.warnings[0].endswith("rights[0].window: Wait for the permit: a window past the "
                                  "last cash flow")
    assert b.warnings[1].endswith("rights[0].cost: Wait for the permit: already named")
    assert b.warnings[2].endswith("market.risk_free_rate: not about a right")
