"""Sections project, market, lattice and investment (no section depends on another here except
investment, which the cross-checks value with the market)."""
from __future__ import annotations

from .. import model, validate
from .keys import LATTICE_KEYS, MARKET_KEYS, PROJECT_KEYS, RATE_WARN
from .primitives import _ABSENT


class MarketSections:
    def project_section(self, value):
        path = ("project",)
        if value is _ABSENT:
            return None, "", ""
        d = self.mapping(path, value, PROJECT_KEYS, "a mapping with name, currency and unit")
        if d is None:
            return None, "", ""
        name = None
        if "name" not in d:
            self.missing(path + ("name",), "the project's name (text)")
        else:
            name = self.text(path + ("name",), d["name"], "the project's name (text)")
        currency = self.text(path + ("currency",), d["currency"], "a currency label such as EUR") \
            if d.get("currency") is not None else ""
        unit = self.text(path + ("unit",), d["unit"], "a unit label such as million") \
            if d.get("unit") is not None else ""
        return name, currency or "", unit or ""

    def market(self, value, form):
        path = ("market",)
        if value is _ABSENT:
            return None
        d = self.mapping(path, value, MARKET_KEYS,
                         "a mapping with risk_free_rate, discount_rate and compounding")
        if d is None:
            return None
        comp = "annual"
        if d.get("compounding") is not None:
            comp = self.field(path + ("compounding",), d["compounding"], model.Market,
                              "compounding")
        rates = {}
        for key in ("risk_free_rate", "discount_rate"):
            if key not in d:
                if key == "discount_rate" and form == "present_value":
                    continue
                self.missing(path + (key,), validate.rule_for(model.Market, key).expected)
                continue
            r = self.field(path + (key,), d[key], model.Market, key)
            if r is not None and r > RATE_WARN:
                # 4 or 9.5 is a percentage written without its sign: refused at the key, before
                # the lattice would give advice about steps and volatility for a 400% rate
                self.bad(path + (key,), f"{r:g}, a rate of {r * 100:,.0f}% a year",
                         f"{validate.rule_for(model.Market, key).expected} as a fraction, at "
                         "most 1 (0.035 for 3.5%)",
                         f"did you mean {r / 100:g}? Write {r / 100:g} for {r:g}%")
                r = None
            rates[key] = r
        rf = rates.get("risk_free_rate")
        dr = rates.get("discount_rate", rf)
        if rf is None or dr is None or comp is None:
            return None
        return model.Market(risk_free_rate=rf, discount_rate=dr, compounding=comp)


    def lattice(self, value):
        path = ("lattice",)
        if value is _ABSENT:
            return model.LatticeSpec()
        d = self.mapping(path, value, LATTICE_KEYS, "a mapping with steps_per_year, or up, down "
                         "and step_years", empty_ok=True)
        if d is None:
            return None
        explicit = [k for k in ("up", "down", "step_years") if k in d]
        if explicit:
            if "steps_per_year" in d:
                self.bad(path + ("steps_per_year",), "steps_per_year together with "
                         + ", ".join(explicit), "either steps_per_year (Cox-Ross-Rubinstein "
                         "factors from the volatility) or up, down and step_years",
                         "delete one of the two ways", at="key")
                return None
            for k in ("up", "down", "step_years"):
                if k not in d:
                    self.missing(path + (k,), {"up": "the up factor per step, above 1",
                                               "down": "the down factor per step, from 0 to 1",
                                               "step_years": "the length of a step in years"}[k],
                                 "explicit trees need up, down and step_years together")
            up, down, dt = (self.field(path + (k,), d[k], model.LatticeSpec, k) if k in d
                            else None for k in ("up", "down", "step_years"))
            if None in (up, down, dt):
                return None
            return model.LatticeSpec(up=up, down=down, step_years=dt)
        spy = 12
        if "steps_per_year" in d:
            spy = self.field(path + ("steps_per_year",), d["steps_per_year"], model.LatticeSpec,
                             "steps_per_year")
        return model.LatticeSpec(steps_per_year=spy) if spy is not None else None

    def investment(self, value, market):
        path = ("investment",)
        if value is _ABSENT:
            return None
        d = self.mapping(path, value, ("cost",), "a mapping with cost")
        if d is None:
            return None
        if "cost" not in d:
            self.missing(path + ("cost",), "the investment outlay: a number paid now, or "
                         "{year: amount}")
            return None
        v = d["cost"]
        expected = "an outlay of 0 or more"
        if isinstance(v, dict):
            if not v:
                self.bad(path + ("cost",), "an empty mapping", "{year: amount} outlays")
                return None
            outlays, ok = [], True
            for k, a in v.items():
                y = self.year_key(path + ("cost", k), k)
                amt = self.number(path + ("cost", k), a, f"{expected} at year {k}", ge=0.0)
                if y is None or amt is None:
                    ok = False
                else:
                    outlays.append((y, amt))
            return model.Investment(outlays=tuple(sorted(outlays))) if ok else None
        amt = self.number(path + ("cost",), v, f"{expected} (paid now), or {{year: amount}}",
                          ge=0.0, fix="an outlay is written positive; 0 for no investment")
        return model.Investment(outlays=((0.0, amt),)) if amt is not None else None

    # ---- rights ----------------------------------------------------------------------------
