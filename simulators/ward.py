"""A simulated ward: scenario -> circulation model -> gateways -> recording lines.

Size: the beds' per-second loop (WardBed) and the generator that interleaves the beds share
the event and artifact plumbing; kept in one reading.

:func:`generate` is a generator: it simulates the beds together one second at a time and
yields the recording lines (``{"rx", "topic", "payload"}``) in arrival order, keeping only a
couple of seconds of messages in memory. Each bed draws its patient, artifacts, noise,
physiological wander and transit delays from its own random streams, derived from the seed
and the bed's position, so the same seed gives the same recording byte for byte, and a bed's
data do not change when beds are added after it.
"""

from __future__ import annotations

import heapq
import json
import sys
from datetime import datetime, timedelta
from pathlib import Path
from typing import IO, Any, Callable, Iterable, Iterator

import numpy as np

from hemostream.core.wire import format_time, topic

from .gateway import CHANNEL_NOTE_PARAM, CMH2O_TO_MMHG, Artifact, Gateway, Vitals
from .model import Circulation
from .patient import Params, Patient
from .scenario import (CONTROL_NAMES, CONTROL_NEUTRAL, BedPlan, Scenario, ScenarioError,
                       format_duration, load_scenario)

__all__ = ["generate", "write_recording", "WardBed", "TRANSIT_MS"]

#: transit delay from measurement to arrival, ms (uniform)
TRANSIT_MS = (20, 80)

_MODEL_CONTROLS = [n for n in CONTROL_NAMES if n not in ("temp_shift", "spo2_shift",
                                                           "rr_shift")]

# physiological wander (Ornstein-Uhlenbeck): heart rate and systemic resistance
# (sizes of resting variability, common practice; scaled by ``artifacts.variability``)
_WANDER = {"hr": (1.5, 90.0), "svr": (0.03, 240.0)}          # (sd, time constant s)
_WANDER_KEEP = np.exp(-1.0 / np.array([tau for _, tau in _WANDER.values()]))
_WANDER_KICK = np.array([sd for sd, _ in _WANDER.values()]) * np.sqrt(1 - _WANDER_KEEP ** 2)


