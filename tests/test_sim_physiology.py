"""Physiology checks of the circulation model against published and textbook facts.

Each check names its source (see docs/sources.md and docs/simulators.md), marked as
there: published, common practice or from memory. The model is used directly (no
measurement noise, no physiological wander), with the reference adult (70 kg, 175 cm) unless
a scenario's patient is the point of the check.
"""

from __future__ import annotations

import numpy as np
import pytest

from simulators import Circulation, Patient, load_scenario
from simulators.model import PV, RA, SA, SV


def _scenario_patient(name: str) -> Patient:
    """The patient a shipped scenario describes, at the reference adult's size."""
    fixed = dict(load_scenario(name).plan()[0].patient)
    fixed.update(sex="male", height_cm=175.0, weight_kg=70.0)
    return Patient(**fixed)


@pytest.fixture
def adult() -> Circulation:
    c = Circulation(Patient.reference())
    c.settle()
    return c


# --------------------------------------------------------------------------- steady state


def test_steady_state_of_a_70_kg_adult(adult: Circulation) -> None:
    s = adult.snapshot()
    # resting cardiac output of an adult about 5 L/min (Guyton and Hall, from memory);
    # the band 4.5-6 L/min
    assert 4.5 <= s["CO"] <= 6.0
    # mean systemic filling pressure about 7 mm[Hg] in a resting adult (Guyton AC, Physiol
    # Rev 1955;35:123, published). Pmsf is read from the model's volumes, not set directly.
    assert 6.0 <= s["PMSF"] <= 8.0
    # blood volume about 70 mL/kg (Guyton and Hall, from memory); Nadler's formula for the
    # reference man gives 4.8 L (from memory)
    assert 65 * 70 <= s["BV"] <= 75 * 70
    # typical adult ranges (critical care texts, from memory): CVP 2-8, PAWP 6-12, MAP 70-105,
    # SV 60-100 mL, SVR roughly 800-1400 dyn.s.cm-5
    assert 2 <= s["CVP"] <= 8 and 6 <= s["PAWP"] <= 12 and 70 <= s["MAP"] <= 105
    assert 60 <= s["SV"] <= 100 and 800 <= s["SVR"] <= 1400
    # most of the blood (about two thirds) in the systemic veins (Guyton and Hall, from memory)
    assert 0.6 <= adult.V[0, SV] / adult.blood_volume[0] <= 0.8
    # venous compliance many times arterial compliance (Guyton and Hall, from memory)
    assert adult.C[0, SV] > 20 * adult.C[0, SA]


def test_venous_return_cardiac_output_and_systemic_flow_are_one_flow_at_steady_state(
        adult: Circulation) -> None:
    # Guyton 1955 (published): at steady state venous return = cardiac output; in a closed
    # circuit every flow is the same, and the two ventricles pump equal amounts. Run the
    # closed loop with the reflex on after a disturbance and let it settle again.
    adult.controls.contractility_left = 0.7
    adult.controls.svr_factor = 1.2
    adult.run(1800)
    q = adult.flows[0]                 # systemic, venous return, right, pulmonary, left
    left, right = q[4], q[2]
    assert abs(left - right) / left < 0.01, (left, right)
    assert np.allclose(q, left, rtol=0.01), q


def test_blood_volume_is_conserved_without_interventions() -> None:
    # mass conservation: nothing enters or leaves a closed circuit, whatever the heart, the
    # vessels or the reflex do (common practice)
    c = Circulation([Patient.reference(), _scenario_patient("bolus_nonresponder")])
    v0 = c.blood_volume.copy()
    for contr, svr, cap in ((0.5, 1.0, 1.0), (1.3, 0.6, 1.2), (0.8, 1.5, 0.9), (1.0, 1.0, 1.0)):
        c.controls.contractility_right = contr
        c.controls.svr_factor = svr
        c.controls.venous_capacity_factor = cap
        c.run(900)
    assert np.allclose(c.blood_volume, v0, rtol=0, atol=1e-6), c.blood_volume - v0


# --------------------------------------------------------------------------- Guyton's curve


