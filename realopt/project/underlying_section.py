"""Section underlying: which form gives the value (cash flows, present value, drivers), cash flows
by year or from a forecast file, terminal value, flow timing, and the volatility (a number or an
estimate block). Needs the lattice (explicit up/down factors make the volatility unused)."""
from __future__ import annotations

from .. import model
from .. import project_simulation as simulation_keys
from .keys import (CASH_FLOW_KEYS, DRIVER_FORM_KEYS, FORECAST_KEYS, PV_KEYS, UNDERLYING_KEYS,
                   VOLATILITY_WARN)
from .paths import describe
from .primitives import _ABSENT, _optional_module


class UnderlyingSection:
    def underlying_form(self, value):
        if not isinstance(value, dict):
            return None
        forms = []
        if "cash_flows" in value:
            forms.append("cash_flows")
        if "present_value" in value:
            forms.append("present_value")
        if any(k in value for k in ("years", "drivers", "cash_flow")):
            forms.append("drivers")
        return forms[0] if len(forms) == 1 else tuple(forms)

    def underlying(self, value, form, lattice):
        path = ("underlying",)
        if value is _ABSENT:
            return None
        d = self.mapping(path, value, UNDERLYING_KEYS,
                         "a mapping giving the operating project's value: cash_flows, or "
                         "present_value, or years/drivers/cash_flow; and its volatility")
        if d is None:
            return None
        if isinstance(form, tuple):
            if not form:
                self.bad(path, describe(d), "one way to give the operating project's value: "
                         "cash_flows, present_value, or years/drivers/cash_flow",
                         "add cash_flows: {1: ..., 2: ...} (expected free cash flow by year)")
            else:
                self.bad(path, f"{' and '.join(form)} together",
                         "exactly one way to give the operating project's value",
                         "keep one of them and delete the others")
            return None
        if form == "drivers" and isinstance(d.get("cash_flow"), dict) and "drivers" not in d:
            self.bad(path + ("cash_flow",), "cash_flow (the formula key) holding a mapping of "
                     "years", "cash_flows: {year: expected free cash flow}",
                     "did you mean cash_flows (with an s)?", at="key")
            return None
        allowed = {"cash_flows": CASH_FLOW_KEYS, "present_value": PV_KEYS,
                   "drivers": DRIVER_FORM_KEYS + ("terminal_value", "flow_timing")}[form]
        for k in d:
            if k in UNDERLYING_KEYS and k != "volatility" and k not in allowed:
                self.bad(path + (k,), f"the key {k} next to {form}",
                         f"with {form}: {', '.join(allowed)} and volatility",
                         _FORM_HINTS.get(k, f"{k} belongs to another way of giving the value; "
                                         "delete it"), at="key")
        out = {}
        if form == "cash_flows":
            out["cash_flows"] = self.cash_flows(path + ("cash_flows",), d["cash_flows"])
        elif form == "present_value":
            out["present_value"] = self.field(path + ("present_value",), d["present_value"],
                                              model.Underlying, "present_value")
            if d.get("payout_yield") is not None:
                out["payout_yield"] = self.field(path + ("payout_yield",), d["payout_yield"],
                                                 model.Underlying, "payout_yield")
        else:
            out["drivers"] = self.driver_model(path, d)
        if d.get("terminal_value") is not None and "terminal_value" in allowed:
            out["terminal_value"] = self.field(path + ("terminal_value",), d["terminal_value"],
                                               model.Underlying, "terminal_value")
        if d.get("flow_timing") is not None and "flow_timing" in allowed:
            out["flow_timing"] = self.field(path + ("flow_timing",), d["flow_timing"],
                                            model.Underlying, "flow_timing")
        vol_path = path + ("volatility",)
        explicit = lattice is not None and lattice.explicit
        simulation_keys.check_underlying(self, d, form)
        if simulation_keys.is_simulation(self):
            pass                       # the drivers' own volatilities drive the simulation
        elif "volatility" not in d or d["volatility"] is None:
            if not explicit:
                self.missing(vol_path, "the yearly volatility of the project value (0.28 for 28%) "
                             "or an estimate block", "add volatility: 0.3, or give explicit "
                             "lattice up/down factors")
        elif isinstance(d["volatility"], dict):
            out["volatility_estimate"] = self.volatility_estimate(vol_path, d["volatility"], form)
            if explicit:
                self.warn(vol_path, "ignored: the lattice's explicit up/down factors set the tree")
        else:
            vol = self.field(vol_path, d["volatility"], model.Underlying, "volatility")
            out["volatility"] = vol
            if vol is not None and vol > VOLATILITY_WARN:
                self.warn(vol_path, f"a volatility of {vol:g} ({vol:.0%} a year) is very high for "
                          "a project's value; check it is a fraction (0.3 for 30%)")
            if vol is not None and explicit:
                self.warn(vol_path, "ignored: the lattice's explicit up/down factors set the tree")
        if any(v is None for v in out.values()):
            return None
        return model.Underlying(**out)

    def cash_flows(self, path, value):
        if isinstance(value, dict) and "file" in value:
            return self.forecast(path, value)
        if not isinstance(value, dict) or not value:
            self.bad(path, describe(value), "a mapping {year: expected free cash flow} with years "
                     "above 0, e.g. {1: 6.0, 2: 9.5}, or {file: forecast.csv, year: .., value: ..}",
                     "a list of flows needs its years: write {1: 6.0, 2: 9.5, ...}"
                     if isinstance(value, list) else "")
            return None
        flows, ok = [], True
        for k, v in value.items():
            y = self.year_key(path + (k,), k, gt=0.0, ge=None,
                              fix="year 0 is today: put today's outlay in investment.cost")
            a = self.number(path + (k,), v, f"the expected free cash flow of year {k} (a number)")
            if y is None or a is None:
                ok = False
            else:
                flows.append((y, a))
        return tuple(sorted(flows)) if ok else None

    def forecast(self, path, d):
        self.mapping(path, d, FORECAST_KEYS, "a mapping with file, year, value and sheet")
        for k in ("year", "value"):
            if k not in d:
                self.missing(path + (k,), f"the name of the forecast's {k} column")
        file = self.resolve(path + ("file",), d.get("file"))
        year = self.text(path + ("year",), d.get("year"), "the name of the year column") \
            if "year" in d else None
        col = self.text(path + ("value",), d.get("value"), "the name of the value column") \
            if "value" in d else None
        sheet = d.get("sheet")
        if sheet is not None and not isinstance(sheet, (str, int)) or isinstance(sheet, bool):
            self.bad(path + ("sheet",), describe(sheet), "a sheet name or number")
            return None
        if file is None or year is None or col is None:
            return None
        mod = _optional_module("forecast")
        if mod is None:
            self.bad(path, "a forecast file", "cash_flows as a {year: amount} mapping",
                     "this installation cannot read forecast files (realopt.forecast is missing); "
                     "write the flows into the file")
            return None
        try:
            rows = mod.read_forecast(str(file), year, col, sheet=sheet)
        except mod.ForecastError as err:
            self.bad(path + ("file",), f"a forecast that cannot be used: {err}",
                     "a table with a year column and a value column", "fix the forecast file")
            return None
        rows = tuple((float(y), float(v)) for y, v in rows)
        bad = [y for y, _ in rows if not y > 0]
        if bad or not rows:
            self.bad(path + ("file",), f"year {bad[0]:g} in {file.name}" if bad else "no rows",
                     "cash-flow years above 0", "year 0 is today: put today's outlay in "
                     "investment.cost")
            return None
        return tuple(sorted(rows))

    def volatility_estimate(self, path, d, form):
        method = d.get("estimate")
        keys = {"simulation": ("estimate", "paths", "seed"),
                "history": ("estimate", "file", "column", "periods_per_year")}
        if "estimate" not in d:
            self.missing(path + ("estimate",), "estimate: simulation or estimate: history")
            return None
        method = self.field(path + ("estimate",), method, model.VolatilityEstimate, "method")
        if method is None:
            return None
        self.mapping(path, d, keys[method], f"an estimate block for {method}")
        if method == "simulation":
            if form != "drivers":
                self.bad(path + ("estimate",), "estimate: simulation without drivers",
                         "simulation only when the cash flows come from drivers",
                         "give a volatility number, or use estimate: history with a price file")
            paths = self.field(path + ("paths",), d.get("paths", 20000),
                               model.VolatilityEstimate, "paths")
            seed = self.field(path + ("seed",), d.get("seed", 1), model.VolatilityEstimate, "seed")
            if paths is None or seed is None:
                return None
            return model.VolatilityEstimate(method="simulation", paths=paths, seed=seed)
        for k, what in (("file", "a CSV or spreadsheet of past values"),
                        ("column", "the column holding the values"),
                        ("periods_per_year", "observations per year (12 for monthly)")):
            if k not in d:
                self.missing(path + (k,), what)
        file = self.resolve(path + ("file",), d["file"]) if "file" in d else None
        column = self.text(path + ("column",), d["column"], "a column name") \
            if "column" in d else None
        ppy = self.field(path + ("periods_per_year",), d["periods_per_year"],
                         model.VolatilityEstimate, "periods_per_year") \
            if "periods_per_year" in d else None
        if file is None or column is None or ppy is None:
            return None
        return model.VolatilityEstimate(method="history", file=str(file), column=column,
                                        periods_per_year=ppy)


_FORM_HINTS = {
    "payout_yield": "payout_yield goes with present_value; with cash_flows the payout is the "
                    "cash flows themselves; delete it",
    "terminal_value": "terminal_value goes with cash_flows (or drivers); delete it",
    "flow_timing": "flow_timing goes with cash_flows or drivers; with present_value the payout "
                   "is the continuous payout_yield; delete it",
    "cash_flow": "cash_flow (singular) is the formula of the drivers form; for flows by year "
                 "use cash_flows",
    "present_value": "present_value is another way of giving the value; keep one",
}

