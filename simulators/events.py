"""A scenario's time line: durations (``90s``, ``30m``, ``1h30m``) and the events a bed's
``[[beds.events]]`` list holds, one pydantic model per ``do`` (docs/simulators.md). Loaded
and checked by :mod:`.scenario`."""

from __future__ import annotations

import re
from typing import Annotated, Literal, Union

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field

# --------------------------------------------------------------------------- durations

_DUR_RE = re.compile(r"^(?:(\d+(?:\.\d+)?)h)?(?:(\d+(?:\.\d+)?)m)?(?:(\d+(?:\.\d+)?)s)?$")


def parse_duration(text: str | int | float) -> float:
    """Seconds from ``90s``, ``30m``, ``2h``, ``1h30m``, ``1h30m15s`` or a bare number.

    >>> parse_duration("1h30m"), parse_duration("90s"), parse_duration("2h"), parse_duration(45)
    (5400.0, 90.0, 7200.0, 45.0)
    """
    if isinstance(text, bool):
        raise ValueError(f"expected a duration such as 90s, 30m, 2h or 1h30m, got {text!r}")
    if isinstance(text, (int, float)):
        if text < 0:
            raise ValueError(f"duration {text!r} is negative")
        return float(text)
    s = str(text).strip().lower().replace(" ", "")
    try:
        value = float(s)
    except ValueError:
        m = _DUR_RE.match(s)
        if not s or m is None or not any(m.groups()):
            raise ValueError(f"expected a duration such as 90s, 30m, 2h or 1h30m, got {text!r}")
        h, mi, se = (float(g) if g else 0.0 for g in m.groups())
        return h * 3600.0 + mi * 60.0 + se
    if value < 0:
        raise ValueError(f"duration {text!r} is negative")
    return value


def format_duration(seconds: float) -> str:
    """``5400`` -> ``1h30m``.

    >>> format_duration(5400), format_duration(45), format_duration(0)
    ('1h30m', '45s', '0s')
    """
    s = int(round(seconds))
    h, rem = divmod(s, 3600)
    m, sec = divmod(rem, 60)
    out = (f"{h}h" if h else "") + (f"{m}m" if m else "") + (f"{sec}s" if sec else "")
    return out or "0s"


Duration = Annotated[float, BeforeValidator(parse_duration)]
#: every scenario model: unknown keys are errors, values do not change once loaded
STRICT = ConfigDict(extra="forbid", frozen=True)

# --------------------------------------------------------------------------- events

#: model controls a ``change`` event may set (see :class:`simulators.model.Controls`), and
#: the bed-level shifts of the values the circulation does not model
CONTROL_NAMES = ("contractility_left", "contractility_right", "svr_factor", "pvr_factor",
                 "venous_capacity_factor", "muscle_pump_ml", "hr_drive", "setpoint_shift",
                 "reflex_gain", "temp_shift", "spo2_shift", "rr_shift")
#: the neutral value of each control (what a bed starts with)
CONTROL_NEUTRAL = {name: 1.0 for name in CONTROL_NAMES[:5]} | {
    "muscle_pump_ml": 0.0, "hr_drive": 0.0, "setpoint_shift": 0.0, "reflex_gain": 1.0,
    "temp_shift": 0.0, "spo2_shift": 0.0, "rr_shift": 0.0}

CHANNELS = ("ABP", "CVP", "PAP")


class _Event(BaseModel):
    model_config = STRICT
    at: Duration
    text: Annotated[str, Field(max_length=500)] | None = None


class Hemorrhage(_Event):
    """Blood loss from the systemic veins at ``rate_ml_min``, for ``for`` (or until a
    ``hemorrhage_stop``). Writes a ``deterioration_onset`` note unless ``onset = false``."""
    do: Literal["hemorrhage"]
    rate_ml_min: Annotated[float, Field(gt=0, le=2000)]
    for_: Annotated[Duration | None, Field(alias="for")] = None
    onset: bool = True


class HemorrhageStop(_Event):
    do: Literal["hemorrhage_stop"]