class WardBed:
    """One bed of a ward: its patient, time line and gateway."""

    def __init__(self, plan: BedPlan, unit: str, seed: int, duration_s: int) -> None:
        self.plan = plan
        self.id = plan.id
        ss = np.random.SeedSequence(seed, spawn_key=(plan.index,))
        r_patient, r_artifacts, r_gateway, r_wander, r_delay = (
            np.random.default_rng(s) for s in ss.spawn(5))
        self.patient = Patient.random(r_patient, **plan.patient)
        self.params = Params.for_patient(self.patient)
        self.duration = duration_s
        self.delay_rng = r_delay
        self._delays: list[int] = []
        self._delay_row = 0
        self.wander_rng = r_wander
        self.variability = plan.artifacts.variability
        self.controls = dict(CONTROL_NEUTRAL)
        self.bleeds: list[tuple[int | None, float]] = []           # (end, rate)
        self.infusions: list[tuple[int, float, float]] = []        # (end, rate, retained)
        self.ramps: list[list[Any]] = []                           # [t0, t1, name, v0, v1]
        self.notes: list[tuple[int, dict[str, Any]]] = []
        artifacts: list[Artifact] = []
        measures: list[tuple[int, str]] = []
        self.actions: list[tuple[int, Any]] = []
        for ev in plan.events:
            t = int(round(ev.at))
            if t >= duration_s:
                continue
            if ev.do in ("nibp", "wedge", "measure_co"):
                measures.append((t, ev.do))
            elif ev.do in ("flush", "zeroing", "transducer_move", "dropout", "silence",
                           "damping", "sample_draw"):
                art, notes = _artifact(ev, t)
                artifacts.append(art)
                self.notes.extend(notes)
            else:
                self.actions.append((t, ev))
                self.notes.extend(_physiology_notes(ev, t))
        if plan.artifacts.random:
            arts, notes = _random_artifacts(plan, duration_s, r_artifacts)
            artifacts.extend(arts)
            self.notes.extend(notes)
        self.actions.sort(key=lambda a: a[0])
        self.notes.sort(key=lambda n: n[0])
        self._next_action = 0
        self._next_note = 0
        self.gateway = Gateway(unit=unit, bed=plan.id, index=plan.index,
                               monitoring=plan.monitoring, artifacts=artifacts,
                               rng=r_gateway, noise=plan.artifacts.noise,
                               duration_s=duration_s, measures=measures)
        self.topic_note = topic(unit, plan.id, "note")
        self.topic_admit = topic(unit, plan.id, "admit")
        self._wander = np.zeros(2)
        self._wander_block = np.zeros((0, 2))
        self._wander_row = 0

    # ------------------------------------------------------------------ time line

    def advance(self, t: int) -> bool:
        """Apply the events due at second ``t`` and move the ramps; True if a control moved."""
        changed = False
        while self._next_action < len(self.actions) and self.actions[self._next_action][0] <= t:
            _, ev = self.actions[self._next_action]
            self._next_action += 1
            self._start(ev, t)
            changed = True
        if self.bleeds and any(end is not None and end <= t for end, _ in self.bleeds):
            self.bleeds = [(e, r) for e, r in self.bleeds if e is None or e > t]
            changed = True
        if self.infusions and any(end <= t for end, _, _ in self.infusions):
            self.infusions = [i for i in self.infusions if i[0] > t]
            changed = True
        if self.ramps:
            for r in self.ramps:
                t0, t1, name, v0, v1 = r
                if v0 is None:
                    r[3] = v0 = self.controls[name]
                frac = 1.0 if t1 <= t0 else min(1.0, (t - t0) / (t1 - t0))
                self.controls[name] = v0 + (v1 - v0) * frac
            self.ramps = [r for r in self.ramps if r[1] > t]
            changed = True
        return changed

    def _start(self, ev: Any, t: int) -> None:
        if ev.do == "hemorrhage":
            end = None if ev.for_ is None else t + int(round(ev.for_))
            self.bleeds.append((end, ev.rate_ml_min))
        elif ev.do == "hemorrhage_stop":
            self.bleeds = []
        elif ev.do == "bolus":
            over = max(int(round(ev.over)), 1)
            retained = 0.0 if ev.fluid == "crystalloid" else 1.0
            self.infusions.append((t + over, ev.volume_ml * 60.0 / over, retained))
        elif ev.do == "contractility":
            sides = ("left", "right") if ev.side == "both" else (ev.side,)
            for side in sides:
                self._ramp(f"contractility_{side}", ev.factor, t, ev.over)
        elif ev.do == "change":
            for name, value in ev.set.items():
                self._ramp(name, value, t, ev.over)

    def _ramp(self, name: str, value: float, t: int, over: float) -> None:
        self.ramps = [r for r in self.ramps if r[2] != name]     # a new target replaces
        self.ramps.append([t, t + int(round(over)), name, None, float(value)])

    @property
    def bleed_ml_min(self) -> float:
        return sum(r for _, r in self.bleeds)

    @property
    def infusion(self) -> tuple[float, float]:
        rate = sum(r for _, r, _ in self.infusions)
        kept = sum(r * k for _, r, k in self.infusions)
        return rate, (kept / rate if rate > 0 else 0.0)

    def wander(self) -> np.ndarray:
        """This second's physiological wander: (heart rate /min, resistance fraction)."""
        if self.variability <= 0:
            return self._wander
        if self._wander_row >= len(self._wander_block):
            self._wander_block = self.wander_rng.standard_normal((600, 2)) \
                * (_WANDER_KICK * self.variability)
            self._wander_row = 0
        self._wander = self._wander * _WANDER_KEEP + self._wander_block[self._wander_row]
        self._wander_row += 1
        return self._wander

    def due_notes(self, t: int) -> Iterator[tuple[int, dict[str, Any]]]:
        while self._next_note < len(self.notes) and self.notes[self._next_note][0] <= t:
            yield self.notes[self._next_note]
            self._next_note += 1

    def delay_ms(self) -> int:
        """A transit delay, ms (uniform over :data:`TRANSIT_MS`)."""
        if self._delay_row >= len(self._delays):
            self._delays = self.delay_rng.integers(TRANSIT_MS[0], TRANSIT_MS[1] + 1,
                                                   size=1000).tolist()
            self._delay_row = 0
        self._delay_row += 1
        return self._delays[self._delay_row - 1]

    def admit_payload(self, time: str) -> dict[str, Any]:
        pt = self.patient
        out: dict[str, Any] = {"v": 1, "time": time, "height_cm": pt.height_cm,
                               "weight_kg": pt.weight_kg}
        if self.plan.limits:
            out["limits"] = {k: {kk: _num(vv) for kk, vv in v.model_dump().items()
                                 if vv is not None}
                             for k, v in self.plan.limits.items()}
        return out


