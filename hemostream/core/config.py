"""Configuration models (pure data; loading from TOML lives in :mod:`hemostream.config`).

Every number has a default; a TOML file only needs what it changes. Unknown keys are errors,
so a misspelt option is reported instead of silently ignored.
"""

from __future__ import annotations

import warnings
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

from .intake import IntakeConfig
from .rules.config import RulesConfig
from .wire import ID_RE, PARAMS

_STRICT = ConfigDict(extra="forbid")


class Bounds(BaseModel):
    """Physically plausible range of a parameter in its canonical unit (inclusive)."""

    model_config = _STRICT
    low: float
    high: float

    @model_validator(mode="after")
    def _ordered(self) -> "Bounds":
        if self.low >= self.high:
            raise ValueError(f"low ({self.low}) must be below high ({self.high})")
        return self


# Defaults from the parameter table (hemostream.core.params): plausible ranges (values
# outside are rejected, never clamped) and maximum ages for derivations (seconds).
DEFAULT_PLAUSIBLE: dict[str, tuple[float, float]] = {p: s.plausible for p, s in PARAMS.items()}
DEFAULT_MAX_AGE: dict[str, float] = {p: s.max_age_s for p, s in PARAMS.items()}


class IngestConfig(BaseModel):
    model_config = _STRICT
    max_payload_bytes: Annotated[int, Field(gt=0)] = 256 * 1024
    stored_raw_bytes: Annotated[int, Field(gt=0)] = 64 * 1024
    max_clock_skew_s: Annotated[float, Field(ge=0)] = 300.0
    #: messages older than the bed's newest by more than this are stored, flagged late and
    #: not fed to derivations; within it they are handled in measurement order
    late_after_s: Annotated[float, Field(ge=0)] = 30.0
    #: a bed's clock (late handling, which value is current, the rules' time) follows the
    #: measurement times but never runs ahead of arrival by more than this: one message
    #: dated ahead (within max_clock_skew_s) cannot push it forward and hold back the rest
    bed_clock_lead_s: Annotated[float, Field(ge=0)] = 1.0
    #: per device, how many recent message identities are remembered to drop duplicates
    dedup_per_device: Annotated[int, Field(ge=16)] = 512
    plausible: dict[str, Bounds] = Field(
        default_factory=lambda: {p: Bounds(low=lo, high=hi)
                                 for p, (lo, hi) in DEFAULT_PLAUSIBLE.items()})

    @model_validator(mode="after")
    def _complete(self) -> "IngestConfig":
        unknown = sorted(set(self.plausible) - set(PARAMS))
        if unknown:
            raise ValueError(f"plausible: unknown parameter(s) {unknown}")
        merged = {p: Bounds(low=lo, high=hi) for p, (lo, hi) in DEFAULT_PLAUSIBLE.items()}
        merged.update(self.plausible)
        object.__setattr__(self, "plausible", merged)
        return self


class DeriveConfig(BaseModel):
    model_config = _STRICT
    bsa_formula: Literal["mosteller", "dubois"] = "mosteller"
    max_age_s: dict[str, Annotated[float, Field(gt=0)]] = Field(
        default_factory=lambda: dict(DEFAULT_MAX_AGE))

    @model_validator(mode="after")
    def _complete(self) -> "DeriveConfig":
        unknown = sorted(set(self.max_age_s) - set(PARAMS))
        if unknown:
            raise ValueError(f"max_age_s: unknown parameter(s) {unknown}")
        merged = dict(DEFAULT_MAX_AGE)
        merged.update(self.max_age_s)
        object.__setattr__(self, "max_age_s", merged)
        return self


class RetentionConfig(BaseModel):
    """How long stored data is kept (days; 0 keeps it forever). ``hemostream db prune`` and
    the live service (every ``prune_every_s``, 0 = never) remove what is older."""

    model_config = _STRICT
    #: observations, derived values and observation messages at full rate
    full_rate_days: Annotated[float, Field(ge=0)] = 30.0
    #: per-minute median/min/max/count of each parameter and derived value
    minute_stats_days: Annotated[float, Field(ge=0)] = 730.0
    #: alarm events, notes, commands, admissions, rejects, configurations and their messages
    audit_days: Annotated[float, Field(ge=0)] = 3650.0
    prune_every_s: Annotated[float, Field(ge=0)] = 3600.0


