"""Wire format version 1: topics, payload models and recording lines.

The contract between bedside gateways (or the simulators) and hemostream. It is documented
for integration engineers in ``docs/wire-format.md``; this module is its executable form.
Unknown JSON fields are ignored (so the format can grow compatibly); wrong types, missing
fields and out-of-range values are errors that name the field.

Size: the whole version-1 contract (topics, every payload model and the recording line) in
one module, so a reader checks it against docs/wire-format.md in one place; the time text both
ways is in :mod:`.timetext` (light, for the query command) and re-exported here.
"""

from __future__ import annotations

import json
import re
from datetime import datetime, timezone
from typing import Annotated, Any, Literal, NamedTuple

from pydantic import (
    AfterValidator,
    AwareDatetime,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    StrictBool,
    StrictFloat,
    StrictInt,
    StrictStr,
    model_validator,
)

from .units import CANONICAL

VERSION = 1

# --------------------------------------------------------------------------- parameters


# the parameter table lives in params.py (with plausible ranges, maximum ages, channels)
from .params import PARAMS, ParamSpec  # noqa: E402,F401

Status = Literal["valid", "questionable", "invalid", "calibrating", "test"]

# --------------------------------------------------------------------------- topics

ROOT = "hemo"
SERVICE = "_svc"             # the "unit" level of the service status topics
TOPIC_KINDS_IN = ("obs", "admit", "note", "cmd")
TOPIC_KINDS_OUT = ("alarm", "derived")
_ID = r"[A-Za-z0-9_-]{1,32}"
_TOPIC_RE = re.compile(rf"^hemo/({_ID})/({_ID})/([a-z]+)$")
ID_RE = re.compile(rf"^{_ID}$")


class Topic(NamedTuple):
    unit: str
    bed: str
    kind: str

    def __str__(self) -> str:
        return topic(self.unit, self.bed, self.kind)


class TopicError(ValueError):
    pass


def parse_topic(topic: str) -> Topic:
    """Split ``hemo/<unit>/<bed>/<kind>``; raise :class:`TopicError` with a readable reason.

    >>> parse_topic("hemo/SDU/bed-04/obs")
    Topic(unit='SDU', bed='bed-04', kind='obs')
    """
    m = _TOPIC_RE.match(topic)
    if m is None:
        parts = topic.split("/")
        if len(parts) != 4 or parts[0] != "hemo":
            raise TopicError(
                f"topic {topic[:200]!r}: expected hemo/<unit>/<bed>/<kind> (4 levels)")
        for name, part in (("unit", parts[1]), ("bed", parts[2])):
            if not ID_RE.match(part):
                raise TopicError(
                    f"topic {topic[:200]!r}: {name} {part[:40]!r} must be 1-32 characters "
                    "of A-Z a-z 0-9 - _")
        raise TopicError(f"topic {topic[:200]!r}: unknown kind {parts[3][:40]!r}")
    unit, bed, kind = m.groups()
    if kind not in TOPIC_KINDS_IN and kind not in TOPIC_KINDS_OUT:
        raise TopicError(
            f"topic {topic[:200]!r}: unknown kind {kind!r}; expected one of "
            + ", ".join(TOPIC_KINDS_IN + TOPIC_KINDS_OUT))
    return Topic(unit, bed, kind)


def topic(unit: str, bed: str, kind: str) -> str:
    """``hemo/<unit>/<bed>/<kind>``; ``+`` in any place makes a subscription filter.

    >>> topic("SDU4", "bed-02", "obs"), topic("SDU4", "+", "alarm")
    ('hemo/SDU4/bed-02/obs', 'hemo/SDU4/+/alarm')
    """
    return f"{ROOT}/{unit}/{bed}/{kind}"


def bed_topic(bed_key: str, kind: str) -> str:
    """The topic of a bed named by its key ``UNIT/BED`` (as the dashboard keys its beds).

    >>> bed_topic("SDU4/bed-02", "cmd")
    'hemo/SDU4/bed-02/cmd'
    """
    unit, _, bed = bed_key.partition("/")
    return topic(unit, bed, kind)


def status_topic(instance: str) -> str:
    """The service status / health topic of one hemostream instance (``+``: every one).

    >>> status_topic("hs-ward"), status_topic("+")
    ('hemo/_svc/hs-ward/status', 'hemo/_svc/+/status')
    """
    return f"{ROOT}/{SERVICE}/{instance}/status"


