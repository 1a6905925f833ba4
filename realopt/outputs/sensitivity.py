"""Sensitivities of the appraisal: tornado of stated input moves, break-evens of the decision
today, and convergence of the expanded NPV over the lattice's steps per year.

Every number here comes from the valuation engine (:func:`realopt.appraisal.quick_appraisal` and
:func:`realopt.appraisal.expanded_npv`) run on a moved copy of the project; the base values are
the Appraisal's own, never recomputed.

Moved copies go through the same path as the command line's ``--set``: dotted key paths set on
the raw tree the loader read (``Project.origin``, overrides already applied), then the loader
validates the whole tree again (:func:`realopt.project.build_project`). A project built in Python
(no ``origin``, or one changed after loading) is first written back as a raw tree by
:func:`project_tree`. Either way the copy with no move must equal the project field for field,
else no sensitivity is computed and a note says why. See docs/design.md, "Sensitivities".

Moves (defaults in :data:`DEFAULT_MOVES`, stated in the figure and the tables), each with the keys
it sets:

* volatility: +- ``volatility`` (absolute, yearly sigma of ln V; floored at 1%):
  ``underlying.volatility``. When the volatility is estimated by simulation from the drivers, the
  moved copy states the drivers' expected cash flows of that simulation as
  ``underlying.cash_flows`` (every other underlying key kept: terminal_value, flow_timing) and
  the moved volatility as a number, so the move is not blurred by a new simulation;
* risk-free rate and discount rate: +- ``rates`` (absolute, yearly, in the project's
  compounding): ``market.risk_free_rate``, ``market.discount_rate`` (a driver project is then
  simulated again with its own paths and seed);
* money and scale inputs: x (1 +- ``relative``): ``investment.cost``; the expected cash flows
  (``underlying.cash_flows`` and ``terminal_value``; for drivers the formula
  ``underlying.cash_flow`` times the factor, and ``terminal_value``) or ``present_value``; each
  right's cost, savings, salvage, switching costs (``rights.<i>.costs``) and the modes' fixed
  flows (``rights.<i>.modes``); each expand/contract scale and switch mode scale (a contraction is
  capped below 100%).

Break-evens: the volatility and the investment cost (every outlay, and any defer right's own
cost, moved in proportion; stated as the present value of the outlays, the Appraisal's
``investment_pv`` today) nearest to today's at which the decision today changes, found by a
scan of SCAN_POINTS steps then BISECT_STEPS halvings (to within 1/(6 x 2^8), about 0.07%, of
the searched span); None where the decision does not change inside the searched range.
"""
from __future__ import annotations

import copy
from dataclasses import dataclass, field, replace
from typing import Any, Callable

from ..errors import RealoptError
from ..model import Driver, LatticeSpec, Project, Right, SimulationSpec, Underlying
from ..rights.contract import CONTRACT_CAP  # noqa: F401  (a moved contraction keeps some)
from ..rights.raw import schedule_raw as _schedule_raw
from ..project import DRIVER_FORM_KEYS, Tree, apply_overrides, build_project
from ..underlying import resolve

VOL_RANGE = (0.02, 1.50)          # searched for the volatility break-even (yearly sigma)
COST_RANGE = (0.0, 3.0)           # searched for the investment-cost break-even (x today's cost)
SCAN_POINTS = 6
BISECT_STEPS = 8
MAX_CONVERGENCE_STEPS = 4800      # finest grid of the convergence figure (total steps)
SETTLED = 0.005                   # a grid has settled within 0.5% of the finest grid's value


@dataclass(frozen=True)
class Moves:
    """Stated moves of the tornado: absolute for volatility and rates, relative for the rest.
    ``level`` (relative: the drivers' levels) and ``correlation`` (absolute) move the inputs of
    a simulation result only (realopt.outputs.sim_sensitivity)."""

    volatility: float = 0.05
    rates: float = 0.01
    relative: float = 0.20
    level: float = 0.10
    correlation: float = 0.10

    def describe(self) -> str:
        return (f"volatility +-{points(self.volatility)}, rates +-{points(self.rates)}, costs, "
                f"cash flows, salvage and scale inputs +-{self.relative:.0%}")


