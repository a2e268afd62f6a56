"""The true course of a scenario's bed for many seeds at once (no gateway, no noise).

:func:`true_course` draws the patient of a scenario's bed for each seed exactly as
:func:`simulators.ward.generate` does (same random stream), plays the bed's time line on the
model and returns the true values every ``every`` seconds. Tests use it to check that a
scenario means what it says for every seed, without MQTT or the gateway.

>>> c = true_course("stable", seeds=range(2), duration_s=120, every=60)
>>> c["CI"].shape, bool((c["CI"] > 2.5).all())
((3, 2), True)
"""

from __future__ import annotations

from typing import Any, Iterable

import numpy as np

from .model import Circulation
from .scenario import CONTROL_NAMES, Scenario, load_scenario
from .ward import WardBed

__all__ = ["true_course", "true_courses", "COURSE_KEYS"]

_MODEL_CONTROLS = [n for n in CONTROL_NAMES if n not in ("temp_shift", "spo2_shift",
                                                           "rr_shift")]
COURSE_KEYS = ("HR", "SBP", "DBP", "MAP", "CVP", "PAP_SYS", "PAP_DIA", "PAP", "PAWP", "CO",
               "SV", "CI", "SI", "SVR", "PMSF", "BV", "SHED", "VR", "CO_R")


def true_course(scenario: Scenario | str, seeds: Iterable[int] = range(30), bed: int = 0,
                duration_s: float | None = None, every: int = 60, dt: float = 1.0,
                variability: float = 0.0) -> dict[str, Any]:
    """True values of bed ``bed`` (0-based position in the ward) for each seed.

    Returns a dict of arrays shaped (samples, seeds) for :data:`COURSE_KEYS` (CI from the
    Mosteller body surface area, SI = HR / SBP, SVR in dyn.s.cm-5, SHED the fraction of the
    starting blood volume lost to bleeding so far), ``t`` (seconds) and ``patients``.
    ``variability`` scales the physiological wander (0: none, the pure model).
    """
    return true_courses([(scenario, bed)], seeds, duration_s, every, dt, variability)[0]


def true_courses(specs: Iterable[tuple[Scenario | str, int]], seeds: Iterable[int] = range(30),
                 duration_s: float | None = None, every: int = 60, dt: float = 1.0,
                 variability: float = 0.0) -> list[dict[str, Any]]:
    """:func:`true_course` for several ``(scenario, bed)`` pairs simulated together (one
    model, every bed of every pair side by side: much faster than one at a time). Each
    pair runs for its scenario's duration (or ``duration_s``)."""
    seeds = list(seeds)
    beds, groups, ends = [], [], []
    for scenario, bed in specs:
        sc = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
        plan = sc.plan(max(bed + 1, sc.bed_count))[bed]
        duration = int(round(sc.duration_s if duration_s is None else duration_s))
        groups.append(slice(len(beds), len(beds) + len(seeds)))
        ends.append(duration)
        beds += [WardBed(plan, sc.unit, s, duration) for s in seeds]
    for b in beds:
        b.variability = variability
    model = Circulation([b.params for b in beds], dt=dt)
    n = len(beds)
    bsa = np.array([b.patient.bsa_m2 for b in beds])
    bv0 = model.blood_volume.copy()
    shed = np.zeros(n)
    out: dict[str, list] = {k: [] for k in COURSE_KEYS}
    times: list[int] = []
    steps = int(round(1.0 / dt)) if dt <= 1 else 1
    stride = 1 if dt <= 1 else int(round(dt))
    duration = max(ends)
    t = 0
    ctl = model.controls
    while t <= duration:
        for i, b in enumerate(beds):
            if b.advance(t):
                for name in _MODEL_CONTROLS:
                    getattr(ctl, name)[i] = b.controls[name]
                ctl.bleed_ml_min[i] = b.bleed_ml_min
                ctl.infusion_ml_min[i], ctl.infusion_retained[i] = b.infusion
        if variability > 0:
            w = np.array([b.wander() for b in beds])
            ctl.hr_drive = np.array([b.controls["hr_drive"] for b in beds]) + w[:, 0]
            ctl.svr_factor = np.array([b.controls["svr_factor"] for b in beds]) * (1 + w[:, 1])
        if t % every == 0:
            r = model.readout()
            s = {k: r[j] for j, k in enumerate(("HR", "SBP", "DBP", "MAP", "CVP", "PAP_SYS",
                                                "PAP_DIA", "PAP", "PAWP", "CO", "SV"))}
            s["CI"] = s["CO"] / bsa
            s["SI"] = s["HR"] / s["SBP"]
            s["SVR"] = 80.0 * (s["MAP"] - s["CVP"]) / s["CO"]
            s["PMSF"] = model.pmsf
            s["BV"] = model.blood_volume
            s["SHED"] = shed / bv0
            s["VR"] = model.venous_return
            s["CO_R"] = model.right_output
            for k in COURSE_KEYS:
                out[k].append(np.array(s[k], dtype=float))
            times.append(t)
        if t == duration:
            break
        for _ in range(steps):
            model.step()
        shed += ctl.bleed_ml_min * (stride / 60.0)
        t += stride
    full = {k: np.array(v) for k, v in out.items()}
    tt = np.array(times)
    res = []
    for g, end in zip(groups, ends):
        keep = tt <= end
        r: dict[str, Any] = {k: v[keep][:, g] for k, v in full.items()}
        r["t"] = tt[keep]
        r["patients"] = [b.patient for b in beds[g]]
        res.append(r)
    return res