def input_filters(unit: str = "+") -> list[str]:
    """Subscription filters for the input topics (obs, admit, note, cmd) of a unit."""
    return [topic(unit, "+", kind) for kind in TOPIC_KINDS_IN]


def split_topic(text: str) -> Topic | None:
    """A lenient split of any four-level ``hemo/...`` topic (outputs and the service status
    included, ``unit`` is ``_svc`` there) for readers of published messages; None otherwise.
    Validation of input topics is :func:`parse_topic`'s.

    >>> split_topic("hemo/_svc/hs-ward/status")
    Topic(unit='_svc', bed='hs-ward', kind='status')
    >>> split_topic("other/x") is None
    True
    """
    parts = text.split("/")
    if len(parts) != 4 or parts[0] != ROOT:
        return None
    return Topic(parts[1], parts[2], parts[3])


def is_status_topic(t: Topic | None) -> bool:
    return t is not None and t.unit == SERVICE


# --------------------------------------------------------------------------- times
#
# The time policy and its functions live in timetext.py (a light module: the query command
# formats times without importing the payload models); re-exported here.

from .timetext import (epoch, format_epoch, parse_time,  # noqa: E402,F401
                       parse_time_or_none)


# --------------------------------------------------------------------------- payloads


def _rfc3339_only(v: Any) -> Any:
    # pydantic would also take numbers as Unix times; the wire format says RFC 3339 text.
    if isinstance(v, datetime):
        return v
    if not isinstance(v, str):
        raise ValueError("expected an RFC 3339 timestamp string such as 2026-12-01T08:15:00Z")
    return v


#: the plausible measurement times: a clock this far off is a broken clock, not a reading
EARLIEST = datetime(2000, 1, 1, tzinfo=timezone.utc)
LATEST = datetime(2100, 1, 1, tzinfo=timezone.utc)


def _plausible_time(v: datetime) -> datetime:
    try:
        utc = v.astimezone(timezone.utc)
    except (OverflowError, ValueError):     # e.g. year 1 with a positive offset
        raise ValueError("timestamp is out of range (before year 1 or after 9999 in UTC)")
    if not EARLIEST <= utc < LATEST:
        raise ValueError(f"timestamp {utc.year} is not a plausible measurement time "
                         f"(accepted: {EARLIEST.year} to {LATEST.year - 1}); check the "
                         "gateway's clock")
    return v


def _no_nul(v: str) -> str:
    # no database stores U+0000 in text (PostgreSQL refuses it), and no reading needs it
    if "\x00" in v:
        raise ValueError("text must not contain the NUL character (U+0000)")
    return v


# text bounded to what every supported database column can store (no NUL, a maximum length)
Name16 = Annotated[StrictStr, Field(min_length=1, max_length=16), AfterValidator(_no_nul)]
Text16 = Annotated[StrictStr, Field(max_length=16), AfterValidator(_no_nul)]
Text64 = Annotated[StrictStr, Field(max_length=64), AfterValidator(_no_nul)]
Name64 = Annotated[StrictStr, Field(min_length=1, max_length=64), AfterValidator(_no_nul)]
Name128 = Annotated[StrictStr, Field(min_length=1, max_length=128), AfterValidator(_no_nul)]
Text500 = Annotated[StrictStr, Field(max_length=500), AfterValidator(_no_nul)]


Time = Annotated[AwareDatetime, BeforeValidator(_rfc3339_only), AfterValidator(_plausible_time)]
#: a 64-bit signed integer: the widest that SQLite and PostgreSQL store
SEQ_MAX = 2 ** 63 - 1
Number = StrictFloat   # strict: accepts JSON integers and floats, never strings or booleans
PositiveNumber = Annotated[Number, Field(gt=0)]

_MODEL = ConfigDict(extra="ignore", allow_inf_nan=False, frozen=True)


class Observation(BaseModel):
    model_config = _MODEL
    param: Name16
    value: Number
    unit: Text16
    status: Status = "valid"
    time: Time | None = None


class ObsMessage(BaseModel):
    model_config = _MODEL
    v: Literal[1]
    device: Annotated[StrictStr, Field(min_length=1, max_length=64, pattern=r"^[\x21-\x7e]+$")]
    seq: Annotated[StrictInt, Field(ge=0, le=SEQ_MAX)]
    time: Time
    obs: Annotated[list[Observation], Field(min_length=1, max_length=256)]


