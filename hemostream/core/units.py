"""UCUM unit codes accepted on the wire and their conversion to canonical units.

Every accepted unit belongs to one *dimension*; each dimension has one canonical unit
(mm[Hg], /min, L/min, mL, %, Cel). Conversion is ``canonical = value * factor + offset``;
the factors are derived here from SI definitions and checked against pint in the tests.

Sources: UCUM, The Unified Code for Units of Measure (Regenstrief Institute) for the codes;
the SI values 1 mm[Hg] = 133.322387415 Pa and 1 cm[H2O] = 98.0665 Pa (both as defined in UCUM).

>>> round(to_canonical(10.0, "cm[H2O]"), 5)
7.35559
>>> round(to_canonical(98.6, "[degF]"), 6)
37.0
"""

from __future__ import annotations

from typing import NamedTuple

PA_PER_MMHG = 133.322387415
PA_PER_CMH2O = 98.0665


class UnitSpec(NamedTuple):
    dimension: str
    factor: float
    offset: float = 0.0


#: dimension -> canonical UCUM code
CANONICAL: dict[str, str] = {
    "pressure": "mm[Hg]",
    "rate": "/min",
    "flow": "L/min",
    "volume": "mL",
    "saturation": "%",
    "temperature": "Cel",
}

#: accepted UCUM code -> how it converts to its dimension's canonical unit
UNITS: dict[str, UnitSpec] = {
    "mm[Hg]": UnitSpec("pressure", 1.0),
    "kPa": UnitSpec("pressure", 1000.0 / PA_PER_MMHG),
    "cm[H2O]": UnitSpec("pressure", PA_PER_CMH2O / PA_PER_MMHG),
    "/min": UnitSpec("rate", 1.0),
    "L/min": UnitSpec("flow", 1.0),
    "mL/min": UnitSpec("flow", 0.001),
    "mL": UnitSpec("volume", 1.0),
    "L": UnitSpec("volume", 1000.0),
    "%": UnitSpec("saturation", 1.0),
    "Cel": UnitSpec("temperature", 1.0),
    "[degF]": UnitSpec("temperature", 5.0 / 9.0, -32.0 * 5.0 / 9.0),
}

#: dimension -> accepted codes, in the order they are listed in error messages
BY_DIMENSION: dict[str, tuple[str, ...]] = {}
for _code, _spec in UNITS.items():
    BY_DIMENSION.setdefault(_spec.dimension, ())
    BY_DIMENSION[_spec.dimension] += (_code,)


def to_canonical(value: float, unit: str) -> float:
    """Convert ``value`` in UCUM ``unit`` to its dimension's canonical unit."""
    spec = UNITS[unit]
    return value * spec.factor + spec.offset


#: 1 mm[Hg].min/L expressed in dyn.s.cm-5 (about 79.99; clinical texts round it to 80).
#: mm[Hg] -> Pa, min -> s, L -> m3 gives Pa.s/m3; 1 dyn.s.cm-5 = 1e5 Pa.s/m3.
MMHG_MIN_PER_L_IN_DYN_S_CM5 = PA_PER_MMHG * 60.0 / 1e-3 / 1e5

#: 1 mm[Hg].mL expressed in g.m (gram-force metre), the stroke-work factor (about 0.0136).
#: 133.322387415 Pa * 1e-6 m3 = 1.333e-4 J; 1 g-force.m = 9.80665e-3 J.
MMHG_ML_IN_GF_M = PA_PER_MMHG * 1e-6 / 9.80665e-3
