"""Clinical correctness of the rules layer, each test with the published criterion it checks.

Streams are built here (not from the simulators), so the tests hold while the simulators are
recalibrated. Physiology of the hand-made patient: CO = HR x SV (definition, Guyton and Hall);
SVR = 80 x (MAP - CVP) / CO and MAP = DIA + (SYS - DIA) / 3 (critical care texts, common
practice); CI = CO / BSA.
"""

from __future__ import annotations

import json
import random
from datetime import datetime, timezone
from functools import partial

import pytest
from streams import stream

from hemostream.core.config import Config
from hemostream.core.processor import Processor
from hemostream.core.rules import RulesEngine
from hemostream.core.rules.config import RulesConfig
from hemostream.core.rules.phrases import PARAM_WORDS, PHRASES, phrase
from hemostream.core.wire import PARAMS

BED = "WARD7/bed-05"
DEV = "gw-w7-05"
T0 = 1_800_000_000.0
BSA = 1.9
TOPIC = "hemo/WARD7/bed-05"

run = partial(stream, bed=BED, device=DEV)


def iso(t: float) -> str:
    return datetime.fromtimestamp(t, timezone.utc).isoformat().replace("+00:00", "Z")


def raised(evs, rule):
    return [e for e in evs if e.rule == rule and e.transition == "raised"]


def ramp(t, start, per_min):
    return max(0.0, t - start) / 60.0 * per_min


def values(hr, sbp, dbp, cvp, co, rng, *, pad=None, sv_noise=True):
    g = lambda sd: rng.gauss(0, sd)  # noqa: E731
    hr, sbp, dbp, cvp, co = hr + g(1.0), sbp + g(1.5), dbp + g(1.0), cvp + g(0.3), co + g(0.05)
    mean = dbp + (sbp - dbp) / 3
    v = {"HR": hr, "ABP_SYS": sbp, "ABP_DIA": dbp, "ABP_MEAN": mean, "CVP": cvp, "CO": co,
         "MAP": mean, "SBP": sbp, "SV": co * 1000 / hr, "CI": co / BSA,
         "SVI": co * 1000 / hr / BSA, "SVR": 80 * (mean - cvp) / co, "SI": hr / sbp,
         "SPO2": 97.0, "RR": 14.0}
    if pad is not None:
        v["PAP_DIA"] = pad + g(0.5)
    return v


# =========================================================================== 1. intermittent CO


class Bedside:
    """A bed fed through the real processor: continuous HR / arterial line / CVP every
    second, cardiac output by thermodilution (a measurement dated ``lag`` seconds before the
    message that reports it, as the wire format's ``obs[i].time`` allows)."""

    def __init__(self) -> None:
        cfg = Config()
        self.proc = Processor(cfg, rules=RulesEngine(cfg.rules))
        self.seq = 0
        self.proc.feed(f"{TOPIC}/admit", json.dumps(
            {"v": 1, "time": iso(T0 - 10), "height_cm": 178, "weight_kg": 73}), T0 - 10)
        self.bsa = (178 * 73 / 3600) ** 0.5          # Mosteller, N Engl J Med 1987
        self.out = []

    def second(self, t, hr=80.0, cvp=8.0, co=None, co_time=None, co_lag=40.0):
        self.seq += 1
        obs = [{"param": "HR", "value": hr, "unit": "/min"},
               {"param": "ABP_SYS", "value": 120, "unit": "mm[Hg]"},
               {"param": "ABP_DIA", "value": 70, "unit": "mm[Hg]"},
               {"param": "ABP_MEAN", "value": 87, "unit": "mm[Hg]"},
               {"param": "CVP", "value": cvp, "unit": "mm[Hg]"}]
        if co is not None:
            obs.append({"param": "CO", "value": co, "unit": "L/min",
                        "time": iso(t - co_lag if co_time is None else co_time)})
        self.proc.feed(f"{TOPIC}/obs", json.dumps(
            {"v": 1, "device": DEV, "seq": self.seq, "time": iso(t), "obs": obs}), t + 0.05)
        self.proc.tick(t + 0.5)
        self.out.append(self.proc.drain())

    def note(self, t, **body):
        self.proc.feed(f"{TOPIC}/note", json.dumps({"v": 1, "time": iso(t), **body}), t)
        self.out.append(self.proc.drain())

    def derived(self, param):
        return [d for o in self.out for d in o.derived if d["param"] == param]

    def events(self, rule=None):
        return [e for o in self.out for e in o.alarm_events if rule is None or e["rule"] == rule]

    def engine(self):
        return self.proc.rules


