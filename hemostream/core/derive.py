"""Derived hemodynamic values: one small function per formula, and their evaluation per bed.

Each function states its formula, units in and out and its source, with one worked example.
Units follow UCUM: pressures mm[Hg], flows L/min, volumes mL, rates /min, areas m2.
:func:`derive_all` evaluates every formula whose inputs are current and records the inputs
(parameter and measurement time) it used; missing inputs mean no value, never a guess.
"""

from __future__ import annotations

import math
from typing import NamedTuple

from .units import MMHG_MIN_PER_L_IN_DYN_S_CM5, MMHG_ML_IN_GF_M

#: canonical UCUM unit of every derived value
DERIVED_UNITS: dict[str, str] = {
    "MAP": "mm[Hg]", "PP": "mm[Hg]", "SV": "mL", "CO": "L/min", "BSA": "m2",
    "CI": "L/min/m2", "SVI": "mL/m2", "SVR": "dyn.s/cm5", "SVRI": "dyn.s.m2/cm5",
    "PVR": "dyn.s/cm5", "LVSWI": "g.m/m2", "RVSWI": "g.m/m2", "SI": "1", "MSI": "1",
}


def mean_pressure(sys: float, dia: float) -> float:
    """Estimated mean pressure from systolic and diastolic: DIA + (SYS - DIA) / 3 (mm[Hg]).

    Common practice (one-third pulse-pressure rule, critical care texts).

    >>> mean_pressure(120, 80)
    93.33333333333333
    """
    return dia + (sys - dia) / 3.0


def pulse_pressure(sys: float, dia: float) -> float:
    """PP = SYS - DIA (mm[Hg]). Common practice.

    >>> pulse_pressure(121, 68)
    53
    """
    return sys - dia


def stroke_volume(co_l_min: float, hr_min: float) -> float:
    """SV (mL) = CO (L/min) x 1000 / HR (/min); the definition CO = HR x SV, rearranged.

    >>> stroke_volume(5.0, 70)
    71.42857142857143
    """
    return co_l_min * 1000.0 / hr_min


def cardiac_output(hr_min: float, sv_ml: float) -> float:
    """CO (L/min) = HR (/min) x SV (mL) / 1000. Textbook definition (Guyton and Hall).

    >>> cardiac_output(70, 70)
    4.9
    """
    return hr_min * sv_ml / 1000.0


def bsa_mosteller(height_cm: float, weight_kg: float) -> float:
    """Body surface area (m2) = sqrt(height_cm x weight_kg / 3600).

    Mosteller RD, N Engl J Med 1987;317:1098 (worked check there: 180 cm, 80 kg -> 2.00 m2).

    >>> round(bsa_mosteller(180, 80), 2)
    2.0
    """
    return math.sqrt(height_cm * weight_kg / 3600.0)


def bsa_dubois(height_cm: float, weight_kg: float) -> float:
    """Body surface area (m2) = 0.007184 x W^0.425 x H^0.725.

    Du Bois D, Du Bois EF, Arch Intern Med 1916;17:863.

    >>> round(bsa_dubois(180, 80), 2)
    2.0
    """
    return 0.007184 * weight_kg ** 0.425 * height_cm ** 0.725


def indexed(value: float, bsa_m2: float) -> float:
    """A value per m2 of body surface: CI = CO / BSA (L/min/m2), SVI = SV / BSA (mL/m2).

    >>> indexed(5.0, 2.0)
    2.5
    """
    return value / bsa_m2


def resistance(upstream: float, downstream: float, flow: float) -> float:
    """Vascular resistance (dyn.s/cm5) = k x (upstream - downstream) (mm[Hg]) / flow (L/min).

    Hydraulic analogue of Ohm's law (pressure drop = flow x resistance), standard critical
    care texts. k = 1 mm[Hg].min/L in dyn.s/cm5 = 79.99 (often rounded to 80); see
    :data:`hemostream.core.units.MMHG_MIN_PER_L_IN_DYN_S_CM5`. Used for
    SVR (MAP, CVP, CO), PVR (PAP_MEAN, PAWP, CO) and, with CI for flow, SVRI (dyn.s.m2/cm5).

    >>> round(resistance(90, 5, 5.0))
    1360
    """
    return MMHG_MIN_PER_L_IN_DYN_S_CM5 * (upstream - downstream) / flow