def _physiology_notes(ev: Any, t: int) -> list[tuple[int, dict[str, Any]]]:
    note: dict[str, Any] | None = None
    if ev.do == "bolus" and ev.note:
        note = {"kind": "fluid_bolus", "volume_ml": _num(ev.volume_ml),
                "over_min": _num(round(ev.over / 60.0, 2)), "text": ev.text or ev.fluid}
        if ev.by:
            note["by"] = ev.by
    elif ev.do == "hemorrhage" and ev.onset:
        note = {"kind": "deterioration_onset",
                "text": ev.text or f"hemorrhage of {_num(ev.rate_ml_min)} mL/min begins"}
    elif ev.do == "contractility" and (ev.onset if ev.onset is not None else ev.factor < 1):
        side = {"left": "left ventricular", "right": "right ventricular",
                "both": "biventricular"}[ev.side]
        note = {"kind": "deterioration_onset",
                "text": ev.text or f"{side} contractility falls to {ev.factor:.0%} "
                                   f"over {format_duration(ev.over)}"}
    elif ev.do == "change" and ev.onset:
        note = {"kind": "deterioration_onset", "text": ev.text or "deterioration begins"}
    elif ev.do == "note":
        note = {"kind": ev.kind}
        for key in ("param", "volume_ml", "over_min", "by", "text"):
            if getattr(ev, key) is not None:
                note[key] = getattr(ev, key)
    return [(t, note)] if note else []


def _artifact(ev: Any, t: int) -> tuple[Artifact, list[tuple[int, dict[str, Any]]]]:
    notes: list[tuple[int, dict[str, Any]]] = []
    dur = getattr(ev, "for_", None)
    t1 = None if dur is None else t + max(int(round(dur)), 1)
    kind = ev.do
    if kind == "flush":
        art = Artifact("flush", t, t1, ev.channel, value=ev.bag_mmhg)
        if ev.note:
            notes.append((t, {"kind": "line_flush", "param": CHANNEL_NOTE_PARAM[ev.channel],
                              "duration_s": int(round(ev.for_))}))
    elif kind == "zeroing":
        art = Artifact("zeroing", t, t1, ev.channel)
        if ev.note:
            notes.append((t, {"kind": "zeroing", "param": CHANNEL_NOTE_PARAM[ev.channel],
                              "duration_s": int(round(ev.for_))}))
    elif kind == "transducer_move":
        art = Artifact("transducer_move", t, t1, ev.channel,
                       value=ev.offset_cm * CMH2O_TO_MMHG)
        if ev.note and t1 is not None:
            notes.append((t1, {"kind": "reposition", "param": CHANNEL_NOTE_PARAM[ev.channel],
                               "text": ev.text or "transducer levelled to the phlebostatic axis"}))
    elif kind == "dropout":
        art = Artifact("dropout", t, t1, params=tuple(ev.params))
    elif kind == "silence":
        art = Artifact("silence", t, t1, reboot=ev.reboot)
    elif kind == "damping":
        art = Artifact("damping", t, t1, ev.channel, value=ev.factor)
    else:  # sample_draw
        art = Artifact("sample_draw", t, t1, "ABP", value=300.0)
        if ev.note:
            notes.append((t, {"kind": "sample_draw", "param": "ABP_MEAN",
                              "duration_s": int(round(ev.for_))}))
    return art, notes