def test_thermodilution_co_gives_one_derived_value_per_measurement_at_its_time():
    """A thermodilution CO is one measurement of output at one time (common practice): SV,
    CI, SVR derived from it are computed once per measurement, dated at it, with the HR of
    that moment (SV = CO x 1000 / HR; CI = CO / BSA; SVR = 80 x (MAP - CVP) / CO), and never
    re-derived every second from the old CO and the current HR."""
    bs = Bedside()
    co_at = {600: 5.2, 1500: 4.6}                    # seconds after T0 -> L/min
    for k in range(2400):
        t = T0 + k
        hr = 80.0 + 10.0 * (k > 1000)                # the HR changes between measurements
        bs.second(t, hr=hr, co=co_at.get(k))
    sv, ci, svr = bs.derived("SV"), bs.derived("CI"), bs.derived("SVR")
    assert len(sv) == len(ci) == len(svr) == 2
    assert [d["time"] for d in sv] == [T0 + 600 - 40, T0 + 1500 - 40]
    assert sv[0]["value"] == pytest.approx(5.2 * 1000 / 80)
    assert sv[1]["value"] == pytest.approx(4.6 * 1000 / 90)
    assert ci[0]["value"] == pytest.approx(5.2 / bs.bsa)
    assert svr[1]["value"] == pytest.approx(80 * (87 - 8) / 4.6, rel=2e-3)   # 79.99 vs 80
    # trends count each measurement once: the SV trend holds at most one point per
    # measurement (no estimate from two points)
    b = bs.engine().bed_state(BED)
    assert len(b.trends["SV"].points_between(T0, T0 + 2400)) <= 2
    assert bs.engine().trend_directions(BED).get("SV") is None


def test_continuous_co_still_derives_every_message():
    bs = Bedside()
    for k in range(30):
        bs.second(T0 + k, co=5.0, co_lag=0.0)
    assert len(bs.derived("SV")) >= 1
    assert bs.engine().bed_state(BED).trends["SV"].points_between(T0, T0 + 30)


@pytest.mark.parametrize("seed", range(5))
def test_thermodilution_responder_is_rated_responsive_from_the_measurements(seed):
    """Monnet X et al., Ann Intensive Care 2016;6:111 (from memory): a responder raises SV by
    at least 10 % after a 500 mL challenge. Output measured by thermodilution before (5 min
    before the bolus) and after the infusion, each scattering about 3 % (the mean of three
    injections; thermodilution repeatability about 6 % per injection, from memory); the
    evaluation waits for the measurement after the infusion and compares the two."""
    rng = random.Random(seed)
    rise = rng.uniform(0.20, 0.30)
    bs = Bedside()
    co0 = 4.0
    before = co0 * (1 + rng.uniform(-0.03, 0.03))
    after = co0 * (1 + rise) * (1 + rng.uniform(-0.03, 0.03))
    bolus = 900
    post = bolus + 600 + rng.randint(60, 900)        # measured 1-15 min after the infusion
    for k in range(post + 60):
        co = before if k == bolus - 300 else after if k == post else None
        bs.second(T0 + k, co=co)
        if k == bolus:
            bs.note(T0 + k, kind="fluid_bolus", volume_ml=500, over_min=10)
    fc = bs.events("fluid_challenge")
    opened = [e for e in fc if e["transition"] == "opened"][0]
    details = json.loads(opened["details"])
    assert details["method"] == "measurement" and "request" in details
    res = [e for e in fc if e["transition"] == "result"]
    assert len(res) == 1
    d = json.loads(res[0]["details"])
    assert d["outcome"] == "responsive", d
    assert d["change_pct"] >= 10.0
    hr = 80.0
    assert [c["time"] for c in d["compared"]] == [T0 + bolus - 300 - 40, T0 + post - 40]
    assert d["compared"][0]["value"] == pytest.approx(before * 1000 / hr)
    assert d["compared"][1]["value"] == pytest.approx(after * 1000 / hr)


