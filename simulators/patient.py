"""Patients and the model parameters derived from them.

A :class:`Patient` is described the way a clinician would: sex, height, weight and a resting
operating point (heart rate, mean arterial, central venous, pulmonary and wedge pressures,
mean systemic filling pressure, cardiac output relative to body size, and where each
ventricle works on its Frank-Starling curve). :meth:`Params.for_patient` turns that into the
model's physical parameters (compliances, unstressed volumes, resistances, Starling curves,
reflex gains) so that the model's closed-loop steady state *is* that operating point with the
reflex at rest. The reference adult (70 kg, 175 cm, male) and the sources of every number are
listed below and in docs/simulators.md; each is marked published, common practice or from
memory, as in the project's references.

Volumes and compliances scale with the patient's blood volume relative to the reference
adult's; resting flow scales with body surface area (so the cardiac index is the patient's
``co_factor`` times the reference adult's 2.93 L/min/m2) and resistances follow from the
pressures and that flow.

>>> p = Params.for_patient(Patient.reference())
>>> round(p.volume), round(p.c_sa + p.c_sv)          # mL; mL/mm[Hg]
(4824, 140)
>>> round(p.r_sys / 0.06 * 80)                       # dyn.s.cm-5 (MAP - Psv over CO)
1243
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields, replace
from typing import Any, Literal

import numpy as np

__all__ = ["Patient", "Params", "nadler_blood_volume", "REFERENCE"]


def nadler_blood_volume(sex: str, height_cm: float, weight_kg: float) -> float:
    """Blood volume in mL: Nadler SB, Hidalgo JH, Bloch T, Surgery 1962;51:224 (from memory).

    men   BV = 0.3669 H^3 + 0.03219 W + 0.6041   (L; H in m, W in kg)
    women BV = 0.3561 H^3 + 0.03308 W + 0.1833

    >>> round(nadler_blood_volume("male", 175, 70))
    4824
    """
    h = height_cm / 100.0
    if sex == "female":
        litres = 0.3561 * h ** 3 + 0.03308 * weight_kg + 0.1833
    else:
        litres = 0.3669 * h ** 3 + 0.03219 * weight_kg + 0.6041
    return litres * 1000.0


# --------------------------------------------------------------------------- reference adult
#
# Every number, with where it comes from (see docs/simulators.md for the discussion).
REFERENCE: dict[str, Any] = {
    # resting operating point of a supine adult, 70 kg / 175 cm (common practice ranges;
    # CO 5.4 L/min, HR 72, MAP 90, CVP 3, PAP mean 15, PAWP 9)
    "co_l_min": 5.4,
    # mean systemic filling pressure about 7 mm[Hg] (Guyton 1955, published)
    "pmsf": 7.0,
    # compliances, mL/mm[Hg]. Arterial: stroke volume over pulse pressure, about 1.5
    # (Chemla D et al., Am J Physiol 1998;274:H500, from memory). Systemic veins: total
    # systemic compliance about 2 mL/mm[Hg] per kg, venous many times arterial (Guyton and
    # Hall; Rothe CF, Physiol Rev 1983;63:1281, from memory). Right atrium 5, pulmonary
    # arteries 4.5 (PA stroke volume over pulse pressure, from memory), pulmonary veins and
    # left atrium 12 (from memory).
    "c_sa": 1.5, "c_sv": 138.5, "c_ra": 5.0, "c_pa": 4.5, "c_pv": 12.0,
    # share of blood volume per compartment: systemic arteries 13 %, systemic veins,
    # venules and capillaries 71 %, right heart 3.5 %, pulmonary arteries 3 %, pulmonary
    # veins with the left heart 9.5 % (Guyton and Hall, from memory)
    "f_sa": 0.13, "f_ra": 0.035, "f_pa": 0.03, "f_pv": 0.095,
    # Frank-Starling curves: output zero at a right atrial pressure of about -4 mm[Hg]
    # (Guyton's cardiac output curves, from memory) and a left atrial pressure of about 0;
    # the operating point uses 60 % of the plateau stroke volume (preload-responsive).
    "p0_r": -4.0, "p0_l": 0.0, "starling_fraction": 0.6,
    # stroke volume falls with ejection pressure: 0.3 %/mm[Hg] left, 2 %/mm[Hg] right
    # (the right ventricle is the more afterload-sensitive; qualitative, from memory)
    "afterload_l": 0.003, "afterload_r": 0.020,
    # venous collapse at the thoracic inlet: venous return plateaus below 0 mm[Hg] (Guyton)
    "p_collapse": 0.0,
    # baroreflex: tanh of (set-point - MAP) / slope; gains up (pressure low) and down;
    # time constants after Ursino M, Am J Physiol 1998;275:H1733 (from memory): heart rate
    # 3 s, contractility 8 s, resistance 6 s, venous unstressed volume 20 s. Gains are
    # effective (they stand for the cardiopulmonary and humoral responses too) and set so that
    # the hemorrhage classes of the ATLS manual come out (see docs).
    "reflex_slope": 10.0,
    # the sensed pressure is MAP + pp_weight x (pulse pressure - resting pulse pressure):
    # arterial baroreceptors fire with the pulsatile stretch as well as the mean (Chapleau MW,
    # Abboud FM, Circ Res 1987;61:648, from memory), so a narrowing pulse pressure at a kept
    # mean still drives the reflex
    "pp_weight": 0.6,
    "g_hr_up": 80.0, "g_hr_down": 6.0,
    "g_contr_up": 0.5, "g_contr_down": 0.05,
    "g_svr_up": 0.9, "g_svr_down": 0.15,
    "g_v0_up": 0.48, "g_v0_down": 0.05,
    "tau_hr": 3.0, "tau_contr": 8.0, "tau_svr": 6.0, "tau_v0": 20.0,
    # capillary exchange restoring the blood volume: excess (crystalloid) leaves with a time
    # constant of 30 min (volume kinetics, Hahn RG, Anesthesiology 2010;113:470, from
    # memory), a deficit refills slowly (4 h, from memory)
    "tau_leak_s": 1800.0, "tau_refill_s": 14400.0,
}


@dataclass(frozen=True)
class Patient:
    """One patient: body size and resting physiology. Defaults are the reference adult."""

    sex: Literal["male", "female"] = "male"
    height_cm: float = 175.0
    weight_kg: float = 70.0
    hr: float = 72.0                 # /min
    map: float = 90.0                # mm[Hg], also the baroreflex set-point
    cvp: float = 3.0
    pap: float = 15.0                # mean
    pawp: float = 9.0
    pmsf: float = 7.0
    co_factor: float = 1.0           # cardiac output relative to the size-scaled reference
    starling_fraction_left: float = 0.6    # SV / plateau SV at rest: 0.6 responsive,
    starling_fraction_right: float = 0.6   # above about 0.9 on the plateau
    spo2: float = 97.0
    rr: float = 14.0
    temp: float = 36.9
    reflex: float = 1.0              # 0 switches the baroreflex off

    @classmethod
    def reference(cls) -> "Patient":
        return cls()

    @classmethod
    def random(cls, rng: np.random.Generator, **fixed: Any) -> "Patient":
        """A plausible adult drawn from ``rng``; ``fixed`` values are kept as given.

        Raises ``ValueError`` naming the field for an unknown field or a value of the wrong
        kind.
        """
        fixed = _checked(fixed)
        sex = fixed.get("sex") or ("female" if rng.random() < 0.5 else "male")
        mean_h, sd_h = (163.0, 6.5) if sex == "female" else (176.0, 7.0)
        h = float(np.clip(rng.normal(mean_h, sd_h), 148, 198))
        bmi = float(np.clip(rng.normal(26.5, 4.0), 18.5, 40))
        draws: dict[str, Any] = {
            "sex": sex,
            "height_cm": round(h),
            "weight_kg": round(bmi * (h / 100) ** 2, 1),
            "hr": round(float(np.clip(rng.normal(72, 7), 56, 92))),
            "map": round(float(np.clip(rng.normal(90, 7), 74, 105)), 1),
            "cvp": round(float(np.clip(rng.normal(4.0, 1.5), 1.0, 8.0)), 1),
            "pap": round(float(np.clip(rng.normal(16, 2), 12, 21)), 1),
            "pawp": round(float(np.clip(rng.normal(9.5, 1.5), 6, 13)), 1),
            # CI = 2.93 x co_factor: 2.64-3.66 L/min/m2, inside the typical 2.5-4.0
            "co_factor": round(float(np.clip(rng.normal(1.03, 0.07), 0.9, 1.25)), 3),
            "starling_fraction_left": round(float(np.clip(rng.normal(0.62, 0.06), 0.5, 0.75)), 3),
            "starling_fraction_right": round(float(np.clip(rng.normal(0.62, 0.06), 0.5, 0.75)), 3),
            "spo2": round(float(np.clip(rng.normal(97, 1.2), 93, 100)), 1),
            "rr": round(float(np.clip(rng.normal(15, 2.5), 10, 22))),
            "temp": round(float(np.clip(rng.normal(36.9, 0.3), 36.2, 37.6)), 2),
        }
        draws["pmsf"] = round(7.0 + rng.normal(0, 0.5), 2)
        draws.update({k: v for k, v in fixed.items() if v is not None})
        # drawn values give way to fixed ones: Pmsf stays above CVP by at least 3.5 (a
        # gradient for venous return), mean PA pressure above the wedge by at least 4
        if "pmsf" not in fixed:
            draws["pmsf"] = max(draws["pmsf"], draws["cvp"] + 3.5)
        if "pap" not in fixed:
            draws["pap"] = max(draws["pap"], draws["pawp"] + 4.0)
        if "hr" not in fixed:
            # keep the resting shock index (HR / SBP) inside its normal 0.5-0.7 (Allgower and
            # Burri 1967, published), with room for noise: HR <= 0.65 SBP, where
            # SBP = MAP + 2/3 PP and PP = SV / C_sa = 3600 x co_factor x (BSA ratio) /
            # (blood volume ratio) / HR here
            ref = Patient()
            scale = ((math.sqrt(draws["height_cm"] * draws["weight_kg"]) /
                      math.sqrt(ref.height_cm * ref.weight_kg))
                     / (nadler_blood_volume(draws["sex"], draws["height_cm"], draws["weight_kg"])
                        / nadler_blood_volume(ref.sex, ref.height_cm, ref.weight_kg)))
            a, c = 0.65 * draws["map"], 0.65 * 2400.0 * draws["co_factor"] * scale
            draws["hr"] = min(draws["hr"], int((a + math.sqrt(a * a + 4 * c)) / 2))
        return cls(**draws)

    def with_(self, **changes: Any) -> "Patient":
        return replace(self, **changes)

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)

    @property
    def blood_volume_ml(self) -> float:
        """Blood volume at rest: Nadler's volume plus what a raised Pmsf adds."""
        return Params.for_patient(self).volume

    @property
    def bsa_m2(self) -> float:
        """Body surface area, Mosteller 1987 (published): sqrt(height cm x weight kg / 3600)."""
        return math.sqrt(self.height_cm * self.weight_kg / 3600.0)