class Limit(BaseModel):
    model_config = _MODEL
    low: Number | None = None
    high: Number | None = None


class AdmitMessage(BaseModel):
    model_config = _MODEL
    v: Literal[1]
    time: Time
    height_cm: Annotated[Number, Field(gt=30, le=260)] | None = None
    weight_kg: Annotated[Number, Field(gt=0.3, le=500)] | None = None
    limits: Annotated[dict[Name16, Limit], Field(max_length=64)] = Field(default_factory=dict)
    discharged: StrictBool = False


NOTE_KINDS = ("fluid_bolus", "line_flush", "zeroing", "reposition", "sample_draw",
              "free_text", "deterioration_onset")


class NoteMessage(BaseModel):
    """A clinical annotation. ``deterioration_onset`` is an extension of v1 (written by the
    simulators' scenarios to mark when a deterioration began, for detection-delay checks)."""

    model_config = _MODEL
    v: Literal[1]
    time: Time
    kind: Literal["fluid_bolus", "line_flush", "zeroing", "reposition", "sample_draw",
                  "free_text", "deterioration_onset"]
    volume_ml: PositiveNumber | None = None
    over_min: Annotated[Number, Field(ge=0)] | None = None
    param: Name16 | None = None
    by: Text64 | None = None
    text: Text500 | None = None
    duration_s: Annotated[Number, Field(ge=0)] | None = None

    @model_validator(mode="after")
    def _needs(self) -> "NoteMessage":
        if self.kind == "fluid_bolus" and self.volume_ml is None:
            raise ValueError("a fluid_bolus note needs volume_ml (mL given)")
        if self.kind == "free_text" and not self.text:
            raise ValueError("a free_text note needs text (at most 500 characters)")
        return self


class CommandMessage(BaseModel):
    """``cmd`` topic payload (the project's own extension of v1): acknowledge or pause audio.

    ``alarm`` is the alarm id as published on the ``alarm`` topic (or a rule id, which
    addresses that rule's active alarm on the bed).
    """

    model_config = _MODEL
    v: Literal[1]
    time: Time
    action: Literal["acknowledge", "pause_audio"]
    alarm: Name128
    by: Name64


PAYLOAD_MODELS: dict[str, type[BaseModel]] = {
    "obs": ObsMessage,
    "admit": AdmitMessage,
    "note": NoteMessage,
    "cmd": CommandMessage,
}


class RecordingLine(BaseModel):
    """One line of a recording file (JSON Lines, one MQTT message per line, arrival order)."""

    model_config = ConfigDict(extra="ignore")
    rx: Time
    topic: StrictStr
    payload: dict[str, Any] | StrictStr


def format_time(t: datetime) -> str:
    """RFC 3339 in UTC with millisecond precision and a ``Z`` suffix (aware datetimes only)."""
    if t.tzinfo is None:
        raise ValueError(f"time {t.isoformat()!r} has no UTC offset")
    return t.astimezone(timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z")


# --------------------------------------------------------------------------- bodies
# Message bodies hemostream itself publishes outside the core (commands, service status).


def encode(body: dict[str, Any]) -> bytes:
    """Compact JSON bytes of a message body, as published."""
    return json.dumps(body, separators=(",", ":")).encode()


def command_body(action: str, alarm: str, by: str, now: float) -> dict[str, Any]:
    """A ``cmd`` message (acknowledge / pause_audio), validated against :class:`CommandMessage`
    (pydantic ValidationError when a field is out of bounds).

    >>> command_body("acknowledge", "HR_high", "nurse-a", 1796112000.0)["time"]
    '2026-12-01T08:00:00.000Z'
    """
    body = {"v": VERSION, "time": format_epoch(now), "action": action, "alarm": alarm,
            "by": by}
    CommandMessage.model_validate(body)
    return body


def status_body(instance: str, state: str, now: float | None, **extra: Any) -> dict[str, Any]:
    """The retained service status (``online`` / ``offline``) on :func:`status_topic`."""
    d: dict[str, Any] = {"v": VERSION, "kind": "status", "state": state, "instance": instance}
    if now is not None:
        d["time"] = format_epoch(now)
    d.update(extra)
    return d