def points(x: float) -> str:
    """An absolute move of a rate in percentage points: "5 points", "1 point"."""
    v = x * 100
    return f"{v:g} point" + ("" if v == 1 else "s")


DEFAULT_MOVES = Moves()


@dataclass(frozen=True)
class TornadoRow:
    """One input moved down and up: settings as text, and the resulting values."""

    input: str
    low_setting: str
    high_setting: str
    expanded_low: float
    expanded_high: float
    flexibility_low: float
    flexibility_high: float

    @property
    def swing(self) -> float:
        return abs(self.expanded_high - self.expanded_low)


@dataclass(frozen=True)
class BreakEven:
    """The value of ``input`` nearest today's at which the decision today changes (None: no
    change within ``searched``); ``decision_beyond`` is the decision on the far side."""

    input: str
    today: float
    below: float | None
    decision_below: str | None
    above: float | None
    decision_above: str | None
    searched: tuple[float, float]
    unit: str                      # "sigma" or "money"


@dataclass(frozen=True)
class Convergence:
    """Expanded NPV against steps per year; ``chosen`` is the project's own grid."""

    steps_per_year: tuple[int, ...]
    expanded_npv: tuple[float, ...]
    chosen: int
    relative_gap: float | None     # |chosen - finest| / |finest| (None if finest is 0)
    settled_at: int | None = None  # fewest steps a year from which every grid shown is within
    #                                SETTLED of the finest (None: only the finest itself)

    @property
    def settled(self) -> bool:
        return self.settled_at is not None and self.chosen >= self.settled_at


@dataclass(frozen=True)
class Sensitivity:
    moves: Moves
    base_expanded: float
    base_flexibility: float
    decision_today: str
    rows: tuple[TornadoRow, ...]
    breakevens: tuple[BreakEven, ...]
    convergence: Convergence | None
    notes: tuple[str, ...] = field(default_factory=tuple)


# --------------------------------------------------------------------------------------------
# The project as a raw tree (for projects built in Python) and moved copies through the loader

def _years_raw(pairs) -> dict:
    return {y: v for y, v in pairs}


def _risk_neutral_raw(rn) -> dict:
    """A driver's risk-neutral description as the file writes it (valuation: simulation)."""
    if rn.kind == "forward":
        return {"forward": _years_raw(rn.forward)}
    return {rn.kind: rn.value}


def _driver_raw(d: Driver):
    if d.process == "schedule":
        return {"schedule": _schedule_raw(d.schedule)}
    if d.process == "gbm":
        out = {"process": "gbm", "start": d.start, "drift": d.drift, "volatility": d.volatility}
    else:
        out = {"process": d.process, "start": d.start, "long_run": d.long_run, "speed": d.speed,
               "volatility": d.volatility}
    if d.risk_neutral is not None:
        out["risk_neutral"] = _risk_neutral_raw(d.risk_neutral)
    return out


def _simulation_raw(spec: SimulationSpec) -> dict:
    """The ``simulation:`` block of a project valued on the drivers."""
    out = {"paths": spec.paths, "seed": spec.seed, "steps_per_year": spec.steps_per_year,
           "basis": spec.basis, "antithetic": spec.antithetic}
    if spec.upper_bound_paths:
        out["upper_bound"] = {"paths": spec.upper_bound_paths, "inner": spec.upper_bound_inner}
    if spec.map_drivers:
        out["map_drivers"] = list(spec.map_drivers)
    return out


