"""Checks that need several sections: links between rights (requires/excludes), dates on an
explicit tree's grid, and the warnings and problems that read the market, underlying, investment
and lattice together. They run last, once every section has been read."""
from __future__ import annotations

import difflib

from ..errors import ProjectError
from .paths import Index


class CrossChecks:
    def links(self, path, rights, at=None, known=None):
        """requires/excludes: known names, not self, requires never an abandon right, no cycle.
        ``at``: each right's index in the file's list; ``known``: every name in the file (when
        some rights failed to build: only the spelling of the names is checked then)."""
        at = list(range(len(rights))) if at is None else at
        index = {r.name: k for k, r in enumerate(rights)}
        names = list(index) if known is None else list(dict.fromkeys(known))
        if known is not None:
            for k, r in enumerate(rights):
                for key in ("requires", "excludes"):
                    for j, target in enumerate(getattr(r, key)):
                        if target not in names:
                            hint = difflib.get_close_matches(target, names, n=1)
                            self.bad(path + (Index(at[k]), key, Index(j)),
                                     f'"{target}", which is not the name of a right',
                                     f"one of: {', '.join(names)}",
                                     f"did you mean {hint[0]}?" if hint else "check the spelling")
            return
        for i, r in enumerate(rights):
            if r.commits and r.requires:
                self.bad(path + (Index(i), "requires"), f"requires on the defer right {r.name}",
                         "no requires on a defer right (committing is the first decision)",
                         "delete requires here; put it on the rights that follow the commitment")
            for key in ("requires", "excludes"):
                for j, target in enumerate(getattr(r, key)):
                    p = path + (Index(i), key, Index(j))
                    if target == r.name:
                        self.bad(p, f"the right's own name {target}",
                                 f"the name of another right in {key}",
                                 f"delete {target} from {key}")
                    elif target not in index:
                        hint = difflib.get_close_matches(target, names, n=1)
                        self.bad(p, f'"{target}", which is not the name of a right',
                                 f"one of: {', '.join(names)}",
                                 f"did you mean {hint[0]}?" if hint else "check the spelling")
                    elif key == "requires" and rights[index[target]].ends:
                        self.bad(p, f"{target}, an abandon right", "a defer, expand, contract "
                                 "or switch right (nothing can follow abandonment)",
                                 f"delete {target} from requires")
            both = set(r.requires) & set(r.excludes)
            for target in sorted(both):
                self.bad(path + (Index(i), "excludes"), f"{target} both required and excluded",
                         "each name in requires or excludes, not both", f"delete {target} from "
                         "one of them")
            for target in r.requires:
                if target in index and r.name in rights[index[target]].excludes:
                    self.bad(path + (Index(i), "requires"), f"{target}, which excludes "
                             f"{r.name}", "requirements that can be met",
                             f"{r.name} could never be used; drop one of the two conditions")
        # cycles in requires (depth-first search; states: 1 = on the path, 2 = done)
        state: dict[str, int] = {}

        def visit(n, trail):
            state[n] = 1
            for m in rights[index[n]].requires:
                if m not in index or m == n:
                    continue
                if state.get(m) == 1:
                    cycle = trail[trail.index(m):] + [m]
                    self.bad(path + (Index(index[n]), "requires"), "a cycle: "
                             + " -> ".join(cycle), "requirements without cycles (a right "
                             "cannot wait for itself)", f"delete {m} from the requires of {n}")
                elif m not in state:
                    visit(m, trail + [m])
            state[n] = 2

        for n in names:
            if n not in state:
                visit(n, [n])

    def on_grid(self, path, rights, dt):
        for i, r in enumerate(rights):
            for d in r.window + r.dates:
                k = d / dt
                if abs(k - round(k)) > 1e-9:
                    self.bad(path + (Index(i), "window"), f"the date {d:g}, between the tree's "
                             f"steps of {dt:g} years", "dates on the explicit tree's grid "
                             f"(multiples of step_years = {dt:g})", "move the date onto a step")

    def cross_checks(self, market, underlying, investment, rights, lattice):
        """Warnings that need several sections (each points at the key to look at)."""
        ipv = investment.present_value(market)
        for i, r in enumerate(rights):
            if r.commits and r.cost is not None:
                c0 = r.cost.at(0.0)
                if abs(c0 - ipv) > 1e-9 * max(1.0, abs(ipv)):
                    self.warn(("rights", Index(i), "cost"),
                              f"{r.name}: the cost of committing at year 0 is {c0:,.4g} but "
                              f"investment.cost is worth {ipv:,.4g} today; committing today "
                              f"through '{r.name}' costs the investment's present value (the "
                              "same commitment as the static NPV) and this cost applies at its "
                              "later exercise dates; leave out the right's cost to use the "
                              "investment plan throughout, or make them agree")
        # windows past the last cash-flow year: warned by the valuation (realopt.appraisal)
        if lattice.explicit and underlying.cash_flows:
            for y, _ in underlying.cash_flows:
                k = y / lattice.step_years
                if abs(k - round(k)) > 1e-9:
                    self.bad(("underlying", "cash_flows", y), f"year {y:g}, between the tree's "
                             f"steps of {lattice.step_years:g} years", "cash-flow years on the "
                             "explicit tree's grid", "use steps_per_year, or move the flow",
                             at="key")
        if self.problems:
            raise ProjectError(sorted(self.problems, key=lambda p: (p.line or 0, p.column or 0)))