def test_thermodilution_without_a_post_bolus_measurement_is_not_evaluable():
    bs = Bedside()
    for k in range(900 + 600 + 1800 + 120):
        bs.second(T0 + k, co=4.0 if k == 600 else None)
        if k == 900:
            bs.note(T0 + k, kind="fluid_bolus", volume_ml=500, over_min=10)
    res = [e for e in bs.events("fluid_challenge") if e["transition"] == "result"]
    assert len(res) == 1
    d = json.loads(res[0]["details"])
    assert d["outcome"] == "not_evaluable" and "measurement" in d["reason"]


def test_one_thermodilution_step_with_a_cvp_rise_is_no_right_heart_mismatch():
    """Trends need many measurements (Theil-Sen over 12+ bucket points, hemostream.core.trends):
    one thermodilution step 4.1 -> 3.9 L/min is not a falling output, whatever the CVP does."""
    bs = Bedside()
    for k in range(3000):
        co = 4.1 if k == 300 else 3.9 if k == 1500 else None
        bs.second(T0 + k, cvp=6.0 + ramp(T0 + k, T0 + 600, 0.4), co=co)
    assert [e for e in bs.events("right_heart_mismatch") if e["transition"] == "raised"] == []


# =========================================================================== 2. profile


@pytest.mark.parametrize("cvp, pawp, rising", [
    (12.0, 4.0, False),      # CVP high
    (6.0, 4.0, True),        # CVP in range but rising
    (5.0, 5.5, False),       # CVP / PAWP 0.9: right-sided filling backing up
    (4.0, None, True),       # no PAWP, CVP rising
])
def test_profile_never_calls_a_high_or_rising_cvp_with_low_output_hypovolemic(cvp, pawp,
                                                                               rising):
    """Hypovolemic = low filling pressures, low CI, high SVR (critical care teaching, common
    practice); a high or rising CVP, or RA/PAWP >= 0.8 (Lopez-Sendon J et al., Circulation
    1981;64:515, from memory), is the right heart failing: no hypovolemic read-out."""
    eng = RulesEngine()
    levels = {"CVP": cvp, "PAWP": pawp, "CI": 1.9, "SVR": 1600.0}
    assert eng.classify(levels, cvp_rising=rising) != "hypovolemic"


def test_profile_still_reads_hypovolemic_for_low_steady_filling():
    eng = RulesEngine()
    assert eng.classify({"CVP": 1.0, "PAWP": 4.0, "CI": 1.9, "SVR": 1600.0}) == "hypovolemic"


def test_rising_cvp_with_falling_output_never_reads_hypovolemic_on_a_stream():
    """The right-ventricular failure of issue 15: CVP rises from 3 to ~7 mm[Hg] while output
    falls to a low CI and PAWP stays low; the read-out must not invite fluid."""
    rng = random.Random(5)
    eng = RulesEngine()
    onset = T0 + 600

    def fn(t):
        v = values(100, 100, 62, 3 + ramp(t, onset, 0.1), 5.2 - ramp(t, onset, 0.05), rng)
        v["PAWP"] = 5.0
        return v

    evs = run(eng, T0, onset + 2400, fn)
    texts = [e.details.get("profile") for e in evs if e.transition == "profile"]
    assert "hypovolemic" not in texts
    # the output did become low (CI < 2.5 with SVR high): the read-out had its chance
    assert fn(onset + 2400)["CI"] < 2.0


# =========================================================================== 3. LV failure


def test_left_heart_mismatch_on_rising_pa_diastolic_with_falling_output():
    """Frank-Starling; Forrester JS et al., N Engl J Med 1976;295:1356: rising left-sided
    filling pressure with falling output is left-ventricular failure (PA diastolic tracks
    PAWP with normal PVR, critical care texts)."""
    rng = random.Random(7)
    eng = RulesEngine()
    onset = T0 + 900
    evs = run(eng, T0, onset + 1500, lambda t: values(
        80, 118, 70, 8, 5.2 - ramp(t, onset, 0.06), rng, pad=12 + ramp(t, onset, 0.5)))
    r = raised(evs, "left_heart_mismatch")
    assert r and onset < r[0].time <= onset + 600
    assert raised(evs, "right_heart_mismatch") == []


