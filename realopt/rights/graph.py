"""Decision rights -> a state graph (networkx DiGraph) of the project's possible situations.

A state records whether the project is invested, which one-shot rights (expand, contract) have
been used, the current mode of each switch right, or that it was abandoned (absorbing). Each state
carries ``scale`` (multiplier on the base project's future cash flows) and ``fixed`` (yearly flow
in that state, + = inflow). Each right contributes edges (source, target, money on exercise).

Usage rules (documented in docs/design.md, section 3, and docs/file-format.md):
* defer is the only edge out of "not yet invested"; every other right needs the project invested;
* expand/contract are used at most once; switch edges may be taken any number of times;
* abandon pays salvage and ends the project, from every invested state;
* ``requires: [A]``: the right is available only once A has been used (defer: invested; a switch:
  while it is in a mode other than its start mode); ``excludes: [B]``: the right is unavailable
  once B has been used and B is unavailable once this right has been used (symmetric). A
  requirement on the defer right always holds: every other right needs the project invested, and
  without the defer right the project is committed today;
* the base project (no right used) has every switch in its start mode, in every subset of rights:
  a switch left out of a subset is *held* in its start mode (it scales the states, no edges).
"""
from __future__ import annotations

from dataclasses import dataclass, replace
from functools import cached_property

from ..errors import ValuationError
from ..model import Right, Schedule
from .base import Action

MAX_STATES = 4096


@dataclass(frozen=True)
class State:
    """A situation of the project; ``invested`` and ``abandoned`` are its flags (outputs read
    them, never the label)."""

    invested: bool
    abandoned: bool
    used: frozenset          # names of one-shot rights used (expand, contract)
    modes: tuple             # current mode of each switch right, in file order
    scale: float
    fixed: float
    label: str


@dataclass(frozen=True)
class Edge:
    """Exercising ``right`` (of type ``kind``) moves ``source`` -> ``target``; ``sign`` *
    amount(t) is received (sign -1: a cost is paid; +1: salvage or savings are received).
    ``action`` says what the move does; ``label`` is its wording."""

    source: int
    target: int
    right: str
    kind: str
    amount: Schedule
    sign: int
    label: str               # e.g. "expand", "run -> idle"
    action: Action = Action.COMMIT


@dataclass(frozen=True)
class StateGraph:
    states: tuple[State, ...]
    edges: tuple[Edge, ...]
    initial: int
    rights: tuple[Right, ...]

    @cached_property
    def graph(self):
        """The states and edges as a networkx DiGraph (built on first use: networkx is slow to
        import and only the outputs need it). Node attributes label, scale, fixed, invested,
        abandoned; edge attributes rights (names), label, action, amount (text), sign."""
        import networkx as nx

        g = nx.DiGraph()
        for k, s in enumerate(self.states):
            g.add_node(k, label=s.label, scale=s.scale, fixed=s.fixed, invested=s.invested,
                       abandoned=s.abandoned)
        for e in self.edges:
            if g.has_edge(e.source, e.target):
                g.edges[e.source, e.target]["rights"].append(e.right)
            else:
                g.add_edge(e.source, e.target, rights=[e.right], label=e.label,
                           action=e.action, amount=e.amount.describe(), sign=e.sign)
        return g

    def index(self, *, invested=True, used=frozenset(), modes=None) -> int | None:
        """Index of the state with these attributes (modes default: every switch at its start)."""
        if modes is None:
            modes = tuple(r.start for r in self.rights if r.modal)
        for k, s in enumerate(self.states):
            if (not s.abandoned and s.invested == invested and s.used == frozenset(used)
                    and s.modes == tuple(modes)):
                return k
        return None


def prepared_rights(project) -> tuple[Right, ...]:
    """The project's rights with a defer right's cost made explicit: by default the investment
    outlay plan shifted to the exercise date, worth its present value at that date (risk-free).
    Committing today through the defer right always costs the investment's present value (the
    commitment of the static NPV); a cost schedule given in the file applies at later dates."""
    ipv = project.investment.present_value(project.market)
    out = []
    for r in project.rights:
        if r.commits:
            if r.cost is None:
                r = replace(r, cost=Schedule.constant(ipv))
            elif abs(r.cost.at(0.0) - ipv) > 1e-12 * max(1.0, abs(ipv)):
                r = replace(r, cost=replace(r.cost, today=ipv))
        out.append(r)
    return tuple(out)


def _live_requires(r, by_name) -> tuple[str, ...]:
    """``r.requires`` less the defer rights (a requirement on the defer right always holds)."""
    return tuple(q for q in r.requires if not getattr(by_name.get(q), "commits", False))


