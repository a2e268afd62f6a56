"""Scenario files: a ward, its patients, their monitoring and the time line of events.

A scenario is a TOML file (see docs/simulators.md for the full reference)::

    id = "hemorrhage"
    title = "Concealed hemorrhage"
    description = "Bleeds 40 mL/min for 45 min from minute 20; heart rate rises first"
    duration = "2h"

    [[beds]]
    patient = { weight_kg = 78, height_cm = 180 }

    [[beds.events]]
    at = "20m"
    do = "hemorrhage"
    rate_ml_min = 40
    for = "45m"

The shipped scenarios live beside this module in ``scenarios/``; a bed can borrow another
scenario's bed (``scenario = "rv_failure"``), which is how the demo ward is put together.
Errors name the file, the bed and the field.
"""

from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass
from datetime import datetime, timezone
from importlib import resources
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, Field, ValidationError

from hemostream.core.wire import ID_RE, NOTE_KINDS, PARAMS
from hemostream.core.units import UNITS, CANONICAL

from .events import (CONTROL_NAMES, CONTROL_NEUTRAL, STRICT, Duration, Event, format_duration,
                     parse_duration)
from .patient import PATIENT_FIELDS

__all__ = ["Scenario", "ScenarioError", "ScenarioInfo", "BedPlan", "load_scenario",
           "list_scenarios", "parse_duration", "format_duration", "CONTROL_NAMES",
           "CONTROL_NEUTRAL"]


class ScenarioError(ValueError):
    """A scenario that cannot be loaded; the message names the file and the field."""


# --------------------------------------------------------------------------- beds


class Monitoring(BaseModel):
    """What is attached to the patient and how the bed's gateway reports it."""
    model_config = STRICT
    arterial_line: bool = True
    central_line: bool = True
    pa_catheter: bool = False
    co: Literal["continuous", "thermodilution", "none"] = "continuous"
    co_every: Duration | None = 3600.0        # thermodilution schedule (also on demand)
    nibp_every: Duration | None = None        # default: 5 min without an arterial line, else 30
    pawp_every: Duration | None = 3600.0      # with a pulmonary artery catheter
    spo2: bool = True
    resp: bool = True
    temp: bool = False
    units: dict[str, str] = {}                # param or dimension -> UCUM code
    device: str | None = None


class Artifacts(BaseModel):
    """Rates of the random artifacts drawn from the seed (per hour), and whether staff
    document them (probability of a note)."""
    model_config = STRICT
    random: bool = True
    flush_per_hour: float = 0.25
    zeroing_per_hour: float = 0.05
    transducer_move_per_hour: float = 0.04
    dropout_per_hour: float = 0.5
    silence_per_hour: float = 0.03
    damping_per_hour: float = 0.02
    sample_draw_per_hour: float = 0.15
    note_probability: Annotated[float, Field(ge=0, le=1)] = 0.8
    noise: Annotated[float, Field(ge=0, le=5)] = 1.0          # scales measurement noise
    variability: Annotated[float, Field(ge=0, le=5)] = 1.0    # scales physiological wander


class Limit(BaseModel):
    model_config = STRICT
    low: float | None = None
    high: float | None = None


class BedTemplate(BaseModel):
    model_config = STRICT
    id: str | None = None
    scenario: str | None = None               # borrow this scenario's first bed
    label: str | None = None
    patient: dict[str, Any] = {}
    monitoring: dict[str, Any] = {}
    artifacts: dict[str, Any] = {}
    limits: dict[str, Limit] = {}
    events: list[Event] = []


class ScenarioFile(BaseModel):
    model_config = STRICT
    id: Annotated[str, Field(pattern=r"^[a-z0-9_]{1,40}$")]
    title: str
    description: Annotated[str, Field(max_length=200)]
    unit: str = "SDU2"
    unit_name: str | None = None
    start: datetime = datetime(2026, 12, 1, 8, 0, tzinfo=timezone.utc)
    duration: Duration = 7200.0
    defaults: BedTemplate = BedTemplate()
    beds: Annotated[list[BedTemplate], Field(min_length=1)]
    events: list[Event] = []


# --------------------------------------------------------------------------- resolved beds


@dataclass(frozen=True)
class BedPlan:
    """One bed ready to simulate: patient overrides, monitoring, artifacts and events."""

    index: int                      # 0-based position in the ward
    id: str
    label: str
    source: str                     # scenario id the bed came from
    patient: dict[str, Any]
    monitoring: Monitoring
    artifacts: Artifacts
    limits: dict[str, Limit]
    events: tuple[Any, ...]