def test_left_heart_mismatch_is_silent_on_a_stable_bed():
    rng = random.Random(8)
    eng = RulesEngine()
    evs = run(eng, T0, T0 + 3 * 3600, lambda t: values(80, 118, 70, 8, 5.2, rng, pad=12))
    assert raised(evs, "left_heart_mismatch") == []


def test_a_wedge_pressure_above_18_raises_pawp_high():
    """PAWP > 18 mm[Hg]: pulmonary congestion (Forrester JS et al., N Engl J Med
    1976;295:1356, published); one intermittent reading is enough."""
    eng = RulesEngine()
    evs = eng.on_values(BED, T0, {"PAWP": 22.0}, frozenset({"PAWP"}), {}, DEV)
    assert raised(evs, "PAWP_high")
    evs = eng.on_values(BED, T0 + 1200, {"PAWP": 12.0}, frozenset({"PAWP"}), {}, DEV)
    evs += eng.tick(T0 + 1300)
    assert "condition_ended" in [e.transition for e in evs if e.rule == "PAWP_high"]
    eng2 = RulesEngine()
    assert raised(eng2.on_values(BED, T0, {"PAWP": 17.0}, frozenset({"PAWP"}), {}, DEV),
                  "PAWP_high") == []


# =========================================================================== 6. vasodilation


def test_vasodilation_is_found_within_ten_minutes_while_the_reflex_holds_map():
    """MAP - CVP = CO x SVR (critical care texts): with vasodilation the SVR falls and the
    reflex raises HR and output, holding MAP (the early, compensated phase)."""
    rng = random.Random(11)
    eng = RulesEngine()
    onset = T0 + 1200

    def fn(t):
        co = 5.0 + ramp(t, onset, 0.05)
        hr = 78 + ramp(t, onset, 1.0)
        v = values(hr, 118, 70, 7, co, rng)
        v["SVR"] = 80 * (v["MAP"] - v["CVP"]) / co * (1 - min(0.5, ramp(t, onset, 0.02)))
        return v

    evs = run(eng, T0, onset + 1800, fn)
    r = raised(evs, "vasodilation_pattern")
    assert r and onset < r[0].time <= onset + 600, [e.time - onset for e in r]


@pytest.mark.parametrize("seed", range(3))
def test_vasodilation_silent_on_stable_beds(seed):
    rng = random.Random(100 + seed)
    eng = RulesEngine()
    evs = run(eng, T0, T0 + 4 * 3600, lambda t: values(78, 118, 70, 7, 5.0, rng))
    assert [e.rule for e in evs if e.category == "physiological"] == []


def _refilling(t, onset, rng):
    """After a bleed: volume given back, CVP rising, the rate settling faster than the
    stroke volume recovers, so CO dips while SV rises."""
    hr = 120 - ramp(t, onset, 2.0)
    sv = 30 + ramp(t, onset, 0.6)
    v = values(hr, 96, 60, 2 + ramp(t, onset, 0.4), hr * sv / 1000, rng)
    return v


def test_right_heart_mismatch_silent_during_a_transfusion():
    """A refilling patient is not a failing right heart: the mismatch does not start while
    a transfusion (a fluid_bolus note) runs and for 10 min after it."""
    rng = random.Random(12)
    eng = RulesEngine()
    onset = T0 + 900
    evs = run(eng, T0, onset, lambda t: _refilling(t, onset, rng))
    evs += eng.on_note(BED, onset, "fluid_bolus", volume_ml=600, over_min=30)
    evs += run(eng, onset, onset + 1800, lambda t: _refilling(t, onset, rng))
    assert raised(evs, "right_heart_mismatch") == []


def test_right_heart_mismatch_silent_when_stroke_volume_rises_without_a_note():
    """Frank-Starling: a heart being filled raises its stroke volume; output may dip only
    because the rate falls (CO = HR x SV). No note is needed to stay quiet."""
    rng = random.Random(13)
    eng = RulesEngine()
    onset = T0 + 900
    evs = run(eng, T0, onset + 1800, lambda t: _refilling(t, onset, rng))
    assert raised(evs, "right_heart_mismatch") == []


