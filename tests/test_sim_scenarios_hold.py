"""Every shipped scenario means what it says, for every seed.

The patient of each scenario's bed is drawn from 30 seeds exactly as a recording draws it
(:func:`simulators.course.true_courses`, the same random streams as
:func:`simulators.ward.generate`), the scenario's time line is played on the model and the
true values (no measurement noise, no physiological wander) are checked against the
published or textbook criterion each scenario stands for. All scenarios run side by side in
one model, so the whole file takes well under a minute. The one check that needs the rules
(a stable ward over 8 hours raises no physiological alarm) replays a simulated ward through
the project's processor and rules with the default configuration, on 2 beds x 8 h of one
seed only (the replay takes about 40 s; the model-only checks cover 30 seeds, and
tests/test_rules_scenarios.py replays 3 more beds x 8 h).

Criteria and their sources (also in docs/simulators.md):

* hemorrhage - ATLS manual, American College of Surgeons (from memory): class I (< 15 %
  loss) near normal; class II (15-30 %) heart rate over 100, systolic pressure kept (here:
  within 10 mm[Hg]), pulse pressure narrowed; class III (30-40 %) heart rate over 120 and
  systolic pressure falling. Transfusion after the bleed: volume refilling raises CVP with
  output recovering (Frank-Starling and Guyton's venous return, published, qualitative).
* stable - CI 2.5-4.0 L/min/m2 typical (critical care texts, from memory); shock index
  HR/SBP normal 0.5-0.7 (Allgower and Burri 1967, published).
* bolus responder / non-responder - a rise of SV or CO of at least 10-15 % after a fluid
  challenge marks a responder (Monnet X, Marik PE, Teboul JL, Ann Intensive Care
  2016;6:111, from memory); here at least 10 % within 15 min of each bolus, and a
  non-responder under 5 %.
* rv_failure - right-sided failure backs up into the veins: CVP up by at least 5 mm[Hg],
  RA/PAWP (CVP/PAWP) above 0.8 (right-predominant profile, common practice), output down.
* lv_failure - cardiogenic profile: PAWP above 18 mm[Hg] with a lowered CI (Forrester JS
  et al., N Engl J Med 1976;295:1356, from memory).
* vasodilation - distributive profile: SVR below 800 dyn.s.cm-5 (lower end of the typical
  800-1200, critical care texts, from memory).
"""

from __future__ import annotations

import numpy as np
import pytest

from simulators import Circulation, Patient
from simulators.course import true_courses

SEEDS = range(30)
NAMES = ("stable", "hemorrhage", "bolus_responder", "bolus_nonresponder", "rv_failure",
         "lv_failure", "vasodilation")
MIN = 60


@pytest.fixture(scope="module")
def course() -> dict[str, dict]:
    runs = true_courses([(n, 0) for n in NAMES], SEEDS, every=10)
    return dict(zip(NAMES, runs))


def _at(c: dict, minute: float) -> int:
    return int(np.searchsorted(c["t"], minute * MIN))


def _window(c: dict, start_min: float, end_min: float) -> slice:
    return slice(_at(c, start_min), _at(c, end_min) + 1)


# --------------------------------------------------------------------------- stable


def test_stable_patients_have_a_normal_cardiac_index_and_shock_index(course) -> None:
    c = course["stable"]
    ci, si = c["CI"], c["SI"]
    assert ci.min() >= 2.5 and ci.max() <= 4.0, (ci.min(0), ci.max(0))
    assert si.max() <= 0.7, si.max(0)
    # inside the default limits with room to spare (MAP 60-120, HR 40-140, CVP <= 18)
    assert c["MAP"].min() >= 70 and c["MAP"].max() <= 110
    assert c["HR"].min() >= 50 and c["HR"].max() <= 100
    assert c["CVP"].max() <= 10


def test_stable_ward_over_eight_hours_raises_no_physiological_alarm() -> None:
    # the project's processor and rules with the default configuration, as `hemostream
    # replay` runs them; measurement noise, physiological wander and artifacts included
    rs = pytest.importorskip("test_rules_scenarios")
    for seed in (11,):
        run = rs.replay(rs.generate("stable", beds=2, duration_s=8 * 3600, seed=seed))
        phys = run.of(category="physiological")
        assert phys == [], (seed, [(r["rule"], r["time"] - run.start) for r in phys])


# --------------------------------------------------------------------------- hemorrhage


def _shed_index(c: dict, fraction: float) -> np.ndarray:
    """Per seed, the first sample at which ``fraction`` of the blood volume is shed."""
    shed = c["SHED"]
    assert (shed.max(0) >= fraction).all(), shed.max(0)
    return np.argmax(shed >= fraction, axis=0)