@dataclass(frozen=True)
class Params:
    """The model's parameters for one bed (units: mL, mm[Hg], s; resistances mm[Hg].s/mL)."""

    c_sa: float
    c_sv: float
    c_ra: float
    c_pa: float
    c_pv: float
    v0_sa: float
    v0_sv: float
    v0_ra: float
    v0_pa: float
    v0_pv: float
    r_sys: float
    r_vr: float
    r_pul: float
    p_collapse: float
    hr0: float
    svmax_l: float
    svmax_r: float
    k_l: float
    k_r: float
    p0_l: float
    p0_r: float
    afterload_l: float
    afterload_r: float
    # design pressures (the steady state the parameters were derived for)
    map0: float
    psv0: float
    cvp0: float
    pap0: float
    pawp0: float
    volume: float
    setpoint: float
    reflex_slope: float
    pp_weight: float
    pp0: float
    g_hr_up: float
    g_hr_down: float
    g_contr_up: float
    g_contr_down: float
    g_svr_up: float
    g_svr_down: float
    g_v0_up: float
    g_v0_down: float
    tau_hr: float
    tau_contr: float
    tau_svr: float
    tau_v0: float
    tau_leak: float
    tau_refill: float

    @classmethod
    def for_patient(cls, pt: Patient, ref: dict[str, Any] | None = None) -> "Params":
        """Derive the parameters whose steady state is ``pt``'s operating point.

        Raises ``ValueError`` naming the field when the operating point is impossible (for
        example Pmsf not above CVP: no gradient would drive venous return).
        """
        r = dict(REFERENCE, **(ref or {}))
        ref_pt = Patient()
        size = (nadler_blood_volume(pt.sex, pt.height_cm, pt.weight_kg)
                / nadler_blood_volume(ref_pt.sex, ref_pt.height_cm, ref_pt.weight_kg))
        bv_ref = nadler_blood_volume(ref_pt.sex, ref_pt.height_cm, ref_pt.weight_kg)
        for name in ("hr", "map", "pmsf", "co_factor", "starling_fraction_left",
                     "starling_fraction_right"):
            if not getattr(pt, name) > 0:
                raise ValueError(f"patient {name}={getattr(pt, name)!r}: must be positive")
        for name in ("starling_fraction_left", "starling_fraction_right"):
            if not 0.05 <= getattr(pt, name) <= 0.99:
                raise ValueError(f"patient {name}={getattr(pt, name)!r}: expected 0.05-0.99")
        c = {k: r[f"c_{k}"] * size for k in ("sa", "sv", "ra", "pa", "pv")}
        # unstressed volumes of the reference adult at the reference pressures, scaled
        f_sv = 1.0 - r["f_sa"] - r["f_ra"] - r["f_pa"] - r["f_pv"]
        ref_p = {"sa": ref_pt.map, "ra": ref_pt.cvp, "pa": ref_pt.pap, "pv": ref_pt.pawp}
        ref_psv = (ref_pt.pmsf * (r["c_sa"] + r["c_sv"]) - r["c_sa"] * ref_pt.map) / r["c_sv"]
        v0 = {k: (r[f"f_{k}"] * bv_ref - r[f"c_{k}"] * ref_p[k]) * size for k in ref_p}
        v0["sv"] = (f_sv * bv_ref - r["c_sv"] * ref_psv) * size
        # the patient's operating point
        psv = (pt.pmsf * (c["sa"] + c["sv"]) - c["sa"] * pt.map) / c["sv"]
        if psv <= pt.cvp + 0.5:
            raise ValueError(
                f"patient pmsf={pt.pmsf} with cvp={pt.cvp}: the mean systemic filling pressure "
                "must exceed the central venous pressure (by about 2 mm[Hg] or more)")
        if pt.map <= psv + 20:
            raise ValueError(f"patient map={pt.map}: too low for pmsf={pt.pmsf}")
        if pt.pap <= pt.pawp + 1:
            raise ValueError(f"patient pap={pt.pap} must exceed pawp={pt.pawp}")
        # resting output scales with body surface area (the cardiac index is the size-free
        # quantity, CI 2.5-4.0 L/min/m2 typical, critical care texts, from memory): the
        # reference adult's CI is 5.4 / 1.85 = 2.93
        q = (r["co_l_min"] * pt.bsa_m2 / ref_pt.bsa_m2 * pt.co_factor * 1000.0 / 60.0)  # mL/s
        sv0 = q * 60.0 / pt.hr
        volume = (sum(v0.values()) + c["sa"] * pt.map + c["sv"] * psv + c["ra"] * pt.cvp
                  + c["pa"] * pt.pap + c["pv"] * pt.pawp)

        def starling(fraction: float, p_fill: float, p0: float, side: str) -> tuple[float, float]:
            if p_fill <= p0 + 0.5:
                raise ValueError(f"patient filling pressure of the {side} heart ({p_fill}) "
                                 f"must exceed {p0 + 0.5}")
            return sv0 / fraction, (p_fill - p0) / -math.log(1.0 - fraction)

        svmax_l, k_l = starling(pt.starling_fraction_left, pt.pawp, r["p0_l"], "left")
        svmax_r, k_r = starling(pt.starling_fraction_right, pt.cvp, r["p0_r"], "right")
        return cls(
            c_sa=c["sa"], c_sv=c["sv"], c_ra=c["ra"], c_pa=c["pa"], c_pv=c["pv"],
            v0_sa=v0["sa"], v0_sv=v0["sv"], v0_ra=v0["ra"], v0_pa=v0["pa"], v0_pv=v0["pv"],
            r_sys=(pt.map - psv) / q, r_vr=(psv - pt.cvp) / q, r_pul=(pt.pap - pt.pawp) / q,
            p_collapse=r["p_collapse"], hr0=pt.hr,
            svmax_l=svmax_l, svmax_r=svmax_r, k_l=k_l, k_r=k_r,
            p0_l=r["p0_l"], p0_r=r["p0_r"],
            afterload_l=r["afterload_l"], afterload_r=r["afterload_r"],
            map0=pt.map, psv0=psv, cvp0=pt.cvp, pap0=pt.pap, pawp0=pt.pawp, volume=volume,
            setpoint=pt.map, reflex_slope=r["reflex_slope"],
            pp_weight=r["pp_weight"], pp0=sv0 / c["sa"],
            g_hr_up=r["g_hr_up"] * pt.reflex, g_hr_down=r["g_hr_down"] * pt.reflex,
            g_contr_up=r["g_contr_up"] * pt.reflex, g_contr_down=r["g_contr_down"] * pt.reflex,
            g_svr_up=r["g_svr_up"] * pt.reflex, g_svr_down=r["g_svr_down"] * pt.reflex,
            g_v0_up=r["g_v0_up"] * pt.reflex, g_v0_down=r["g_v0_down"] * pt.reflex,
            tau_hr=r["tau_hr"], tau_contr=r["tau_contr"], tau_svr=r["tau_svr"],
            tau_v0=r["tau_v0"], tau_leak=r["tau_leak_s"], tau_refill=r["tau_refill_s"],
        )


PATIENT_FIELDS = tuple(f.name for f in fields(Patient))


def _checked(values: dict[str, Any]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in values.items():
        if key not in PATIENT_FIELDS:
            raise ValueError(f"unknown patient field {key!r}; known: {', '.join(PATIENT_FIELDS)}")
        if key == "sex":
            if value not in ("male", "female"):
                raise ValueError(f"patient sex {value!r}: expected 'male' or 'female'")
        elif isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not math.isfinite(value):
            raise ValueError(f"patient {key} {value!r}: expected a number")
        out[key] = value
    if not 100 <= out.get("height_cm", 175) <= 230:
        raise ValueError(f"patient height_cm {out['height_cm']!r}: expected 100-230")
    if not 30 <= out.get("weight_kg", 70) <= 300:
        raise ValueError(f"patient weight_kg {out['weight_kg']!r}: expected 30-300")
    return out
