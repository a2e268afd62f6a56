"""Shared pieces of the rules package: parameter names, number types, rule ids, helpers.

Pure: no I/O. Everything here is used by more than one feature module.
"""

from __future__ import annotations

import re
from typing import Annotated, Iterable

from pydantic import BaseModel, ConfigDict, Field, model_validator

from ..alarms import Priority
from ..wire import PARAMS

__all__ = ["STRICT", "DERIVED_PARAMS", "KNOWN_PARAMS", "Priority", "Seconds", "PosSeconds",
           "RULE_ID", "check_params", "Span", "median", "INF", "NINF", "FEED_SILENT",
           "DEVICE_SILENT", "NOT_VALID", "ARTIFACT", "FLUID", "PROFILE", "DELAY_TOLERANCE_S"]

STRICT = ConfigDict(extra="forbid")

#: derived values the processing core may hand to the rules layer (besides measured ones)
DERIVED_PARAMS = ("MAP", "SBP", "PP", "SV", "CO", "BSA", "CI", "SVI", "SVR", "SVRI", "PVR",
                  "LVSWI", "RVSWI", "SI", "MSI")
#: every parameter name a rule may refer to
KNOWN_PARAMS: tuple[str, ...] = tuple(PARAMS) + tuple(p for p in DERIVED_PARAMS
                                                      if p not in PARAMS)

Seconds = Annotated[float, Field(ge=0)]
PosSeconds = Annotated[float, Field(gt=0)]
RULE_ID = re.compile(r"^[a-z][a-z0-9_]{0,63}$")

INF = float("inf")
NINF = float("-inf")

#: A delay (condition delay, clear delay, not-valid delay, profile hold) counts as met when
#: the time elapsed is at least the delay minus this much. Half a millisecond: times travel
#: as RFC 3339 text and hemostream writes them to the millisecond (wire.format_epoch), so two
#: times that read the same on the wire are never told apart by a delay; and a sender that
#: stamps each sample with its own clock to the microsecond (a 1 Hz gateway whose sleep
#: wakes a few tens of microseconds early or late) makes the sample due at the end of the
#: delay fall either side of it by far less. The float arithmetic of epoch seconds (about
#: 2.4e-7 s apart around 2026) is covered as well. An alarm is raised at most half a
#: millisecond before its configured delay: nothing at the scale of a 1 s sample period or
#: a clinical delay of seconds. It was 1e-9 s, finer than the spacing of the floats
#: themselves, which left the decision to noise: half the raises waited for the next tick.
DELAY_TOLERANCE_S = 0.0005

#: rule ids of the technical conditions and the information read-outs
FEED_SILENT = "feed_silent"
DEVICE_SILENT = "device_silent"
NOT_VALID = "values_not_valid"
ARTIFACT = "artifact_suspected"
FLUID = "fluid_challenge"
PROFILE = "hemodynamic_profile"


def check_params(names: Iterable[str], where: str) -> None:
    bad = [n for n in names if n not in KNOWN_PARAMS]
    if bad:
        raise ValueError(f"{where}: unknown parameter(s) {bad}; expected names from "
                         + ", ".join(KNOWN_PARAMS))


class Span(BaseModel):
    model_config = STRICT
    low: float
    high: float

    @model_validator(mode="after")
    def _ordered(self) -> "Span":
        if self.low >= self.high:
            raise ValueError(f"low ({self.low}) must be below high ({self.high})")
        return self


def median(vals: list[float]) -> float:
    s = sorted(vals)
    n = len(s)
    return s[n // 2] if n % 2 else 0.5 * (s[n // 2 - 1] + s[n // 2])