def test_hemorrhage_follows_the_atls_classes(course) -> None:
    c = course["hemorrhage"]
    cols = np.arange(len(SEEDS))
    sbp0, hr0, pp0 = c["SBP"][0], c["HR"][0], c["SBP"][0] - c["DBP"][0]
    i15, i30, i37 = (_shed_index(c, f) for f in (0.15, 0.30, 0.37))
    for j in cols:
        # class I: near normal
        assert c["HR"][: i15[j], j].max() < 100, j
        assert np.abs(c["SBP"][: i15[j], j] - sbp0[j]).max() <= 10, j
        # class II: systolic kept through 30 %, heart rate over 100 by 30 %
        assert c["SBP"][: i30[j] + 1, j].min() >= sbp0[j] - 10, j
    hr30, sbp30 = c["HR"][i30, cols], c["SBP"][i30, cols]
    assert (hr30 > 100).all(), hr30
    assert ((c["SBP"] - c["DBP"])[i30, cols] < pp0).all()       # pulse pressure narrowed
    # class III: heart rate over 120 and systolic falling
    hr37, sbp37 = c["HR"][i37, cols], c["SBP"][i37, cols]
    assert (hr37 > 120).all(), hr37
    assert (sbp37 < sbp0 - 10).all(), sbp37 - sbp0
    assert (sbp37 < sbp30 - 3).all(), sbp37 - sbp30
    assert (hr0 < 90).all()


def test_fluid_and_blood_after_the_bleed_read_as_refilling(course) -> None:
    # the shipped scenario: bleeding stops at 60 min, crystalloid 65-85, blood 85-115.
    # Refilling raises CVP and output together; in no 5-minute stretch does CVP rise while
    # output falls (which would read as pump failure).
    c = course["hemorrhage"]
    for a, b in ((65, 85), (85, 115)):
        ia, ib = _at(c, a), _at(c, b)
        assert (c["CVP"][ib] > c["CVP"][ia]).all() and (c["CO"][ib] > c["CO"][ia]).all(), (a, b)
    for m in range(62, 116):
        i, k = _at(c, m), _at(c, m + 5)
        dcvp, dco = c["CVP"][k] - c["CVP"][i], c["CO"][k] - c["CO"][i]
        assert not ((dcvp > 0.2) & (dco < 0)).any(), m


# --------------------------------------------------------------------------- fluid challenges


def _sv_rise_pct(c: dict, bolus_min: float) -> np.ndarray:
    i0 = _at(c, bolus_min)
    after = c["SV"][_window(c, bolus_min, bolus_min + 15)].max(0)
    return 100.0 * (after / c["SV"][i0] - 1.0)


def test_bolus_responder_starts_quiet_and_responds_to_each_bolus(course) -> None:
    c = course["bolus_responder"]
    start = _window(c, 0, 29)
    assert c["SI"][start].max() < 0.8, c["SI"][0]         # well under the 0.9 warning level
    assert c["CI"][start].min() >= 2.5
    for bolus in (30, 90):
        rise = _sv_rise_pct(c, bolus)
        assert (rise >= 10.0).all(), (bolus, rise)


def test_bolus_nonresponder_does_not_respond(course) -> None:
    c = course["bolus_nonresponder"]
    rise = _sv_rise_pct(c, 30)
    assert (rise < 5.0).all(), rise
    # but the filling pressures rise
    assert (c["CVP"][_at(c, 41)] > c["CVP"][_at(c, 29)] + 1.0).all()


# --------------------------------------------------------------------------- failures


def test_rv_failure_backs_up_into_the_veins(course) -> None:
    c = course["rv_failure"]
    est = _window(c, 50, 120)                              # onset 30 min, over 10 min
    assert (c["CVP"][est] - c["CVP"][0] >= 5.0).all(), (c["CVP"][est] - c["CVP"][0]).min(0)
    assert ((c["CVP"] / c["PAWP"])[est] > 0.8).all()
    assert (c["PAWP"][-1] < c["PAWP"][0]).all()
    assert (c["CO"][est] < 0.9 * c["CO"][0]).all()


def test_lv_failure_raises_the_wedge_and_lowers_the_index(course) -> None:
    c = course["lv_failure"]
    est = _window(c, 65, 120)                              # onset 30 min, over 30 min
    assert (c["PAWP"][est] > 18.0).all(), c["PAWP"][est].min(0)
    assert (c["CI"][est] < 0.97 * c["CI"][0]).all(), (c["CI"][est] / c["CI"][0]).max(0)
    assert (c["PAP"][-1] > c["PAP"][0] + 6).all()


def test_vasodilation_lowers_svr_below_800(course) -> None:
    c = course["vasodilation"]
    est = _window(c, 75, 99)                               # ramp ends at 75 min, fluid at 100
    assert (c["SVR"][est] < 800).all(), c["SVR"][est].max(0)
    assert (c["CO"][est] >= 0.95 * c["CO"][0]).all()      # output kept (distributive)


# --------------------------------------------------------------------------- venous return


def test_venous_return_is_never_negative_above_the_filling_pressure() -> None:
    # Guyton AC, Physiol Rev 1955;35:123 (published): venous return falls to zero at a right
    # atrial pressure equal to Pmsf and stays zero above it (no flow is driven backwards)
    rng = np.random.default_rng(5)
    pts = [Patient.random(rng) for _ in range(5)]
    c = Circulation(pts)
    c.settle()
    for bed in range(len(pts)):
        pmsf = float(c.pmsf[bed])
        vr = c.venous_return_curve([pmsf + 1, pmsf + 5, pmsf + 15], bed=bed)
        assert (vr >= 0).all() and vr.max() < 0.05, vr


def test_venous_return_stays_positive_in_every_scenario(course) -> None:
    for name, c in course.items():
        assert c["VR"].min() > 0, name
        # and, away from the moments of change, it equals the right heart's output
        assert np.allclose(c["VR"][0], c["CO_R"][0], rtol=0.01), name
