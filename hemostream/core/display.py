"""How a value of a parameter is written for people: one number format and one unit per
parameter, the same on every screen, report and summary (dashboard tiles and detail, the
alarm list, the demo summary, the report tables).

Digits follow the resolution a bedside display usually shows (common practice): whole
numbers for rates, pressures, resistances and volumes; one decimal for cardiac output and
index and temperature; two for the dimensionless indices.

>>> fmt_value("CVP", 6.0), fmt_value("CO", 4.26), fmt_value("SI", 0.9261)
('6', '4.3', '0.93')
>>> with_unit("CVP", 6.0), with_unit("SI", 0.9261)
('6 mm[Hg]', '0.93')
"""

from __future__ import annotations

from typing import Any

from .derive import DERIVED_UNITS
from .params import PARAMS

#: note kinds that mark a simulator's ground truth (for compare and the report's figures),
#: never shown among a bed's clinical notes
GROUND_TRUTH_NOTES = frozenset({"deterioration_onset"})

#: decimals per parameter; a parameter not listed is written with three significant digits
DECIMALS: dict[str, int] = {
    "HR": 0, "PR": 0, "SPO2": 0, "RR": 0, "TEMP": 1, "CVP": 0, "PAWP": 0, "CO": 1, "CI": 1,
    "SV": 0, "SVI": 0, "SVR": 0, "SVRI": 0, "PVR": 0, "SI": 2, "MSI": 2, "BSA": 2,
    "LVSWI": 0, "RVSWI": 0, "MAP": 0, "PP": 0}

def decimals(param: str) -> int | None:
    if param in DECIMALS:
        return DECIMALS[param]
    spec = PARAMS.get(param)
    if spec is not None and spec.dimension == "pressure":
        return 0
    return None


def unit_of(param: str) -> str:
    """The parameter's unit as shown ('' for a dimensionless index)."""
    if param in DERIVED_UNITS:
        u = DERIVED_UNITS[param]
        return "" if u == "1" else u
    spec = PARAMS.get(param)
    return spec.canonical_unit if spec is not None else ""


def fmt_value(param: str, v: Any) -> str:
    """``v`` in the parameter's one number format (non-numbers as text)."""
    if isinstance(v, bool) or not isinstance(v, int | float):
        return "--" if v is None else str(v)
    d = decimals(param)
    if d is None:
        return f"{v:.3g}" if abs(v) < 1000 else f"{v:.0f}"
    s = f"{v:.{d}f}"
    return "0" if s in ("-0", "-0.0") and d == 0 else s


def with_unit(param: str, v: Any) -> str:
    """The value and its unit, e.g. ``6 mm[Hg]``."""
    u = unit_of(param)
    return f"{fmt_value(param, v)} {u}" if u else fmt_value(param, v)


def alarm_value(alarm: dict, current: Any = None) -> str:
    """What an alarm is about, for a person: its parameter's value with unit (the current
    value when ``current(param)`` gives one, else the value the rule saw), and the direction
    for a pattern ("CVP 8 mm[Hg] rising"); otherwise the condition in words.

    >>> a = {"details": {"message": "shock index high",
    ...      "terms": [{"param": "SI", "value": 0.9261, "at_least": 0.9}]}}
    >>> alarm_value(a), alarm_value(a, {"SI": 0.95}.get)
    ('SI 0.93', 'SI 0.95')
    >>> alarm_value({"details": {"terms": [{"param": "CVP", "level": 8.17,
    ...     "required": "rising", "slope_per_10min": 2.1}]}})
    'CVP 8 mm[Hg] rising'
    >>> alarm_value({"message": "no data from the arterial line"})
    'no data from the arterial line'
    """
    raw = alarm.get("details")
    d: dict = raw if isinstance(raw, dict) else {}
    terms = [t for t in (d.get("terms") or []) if isinstance(t, dict) and t.get("param")]
    parts = []
    for t in terms[:2]:
        p = str(t["param"])
        v = current(p) if current is not None else None
        if v is None:
            v = t.get("value", t.get("level"))
        if not isinstance(v, int | float):
            continue
        s = f"{p} {with_unit(p, v)}"
        if isinstance(t.get("required"), str):
            s += f" {t['required']}"
        parts.append(s)
    if parts:
        return ", ".join(parts)
    return str(alarm.get("message") or d.get("message") or "")