def stroke_work_index(svi_ml_m2: float, upstream: float, downstream: float) -> float:
    """Stroke work index (g.m/m2) = SVI x (upstream - downstream) x 0.0136.

    LVSWI uses MAP and PAWP, RVSWI uses PAP_MEAN and CVP; 0.0136 converts mm[Hg].mL to g.m
    (common practice; the factor is :data:`hemostream.core.units.MMHG_ML_IN_GF_M`).

    >>> round(stroke_work_index(40, 93, 10), 1)
    45.1
    """
    return svi_ml_m2 * (upstream - downstream) * MMHG_ML_IN_GF_M


def shock_index(hr_min: float, sbp: float) -> float:
    """Shock index SI = HR / systolic pressure; normal 0.5-0.7.

    Allgower M, Burri C, Dtsch Med Wochenschr 1967;92:1947.

    >>> shock_index(84, 120)
    0.7
    """
    return hr_min / sbp


def modified_shock_index(hr_min: float, map_mmhg: float) -> float:
    """Modified shock index MSI = HR / MAP; normal about 0.7-1.3 (Liu YC et al.,
    Am J Emerg Med 2012 — from memory).

    >>> modified_shock_index(90, 90)
    1.0
    """
    return hr_min / map_mmhg


# --------------------------------------------------------------------------- evaluation


class Current(NamedTuple):
    """A current input: canonical value and its measurement time (epoch seconds)."""

    value: float
    time: float


class Derived(NamedTuple):
    param: str
    value: float
    inputs: tuple[tuple[str, float], ...]   # (param, measurement time) of every input