def _underlying_raw(u: Underlying) -> dict:
    out: dict[str, Any] = {}
    if u.drivers is not None:
        m = u.drivers
        out.update(years=list(m.years), drivers={d.name: _driver_raw(d) for d in m.drivers},
                   correlation=[[a, b, r] for a, b, r in m.correlation], cash_flow=m.cash_flow,
                   tax_rate=m.tax_rate)
    elif u.cash_flows:
        out["cash_flows"] = _years_raw(u.cash_flows)
    else:
        out.update(present_value=u.present_value, payout_yield=u.payout_yield)
    if "present_value" not in out:
        out.update(terminal_value=u.terminal_value, flow_timing=u.flow_timing)
    e = u.volatility_estimate
    if e is not None and e.method == "simulation":
        out["volatility"] = {"estimate": "simulation", "paths": e.paths, "seed": e.seed}
    elif e is not None:
        out["volatility"] = {"estimate": e.method, "file": e.file, "column": e.column,
                             "periods_per_year": e.periods_per_year}
    elif u.volatility is not None:
        out["volatility"] = u.volatility
    return out


def _right_raw(r: Right) -> dict:
    out: dict[str, Any] = {"name": r.name, "type": r.kind, "window": list(r.window),
                           "exercise": r.exercise}
    if r.exercise == "bermudan":
        out["dates"] = list(r.dates)
    if r.requires:
        out["requires"] = list(r.requires)
    if r.excludes:
        out["excludes"] = list(r.excludes)
    out.update(r.raw())              # the type's own keys (realopt/rights/<type>.py)
    return out


def project_tree(p: Project) -> dict:
    """``p`` written back as the raw tree of a project file (plain dicts, lists, numbers and
    text, values exactly as held): the loader turns it into a Project equal to ``p`` whenever
    ``p`` is one the loader could have built. Used for projects built in Python."""
    lat = p.lattice
    out = {
        "project": {"name": p.name, **({"currency": p.currency} if p.currency else {}),
                    **({"unit": p.unit} if p.unit else {})},
        "market": {"risk_free_rate": p.market.risk_free_rate,
                   "discount_rate": p.market.discount_rate,
                   "compounding": p.market.compounding},
        "underlying": _underlying_raw(p.underlying),
        "investment": {"cost": _years_raw(p.investment.outlays)},
        "lattice": ({"up": lat.up, "down": lat.down, "step_years": lat.step_years}
                    if lat.explicit else {"steps_per_year": lat.steps_per_year}),
        "rights": [_right_raw(r) for r in p.rights],
    }
    if p.valuation == "simulation":
        out["valuation"] = "simulation"
        if p.simulation is not None:
            out["simulation"] = _simulation_raw(p.simulation)
        if lat == LatticeSpec():          # not used there (the loader warns about a lattice)
            del out["lattice"]
    return out


def _same(q: Project, p: Project) -> bool:
    return replace(q, source=p.source, warnings=p.warnings) == p


