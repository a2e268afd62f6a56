"""The parameter table: every measured parameter's facts in one place.

Each entry gives the parameter's dimension (and so its canonical unit), its meaning, its
physically plausible range in the canonical unit, how old a value may be and still count as
current for derivations, and the pressure channel it is measured on (the unit of flush,
zeroing and damping handling), if any. Everything else reads it from here: the wire model
(:data:`hemostream.core.wire.PARAMS`), the configuration defaults
(:data:`hemostream.core.config.DEFAULT_PLAUSIBLE`, ``DEFAULT_MAX_AGE``), the shipped
``configs/default.toml`` (tested against this table) and ``docs/wire-format.md``.

Plausible ranges are wide on purpose: values outside are physically impossible or a device
fault and are rejected, never clamped; they catch garbage, not illness (common practice).
Maximum ages: continuous channels seconds, intermittent ones (cuff, wedge, thermodilution
CO) minutes (common practice).

>>> PARAMS["NIBP_SYS"].canonical_unit, PARAMS["NIBP_SYS"].max_age_s, PARAMS["NIBP_SYS"].channel
('mm[Hg]', 900, 'NIBP')
"""

from __future__ import annotations

from typing import NamedTuple

from .units import CANONICAL


class ParamSpec(NamedTuple):
    dimension: str
    meaning: str
    #: physically plausible range (low, high), canonical unit, inclusive
    plausible: tuple[float, float]
    #: seconds a value stays current for derivations
    max_age_s: float
    #: pressure channel (ABP, NIBP, CVP, PAP, PAWP) or None
    channel: str | None = None

    @property
    def canonical_unit(self) -> str:
        return CANONICAL[self.dimension]


_P = ParamSpec
PARAMS: dict[str, ParamSpec] = {
    "HR": _P("rate", "heart rate (ECG)", (0, 350), 10),
    "PR": _P("rate", "pulse rate (oximeter or arterial line)", (0, 350), 10),
    "ABP_SYS": _P("pressure", "invasive arterial pressure, systolic", (-20, 350), 10, "ABP"),
    "ABP_DIA": _P("pressure", "invasive arterial pressure, diastolic", (-20, 300), 10, "ABP"),
    "ABP_MEAN": _P("pressure", "invasive arterial pressure, mean", (-20, 300), 10, "ABP"),
    "NIBP_SYS": _P("pressure", "cuff pressure, systolic (intermittent)", (0, 350), 900,
                   "NIBP"),
    "NIBP_DIA": _P("pressure", "cuff pressure, diastolic (intermittent)", (0, 300), 900,
                   "NIBP"),
    "NIBP_MEAN": _P("pressure", "cuff pressure, mean (intermittent)", (0, 300), 900, "NIBP"),
    "CVP": _P("pressure", "central venous pressure (mean)", (-20, 80), 30, "CVP"),
    "PAP_SYS": _P("pressure", "pulmonary artery pressure, systolic", (-20, 150), 10, "PAP"),
    "PAP_DIA": _P("pressure", "pulmonary artery pressure, diastolic", (-20, 120), 10, "PAP"),
    "PAP_MEAN": _P("pressure", "pulmonary artery pressure, mean", (-20, 130), 10, "PAP"),
    "PAWP": _P("pressure", "pulmonary artery wedge pressure (intermittent)", (-20, 80), 1800,
               "PAWP"),
    "CO": _P("flow", "cardiac output", (0, 30), 900),
    "SV": _P("volume", "stroke volume", (0, 300), 10),
    "SPO2": _P("saturation", "peripheral oxygen saturation", (0, 100), 30),
    "RR": _P("rate", "respiratory rate", (0, 150), 30),
    "TEMP": _P("temperature", "core temperature", (15, 45), 300),
}

def channel_params() -> dict[str, list[str]]:
    """Measured parameters per pressure channel, in table order.

    >>> channel_params()["PAP"]
    ['PAP_SYS', 'PAP_DIA', 'PAP_MEAN']
    """
    out: dict[str, list[str]] = {}
    for p, spec in PARAMS.items():
        if spec.channel:
            out.setdefault(spec.channel, []).append(p)
    return out