def derive_all(cur: dict[str, Current], bsa: tuple[float, float] | None
               ) -> tuple[list[Derived], dict[str, Current]]:
    """Evaluate every derived value from the current inputs.

    ``cur`` maps each measured parameter to its current valid value (already checked
    against its maximum age). ``bsa`` is (m2, admission time) or None.
    Returns the derived values and the *effective* values the rules layer reads
    (``MAP``, ``SBP``, ``PAP_MEAN``, ``HR``, ``SV``, ``CO``: measured where measured, else
    calculated), each with its provenance time.

    >>> out, eff = derive_all({"HR": Current(80, 0.0), "CO": Current(5.0, 0.0)}, None)
    >>> [(d.param, d.value) for d in out]
    [('SV', 62.5)]
    """
    get = cur.get
    out: list[Derived] = []
    add = out.append
    eff: dict[str, Current] = {}
    src: dict[str, tuple[tuple[str, float], ...]] = {}

    # Arterial pressure: the line is preferred over the cuff (continuous, beat to beat) when
    # it is complete, that is when it gives a systolic value and a mean (measured, or from
    # systolic and diastolic). An incomplete line (a lone diastolic, say, while the other
    # values are being re-zeroed) gives way to a complete cuff set; values of the two sites
    # are never mixed in one calculation.
    sites = []
    for sys_p, dia_p, mean_p in (("ABP_SYS", "ABP_DIA", "ABP_MEAN"),
                                 ("NIBP_SYS", "NIBP_DIA", "NIBP_MEAN")):
        s, d, m = get(sys_p), get(dia_p), get(mean_p)
        if s is None and m is None:
            continue                     # nothing usable (at most a lone diastolic)
        sites.append((s is not None and (m is not None or d is not None),
                      sys_p, dia_p, mean_p, s, d, m))
    if sites:
        complete = [x for x in sites if x[0]]
        _, sys_p, dia_p, mean_p, s, d, m = complete[0] if complete else sites[0]
        if s is not None:
            eff["SBP"], src["SBP"] = s, ((sys_p, s.time),)
        if m is not None:
            eff["MAP"], src["MAP"] = m, ((mean_p, m.time),)
        if s is not None and d is not None:
            ins: tuple[tuple[str, float], ...] = ((sys_p, s.time), (dia_p, d.time))
            add(Derived("PP", pulse_pressure(s.value, d.value), ins))
            if m is None:
                mean = mean_pressure(s.value, d.value)
                add(Derived("MAP", mean, ins))
                eff["MAP"], src["MAP"] = Current(mean, max(s.time, d.time)), ins

    # Pulmonary artery mean pressure: measured, else from systolic and diastolic.
    pam = get("PAP_MEAN")
    if pam is not None:
        eff["PAP_MEAN"], src["PAP_MEAN"] = pam, (("PAP_MEAN", pam.time),)
    else:
        s, d = get("PAP_SYS"), get("PAP_DIA")
        if s is not None and d is not None:
            pam = eff["PAP_MEAN"] = Current(mean_pressure(s.value, d.value), max(s.time, d.time))
            src["PAP_MEAN"] = (("PAP_SYS", s.time), ("PAP_DIA", d.time))

    # Heart rate: ECG preferred, pulse rate as fallback.
    hr = get("HR")
    hr_p = "HR"
    if hr is None:
        hr, hr_p = get("PR"), "PR"
    if hr is not None:
        eff["HR"], src["HR"] = hr, ((hr_p, hr.time),)

    # Stroke volume and cardiac output, each from the other and HR when not measured.
    sv, co = get("SV"), get("CO")
    if sv is not None:
        eff["SV"], src["SV"] = sv, (("SV", sv.time),)
    if co is not None:
        eff["CO"], src["CO"] = co, (("CO", co.time),)
    if hr is not None and hr.value > 0:
        if co is not None and sv is None:
            ins = src["CO"] + src["HR"]
            v = stroke_volume(co.value, hr.value)
            add(Derived("SV", v, ins))
            sv = eff["SV"] = Current(v, max(co.time, hr.time))
            src["SV"] = ins
        elif sv is not None and co is None:
            ins = src["HR"] + src["SV"]
            v = cardiac_output(hr.value, sv.value)
            add(Derived("CO", v, ins))
            co = eff["CO"] = Current(v, max(sv.time, hr.time))
            src["CO"] = ins

    bsa_src: tuple[tuple[str, float], ...] = (("BSA", bsa[1]),) if bsa is not None else ()
    mp = eff.get("MAP")
    cvp = get("CVP")
    pawp = get("PAWP")

    ci = svi = None
    if bsa is not None and bsa[0] > 0:
        if co is not None:
            ci = indexed(co.value, bsa[0])
            add(Derived("CI", ci, src["CO"] + bsa_src))
        if sv is not None:
            svi = indexed(sv.value, bsa[0])
            add(Derived("SVI", svi, src["SV"] + bsa_src))

    if co is not None and co.value > 0:
        if mp is not None and cvp is not None:
            add(Derived("SVR", resistance(mp.value, cvp.value, co.value),
                        src["MAP"] + (("CVP", cvp.time),) + src["CO"]))
        if pam is not None and pawp is not None:
            add(Derived("PVR", resistance(pam.value, pawp.value, co.value),
                        src["PAP_MEAN"] + (("PAWP", pawp.time),) + src["CO"]))
    if ci is not None and ci > 0 and mp is not None and cvp is not None:
        add(Derived("SVRI", resistance(mp.value, cvp.value, ci),
                    src["MAP"] + (("CVP", cvp.time),) + src["CO"] + bsa_src))
    if svi is not None:
        if mp is not None and pawp is not None:
            add(Derived("LVSWI", stroke_work_index(svi, mp.value, pawp.value),
                        src["SV"] + bsa_src + src["MAP"] + (("PAWP", pawp.time),)))
        if pam is not None and cvp is not None:
            add(Derived("RVSWI", stroke_work_index(svi, pam.value, cvp.value),
                        src["SV"] + bsa_src + src["PAP_MEAN"] + (("CVP", cvp.time),)))

    if hr is not None:
        sbp = eff.get("SBP")
        if sbp is not None and sbp.value > 0:
            add(Derived("SI", shock_index(hr.value, sbp.value), src["HR"] + src["SBP"]))
        if mp is not None and mp.value > 0:
            add(Derived("MSI", modified_shock_index(hr.value, mp.value), src["HR"] + src["MAP"]))
    # Every input is finite and within its plausible range (checked on ingest) and every
    # division above is guarded by a positive divisor, so every value here is finite.
    return out, eff