@dataclass(frozen=True)
class ScenarioInfo:
    id: str
    title: str
    description: str
    path: Path


@dataclass(frozen=True)
class Scenario:
    """A loaded scenario. :meth:`plan` lays out ``n`` beds, cycling the file's beds."""

    file: ScenarioFile
    path: Path | None

    @property
    def id(self) -> str:
        return self.file.id

    @property
    def description(self) -> str:
        return self.file.description

    @property
    def unit(self) -> str:
        return self.file.unit

    @property
    def start(self) -> datetime:
        return self.file.start

    @property
    def duration_s(self) -> float:
        return self.file.duration

    @property
    def bed_count(self) -> int:
        return len(self.file.beds)

    def plan(self, beds: int | None = None) -> list[BedPlan]:
        n = self.bed_count if beds is None else int(beds)
        if n < 1:
            raise ScenarioError(f"{self._where()}: need at least one bed, got {n}")
        resolved = [self._resolve(i, b, set()) for i, b in enumerate(self.file.beds)]
        out: list[BedPlan] = []
        # explicit ids hold for the file's own beds; other beds are numbered by position,
        # skipping numbers already taken
        explicit = [r["id"] for r in resolved if r["id"]]
        dup = sorted({x for x in explicit if explicit.count(x) > 1})
        if dup:
            raise ScenarioError(f"{self._where()}: bed id(s) {', '.join(dup)} used twice")
        used = {r["id"] for r in resolved[:n] if r["id"]}
        for i in range(n):
            src = resolved[i % len(resolved)]
            if src["id"] and i < len(resolved):
                bed_id = src["id"]
            else:
                k = i + 1
                while f"bed-{k:02d}" in used:
                    k += 1
                bed_id = f"bed-{k:02d}"
                used.add(bed_id)
            if not ID_RE.match(bed_id):
                raise ScenarioError(f"{self._where()}: bed id {bed_id!r} must be 1-32 "
                                    "characters of A-Z a-z 0-9 - _")
            try:
                mon = Monitoring(**src["monitoring"])
                art = Artifacts(**src["artifacts"])
            except ValidationError as e:
                raise ScenarioError(f"{self._where()}: bed {bed_id}: {_first_error(e)}") from None
            _check_monitoring(mon, f"{self._where()}: bed {bed_id}")
            out.append(BedPlan(index=i, id=bed_id, label=src["label"], source=src["source"],
                               patient=dict(src["patient"]), monitoring=mon, artifacts=art,
                               limits=dict(src["limits"]),
                               events=tuple(sorted(src["events"], key=lambda e: e.at))))
        return out

    def _where(self) -> str:
        return str(self.path) if self.path else f"scenario {self.id}"

    def _resolve(self, i: int, bed: BedTemplate, seen: set[str]) -> dict[str, Any]:
        """The bed as layers, later ones winning table by table: this file's ``defaults``,
        the borrowed scenario's bed (itself fully resolved), the bed's own tables. Events
        add up: borrowed, the bed's, this file's ``defaults`` and top-level ``events``."""
        if bed.scenario:
            if bed.scenario in seen or bed.scenario == self.id:
                raise ScenarioError(f"{self._where()}: bed {i + 1} borrows scenario "
                                    f"{bed.scenario!r} in a loop")
            other = load_scenario(bed.scenario)
            base = other._resolve(0, other.file.beds[0], seen | {self.id})
        else:
            base = {"label": self.file.title, "source": self.id, "patient": {},
                    "monitoring": {}, "artifacts": {}, "limits": {}, "events": []}
        defaults = self.file.defaults
        merged: dict[str, Any] = {"id": bed.id, "label": bed.label or base["label"],
                                  "source": base["source"]}
        for table in ("patient", "monitoring", "artifacts", "limits"):
            merged[table] = {**getattr(defaults, table), **base[table], **getattr(bed, table)}
        merged["events"] = (list(base["events"]) + list(bed.events) + list(defaults.events)
                            + list(self.file.events))
        unknown = set(merged["patient"]) - set(PATIENT_FIELDS)
        if unknown:
            raise ScenarioError(f"{self._where()}: bed {i + 1}: unknown patient field(s) "
                                f"{', '.join(sorted(unknown))}; known: {', '.join(PATIENT_FIELDS)}")
        for ev in merged["events"]:
            _check_event(ev, f"{self._where()}: bed {i + 1}")
        bad = [k for k in merged["limits"] if k not in PARAMS]
        if bad:
            raise ScenarioError(f"{self._where()}: bed {i + 1}: limits for unknown "
                                f"parameter(s) {', '.join(bad)}")
        return merged