def _random_artifacts(plan: BedPlan, duration: int, rng: np.random.Generator
                      ) -> tuple[list[Artifact], list[tuple[int, dict[str, Any]]]]:
    """Artifacts drawn as Poisson processes at the bed's rates (per hour)."""
    a, mon = plan.artifacts, plan.monitoring
    hours = duration / 3600.0
    arts: list[Artifact] = []
    notes: list[tuple[int, dict[str, Any]]] = []
    channels = [c for c, on in (("ABP", mon.arterial_line), ("CVP", mon.central_line),
                                ("PAP", mon.pa_catheter)) if on]
    params = ["HR"] + (["SPO2"] if mon.spo2 else []) + (["RR"] if mon.resp else [])

    def times(rate: float) -> list[int]:
        if rate <= 0 or duration < 300:
            return []
        k = int(rng.poisson(rate * hours))
        return sorted(int(x) for x in rng.uniform(120, duration - 60, size=k))

    def noted() -> bool:
        return bool(rng.random() < a.note_probability)

    for t in times(a.flush_per_hour if channels else 0):
        ch = "ABP" if "ABP" in channels else channels[0]
        d = int(rng.integers(3, 7))
        arts.append(Artifact("flush", t, t + d, ch, value=300.0))
        if noted():
            notes.append((t, {"kind": "line_flush", "param": CHANNEL_NOTE_PARAM[ch],
                              "duration_s": d}))
    for t in times(a.zeroing_per_hour if channels else 0):
        ch = channels[int(rng.integers(len(channels)))]
        d = int(rng.integers(10, 21))
        arts.append(Artifact("zeroing", t, t + d, ch))
        if noted():
            notes.append((t, {"kind": "zeroing", "param": CHANNEL_NOTE_PARAM[ch],
                              "duration_s": d}))
    for t in times(a.transducer_move_per_hour if mon.central_line else 0):
        cm = float(rng.choice([-1, 1]) * rng.uniform(5, 15))
        d = int(rng.uniform(600, 2400))
        arts.append(Artifact("transducer_move", t, t + d, "CVP", value=cm * CMH2O_TO_MMHG))
        if noted() and t + d < duration:
            notes.append((t + d, {"kind": "reposition", "param": "CVP",
                                  "text": "transducer levelled to the phlebostatic axis"}))
    for t in times(a.dropout_per_hour if params else 0):
        p = "SPO2" if ("SPO2" in params and rng.random() < 0.6) else \
            params[int(rng.integers(len(params)))]
        arts.append(Artifact("dropout", t, t + int(rng.uniform(10, 120)), params=(p,)))
    for t in times(a.silence_per_hour):
        arts.append(Artifact("silence", t, t + int(rng.uniform(60, 300)),
                             reboot=bool(rng.random() < 0.5)))
    for t in times(a.damping_per_hour if mon.arterial_line else 0):
        arts.append(Artifact("damping", t, t + int(rng.uniform(300, 1800)), "ABP",
                             value=float(rng.uniform(0.4, 0.7))))
    for t in times(a.sample_draw_per_hour if mon.arterial_line else 0):
        d = int(rng.integers(20, 31))
        arts.append(Artifact("sample_draw", t, t + d, "ABP", value=300.0))
        if noted():
            notes.append((t, {"kind": "sample_draw", "param": "ABP_MEAN", "duration_s": d}))
    return arts, notes


def _num(x: float) -> int | float:
    return int(x) if float(x).is_integer() else x


# --------------------------------------------------------------------------- the ward