class Copier:
    """Moved copies of one project: ``copier(overrides)`` sets each dotted key path of
    ``overrides`` (as ``--set`` does) on a fresh copy of the raw tree and validates it with the
    loader. ``route`` says which raw tree: "file" (``Project.origin``) or "values"
    (:func:`project_tree`); ``problem`` is set (and ``route`` None) when neither rebuilds the
    project exactly."""

    def __init__(self, project: Project):
        self.project = project
        self.route: str | None = None
        self.problem: str | None = None
        self._frozen: dict | None = None
        tries = []
        if project.origin is not None:
            tries.append(("file", project.origin[0], project.origin[1]))
        tries.append(("values", None, "."))
        for route, data, folder in tries:
            if data is None:
                try:
                    data = project_tree(project)
                except (AttributeError, TypeError, ValueError) as err:
                    self.problem = f"its values cannot be written as a project file ({err})"
                    continue
            self.data, self.folder = data, folder
            try:
                rebuilt = self(())
            except RealoptError as err:
                self.problem = str(err).splitlines()[-1].strip(" -")
                continue
            if _same(rebuilt, project):
                self.route, self.problem = route, None
                return
            self.problem = ("the copy rebuilt from its inputs differs from the project (changed "
                            "after loading, or holding values a project file cannot state)")

    def __call__(self, overrides) -> Project:
        """The project with ``overrides`` (mapping or pairs of dotted key -> raw value)."""
        items = dict(overrides)
        tree = Tree(copy.deepcopy(self.data), file=self.project.source or "<project>")
        if items:
            apply_overrides(tree, items, {k: f"sensitivity move {k}" for k in items})
        return build_project(tree, self.folder)

    def volatility(self, sigma: float) -> dict:
        """Overrides setting the volatility the lattice uses to ``sigma`` (see module doc)."""
        u = self.project.underlying
        if u.drivers is None or u.volatility_estimate is None:
            return {"underlying.volatility": sigma}
        if self._frozen is None:
            if u.terminal_value == 0.0:       # the appraisal's own flows (nothing added to them)
                res = resolve(self.project)
                flows = tuple(zip(res.flow_times, res.cash_flows))
            else:
                from ..drivers import simulate_underlying

                flows = simulate_underlying(u.drivers, u.volatility_estimate,
                                            self.project.market).cash_flows
            raw = self.data.get("underlying") or {}
            keep = {k: v for k, v in raw.items() if k not in DRIVER_FORM_KEYS + ("volatility",)}
            self._frozen = {**keep, "cash_flows": _years_raw(flows)}
        return {"underlying": {**copy.deepcopy(self._frozen), "volatility": sigma}}


def _investment(p: Project, k: float) -> dict:
    return {"investment.cost": {y: a * k for y, a in p.investment.outlays}}


def _money_inputs(p: Project):
    """(label, overrides(k)) for each money input; k multiplies it."""
    out: list[tuple[str, Callable[[float], dict]]] = []
    u = p.underlying
    out.append(("Investment cost", lambda k: _investment(p, k)))
    if u.drivers is not None:
        out.append(("Expected cash flows", lambda k: {
            "underlying.cash_flow": f"({u.drivers.cash_flow}) * {k!r}",
            "underlying.terminal_value": u.terminal_value * k}))
    elif u.cash_flows:
        out.append(("Expected cash flows", lambda k: {
            "underlying.cash_flows": {y: c * k for y, c in u.cash_flows},
            "underlying.terminal_value": u.terminal_value * k}))
    elif u.present_value is not None:
        out.append(("Present value of the project", lambda k: {
            "underlying.present_value": u.present_value * k}))
    for i, r in enumerate(p.rights):         # each type states its own money inputs
        out += r.money_inputs(f"rights.{i}")
    return out


def _scale_inputs(p: Project):
    """(label, base scale, cap, overrides(k)) for each scale input; k multiplies it."""
    out = []
    for i, r in enumerate(p.rights):         # each type states its own scale inputs
        out += r.scale_inputs(f"rights.{i}")
    return out


def _cost_overrides(p: Project, k: float) -> dict:
    """Every outlay and any defer right's own cost times k (the cost break-even's move)."""
    out = _investment(p, k)
    for i, r in enumerate(p.rights):
        out.update(r.cost_overrides(f"rights.{i}", k))
    return out


@dataclass(frozen=True)
class Case:
    """One input of the tornado: its label, the two settings as text, and the overrides (dotted
    key -> raw value) of the low and high copies."""

    input: str
    low_setting: str
    high_setting: str
    low: dict
    high: dict