def _check_event(ev: Any, where: str) -> None:
    if ev.do == "change":
        bad = set(ev.set) - set(CONTROL_NAMES)
        if bad:
            raise ScenarioError(f"{where}: event at {format_duration(ev.at)}: unknown control(s) "
                                f"{', '.join(sorted(bad))}; known: {', '.join(CONTROL_NAMES)}")
    if ev.do == "note" and ev.kind not in NOTE_KINDS:
        raise ScenarioError(f"{where}: note at {format_duration(ev.at)}: kind {ev.kind!r}; "
                            f"expected one of {', '.join(NOTE_KINDS)}")
    if ev.do == "dropout":
        unknown = [p for p in ev.params if p not in PARAMS]
        if unknown:
            raise ScenarioError(f"{where}: dropout at {format_duration(ev.at)}: unknown "
                                f"param(s) {', '.join(unknown)}")


def _check_monitoring(mon: Monitoring, where: str) -> None:
    for key, code in mon.units.items():
        if key in CANONICAL:
            dim = key
        elif key in PARAMS:
            dim = PARAMS[key].dimension
        else:
            raise ScenarioError(f"{where}: monitoring.units key {key!r}: expected a parameter "
                                f"({', '.join(PARAMS)}) or a dimension ({', '.join(CANONICAL)})")
        spec = UNITS.get(code)
        if spec is None or spec.dimension != dim:
            ok = [c for c, s in UNITS.items() if s.dimension == dim]
            raise ScenarioError(f"{where}: monitoring.units {key} = {code!r}: expected one of "
                                f"{', '.join(ok)}")
    if mon.device is not None and not re.match(r"^[\x21-\x7e]{1,64}$", mon.device):
        raise ScenarioError(f"{where}: monitoring.device {mon.device!r}: 1-64 printable "
                            "characters without spaces")


def _first_error(e: ValidationError) -> str:
    err = e.errors()[0]
    loc = ".".join(str(x) for x in err["loc"])
    return f"{loc}: {err['msg']}" + (f" (got {err['input']!r})" if "input" in err
                                      and not isinstance(err["input"], dict) else "")


# --------------------------------------------------------------------------- loading


def _scenario_dir():
    return resources.files("simulators").joinpath("scenarios")


def list_scenarios() -> list[ScenarioInfo]:
    """The shipped scenarios, sorted by id."""
    out = []
    for entry in sorted(_scenario_dir().iterdir(), key=lambda p: p.name):
        if entry.name.endswith(".toml"):
            data = tomllib.loads(entry.read_text(encoding="utf-8"))
            out.append(ScenarioInfo(data.get("id", entry.name[:-5]), data.get("title", ""),
                                    data.get("description", ""), Path(str(entry))))
    return out


def load_scenario(name_or_path: str | Path) -> Scenario:
    """Load a shipped scenario by id (``hemorrhage``) or a scenario file by path."""
    if isinstance(name_or_path, Scenario):
        return name_or_path
    text = str(name_or_path)
    path = Path(text)
    if text.endswith(".toml") or path.is_file() or "/" in text:
        if not path.is_file():
            raise ScenarioError(f"scenario file {text}: not found")
        source, where = path.read_text(encoding="utf-8"), path
    else:
        entry = _scenario_dir().joinpath(f"{text}.toml")
        if not entry.is_file():
            names = ", ".join(s.id for s in list_scenarios())
            raise ScenarioError(f"no scenario named {text!r}; shipped: {names} "
                                "(or give a path to a .toml file)")
        source, where = entry.read_text(encoding="utf-8"), Path(str(entry))
    try:
        data = tomllib.loads(source)
    except tomllib.TOMLDecodeError as e:
        raise ScenarioError(f"{where}: not valid TOML: {e}") from None
    try:
        sf = ScenarioFile(**data)
    except ValidationError as e:
        raise ScenarioError(f"{where}: {_first_error(e)}") from None
    if not ID_RE.match(sf.unit):
        raise ScenarioError(f"{where}: unit {sf.unit!r} must be 1-32 characters of "
                            "A-Z a-z 0-9 - _")
    if sf.start.tzinfo is None:
        raise ScenarioError(f"{where}: start {sf.start} needs a UTC offset (e.g. Z)")
    sc = Scenario(sf, where)
    sc.plan()          # resolve borrowed beds and check every bed now, not mid-run
    return sc
