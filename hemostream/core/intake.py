"""``[intake]``: other ways in besides MQTT. ``[intake.hl7]``: the HL7 v2 (IHE PCD-01) listener
and how its messages map to units and beds (see docs/hl7.md)."""

from __future__ import annotations

import re
from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field, field_validator

__all__ = ["DEFAULT_STATUS_MAP", "Hl7Config", "IntakeConfig", "Location", "location_key",
           "split_host_port"]

_STRICT = ConfigDict(extra="forbid")
_NAME = r"^[A-Za-z0-9_-]{1,32}$"

#: OBX-11 observation result status (HL7 table 0085) -> wire-format status
DEFAULT_STATUS_MAP = {
    "F": "valid",          # final
    "C": "valid",          # correction of a final result
    "U": "valid",          # changed to final
    "R": "valid",          # results entered, not verified: how devices send live values
    "P": "questionable",   # preliminary
    "S": "questionable",   # partial
    "I": "questionable",   # in process
    "X": "invalid",        # cannot be obtained
    "W": "invalid",        # posted as wrong
    "D": "invalid",        # deleted
}


def location_key(text: str) -> str:
    """A PV1-3 value as a map key: components kept as sent, trailing empty ones dropped.

    >>> location_key("SDU4^^B2^^")
    'SDU4^^B2'
    """
    return text.strip().rstrip("^")


class Location(BaseModel):
    model_config = _STRICT
    unit: Annotated[str, Field(pattern=_NAME)]
    bed: Annotated[str, Field(pattern=_NAME)]


class Hl7Config(BaseModel):
    model_config = _STRICT
    #: HOST:PORT the MLLP listener binds ("" = no listener)
    listen: str = ""
    #: PV1-3 (point of care ^ room ^ bed ...) -> unit id and bed
    locations: dict[str, Location] = Field(default_factory=dict)
    #: a location not in the map is read as point of care = unit, bed (PV1-3.3) = bed
    locations_from_components: bool = False
    #: keep PID/NK1/PD1 contents in stored rejects (default: removed before storing)
    store_patient_ids: bool = False
    #: offset for HL7 times sent without one, e.g. "+0100" (default: such times are rejected)
    assume_utc_offset: str | None = None
    max_message_bytes: Annotated[int, Field(ge=1024, le=64 * 1024 * 1024)] = 1024 * 1024
    idle_timeout_s: Annotated[float, Field(gt=0)] = 300.0
    max_connections: Annotated[int, Field(ge=1)] = 64
    status_map: dict[str, str] = Field(default_factory=lambda: dict(DEFAULT_STATUS_MAP))
    #: MSH-11 processing ids whose observations are stored with status "test"
    test_processing_ids: list[str] = Field(default_factory=lambda: ["T", "D"])

    @field_validator("locations")
    @classmethod
    def _keys(cls, v: dict[str, Location]) -> dict[str, Location]:
        return {location_key(k): loc for k, loc in v.items()}

    @field_validator("assume_utc_offset")
    @classmethod
    def _offset(cls, v: str | None) -> str | None:
        if v is not None and not re.fullmatch(r"[+-](0\d|1[0-4])[0-5]\d", v):
            raise ValueError("expected +hhmm or -hhmm, for example +0100")
        return v

    @field_validator("status_map")
    @classmethod
    def _statuses(cls, v: dict[str, str]) -> dict[str, str]:
        allowed = {"valid", "questionable", "invalid", "calibrating", "test"}
        for k, s in v.items():
            if s not in allowed:
                raise ValueError(f"{k}: {s!r} is not one of {', '.join(sorted(allowed))}")
        return v

    @field_validator("listen")
    @classmethod
    def _listen(cls, v: str) -> str:
        if v:
            split_host_port(v)
        return v

    def reverse_locations(self) -> dict[tuple[str, str], str]:
        return {(loc.unit, loc.bed): key for key, loc in self.locations.items()}


def split_host_port(text: str) -> tuple[str, int]:
    """``HOST:PORT`` (``[v6]:PORT`` too) -> (host, port).

    >>> split_host_port("127.0.0.1:2575")
    ('127.0.0.1', 2575)
    """
    host, sep, port = text.rpartition(":")
    if not sep or not port.isdigit() or not 0 <= int(port) <= 65535:
        raise ValueError(f"{text!r}: expected HOST:PORT")
    return host.strip("[]") or "0.0.0.0", int(port)




class IntakeConfig(BaseModel):
    model_config = _STRICT
    hl7: Hl7Config = Field(default_factory=Hl7Config)