def generate(scenario: Scenario | str | Path, beds: int | None = None,
             duration_s: float | None = None, seed: int = 0, *, start: datetime | None = None,
             dt: float = 1.0, progress: Callable[[int, int], None] | None = None
             ) -> Iterator[dict[str, Any]]:
    """Simulate ``scenario`` and yield recording lines in arrival order.

    ``beds`` cycles the scenario's beds (default: as many as the file has); ``duration_s``
    defaults to the scenario's; ``start`` (aware datetime) to the scenario's start time.
    ``progress(seconds_done, seconds_total)`` is called once a simulated minute.

    >>> lines = list(generate("stable", beds=1, duration_s=3, seed=1))
    >>> [line["topic"].rsplit("/", 1)[1] for line in lines]
    ['admit', 'obs', 'obs', 'obs']
    """
    sc = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    plans = sc.plan(beds)
    duration = int(round(sc.duration_s if duration_s is None else duration_s))
    if duration < 1:
        raise ValueError(f"duration must be at least 1 s, got {duration_s!r}")
    t_start = start or sc.start
    if t_start.tzinfo is None:
        raise ValueError("start needs a timezone (UTC)")
    ward = []
    for p in plans:
        try:
            ward.append(WardBed(p, sc.unit, seed, duration))
        except ValueError as e:        # an impossible or malformed patient
            raise ScenarioError(f"{sc._where()}: bed {p.id}: {e}") from None
    model = Circulation([b.params for b in ward], dt=dt)
    n = len(ward)
    base = {name: np.array([b.controls[name] for b in ward]) for name in CONTROL_NAMES}
    spo2_0 = np.array([b.patient.spo2 for b in ward])
    rr_0 = np.array([b.patient.rr for b in ward])
    temp_0 = np.array([b.patient.temp for b in ward])
    co_0 = model.cardiac_output.copy()
    bleed = np.zeros(n)
    infusion = np.zeros(n)
    retained = np.zeros(n)

    def time_of(ms: int) -> str:
        return format_time(t_start + timedelta(milliseconds=ms))

    heap: list[tuple[int, int, dict[str, Any]]] = []
    counter = 0
    changed = False

    def push(rx_ms: int, topic: str, payload: dict[str, Any]) -> None:
        nonlocal counter
        heapq.heappush(heap, (rx_ms, counter, {"rx": time_of(rx_ms), "topic": topic,
                                               "payload": payload}))
        counter += 1

    for b in ward:
        # the admission arrives before the bed's first observation (sent 20 ms or more later)
        push(1 + b.delay_ms() % 15, b.topic_admit, b.admit_payload(time_of(0)))

    steps = int(round(1.0 / dt))
    if abs(steps * dt - 1.0) > 1e-9:
        raise ValueError(f"dt must divide 1 s, got {dt}")
    for t in range(duration):
        # the events of second t set the controls that act over the next second
        for i, b in enumerate(ward):
            if b.advance(t):
                changed = True
                for name in CONTROL_NAMES:
                    base[name][i] = b.controls[name]
                bleed[i] = b.bleed_ml_min
                infusion[i], retained[i] = b.infusion
        ctl = model.controls
        if changed:
            changed = False
            for name in _MODEL_CONTROLS:
                setattr(ctl, name, base[name])
            ctl.bleed_ml_min = bleed
            ctl.infusion_ml_min = infusion
            ctl.infusion_retained = retained
        wander = np.array([b.wander() for b in ward])
        ctl.hr_drive = base["hr_drive"] + wander[:, 0]
        ctl.svr_factor = base["svr_factor"] * (1.0 + wander[:, 1])
        # the true values at second t
        model.prepare()
        out = model.readout()
        pawp, co = out[8], out[9]
        ratio = co / co_0
        # saturation falls with pulmonary congestion and very low flow, breathing quickens
        # (qualitative shapes, from memory)
        spo2 = np.minimum(np.maximum(
            spo2_0 + base["spo2_shift"] - 0.8 * np.maximum(pawp - 18.0, 0.0)
            - 25.0 * np.maximum(0.4 - ratio, 0.0), 50.0), 100.0)
        rr = np.minimum(np.maximum(
            rr_0 + base["rr_shift"] + 0.5 * np.maximum(pawp - 18.0, 0.0)
            + 20.0 * np.maximum(0.7 - ratio, 0.0), 4.0), 50.0)
        rows = np.concatenate([out, [spo2, rr, temp_0 + base["temp_shift"]]]).T.tolist()
        for i, b in enumerate(ward):
            msg = b.gateway.sample(t, Vitals(*rows[i]), time_of)
            if msg is not None:
                ms, payload = msg
                push(ms + b.delay_ms(), b.gateway.topic, payload)
            for t_note, note in b.due_notes(t):
                ms = t_note * 1000
                push(ms + b.delay_ms(), b.topic_note, {"v": 1, "time": time_of(ms), **note})
        # on to second t + 1
        model.advance()
        for _ in range(steps - 1):
            model.step()
        horizon = (t + 1) * 1000
        while heap and heap[0][0] < horizon:
            yield heapq.heappop(heap)[2]
        if progress is not None and ((t + 1) % 60 == 0 or t + 1 == duration):
            progress(t + 1, duration)
    while heap:
        yield heapq.heappop(heap)[2]


def dumps(line: dict[str, Any]) -> str:
    """One recording line as compact JSON (key order as built, so deterministic)."""
    return json.dumps(line, separators=(",", ":"), allow_nan=False)


def write_recording(lines: Iterable[dict[str, Any]], path: str | Path | IO[str]) -> int:
    """Write lines as JSON Lines to ``path`` (``-`` for standard output); return the count."""
    if hasattr(path, "write"):
        return _write(lines, path)  # type: ignore[arg-type]
    if str(path) == "-":
        return _write(lines, sys.stdout)
    p = Path(path)
    if p.parent and not p.parent.exists():
        p.parent.mkdir(parents=True, exist_ok=True)
    tmp = p.with_name(p.name + ".part")
    with open(tmp, "w", encoding="utf-8", newline="\n") as fh:
        count = _write(lines, fh)
    tmp.replace(p)
    return count


def _write(lines: Iterable[dict[str, Any]], fh: IO[str]) -> int:
    count = 0
    buf: list[str] = []
    for line in lines:
        buf.append(dumps(line))
        count += 1
        if len(buf) >= 2000:
            fh.write("\n".join(buf) + "\n")
            buf.clear()
    if buf:
        fh.write("\n".join(buf) + "\n")
    return count
