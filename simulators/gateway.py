"""The bedside gateway: what the monitor makes of the circulation, one message a second.

It adds measurement noise, rounds to the display resolution, converts to the bed's units
(some gateways send CVP in cm[H2O] or pressures in kPa), runs the intermittent measurements
(cuff pressure, wedge pressure, thermodilution cardiac output, each with its own ``time``)
and lays the artifacts over the true values: line flushes, zeroing (status
``calibrating``), a moved transducer, an over-damped line, a blood sample drawn from the
arterial line, dropouts of single parameters and a gateway that goes silent (and may come
back with ``seq`` from 0). Everything random comes from the bed's own generator.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from hemostream.core.units import UNITS
from hemostream.core.wire import PARAMS, topic

from .scenario import Monitoring

__all__ = ["Gateway", "Vitals", "Artifact", "CMH2O_TO_MMHG"]

#: 1 cm[H2O] in mm[Hg] (98.0665 Pa / 133.322387415 Pa, as UCUM defines both)
CMH2O_TO_MMHG = 98.0665 / 133.322387415

#: parameters of each pressure channel
CHANNEL_PARAMS = {
    "ABP": ("ABP_SYS", "ABP_DIA", "ABP_MEAN"),
    "PAP": ("PAP_SYS", "PAP_DIA", "PAP_MEAN"),
    "CVP": ("CVP",),
}
#: the parameter a note about a channel names (the channel's mean)
CHANNEL_NOTE_PARAM = {"ABP": "ABP_MEAN", "PAP": "PAP_MEAN", "CVP": "CVP"}

# measurement noise, standard deviation in canonical units (common practice for the size of
# beat-to-beat and sensor scatter at 1 Hz; scaled by the bed's ``artifacts.noise``)
NOISE_SD = {"HR": 1.0, "ABP_SYS": 1.6, "ABP_DIA": 1.0, "ABP_MEAN": 1.0, "CVP": 0.6,
            "PAP_SYS": 1.2, "PAP_DIA": 0.8, "PAP_MEAN": 0.8, "CO": 0.025, "SPO2": 0.5,
            "RR": 0.8, "TEMP": 0.02}
# one row of standard normals a second: the parameters above in order, then one for the
# artifacts' own scatter, then one shared by the arterial pressures (common mode)
_ART, _COMMON = len(NOISE_SD), len(NOISE_SD) + 1
N_NOISE = len(NOISE_SD) + 2

# display resolution (decimals) in the canonical units; other units below
DECIMALS = {"HR": 0, "PR": 0, "ABP_SYS": 0, "ABP_DIA": 0, "ABP_MEAN": 0, "NIBP_SYS": 0,
            "NIBP_DIA": 0, "NIBP_MEAN": 0, "CVP": 0, "PAP_SYS": 0, "PAP_DIA": 0,
            "PAP_MEAN": 0, "PAWP": 0, "CO": 1, "SV": 0, "SPO2": 0, "RR": 0, "TEMP": 1}
_CO_EMA = 1.0 - math.exp(-1.0 / 20.0)        # 20 s running average, per second
UNIT_DECIMALS = {"kPa": 1, "cm[H2O]": 0, "mL/min": 0, "L": 3, "[degF]": 1}


@dataclass
class Vitals:
    """The true values of one bed at one second (canonical units)."""
    hr: float
    sbp: float
    dbp: float
    map: float
    cvp: float
    pap_sys: float
    pap_dia: float
    pap_mean: float
    pawp: float
    co: float
    sv: float          # the model's stroke volume (the gateway reports CO / HR, as devices do)
    spo2: float
    rr: float
    temp: float


@dataclass
class Artifact:
    """One artifact on the bed's time line (seconds from the start)."""
    kind: str                       # flush, zeroing, transducer_move, dropout, silence, ...
    t0: int
    t1: int | None                  # None: to the end
    channel: str | None = None
    value: float = 0.0              # flush bag pressure, damping factor, offset (mm[Hg])
    params: tuple[str, ...] = ()
    reboot: bool = False


def _round(x: float, decimals: int) -> int | float:
    if decimals == 0:
        return int(round(x))
    return round(x, decimals) + 0.0          # + 0.0 turns -0.0 into 0.0