class Bolus(_Event):
    """Fluid given into the systemic veins; writes a ``fluid_bolus`` note."""
    do: Literal["bolus"]
    volume_ml: Annotated[float, Field(gt=0, le=5000)]
    over: Duration = 600.0
    fluid: Literal["crystalloid", "colloid", "blood"] = "crystalloid"
    note: bool = True
    by: str | None = None


class Contractility(_Event):
    """Contractility of one ventricle (or both) set to ``factor`` times baseline, reached
    linearly ``over`` the given time. A fall writes a ``deterioration_onset`` note."""
    do: Literal["contractility"]
    side: Literal["left", "right", "both"]
    factor: Annotated[float, Field(gt=0, le=3)]
    over: Duration = 0.0
    onset: bool | None = None


class Change(_Event):
    """Move model controls (``set = {svr_factor = 0.5}``) linearly ``over`` the given time."""
    do: Literal["change"]
    set: dict[str, float]
    over: Duration = 0.0
    onset: bool = False


class Note(_Event):
    """A clinical note as written by staff (any wire note kind)."""
    do: Literal["note"]
    kind: str
    param: str | None = None
    volume_ml: float | None = None
    over_min: float | None = None
    by: str | None = None


class Flush(_Event):
    """Fast flush of a pressure line: readings jump towards the flush bag's pressure."""
    do: Literal["flush"]
    channel: Literal["ABP", "CVP", "PAP"] = "ABP"
    for_: Annotated[Duration, Field(alias="for")] = 4.0
    bag_mmhg: float = 300.0
    note: bool = True


class Zeroing(_Event):
    """Transducer opened to air: readings near 0 with status ``calibrating``."""
    do: Literal["zeroing"]
    channel: Literal["ABP", "CVP", "PAP"] = "CVP"
    for_: Annotated[Duration, Field(alias="for")] = 15.0
    note: bool = True


class TransducerMove(_Event):
    """The transducer leaves the phlebostatic level: ``offset_cm`` lower reads that much
    water column higher (negative: raised, reads low). Lasts ``for`` (then a
    ``reposition`` note) or to the end."""
    do: Literal["transducer_move"]
    channel: Literal["ABP", "CVP", "PAP"] = "CVP"
    offset_cm: float
    for_: Annotated[Duration | None, Field(alias="for")] = None
    note: bool = True


class Dropout(_Event):
    """Parameters missing from the device's messages (probe off, cable out)."""
    do: Literal["dropout"]
    params: list[str] = ["SPO2"]
    for_: Annotated[Duration, Field(alias="for")] = 30.0


class Silence(_Event):
    """The gateway sends nothing; with ``reboot`` its ``seq`` starts again from 0."""
    do: Literal["silence"]
    for_: Annotated[Duration, Field(alias="for")] = 120.0
    reboot: bool = True


class Damping(_Event):
    """An over-damped arterial line: systolic and diastolic drawn towards the mean."""
    do: Literal["damping"]
    channel: Literal["ABP", "PAP"] = "ABP"
    factor: Annotated[float, Field(ge=0, le=1)] = 0.5
    for_: Annotated[Duration, Field(alias="for")] = 600.0


class SampleDraw(_Event):
    """Blood drawn from the arterial line (flat low readings), then the line is flushed."""
    do: Literal["sample_draw"]
    for_: Annotated[Duration, Field(alias="for")] = 25.0
    note: bool = True


class Measure(_Event):
    """An intermittent measurement now: cuff pressure, wedge pressure or thermodilution."""
    do: Literal["nibp", "wedge", "measure_co"]


Event = Annotated[Union[Hemorrhage, HemorrhageStop, Bolus, Contractility, Change, Note, Flush,
                        Zeroing, TransducerMove, Dropout, Silence, Damping, SampleDraw,
                        Measure], Field(discriminator="do")]

EVENT_KINDS = ("hemorrhage", "hemorrhage_stop", "bolus", "contractility", "change", "note",
               "flush", "zeroing", "transducer_move", "dropout", "silence", "damping",
               "sample_draw", "nibp", "wedge", "measure_co")