def cases(appraisal, moves: Moves = DEFAULT_MOVES, copier: Copier | None = None):
    """The tornado's inputs with their overrides, and notes on inputs that are not moved."""
    p = appraisal.project
    copier = copier or Copier(p)
    out: list[Case] = []
    notes = []
    if p.lattice.explicit:
        notes.append("Volatility is not moved: the lattice uses explicit up/down factors.")
    elif appraisal.volatility is not None:
        s = appraisal.volatility
        lo, hi = max(0.01, s - moves.volatility), s + moves.volatility
        out.append(Case("Volatility", _pct(lo), _pct(hi), copier.volatility(lo),
                        copier.volatility(hi)))
    for key, label in (("risk_free_rate", "Risk-free rate"), ("discount_rate", "Discount rate")):
        if key == "discount_rate" and p.underlying.present_value is not None \
                and not p.underlying.cash_flows and p.underlying.drivers is None:
            notes.append("Discount rate is not moved: the project value is given as a present "
                         "value, so the discount rate does not enter the valuation.")
            continue
        base = getattr(p.market, key)
        lo, hi = base - moves.rates, base + moves.rates
        out.append(Case(label, _pct(lo), _pct(hi), {f"market.{key}": lo},
                        {f"market.{key}": hi}))
    k_lo, k_hi = 1.0 - moves.relative, 1.0 + moves.relative
    for label, build in _money_inputs(p):
        out.append(Case(label, f"x{k_lo:g}", f"x{k_hi:g}", build(k_lo), build(k_hi)))
    for label, base, cap, build in _scale_inputs(p):
        hi = base * k_hi if cap is None else min(cap, base * k_hi)
        out.append(Case(label, _pct(base * k_lo), _pct(hi), build(k_lo), build(k_hi)))
    return out, notes


def _not_rebuilt(copier: Copier) -> str:
    return (f"No sensitivity is computed: moved copies of the project are made by the project "
            f"loader, and {copier.problem}.")


def _pct(x: float) -> str:
    return f"{x * 100:.3g}%"


def _quick(project: Project, decision: bool = True):
    from ..appraisal import quick_appraisal

    return quick_appraisal(project, decision=decision)


def tornado(appraisal, moves: Moves = DEFAULT_MOVES,
            copier: Copier | None = None) -> tuple[list[TornadoRow], list[str]]:
    """Rows of the tornado, largest swing of expanded NPV first; notes on skipped inputs."""
    copier = copier or Copier(appraisal.project)
    if copier.route is None:
        return [], [_not_rebuilt(copier)]
    try:
        todo, notes = cases(appraisal, moves, copier)
    except RealoptError as err:           # the drivers' simulation of the volatility move
        return [], [f"No sensitivity is computed: {err}"]
    rows = []
    for c in todo:
        try:
            s_lo, e_lo, _ = _quick(copier(c.low), decision=False)
            s_hi, e_hi, _ = _quick(copier(c.high), decision=False)
        except RealoptError as err:
            notes.append(f"{c.input} is not moved: {err}")
            continue
        rows.append(TornadoRow(c.input, c.low_setting, c.high_setting, e_lo, e_hi, e_lo - s_lo,
                               e_hi - s_hi))
    rows.sort(key=lambda r: -r.swing)
    return rows, notes


def _search(decide, today: float, lo: float, hi: float, base: str):
    """Nearest point below and above ``today`` in [lo, hi] where decide(x) != base."""
    def first_change(points):
        prev = today
        for x in points:
            d = decide(x)
            if d is not None and d != base:
                a, b = prev, x                     # base at a, changed at b
                for _ in range(BISECT_STEPS):
                    mid = 0.5 * (a + b)
                    dm = decide(mid)
                    if dm is None or dm == base:
                        a = mid
                    else:
                        b, d = mid, dm
                return 0.5 * (a + b), d
            if d is not None:
                prev = x
        return None, None

    n = SCAN_POINTS
    down = [today - (today - lo) * (k + 1) / n for k in range(n)] if today > lo else []
    up = [today + (hi - today) * (k + 1) / n for k in range(n)] if today < hi else []
    below, d_below = first_change(down)
    above, d_above = first_change(up)
    return below, d_below, above, d_above