def test_venous_return_curve_reaches_zero_at_pmsf_and_plateaus_below_zero(
        adult: Circulation) -> None:
    # Guyton AC, Physiol Rev 1955;35:123 (published): with the heart replaced by a pump that
    # sets right atrial pressure, venous return falls linearly to zero when right atrial
    # pressure reaches the mean systemic filling pressure, and plateaus once right atrial
    # pressure is below about 0 mm[Hg] (the great veins collapse at the chest inlet).
    pmsf = float(adult.pmsf[0])
    pra = np.array([-8.0, -6.0, -4.0, -2.0, -1.0, 0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, pmsf])
    vr = adult.venous_return_curve(pra)
    assert abs(vr[-1]) < 0.02, "venous return must vanish at Pmsf"
    # the straight part, extrapolated, crosses zero at Pmsf
    straight = (pra >= 1.0) & (pra <= 6.0)
    slope, intercept = np.polyfit(pra[straight], vr[straight], 1)
    assert slope < 0
    assert abs(-intercept / slope - pmsf) < 0.1
    assert 6.0 <= pmsf <= 8.0
    # plateau: the same flow for every right atrial pressure below 0
    below = vr[pra <= 0.0]
    assert np.ptp(below) < 0.01 * below.max()
    # and at the operating point the curve passes through the model's own cardiac output
    at_cvp = adult.venous_return_curve([float(adult.cvp[0])])[0]
    assert at_cvp == pytest.approx(float(adult.cardiac_output[0]), rel=0.01)


# --------------------------------------------------------------------------- Frank-Starling


def _bolus(pt: Patient, volume_ml: float = 500.0, minutes: float = 10.0):
    c = Circulation(pt)
    c.settle()
    before = c.snapshot()
    c.controls.infusion_ml_min = volume_ml / minutes
    c.run(minutes * 60)
    return before, c.snapshot()


def test_bolus_in_a_preload_responsive_patient_raises_cvp_and_output() -> None:
    # Frank-Starling (Patterson SW, Starling EH, J Physiol 1914;48:357, published,
    # qualitative): on the steep part of the curve more filling gives more output. A rise of
    # CO of at least 10-15 % after 250-500 mL over 10-15 min marks a preload responder
    # (Monnet X, Marik PE, Teboul JL, Ann Intensive Care 2016;6:111, from memory).
    before, after = _bolus(_scenario_patient("bolus_responder"))
    assert after["CVP"] > before["CVP"] + 1.0
    assert after["CO"] >= 1.10 * before["CO"], (before["CO"], after["CO"])


def test_bolus_in_a_patient_on_the_plateau_raises_cvp_not_output() -> None:
    # Same sources: on the plateau of the Starling curve the filling pressures rise and the
    # output barely moves (a non-responder: under 5 % here).
    before, after = _bolus(_scenario_patient("bolus_nonresponder"))
    assert after["CVP"] > before["CVP"] + 1.0
    assert after["PAWP"] > before["PAWP"]
    assert abs(after["CO"] / before["CO"] - 1.0) < 0.05, (before["CO"], after["CO"])


# --------------------------------------------------------------------------- hemorrhage


def _bleed_until(fractions: list[float], rate_ml_min: float = 40.0) -> dict[float, dict]:
    """Bleed the reference adult and read the state when each shed fraction is reached."""
    c = Circulation(Patient.reference())
    c.settle()
    bv = float(c.blood_volume[0])
    c.controls.bleed_ml_min = rate_ml_min
    out: dict[float, dict] = {"baseline": c.snapshot()}  # type: ignore[dict-item]
    sbp0 = out["baseline"]["SBP"]  # type: ignore[index]
    shed, t = 0.0, 0
    first_hr100 = first_sbp_fall = None
    for frac in fractions:
        while shed < frac * bv:
            c.run(10)
            t += 10
            shed += rate_ml_min / 6.0
            s = c.snapshot()
            if first_hr100 is None and s["HR"] > 100:
                first_hr100 = t
            if first_sbp_fall is None and s["SBP"] < sbp0 - 10:
                first_sbp_fall = t
        out[frac] = c.snapshot()
    out["times"] = {"hr_over_100": first_hr100, "sbp_down_10": first_sbp_fall}  # type: ignore
    return out


def test_hemorrhage_classes() -> None:
    # ATLS manual, American College of Surgeons (from memory): under 15 % loss little
    # change (class I); 15-30 % heart rate over 100 while systolic pressure is kept and the
    # pulse pressure narrows (class II); 30-40 % heart rate over 120 and systolic pressure
    # falling (class III). Bleeding 40 mL/min from the reference adult (4.8 L).
    r = _bleed_until([0.12, 0.25, 0.30, 0.38])
    base, i, ii, ii_end, iii = r["baseline"], r[0.12], r[0.25], r[0.30], r[0.38]
    assert i["HR"] < 100 and abs(i["SBP"] - base["SBP"]) <= 10
    assert ii["HR"] > 100
    assert ii_end["SBP"] >= base["SBP"] - 10              # systolic kept through class II
    assert ii["SBP"] - ii["DBP"] < base["SBP"] - base["DBP"]   # pulse pressure narrowed
    assert iii["HR"] > 120
    assert iii["SBP"] < base["SBP"] - 10 and iii["SBP"] < ii_end["SBP"] - 3   # falling
    # the heart rate rises first, the pressure falls later
    times = r["times"]
    assert times["hr_over_100"] is not None and times["sbp_down_10"] is not None
    assert times["hr_over_100"] < times["sbp_down_10"]