def usable_subset(rights, names) -> tuple[Right, ...]:
    """The rights named in ``names`` whose ``requires`` are (transitively) inside the subset. A
    requirement on the defer right is met without it: the project is then committed today (and
    an exclusion with the defer right is then in force)."""
    by_name = {r.name: r for r in rights}
    # a right excluded with the defer right can never be used: the project is committed (the
    # defer right "used") from the start, with the defer right or without it (committed today)
    defers = {r.name for r in rights if r.commits}
    never = {r.name for r in rights if not r.commits and set(r.excludes) & defers}
    never |= {x for r in rights if r.commits for x in r.excludes}
    keep = {r.name: r for r in rights if r.name in names and r.name not in never}
    changed = True
    while changed:
        changed = False
        for name, r in list(keep.items()):
            if any(q not in keep for q in _live_requires(r, by_name)):
                del keep[name]
                changed = True
    out = []
    for r in rights:
        if r.name in keep:
            if any(q not in keep for q in r.requires):      # a defer right left out: met today
                r = replace(r, requires=tuple(q for q in r.requires if q in keep))
            out.append(r)
    return tuple(out)


def requirement_closure(rights, name) -> frozenset:
    """``name`` plus every right it requires, directly or indirectly (a defer right only where
    it is ``name`` itself: a requirement on it holds without it)."""
    by_name = {r.name: r for r in rights}
    out, todo = set(), [name]
    while todo:
        n = todo.pop()
        if n in out or n not in by_name:
            continue
        out.add(n)
        todo.extend(_live_requires(by_name[n], by_name))
    return frozenset(out)


def held_switches(rights, subset) -> tuple[Right, ...]:
    """The switches (modal rights) of ``rights`` left out of ``subset``: held in their start
    modes."""
    names = {r.name for r in subset}
    return tuple(r for r in rights if r.modal and r.name not in names)


def base_description(rights, what: str = "the cash flows as given") -> str:
    """One line on the base project every subset of rights values: ``what``, with each switch in
    its start mode where that mode is not the plain project (scale 1, no fixed flow)."""
    parts = [t for t in (r.base_part() for r in rights) if t]
    text = f"Base project: {what}"
    return text + (", with " + " and ".join(parts) if parts else "")


def base_scale_fixed(rights) -> tuple[float, float]:
    """(scale, fixed yearly flow) of the base project: every switch in its start mode."""
    return _scale_fixed(rights, frozenset(), tuple(r.start for r in rights if r.modal))


def _scale_fixed(rights, used, modes, held=()):
    scale, fixed = 1.0, 0.0
    for sw in held:
        k, add = sw.scale_fixed(used, sw.start)
        scale *= k
        fixed += add
    for r in rights:
        if not r.modal:
            k, add = r.scale_fixed(used, None)
            if k != 1.0:
                scale *= k
            fixed += add
    for sw, m in zip([r for r in rights if r.modal], modes):
        k, add = sw.scale_fixed(used, m)
        scale *= k
        fixed += add
    return scale, fixed


def _label(rights, invested, abandoned, used, modes):
    if abandoned:
        return "abandoned"
    if not invested:
        return "not yet invested"
    parts = [r.name for r in rights if r.name in used]
    switches = [r for r in rights if r.modal]
    parts += [f"{m} mode" for sw, m in zip(switches, modes) if m != sw.start]
    return "operating" if not parts else "operating, " + ", ".join(parts)


def build_state_graph(rights: tuple[Right, ...], held: tuple[Right, ...] = ()) -> StateGraph:
    """Compile ``rights`` into the state graph by search from the initial state; validates it.
    ``held``: switches outside ``rights`` that stay in their start modes (see held_switches)."""
    switches = [r for r in rights if r.modal]
    sw_index = {r.name: k for k, r in enumerate(switches)}
    defer = next((r for r in rights if r.commits), None)
    by_name = {r.name: r for r in rights}
    excluded_by = {r.name: set(r.excludes) for r in rights}
    for r in rights:                                   # excludes is symmetric
        for x in r.excludes:
            excluded_by.setdefault(x, set()).add(r.name)

    def used_in(name, key):
        invested, abandoned, used, modes = key
        r = by_name.get(name)
        if r is None:
            return False
        return r.is_used(invested, abandoned, used, modes, sw_index.get(name))

    start_modes = tuple(r.start for r in switches)
    initial = (defer is None, False, frozenset(), start_modes)
    ABANDONED = (True, True, frozenset(), ())
    keys = [initial]
    index = {initial: 0}
    raw_edges = []
    k = 0
    while k < len(keys):
        key = keys[k]
        invested, abandoned, used, modes = key
        k += 1
        if abandoned:
            continue
        moves = []
        if not invested:
            moves.append((defer, (True, False, used, modes), defer.cost, -1, Action.COMMIT,
                          "commit"))
        else:
            for r in rights:
                if r.commits:
                    continue
                if not all(used_in(q, key) for q in _live_requires(r, by_name)):
                    continue
                if any(used_in(x, key) for x in excluded_by.get(r.name, ())):
                    continue
                for new_used, new_modes, amount, sign, action, label in r.moves(
                        used, modes, sw_index.get(r.name)):
                    target = ABANDONED if new_modes is None else (True, False, frozenset(
                        new_used), new_modes)
                    moves.append((r, target, amount, sign, action, label))
        for r, target, amount, sign, action, label in moves:
            if target not in index:
                if len(keys) >= MAX_STATES:
                    raise ValuationError(
                        f"The rights combine into more than {MAX_STATES} project states; value "
                        "fewer rights together (split the project) or merge similar rights.")
                index[target] = len(keys)
                keys.append(target)
            raw_edges.append(Edge(index[key], index[target], r.name, r.kind, amount, sign, label,
                                  action))

    states = []
    for key in keys:
        invested, abandoned, used, modes = key
        scale, fixed = (0.0, 0.0) if (abandoned or not invested) else _scale_fixed(
            rights, used, modes, held)
        states.append(State(invested, abandoned, used, modes, scale, fixed,
                            _label(rights, invested, abandoned, used, modes)))

    if defer is not None and defer.cost is None:
        raise ValuationError("internal: a defer right's cost must be resolved before the graph")
    sg = StateGraph(tuple(states), tuple(raw_edges), 0, tuple(rights))
    check_state_graph(sg)
    return sg