class Gateway:
    """One bed's gateway. :meth:`sample` turns a second of true values into a message."""

    def __init__(self, *, unit: str, bed: str, index: int, monitoring: Monitoring,
                 artifacts: list[Artifact], rng: np.random.Generator, noise: float,
                 duration_s: int, measures: list[tuple[int, str]]) -> None:
        self.mon = monitoring
        self.topic = topic(unit, bed, "obs")
        self.device = monitoring.device or f"bgw-{unit.lower()}-{index + 1:02d}"
        self.rng = rng
        self.noise = noise
        self.phase_ms = int(rng.integers(0, 1000))
        self.seq = 0
        self.artifacts = sorted(artifacts, key=lambda a: a.t0)
        self._next_art = 0
        self._active: list[Artifact] = []
        self._block: list[list[float]] = []
        self._row = 0
        self._co_ema: float | None = None
        self._pending: list[tuple[int, dict[str, Any]]] = []   # (emit at, observation)
        self._captures: list[tuple[int, str, int]] = []        # (capture at, kind, id)
        self._td: dict[int, dict[str, Any]] = {}
        self._wedge_until = -1
        self._units = {p: self._unit_for(p) for p in PARAMS}
        # schedules of the intermittent measurements, plus those the scenario asks for
        sched: list[tuple[int, str]] = list(measures)
        nibp_every = monitoring.nibp_every
        if nibp_every is None:
            nibp_every = 1800.0 if monitoring.arterial_line else 300.0
        for kind, every, on in (("nibp", nibp_every, True),
                                ("wedge", monitoring.pawp_every, monitoring.pa_catheter),
                                ("measure_co", monitoring.co_every,
                                 monitoring.co == "thermodilution")):
            if on and every and every > 0:
                t = int(rng.uniform(30, min(every, 900)))
                while t < duration_s:
                    sched.append((t, kind))
                    t += int(every)
        for t, kind in sorted(sched):
            self._start_measure(t, kind)

    # ------------------------------------------------------------------ helpers

    def _unit_for(self, param: str) -> tuple[str, float, float, int]:
        spec = PARAMS[param]
        code = self.mon.units.get(param) or self.mon.units.get(spec.dimension) \
            or spec.canonical_unit
        u = UNITS[code]
        decimals = UNIT_DECIMALS.get(code, DECIMALS.get(param, 1))
        return code, u.factor, u.offset, decimals

    def _obs(self, param: str, value: float, status: str | None = None,
             time: str | None = None) -> dict[str, Any]:
        code, factor, offset, decimals = self._units[param]
        o: dict[str, Any] = {"param": param,
                             "value": _round((value - offset) / factor, decimals),
                             "unit": code}
        if status:
            o["status"] = status
        if time:
            o["time"] = time
        return o

    def _noise_row(self) -> list[float]:
        if self._row >= len(self._block):
            self._block = (self.rng.standard_normal((600, N_NOISE)) * self.noise).tolist()
            self._row = 0
        row = self._block[self._row]
        self._row += 1
        return row

    def _start_measure(self, t: int, kind: str) -> None:
        if kind == "nibp":
            self._captures.append((t + 30, "nibp", t))
        elif kind == "wedge" and self.mon.pa_catheter:
            self._captures.append((t, "wedge_start", t))
            self._captures.append((t + 6, "wedge", t))
        elif kind == "measure_co" and self.mon.co != "none":
            for k in range(3):                      # three injectate boluses, 40 s apart
                self._captures.append((t + 40 * k, "td", t))
        self._captures.sort()

    # ------------------------------------------------------------------ one second

    def sample(self, t: int, v: Vitals, time_of) -> tuple[int, dict[str, Any]] | None:
        """The message for second ``t`` as ``(time in ms from the start, payload)``, or
        ``None`` while the gateway is silent. ``time_of(ms)`` formats a time."""
        # artifacts starting and ending
        while self._next_art < len(self.artifacts) and self.artifacts[self._next_art].t0 <= t:
            self._active.append(self.artifacts[self._next_art])
            self._next_art += 1
        if self._active:
            self._active = [a for a in self._active if a.t1 is None or a.t1 > t
                            or (a.kind in ("flush", "sample_draw") and a.t1 == t)]
        nz = self._noise_row()
        ms = t * 1000 + self.phase_ms
        sd = NOISE_SD
        common = nz[_COMMON]
        vals: dict[str, float] = {"HR": v.hr + nz[0] * sd["HR"]}
        mon = self.mon
        if mon.arterial_line:
            vals["ABP_SYS"] = v.sbp + common + nz[1] * sd["ABP_SYS"]
            vals["ABP_DIA"] = v.dbp + common + nz[2] * sd["ABP_DIA"]
            vals["ABP_MEAN"] = v.map + common + nz[3] * sd["ABP_MEAN"]
        if mon.central_line:
            vals["CVP"] = v.cvp + nz[4] * sd["CVP"]
        if mon.pa_catheter:
            if t < self._wedge_until:                # balloon up: the tip reads wedge
                w = v.pawp + nz[7] * sd["PAP_MEAN"]
                vals["PAP_SYS"], vals["PAP_DIA"], vals["PAP_MEAN"] = w + 3.0, w - 2.0, w
            else:
                vals["PAP_SYS"] = v.pap_sys + nz[5] * sd["PAP_SYS"]
                vals["PAP_DIA"] = v.pap_dia + nz[6] * sd["PAP_DIA"]
                vals["PAP_MEAN"] = v.pap_mean + nz[7] * sd["PAP_MEAN"]
        if mon.co == "continuous":
            # pulse-contour style: a 20 s running average of the true output, with scatter
            k = _CO_EMA
            self._co_ema = v.co if self._co_ema is None else self._co_ema + k * (v.co - self._co_ema)
            co = self._co_ema * (1.0 + nz[8] * sd["CO"])
            vals["CO"] = co
            vals["SV"] = co * 1000.0 / max(v.hr, 1.0)
        if mon.spo2:
            vals["SPO2"] = min(v.spo2 + nz[9] * sd["SPO2"], 100.0)
        if mon.resp:
            vals["RR"] = max(v.rr + nz[10] * sd["RR"], 0.0)
        if mon.temp:
            vals["TEMP"] = v.temp + nz[11] * sd["TEMP"]

        status: dict[str, str] = {}
        silent = False
        omit: set[str] = set()
        for a in self._active:
            silent = silent or self._apply(a, t, vals, status, omit, nz)

        extra = self._intermittent(t, v, ms, silent, time_of)
        if silent:
            return None
        obs = [self._obs(p, x, status.get(p)) for p, x in vals.items() if p not in omit]
        obs.extend(extra)
        if not obs:
            return None
        payload = {"v": 1, "device": self.device, "seq": self.seq, "time": time_of(ms),
                   "obs": obs}
        self.seq += 1
        return ms, payload

    def _apply(self, a: Artifact, t: int, vals: dict[str, float], status: dict[str, str],
               omit: set[str], nz: list[float]) -> bool:
        """Lay artifact ``a`` over this second's values; True when the gateway is silent."""
        kind = a.kind
        if kind == "silence":
            if a.reboot and a.t1 is not None and t == a.t1 - 1:
                self.seq = 0                        # restarts counting from 0
            return True
        params = CHANNEL_PARAMS.get(a.channel or "", ())
        present = [p for p in params if p in vals]
        if kind == "dropout":
            omit.update(a.params)
        elif kind == "transducer_move":
            for p in present:
                vals[p] += a.value
        elif kind == "zeroing":
            for p in present:
                vals[p] = nz[_ART] * 0.4
                status[p] = "calibrating"
        elif kind == "damping" and len(present) == 3:
            s, d, m = present
            vals[s] = vals[m] + (vals[s] - vals[m]) * a.value
            vals[d] = vals[m] - (vals[m] - vals[d]) * a.value
        elif kind in ("flush", "sample_draw"):
            bag = a.value or 300.0
            if kind == "sample_draw" and (a.t1 is None or t < a.t1 - 3):
                # stopcock turned to the sampling port: a flat, low trace
                for p in present:
                    vals[p] = 6.0 + nz[_ART] * 2.0
            elif a.t1 is not None and t == a.t1:
                # the line rings for a second after the flush valve closes
                if len(present) == 3:
                    vals[present[0]] += 22.0
                    vals[present[1]] -= 9.0
                elif present:
                    vals[present[0]] += 4.0
            else:
                # the flush bag's pressure as a square wave: high and without a pulse
                level = bag * 0.93 + nz[_ART] * 4.0
                if len(present) == 3:
                    vals[present[0]] = level + 3.0
                    vals[present[1]] = level - 4.0
                    vals[present[2]] = level
                elif present:
                    vals[present[0]] = level
        return False

    def _intermittent(self, t: int, v: Vitals, ms: int, silent: bool, time_of) -> list[dict]:
        """Run the cuff, wedge and thermodilution captures due now; return what is ready."""
        while self._captures and self._captures[0][0] <= t:
            _, kind, key = self._captures.pop(0)
            r = (self.rng.standard_normal(3) * self.noise).tolist()
            when = time_of(ms)
            if kind == "nibp" and not silent:
                # oscillometry measures the mean; systolic and diastolic are estimated
                self._pending.append((t + 1, self._obs("NIBP_SYS", v.sbp - 2.0 + r[0] * 5.0,
                                                       time=when)))
                self._pending.append((t + 1, self._obs("NIBP_DIA", v.dbp + 3.0 + r[1] * 4.0,
                                                       time=when)))
                self._pending.append((t + 1, self._obs("NIBP_MEAN", v.map + r[2] * 3.0,
                                                       time=when)))
            elif kind == "wedge_start":
                self._wedge_until = t + 12
            elif kind == "wedge":
                # read at end-expiration from the wedge trace, reported a little later
                self._pending.append((t + 14, self._obs("PAWP", v.pawp + r[0] * 1.0,
                                                        time=when)))
            elif kind == "td":
                # three injections, each scattering about 6 % (thermodilution
                # repeatability, from memory); reported as their mean, timed at the middle one
                run = self._td.setdefault(key, {"co": []})
                run["co"].append(v.co * (1.0 + r[0] * 0.06))
                if len(run["co"]) == 2:
                    run["time"], run["hr"] = when, v.hr
                if len(run["co"]) == 3:
                    co = sum(run["co"]) / 3.0
                    self._pending.append((t + 10, self._obs("CO", co, time=run["time"])))
                    self._pending.append((t + 10, self._obs(
                        "SV", co * 1000.0 / max(run["hr"], 1.0), time=run["time"])))
                    del self._td[key]
        if not self._pending:
            return []
        ready = [o for due, o in self._pending if due <= t]
        if ready:
            self._pending = [(due, o) for due, o in self._pending if due > t]
            if silent:
                return []                           # lost with the gateway's buffer
        return ready