def test_right_heart_mismatch_still_fires_when_the_pump_fails():
    rng = random.Random(14)
    eng = RulesEngine()
    onset = T0 + 900
    evs = run(eng, T0, onset + 1200, lambda t: values(
        90 + ramp(t, onset, 0.5), 110, 68, 6 + ramp(t, onset, 0.5),
        5.0 - ramp(t, onset, 0.06), rng))
    r = raised(evs, "right_heart_mismatch")
    assert r and r[0].time <= onset + 600


# =========================================================================== 7. CVP offset


def _bolus_with(cvp_fn, note=None):
    rng = random.Random(21)
    eng = RulesEngine()
    bolus = T0 + 600

    def fn(t):
        co = 4.0 + 0.6 * min(1.0, ramp(t, bolus, 0.1))
        return values(88, 110, 66, cvp_fn(t), co, rng)

    evs = run(eng, T0, bolus, fn)
    evs += eng.on_note(BED, bolus, "fluid_bolus", volume_ml=500, over_min=10)
    evs += run(eng, bolus, bolus + 400, fn)
    if note:
        evs += eng.on_note(BED, bolus + 400, note, param="CVP")
    evs += run(eng, bolus + 400, bolus + 900, fn)
    return [e for e in evs if e.rule == "fluid_challenge" and e.transition == "result"][0]


def test_cvp_change_is_reported_when_the_transducer_stays():
    res = _bolus_with(lambda t: 5.0 + min(2.0, ramp(t, T0 + 600, 0.2)))
    assert res.details["cvp_change"] == pytest.approx(2.0, abs=0.5)


def test_a_moved_cvp_transducer_does_not_feed_the_cvp_change():
    """A transducer moved by 10 cm shifts the CVP by about 7 mm[Hg] at once (1 cm H2O =
    0.7356 mm[Hg], UCUM); filling changes it over minutes (common practice). The step is
    detected and the CVP change withheld, with the reason."""
    res = _bolus_with(lambda t: 5.0 + (7.4 if t >= T0 + 600 + 420 else 0.0))
    assert res.details["outcome"] == "responsive"
    assert res.details["cvp_change"] is None and "stepped" in res.details["cvp_note"]


def test_a_reposition_note_withholds_the_cvp_change():
    res = _bolus_with(lambda t: 5.0 + (1.5 if t >= T0 + 600 + 400 else 0.0),
                      note="reposition")
    assert res.details["cvp_change"] is None and "reposition" in res.details["cvp_note"]


# =========================================================================== words on screens


def test_every_shipped_rule_has_a_phrase():
    cfg = RulesConfig()
    for rid in list(cfg.patterns) + ["feed_silent", "device_silent", "values_not_valid",
                                     "artifact_suspected", "fluid_challenge",
                                     "hemodynamic_profile"]:
        assert rid in PHRASES, rid
    for p in list(PARAMS) + ["MAP", "SBP", "PP", "CI", "SVI", "SVR", "SVRI", "PVR", "LVSWI",
                             "RVSWI", "SI", "MSI"]:
        assert p in PARAM_WORDS, p
    for p in cfg.limits:
        assert phrase(f"{p}_high") == f"{PARAM_WORDS[p]} high"
    # short enough to read at a glance (project choice: at most 40 characters)
    assert max(len(v) for v in PHRASES.values()) <= 40
    assert phrase("right_heart_mismatch") == "CVP rising, output falling"
    assert phrase("low_output") == "low cardiac output"


def test_alarm_events_and_state_carry_the_phrase():
    cfg = Config()
    proc = Processor(cfg, rules=RulesEngine(cfg.rules))
    for k in range(20):
        t = T0 + k
        proc.feed(f"{TOPIC}/obs", json.dumps({"v": 1, "device": DEV, "seq": k, "time": iso(t),
                                              "obs": [{"param": "HR", "value": 160,
                                                       "unit": "/min"}]}), t)
        proc.tick(t + 0.5)
    pubs = [p for p in proc.drain().publish if p[0].endswith("/alarm")]
    events = [b["event"] for _, b, _ in pubs if "event" in b]
    states = [b["state"] for _, b, _ in pubs if "state" in b]
    assert events and all(e["phrase"] == "HR high" for e in events if e["rule"] == "HR_high")
    assert states[-1]["alarms"][0]["phrase"] == "HR high"
    assert states[-1]["alarms"][0]["rule"] == "HR_high"       # the id stays for data
