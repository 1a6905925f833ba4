"""The builder: one object that reads every section in dependency order and collects every
problem (see the package docstring for the order)."""
from __future__ import annotations

from dataclasses import replace

from .. import model, validate
from .. import project_simulation as simulation_keys
from ..errors import ProjectError
from .crosschecks import CrossChecks
from .drivers_section import DriverSections
from .keys import TOP_KEYS
from .market import MarketSections
from .primitives import _ABSENT, Primitives
from .reading import _fatal
from .rights_section import RightsSection
from .underlying_section import UnderlyingSection


class _Builder(MarketSections, UnderlyingSection, DriverSections, RightsSection, CrossChecks,
               Primitives):
    def build(self) -> model.Project:
        data = self.tree.data
        if data is None and not self.tree.overridden:
            _fatal(self.file, "an empty document (no keys at all)",
                   "a project: the sections project, market, underlying, investment and rights",
                   "start from one of the demo files in projects/")
        top = self.mapping((), data, TOP_KEYS, "a mapping with the sections project, market, "
                           "underlying, investment, lattice and rights")
        if top is None:
            raise ProjectError(self.problems)
        for key, what in (("project", "the project's name"), ("market", "the rates"),
                          ("underlying", "the operating project's value and volatility"),
                          ("investment", "the investment cost")):
            if key not in top:
                self.missing((key,), f"a {key} section ({what})",
                             "add it; see the project file reference in the README")
        sec = {k: top.get(k, _ABSENT) for k in TOP_KEYS}
        simulation_keys.read_valuation(self, top)
        name, currency, unit = self.project_section(sec["project"])
        form = self.underlying_form(sec["underlying"])
        market = self.market(sec["market"], form)
        lattice = self.lattice(sec["lattice"])
        underlying = self.underlying(sec["underlying"], form, lattice)
        investment = self.investment(sec["investment"], market)
        rights = self.rights(sec["rights"], lattice)
        simulation_keys.finish(self, underlying, rights)
        if self.problems:
            raise ProjectError(sorted(self.problems, key=lambda p: (p.line or 0, p.column or 0)))
        project = model.Project(name=name, market=market, underlying=underlying,
                                investment=investment, rights=rights, lattice=lattice,
                                currency=currency, unit=unit, source=self.file,
                                valuation=self.valuation, simulation=self.simulation_spec)
        # the model's own rules (realopt.validate), located in the file; the sections read the
        # same rules, so this finds nothing unless a section forgot one
        for issue in validate.issues(project):
            self.bad(issue.path, issue.found, issue.expected, issue.fix)
        if self.problems:
            raise ProjectError(sorted(self.problems, key=lambda p: (p.line or 0, p.column or 0)))
        self.cross_checks(market, underlying, investment, rights, lattice)
        return replace(project, warnings=tuple(self.warnings))

