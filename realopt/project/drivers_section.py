"""The drivers form of section underlying: cash-flow years, driver processes, their correlations
(checked positive semi-definite) and the cash-flow formula over the driver names."""
from __future__ import annotations

import difflib
import keyword
import re

from .. import model, validate
from .. import project_simulation as simulation_keys
from .paths import Index, describe
from .primitives import _optional_module

_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


class DriverSections:
    def driver_model(self, path, d):
        ok = True
        for k, what in (("years", "the cash-flow years [first, last]"),
                        ("drivers", "a mapping of driver names to their processes"),
                        ("cash_flow", "the cash-flow formula over the driver names")):
            if k not in d:
                self.missing(path + (k,), what)
                ok = False
        if not ok:
            return None
        years = None
        y = d["years"]
        if isinstance(y, list) and len(y) == 2:
            first, last = validate.YEARS
            a = self.integer(path + ("years", Index(0)), y[0], first.expected, **first.bounds)
            b = self.integer(path + ("years", Index(1)), y[1], last.expected, **last.bounds)
            if a is not None and b is not None:
                if a > b:
                    self.bad(path + ("years",), f"[{a}, {b}]", "[first, last] with first <= last",
                             f"write [{b}, {a}]")
                else:
                    years = (a, b)
        else:
            self.bad(path + ("years",), describe(y), "[first, last] cash-flow years, e.g. [1, 15]")
        drivers = self.drivers(path + ("drivers",), d["drivers"])
        names = {dr.name: dr for dr in drivers} if drivers else {}
        self.driver_names = names
        corr = self.correlation(path + ("correlation",), d.get("correlation"), names)
        tax = 0.0
        if d.get("tax_rate") is not None:
            tax = self.field(path + ("tax_rate",), d["tax_rate"], model.DriverModel, "tax_rate")
        formula = self.formula(path + ("cash_flow",), d["cash_flow"], names)
        if None in (years, drivers, corr, tax, formula):
            return None
        return model.DriverModel(years=years, drivers=drivers, cash_flow=formula,
                                 correlation=corr, tax_rate=tax)

    def drivers(self, path, value):
        if not isinstance(value, dict) or not value:
            self.bad(path, describe(value), "a mapping of driver names to processes, e.g. "
                     "price: {process: gbm, start: 52, drift: 0.02, volatility: 0.25}")
            return None
        out, ok = [], True
        for name, spec in value.items():
            p = path + (name,)
            if not isinstance(name, str) or not _NAME.match(name) or keyword.iskeyword(name):
                self.bad(p, f"the driver name {name}", "a name of letters, digits and _ that "
                         "does not start with a digit (it is used in the formula)",
                         "rename it, e.g. unit_cost", at="key")
                ok = False
                continue
            dr = self.driver(p, name, spec)
            ok = ok and dr is not None
            if dr is not None:
                out.append(dr)
        return tuple(out) if ok else None

    def driver(self, path, name, spec):
        if isinstance(spec, (int, float)) and not isinstance(spec, bool):
            return model.Driver(name=name, process="schedule",
                                schedule=model.Schedule.constant(float(spec)))
        if not isinstance(spec, dict):
            self.bad(path, describe(spec), "a driver: {process: gbm, ...}, {process: "
                     "mean_reverting, ...} or {schedule: {year: value}}")
            return None
        if "schedule" in spec and spec.get("process", "schedule") == "schedule":
            self.mapping(path, spec, ("process", "schedule"), "a deterministic driver")
            s = self.schedule(path + ("schedule",), spec["schedule"], f"the values of {name}")
            return model.Driver(name=name, process="schedule", schedule=s) if s else None
        if "process" not in spec:
            self.missing(path + ("process",), "process: gbm or mean_reverting (or a schedule:)")
            return None
        proc = self.choice(path + ("process",), spec["process"], validate._STOCHASTIC,
                           "the driver's process")
        if proc is None:
            return None
        need = {"gbm": ("start", "volatility"),
                "mean_reverting": ("start", "long_run", "speed", "volatility")}[proc]
        keys = ("process",) + need + (("drift",) if proc == "gbm" else ()) + ("risk_neutral",)
        self.mapping(path, spec, keys, f"a {proc} driver")
        vals = {}
        rn = None
        if spec.get("risk_neutral") is not None:
            rn = simulation_keys.risk_neutral(self, path + ("risk_neutral",),
                                              spec["risk_neutral"], proc)
            if rn is None:
                return None
        for k in keys[1:-1]:
            if k not in spec:
                if k == "drift":
                    vals[k] = 0.0
                    continue
                self.missing(path + (k,), validate.rule_for(model.Driver, k).expected)
                vals[k] = None
                continue
            vals[k] = self.field(path + (k,), spec[k], model.Driver, k)
        if any(v is None for v in vals.values()):
            return None
        return model.Driver(name=name, process=proc, risk_neutral=rn, **vals)

    def correlation(self, path, value, drivers):
        if value is None:
            return ()
        if not isinstance(value, list):
            self.bad(path, describe(value), "a list of [driver, driver, rho] triples, e.g. "
                     "[[price, unit_cost, 0.6]]")
            return None
        out, ok = [], True
        stochastic = [n for n, d in drivers.items() if d.process != "schedule"]
        seen = set()
        for i, item in enumerate(value):
            p = path + (Index(i),)
            if not isinstance(item, list) or len(item) != 3:
                self.bad(p, describe(item), "[driver, driver, rho]")
                ok = False
                continue
            a, b, rho = item
            for j, n in enumerate((a, b)):
                if drivers and n not in stochastic:
                    hint = difflib.get_close_matches(str(n), stochastic, n=1)
                    self.bad(p + (Index(j),), describe(n), "the name of a simulated driver ("
                             + ", ".join(stochastic) + ")",
                             f"did you mean {hint[0]}?" if hint else "")
                    ok = False
            r = self.number(p + (Index(2),), rho, validate.RHO.expected, **validate.RHO.bounds)
            if a == b:
                self.bad(p, f"{a} paired with itself", "two different drivers")
                ok = False
            pair = frozenset((str(a), str(b)))
            if pair in seen:
                self.bad(p, f"the pair {a}, {b} a second time", "each pair once")
                ok = False
            seen.add(pair)
            if r is None:
                ok = False
            else:
                out.append((str(a), str(b), r))
        if ok and out and all(a in stochastic and b in stochastic for a, b, _ in out):
            bad = validate.correlation_problem(stochastic, out)
            if bad is not None:
                self.bad(path, *bad)        # names the factor that makes the set consistent
                ok = False
        return tuple(out) if ok else None

    def formula(self, path, value, drivers):
        text = self.text(path, value, "a formula over the driver names, e.g. "
                         "(price - unit_cost) * volume / 1000 - 4.5")
        if text is None:
            return None
        if isinstance(value, dict):
            return None
        mod = _optional_module("formula")
        if mod is None:
            self.bad(path, "a cash-flow formula", "cash_flows as a {year: amount} mapping",
                     "this installation cannot evaluate formulas (realopt.formula is missing)")
            return None
        try:
            parsed = mod.parse(text)
        except mod.FormulaError as err:
            self.bad(path, f"a formula that cannot be used: {err}", "whitelisted arithmetic over "
                     "the driver names (+ - * / ** parentheses, numbers, min, max)")
            return None
        used = getattr(parsed, "names", None)
        if used is not None and drivers:
            for n in sorted(set(used) - set(drivers)):
                hint = difflib.get_close_matches(n, list(drivers), n=1)
                self.bad(path, f"the name {n}, which is not a driver",
                         f"names from: {', '.join(drivers)}",
                         f"did you mean {hint[0]}?" if hint else "define it under drivers")
        return text