class StoreConfig(BaseModel):
    model_config = _STRICT
    url: str = "sqlite:///hemostream.db"
    #: a bed's chunk is sealed (merged, compressed, its messages moved in) at this many
    #: observation messages; before that, at most ``chunk_segments`` open segments
    chunk_messages: Annotated[int, Field(gt=0)] = 900
    chunk_segments: Annotated[int, Field(gt=1)] = 128
    #: each write batch is staged as one row of every bed's values; the staged rows are
    #: split into per-bed segments every ``stage_messages`` messages or ``stage_s`` seconds
    stage_messages: Annotated[int, Field(gt=0)] = 20000
    stage_s: Annotated[float, Field(gt=0)] = 60.0
    #: staged as one row per group of beds, the groups split in turn: more groups spread the
    #: split's work (lower alarm latency tail), fewer cost less per batch (more throughput)
    stage_groups: Annotated[int, Field(ge=1, le=64)] = 1
    retention: RetentionConfig = Field(default_factory=RetentionConfig)
    #: derived values are recomputable from the stored observations, so each (bed, value)
    #: is stored when it first appears, when it moved by more than `derived_deadband`
    #: (relative) since the last stored one, or at least every `derived_every_s` seconds.
    derived_every_s: Annotated[float, Field(ge=0)] = 60.0
    derived_deadband: Annotated[float, Field(ge=0)] = 0.05
    batch_rows: Annotated[int, Field(gt=0)] = 20000
    #: on stop, how long to wait for a busy or unreachable database before giving up on the
    #: last batches (they stay unacknowledged, so the broker delivers them again)
    shutdown_wait_s: Annotated[float, Field(gt=0)] = 30.0
    #: SQLite only, live service: "full" syncs every commit to disk before the broker is told
    #: (survives a power cut); "normal" survives a crash of hemostream but not of the machine
    sqlite_synchronous: Literal["full", "normal"] = "full"


class UnitConfig(BaseModel):
    model_config = _STRICT
    id: str
    name: str = ""
    beds: list[str] = Field(default_factory=list)

    @model_validator(mode="after")
    def _ids(self) -> "UnitConfig":
        for x in [self.id, *self.beds]:
            if not ID_RE.match(x):
                raise ValueError(f"{x!r} must be 1-32 characters of A-Z a-z 0-9 - _")
        return self


class BrokerConfig(BaseModel):
    """The MQTT broker of the live service (``hemostream run``). Secrets never live here:
    the password comes from the environment variable or file named below."""

    model_config = _STRICT
    url: str = "mqtt://127.0.0.1:1883"
    client_id: str = "hemostream-1"
    #: MQTT protocol version: "5" (default) or "3.1.1" (for brokers that speak only 3.1.1;
    #: session expiry, receive maximum and maximum packet size are MQTT 5 only and then come
    #: from the broker's own settings, with a note in the log)
    protocol: Literal["5", "3.1.1"] = "5"
    username: str | None = None
    password_env: str | None = None
    password_file: str | None = None
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    keepalive_s: Annotated[int, Field(gt=0)] = 30
    health_every_s: Annotated[float, Field(gt=0)] = 10.0
    #: how long the broker keeps hemostream's session (subscriptions and queued messages)
    #: while hemostream is away (MQTT 5 Session Expiry Interval, seconds)
    session_expiry_s: Annotated[int, Field(gt=0, le=0xFFFFFFFF)] = 7 * 86400
    #: unacknowledged QoS 1 messages the broker may have in flight to hemostream (MQTT 5
    #: Receive Maximum): the back-pressure window towards the broker
    receive_maximum: Annotated[int, Field(ge=1, le=65535)] = 1000
    #: larger MQTT packets are not sent to hemostream at all (MQTT 5 Maximum Packet Size);
    #: payloads over ingest.max_payload_bytes but under this are stored as rejects
    max_packet_bytes: Annotated[int, Field(ge=1024)] = 1024 * 1024
    connect_timeout_s: Annotated[float, Field(gt=0)] = 10.0
    #: reconnect back-off: doubles from min to max, with random jitter
    reconnect_min_s: Annotated[float, Field(gt=0)] = 0.5
    reconnect_max_s: Annotated[float, Field(gt=0)] = 30.0
    #: bounded queue between receiving and processing (messages)
    queue_size: Annotated[int, Field(ge=1)] = 2000
    #: a batch goes to the database after this long or this many messages, whichever first;
    #: messages are acknowledged to the broker when their batch has committed
    flush_every_s: Annotated[float, Field(gt=0)] = 0.05
    flush_messages: Annotated[int, Field(ge=1)] = 500
    #: alarm lifecycle events kept for publishing while the broker is unreachable
    offline_events: Annotated[int, Field(ge=0)] = 10000
    #: outgoing QoS 1 messages in flight / queued in the client
    outgoing_inflight: Annotated[int, Field(ge=1)] = 100
    outgoing_queue: Annotated[int, Field(ge=0)] = 20000
    #: QoS of the ``derived`` publications: 0 (default; a live stream, one per input
    #: message, recomputable from the stored observations: no PUBACK to wait for and handle)
    #: or 1. Alarm state, alarm events and status are always QoS 1.
    derived_qos: Literal[0, 1] = 0