def check_state_graph(sg: StateGraph) -> None:
    """Every state reachable from the initial one, nothing returns to "not yet invested",
    abandonment absorbing. Raises ValuationError (these hold by construction; a failure is a bug
    or an impossible combination of rights)."""
    out = {k: set() for k in range(len(sg.states))}
    for e in sg.edges:
        out[e.source].add(e.target)
    reach, todo = {sg.initial}, [sg.initial]
    while todo:
        for t in out[todo.pop()] - reach:
            reach.add(t)
            todo.append(t)
    if len(reach) != len(sg.states):
        raise ValuationError("internal: unreachable states in the rights graph")
    targets = {e.target for e in sg.edges}
    for k, s in enumerate(sg.states):
        if not s.invested and k in targets:
            raise ValuationError("internal: an edge returns to 'not yet invested'")
        if s.abandoned and out[k]:
            raise ValuationError("internal: the abandoned state is not absorbing")


def unusable_rights(sg: StateGraph) -> list[str]:
    """Rights that no state allows (e.g. a requirement that an exclusion makes impossible)."""
    seen = {e.right for e in sg.edges}
    return [r.name for r in sg.rights if r.name not in seen]


def _open_at(r: Right, t: float) -> bool:
    """Whether the file's exercise dates of ``r`` include the date t (years)."""
    a, b = r.window
    if r.exercise == "european":
        return abs(b - t) < 1e-9
    if r.exercise == "bermudan":
        return any(abs(d - t) < 1e-9 for d in r.dates if a - 1e-12 <= d <= b + 1e-12)
    return a - 1e-9 <= t <= b + 1e-9


def structure_warnings(sg: StateGraph, last_flow_year: float | None, horizon: float, *,
                       terminal_value: float | None = None) -> list[str]:
    """Warnings about how the rights meet the forecast (shown by ``check`` and ``appraise``);
    each names the right it concerns. These bear on the headline numbers.

    The project ends at its last cash-flow date L: no right can be used after L; at L the rights
    are decided after that year's flow and before the terminal value, so a sale there replaces
    the terminal value (or, for a contraction, its share of it)."""
    dead = unusable_rights(sg)
    out = [f"Right '{name}' can never be used: its requires/excludes rule out every state; it "
           "adds nothing." for name in dead]
    if last_flow_year is None:
        return out
    last = last_flow_year
    for r in sg.rights:
        if r.name in dead:
            continue
        if r.window[1] > last + 1e-9:
            never = r.window[0] > last + 1e-9 or (
                r.exercise == "european") or (r.exercise == "bermudan" and not any(
                    d <= last + 1e-9 for d in r.dates))
            out.append(f"'{r.name}': its window runs to year {r.window[1]:g}, past the last "
                       f"cash-flow year ({last:g}), where the project ends; "
                       + (f"'{r.name}' can never be used." if never else
                          f"'{r.name}' is not used after year {last:g}.")
                       + " End the window by the last cash-flow year, or extend the cash flows.")
        if r.proceeds and _open_at(r, last):
            what = r.proceeds
            if terminal_value is not None and terminal_value == 0:
                out.append(f"'{r.name}' can be used at the last cash-flow year ({last:g}), when "
                           f"nothing is left of the project (no terminal value): using it there "
                           f"collects its {what} for giving up nothing. End the window before "
                           f"year {last:g} unless the {what} can truly be had then.")
            else:
                tv = " (if any)" if terminal_value is None else f" ({terminal_value:,.4g})"
                share = r.terminal_share()
                out.append(f"'{r.name}' can be used at the last cash-flow year ({last:g}), when "
                           f"only the terminal value{tv} is left: decided before the terminal "
                           f"value is paid, its {what} there {share}. Check that the terminal "
                           f"value and the {what} at year {last:g} describe the same end of the "
                           "project.")
    return out