def breakevens(appraisal, copier: Copier | None = None) -> list[BreakEven]:
    """Volatility and investment cost at which the decision today changes (see module doc)."""
    p = appraisal.project
    base = appraisal.decision_today
    out = []
    copier = copier or Copier(p)
    if copier.route is None:
        return out

    def decide_with(overrides):
        def decide(x):
            try:
                return _quick(copier(overrides(x)))[2]
            except RealoptError:
                return None
        return decide

    if not p.lattice.explicit and appraisal.volatility is not None:
        s = appraisal.volatility
        b, db, a, da = _search(decide_with(copier.volatility), s, *VOL_RANGE, base)
        out.append(BreakEven("Volatility", s, b, db, a, da, VOL_RANGE, "sigma"))

    today = appraisal.investment_pv            # every outlay moves by k, so its PV by k
    if today > 0:
        b, db, a, da = _search(decide_with(lambda k: _cost_overrides(p, k)), 1.0, *COST_RANGE, base)
        out.append(BreakEven("Investment cost", today, None if b is None else b * today, db,
                             None if a is None else a * today, da,
                             (COST_RANGE[0] * today, COST_RANGE[1] * today), "money"))
    return out


def report_solves(project: Project) -> float:
    """Lattice solves the report adds after the appraisal, in units of one solve of the whole
    project at its own grid (for the command line's memory/time guard): two per tornado input,
    the break-even scans and bisections at most, and the convergence grids (cost ~ steps^2)."""
    inputs = 3 + len(list(_money_inputs(project))) + len(list(_scale_inputs(project)))
    solves = 2.0 * inputs + 4.0 * (SCAN_POINTS + BISECT_STEPS)
    if not project.lattice.explicit:
        chosen = int(project.lattice.steps_per_year)
        for f in (0.25, 0.5, 2, 4, 8, 16):
            n = max(1, round(chosen * f))
            if n * float(project.horizon) <= MAX_CONVERGENCE_STEPS:
                solves += (n / chosen) ** 2
    return solves


def convergence(appraisal, copier: Copier | None = None) -> Convergence | None:
    """Expanded NPV over steps per year (x1/4 .. x16 of the chosen grid, capped in total
    steps); None for explicit up/down trees, whose step is fixed by the file."""
    from ..appraisal import expanded_npv

    p = appraisal.project
    if p.lattice.explicit:
        return None
    copier = copier or Copier(p)
    if copier.route is None:
        return None
    chosen = int(p.lattice.steps_per_year)
    horizon = float(p.horizon)
    grid = sorted({max(1, round(chosen * f)) for f in (0.25, 0.5, 1, 2, 4, 8, 16)})
    grid = [n for n in grid if n == chosen or n * horizon <= MAX_CONVERGENCE_STEPS]
    values = []
    for n in grid:
        if n == chosen:
            values.append(appraisal.expanded_npv)
        else:
            values.append(expanded_npv(copier({"lattice.steps_per_year": n})))
    finest = values[-1]
    gap = abs(appraisal.expanded_npv - finest) / abs(finest) if finest else None
    tol = SETTLED * abs(finest) if finest else 1e-12
    settled_at = None
    for k in range(len(grid) - 1):
        if all(abs(v - finest) <= tol for v in values[k:-1]):
            settled_at = grid[k]
            break
    return Convergence(tuple(grid), tuple(values), chosen, gap, settled_at)


def analyse(appraisal, moves: Moves = DEFAULT_MOVES) -> Sensitivity:
    """Tornado, break-evens and convergence for ``appraisal`` (see the module doc)."""
    copier = Copier(appraisal.project)
    rows, notes = tornado(appraisal, moves, copier)
    if copier.route == "values" and appraisal.project.origin is not None:
        notes.insert(0, "The project was changed after it was loaded: moved copies are made "
                        "from its values written back as a project file.")
    return Sensitivity(moves=moves, base_expanded=appraisal.expanded_npv,
                       base_flexibility=appraisal.flexibility_value,
                       decision_today=appraisal.decision_today, rows=tuple(rows),
                       breakevens=tuple(breakevens(appraisal, copier)),
                       convergence=convergence(appraisal, copier), notes=tuple(notes))