class WorkersConfig(BaseModel):
    """[workers]: several ``hemostream run`` processes with the same configuration and the
    same PostgreSQL database share the units by lease (docs/workers.md)."""

    model_config = _STRICT
    #: share the units with other workers (needs a PostgreSQL store.url)
    enabled: bool = False
    #: this worker's name in the lease table; empty: host name and process id
    name: str = ""
    #: a worker that stops renewing loses its units this long after its last renewal
    lease_s: Annotated[float, Field(gt=0)] = 10.0
    #: how often leases are renewed and the sharing is looked at again
    check_every_s: Annotated[float, Field(gt=0)] = 1.0
    #: stored history (seconds before the newest stored message) a new owner feeds through
    #: the rules again, without storing or publishing, to rebuild trend windows and alarm
    #: states before it takes new messages
    rebuild_s: Annotated[float, Field(ge=0)] = 1800.0

    @model_validator(mode="after")
    def _renew_in_time(self) -> "WorkersConfig":
        if self.check_every_s * 2 > self.lease_s:
            raise ValueError("workers.check_every_s must be at most half of workers.lease_s "
                             "(a lease is renewed at least twice before it runs out)")
        return self


class ConfigDeprecation(FutureWarning):
    """A configuration key that moved; the old place still works for now."""


#: (old section, key) -> new section, for keys that moved
MOVED_KEYS = {("broker", "sqlite_synchronous"): "store"}


class Config(BaseModel):
    model_config = _STRICT

    @model_validator(mode="before")
    @classmethod
    def _moved_keys(cls, data: Any) -> Any:
        if not isinstance(data, dict):
            return data
        for (old, key), new in MOVED_KEYS.items():
            sec = data.get(old)
            if isinstance(sec, dict) and key in sec:
                data = dict(data)
                sec = dict(sec)
                value = sec.pop(key)
                data[old] = sec
                target = data.get(new)
                if isinstance(target, BaseModel):
                    target = target.model_dump()
                target = dict(target) if isinstance(target, dict) else {}
                if key in target:
                    msg = f"{old}.{key} is deprecated and ignored: {new}.{key} is set"
                else:
                    target[key] = value
                    msg = f"{old}.{key} is deprecated: write it as {new}.{key}"
                data[new] = target
                warnings.warn(msg, ConfigDeprecation, stacklevel=2)
        return data

    instance: str = "hemostream-1"
    #: units this instance serves; empty means every unit seen
    units: list[UnitConfig] = Field(default_factory=list)
    ingest: IngestConfig = Field(default_factory=IngestConfig)
    derive: DeriveConfig = Field(default_factory=DeriveConfig)
    store: StoreConfig = Field(default_factory=StoreConfig)
    broker: BrokerConfig = Field(default_factory=BrokerConfig)
    #: several workers sharing the units (docs/workers.md)
    workers: WorkersConfig = Field(default_factory=WorkersConfig)
    #: trends, limit and pattern rules, fluid challenges, alarm lifecycle (configs/rules.toml)
    rules: RulesConfig = Field(default_factory=RulesConfig)
    #: other intakes besides MQTT: [intake.hl7], HL7 v2 (IHE PCD-01) over MLLP (docs/hl7.md)
    intake: IntakeConfig = Field(default_factory=IntakeConfig)