# --------------------------------------------------------------------------- the failures


def _after(change: dict, seconds: float = 1800.0) -> tuple[dict, dict]:
    c = Circulation(Patient.reference())
    c.settle()
    before = c.snapshot()
    for name, value in change.items():
        setattr(c.controls, name, value)
    c.run(seconds)
    return before, c.snapshot()


def test_right_ventricular_failure_raises_cvp_and_lowers_output() -> None:
    # Classic hemodynamic profile (common practice, critical care teaching): a failing right
    # ventricle backs up into the systemic veins (CVP up), its output falls and the left
    # heart is under-filled (wedge pressure down), so RA/PAWP rises above 0.8 (right-sided
    # predominance, common practice). Right contractility to 25 %, as the rv_failure scenario.
    before, after = _after({"contractility_right": 0.25})
    assert after["CVP"] > before["CVP"] + 5.0
    assert after["CVP"] / after["PAWP"] > 0.8
    assert after["CO"] < 0.85 * before["CO"]
    assert after["PAWP"] < before["PAWP"]


def test_left_ventricular_failure_raises_wedge_and_pulmonary_pressures() -> None:
    # Cardiogenic profile (common practice): high wedge pressure, low output, high SVR.
    before, after = _after({"contractility_left": 0.5})
    assert after["PAWP"] > before["PAWP"] + 6.0
    assert after["PAP"] > before["PAP"] + 6.0
    assert after["CO"] < 0.95 * before["CO"]
    assert after["SVR"] > before["SVR"]


def test_vasodilatory_state_lowers_resistance_and_pressure_not_output() -> None:
    # Distributive profile (common practice): low SVR, cardiac output normal or high.
    before, after = _after({"svr_factor": 0.3, "venous_capacity_factor": 1.2,
                            "reflex_gain": 0.4})
    assert after["SVR"] < 0.6 * before["SVR"]
    assert after["MAP"] < before["MAP"] - 15
    assert after["CO"] >= before["CO"]
    assert after["HR"] > before["HR"]


def test_muscle_pump_raises_venous_return_and_heart_rate() -> None:
    # Exercise (Guyton and Hall, from memory): the muscle pump squeezes venous blood toward
    # the heart and raises the mean systemic filling pressure; central command raises heart
    # rate; output and venous return rise together.
    before, after = _after({"muscle_pump_ml": 500.0, "hr_drive": 30.0, "svr_factor": 0.6,
                            "setpoint_shift": 10.0}, seconds=600)
    assert after["PMSF"] > before["PMSF"] + 2.0
    assert after["VR"] > 1.3 * before["VR"]
    assert after["HR"] > before["HR"] + 20
    assert after["CO"] == pytest.approx(after["VR"], rel=0.02)


# --------------------------------------------------------------------------- numerics


def test_results_do_not_depend_on_the_step() -> None:
    # the implicit scheme at the default 1 s step agrees with a ten times finer step
    def run(dt: float) -> dict:
        c = Circulation(Patient.reference(), dt=dt)
        c.controls.bleed_ml_min = 60.0
        c.run(900)
        c.controls.bleed_ml_min = 0.0
        c.controls.contractility_left = 0.6
        c.run(300)
        return c.snapshot()

    coarse, fine = run(1.0), run(0.1)
    for key in ("HR", "MAP", "CVP", "PAWP", "CO", "BV"):
        assert coarse[key] == pytest.approx(fine[key], rel=0.02, abs=0.3), key


def test_the_model_is_a_real_ring_of_compartments(adult: Circulation) -> None:
    # CVP is the right atrial pressure and the wedge the left atrial (pulmonary venous) one
    assert adult.cvp[0] == adult.pressures[0, RA]
    assert adult.pawp[0] == adult.pressures[0, PV]
    # pulse pressure from stroke volume and arterial compliance; mean = dia + pp / 3
    pp = adult.sv_left[0] / adult.C[0, SA]
    assert adult.abp_sys[0] - adult.abp_dia[0] == pytest.approx(pp)
    assert adult.abp_dia[0] + pp / 3 == pytest.approx(adult.map[0])
