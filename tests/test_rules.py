"""Pattern rules, fluid-challenge evaluation, profile read-out, artifact exclusion and the
rules configuration, on hand-made streams.

Hand-made physiology: values of an invented adult at 1 Hz with seeded noise; derived values
are computed here with the published formulas (MAP = DIA + (SYS - DIA) / 3, common practice;
SI = HR / SBP, Allgower and Burri 1967; CI = CO / BSA; SV = CO x 1000 / HR;
SVR = 80 x (MAP - CVP) / CO, critical care texts, from memory), not by the code under test.
"""

from __future__ import annotations

import random
import tomllib
from functools import partial
from pathlib import Path

import pytest
from pydantic import ValidationError
from streams import stream

from hemostream.core.rules import RulesEngine
from hemostream.core.rules.config import RulesConfig

BED = "WARD7/bed-03"
DEV = "gw-w7-03"
T0 = 1_800_000_000.0
BSA = 1.9
ROOT = Path(__file__).resolve().parent.parent


def patient(hr, sbp, dbp, cvp, co, *, pawp=None, rng=None, noise=1.0):
    g = (lambda sd: rng.gauss(0, sd * noise)) if rng is not None else (lambda sd: 0.0)
    hr = hr + g(1.5)
    sbp = sbp + g(2.0)
    dbp = dbp + g(1.5)
    cvp = cvp + g(0.4)
    co = co + g(0.08)
    mean = dbp + (sbp - dbp) / 3
    v = {"HR": hr, "ABP_SYS": sbp, "ABP_DIA": dbp, "ABP_MEAN": mean, "CVP": cvp, "CO": co,
         "SPO2": 97.0, "RR": 14.0, "MAP": mean, "SBP": sbp, "PP": sbp - dbp,
         "SV": co * 1000 / hr, "BSA": BSA, "CI": co / BSA, "SVI": co * 1000 / hr / BSA,
         "SVR": 80 * (mean - cvp) / co, "SI": hr / sbp, "MSI": hr / mean}
    if pawp is not None:
        v["PAWP"] = pawp
    return v


STABLE = dict(hr=72, sbp=120, dbp=70, cvp=6, co=5.5)


run = partial(stream, bed=BED, device=DEV)


def raised(evs, rule):
    return [e for e in evs if e.rule == rule and e.transition == "raised"]


def physio(evs):
    return sorted({e.rule for e in evs if e.category == "physiological"})


def ramp(t, onset, per_min):
    return max(0.0, (t - onset) / 60.0) * per_min


# --------------------------------------------------------------------------- right heart


def test_right_heart_mismatch_raised_within_ten_minutes_of_onset():
    rng = random.Random(1)
    eng = RulesEngine()
    onset = T0 + 900
    # CVP +0.5 mm[Hg]/min, CO -0.06 L/min/min: filling pressure up while output falls
    evs = run(eng, T0, onset + 900, lambda t: patient(
        72 + ramp(t, onset, 0.5), 120 - ramp(t, onset, 1.0), 70 - ramp(t, onset, 0.5),
        6 + ramp(t, onset, 0.5), 5.5 - ramp(t, onset, 0.06), rng=rng))
    r = raised(evs, "right_heart_mismatch")
    assert len(r) == 1
    assert r[0].time - onset <= 600
    assert r[0].priority == "medium"
    terms = {x["param"]: x for x in r[0].details["terms"]}
    assert terms["CVP"]["trend"] == "rising" and terms["CI"]["trend"] == "falling"
    assert not [e for e in evs if e.time < onset and e.category == "physiological"]


def test_no_mismatch_when_cvp_and_output_rise_together():
    rng = random.Random(2)
    eng = RulesEngine()
    onset = T0 + 900
    # a preload-responsive patient being filled: CVP and CO up together
    evs = run(eng, T0, onset + 1200, lambda t: patient(
        72, 120, 70, 6 + ramp(t, onset, 0.4), 5.0 + ramp(t, onset, 0.05), rng=rng))
    assert raised(evs, "right_heart_mismatch") == []


@pytest.mark.parametrize("cvp_rate, co_rate", [(0.5, 0.0), (0.0, -0.06)])
def test_no_mismatch_when_only_one_moves(cvp_rate, co_rate):
    rng = random.Random(3)
    eng = RulesEngine()
    onset = T0 + 900
    evs = run(eng, T0, onset + 1200, lambda t: patient(
        72, 120, 70, 6 + ramp(t, onset, cvp_rate), 5.5 + ramp(t, onset, co_rate), rng=rng))
    assert raised(evs, "right_heart_mismatch") == []


def test_mismatch_uses_co_without_body_surface_area():
    rng = random.Random(4)
    eng = RulesEngine()
    onset = T0 + 900

    def fn(t):
        v = patient(72, 120, 70, 6 + ramp(t, onset, 0.5), 5.5 - ramp(t, onset, 0.06), rng=rng)
        for k in ("BSA", "CI", "SVI"):
            del v[k]
        return v

    r = raised(run(eng, T0, onset + 900, fn), "right_heart_mismatch")
    # the output term falls back to CO and the stroke-volume term to SV
    assert r and {x["param"] for x in r[0].details["terms"]} == {"CVP", "CO", "SV"}


# --------------------------------------------------------------------------- shock index


def test_hemorrhage_like_stream_raises_shock_index_alarms():
    rng = random.Random(5)
    eng = RulesEngine()
    onset = T0 + 900
    # HR up 2/min, SBP down 2/min: SI 0.6 -> above 1.0 within about 12 minutes
    evs = run(eng, T0, onset + 1500, lambda t: patient(
        min(72 + ramp(t, onset, 2.0), 125), max(120 - ramp(t, onset, 2.0), 85),
        max(70 - ramp(t, onset, 1.0), 50), max(6 - ramp(t, onset, 0.2), 2),
        max(5.5 - ramp(t, onset, 0.1), 3.5), rng=rng))
    hi = [e for e in evs if e.rule == "shock_index_high"]
    assert [e.transition for e in hi][:2] == ["raised", "updated"]
    assert hi[0].priority == "low" and hi[0].value >= 0.9 - 0.05   # warning level 0.9
    assert hi[1].priority == "medium" and "priority_raised" in hi[1].details["reason"]
    assert raised(evs, "shock_index_rising")
    assert raised(evs, "hypovolemia_pattern")
    # SI crosses 0.9 when (72 + 2m) / (120 - 2m) = 0.9, m = 9.47 min; raised after the delay
    cross = onset + 60 * (0.9 * 120 - 72) / (2 + 0.9 * 2)
    assert hi[0].time >= cross + eng.cfg.patterns["shock_index_high"].delay_s - 60
    assert hi[0].time <= cross + 180


def test_stable_patient_raises_nothing_physiological():
    rng = random.Random(6)
    eng = RulesEngine()
    evs = run(eng, T0, T0 + 4 * 3600, lambda t: patient(**STABLE, rng=rng, noise=1.5),
              step=2.0)
    assert physio(evs) == []
    assert [e for e in evs if e.category == "technical"] == []


# --------------------------------------------------------------------------- low output etc.


def test_low_output_after_its_delay():
    eng = RulesEngine(RulesConfig.model_validate({"alarms": {"escalate_medium_after_s": None}}))
    delay = eng.cfg.patterns["low_output"].delay_s
    evs = run(eng, T0, T0 + 600, lambda t: {"CI": 2.0 if t >= T0 + 60 else 2.8, "HR": 80.0})
    r = raised(evs, "low_output")
    # CI is trended, so its level is read from bucket points: onset within one bucket
    bucket = eng.cfg.trends.bucket_s
    assert len(r) == 1 and T0 + 60 + delay <= r[0].time <= T0 + 60 + delay + bucket + 1
    # hysteresis 0.1: 2.25 keeps it, 2.4 ends it after the clear delay
    evs = run(eng, T0 + 600, T0 + 800, lambda t: {"CI": 2.25, "HR": 80.0})
    assert [e.transition for e in evs if e.rule == "low_output"] == []
    evs = run(eng, T0 + 800, T0 + 1000, lambda t: {"CI": 2.4, "HR": 80.0})
    assert [e.transition for e in evs if e.rule == "low_output"] == ["condition_ended",
                                                                   "cleared"]


def test_vasodilation_pattern_and_not_when_output_falls():
    rng = random.Random(7)
    onset = T0 + 900
    eng = RulesEngine()
    # SBP/DBP down (MAP and SVR falling) while CO is held and the reflex raises HR (the
    # pattern asks for that answer: HR rising, beyond its 5 /min per 10 min band)
    evs = run(eng, T0, onset + 900, lambda t: patient(
        72 + ramp(t, onset, 1.0), 120 - ramp(t, onset, 1.5), 70 - ramp(t, onset, 1.2), 6,
        5.5, rng=rng))
    assert raised(evs, "vasodilation_pattern")
    eng = RulesEngine()
    evs = run(eng, T0, onset + 900, lambda t: patient(
        72, 120 - ramp(t, onset, 1.5), 70 - ramp(t, onset, 1.2), 6,
        5.5 - ramp(t, onset, 0.1), rng=random.Random(7)))
    assert raised(evs, "vasodilation_pattern") == []


# --------------------------------------------------------------------------- fluid challenge


def _bolus_run(sv_gain, cvp_gain, *, over_min=10):
    rng = random.Random(8)
    eng = RulesEngine()
    bolus = T0 + 900
    end = bolus + over_min * 60

    def frac(t):
        return min(max((t - bolus) / (end - bolus), 0.0), 1.0)

    def fn(t):
        hr = 80.0
        sv = 60.0 * (1 + sv_gain * frac(t))
        return patient(hr, 115, 68, 5 + cvp_gain * frac(t), hr * sv / 1000, rng=rng,
                       noise=0.3)

    evs = run(eng, T0, bolus, fn)
    evs += eng.on_note(BED, bolus, "fluid_bolus", volume_ml=500, over_min=over_min)
    evs += run(eng, bolus, end + 600, fn)
    return eng, evs


def test_responsive_fluid_challenge():
    eng, evs = _bolus_run(0.20, 2.0)
    fc = [e for e in evs if e.rule == "fluid_challenge"]
    assert [e.transition for e in fc] == ["opened", "result"]
    res = fc[1]
    assert res.category == "information" and res.priority == "info"
    d = res.details
    assert d["outcome"] == "responsive" and d["responsive"] is True
    assert d["param"] == "SV"
    # baseline SV = 60 mL; at the end of the infusion SV = 72 mL (+20 %); the after-window
    # straddles the end, so its median sits near the plateau
    assert d["baseline"] == pytest.approx(60, abs=1.0)
    assert d["change_pct"] == pytest.approx(20, abs=3)
    assert d["cvp_change"] == pytest.approx(2.0, abs=0.6)
    assert res.value == d["change_pct"]
    assert eng.bed_view(BED)["fluid_challenge"]["outcome"] == "responsive"
    # CVP and SV rose together: no mismatch alarm
    assert raised(evs, "right_heart_mismatch") == []


def test_not_responsive_fluid_challenge_reports_the_cvp_rise():
    _, evs = _bolus_run(0.03, 4.0)
    res = [e for e in evs if e.rule == "fluid_challenge" and e.transition == "result"][0]
    assert res.details["outcome"] == "not_responsive" and res.details["responsive"] is False
    assert res.details["change_pct"] == pytest.approx(3, abs=2)
    assert res.details["cvp_change"] == pytest.approx(4.0, abs=0.6)


def test_threshold_is_configurable():
    cfg = RulesConfig.model_validate({"fluid_challenge": {"responsive_change_pct": 15}})
    eng = RulesEngine(cfg)
    t = T0
    for k in range(400):
        v = {"SV": 60.0, "CVP": 6.0, "HR": 80.0}
        eng.on_values(BED, t + k, v, frozenset(v), {}, DEV)
    eng.on_note(BED, T0 + 400, "fluid_bolus", volume_ml=250, over_min=5)
    evs = []
    for k in range(400, 1200):
        v = {"SV": 67.2, "CVP": 6.5, "HR": 80.0}          # +12 %
        evs += eng.on_values(BED, T0 + k, v, frozenset(v), {}, DEV)
        evs += eng.tick(T0 + k + 0.5)
    res = [e for e in evs if e.transition == "result"][0]
    assert res.details["change_pct"] == pytest.approx(12.0, abs=1e-6)   # (67.2-60)/60
    assert res.details["outcome"] == "not_responsive"


def test_second_bolus_during_the_window_uses_what_was_collected():
    eng = RulesEngine()
    for k in range(400):
        v = {"SV": 60.0, "CVP": 6.0, "HR": 80.0}
        eng.on_values(BED, T0 + k, v, frozenset(v), {}, DEV)
    eng.on_note(BED, T0 + 400, "fluid_bolus", volume_ml=500, over_min=5)
    for k in range(400, 700):       # the window opens at the end (700 s) minus 60 s
        v = {"SV": 69.0, "CVP": 7.0, "HR": 80.0}
        eng.on_values(BED, T0 + k, v, frozenset(v), {}, DEV)
    evs = eng.on_note(BED, T0 + 700, "fluid_bolus", volume_ml=250, over_min=5)
    res = [e for e in evs if e.transition == "result"][0]
    assert res.details["outcome"] == "responsive"
    assert res.details["change_pct"] == pytest.approx(15.0)          # (69 - 60) / 60
    assert "cut short" in res.details["note"]
    assert [e.transition for e in evs][-1] == "opened"


def test_fluid_challenge_without_baseline_is_not_evaluable():
    eng = RulesEngine()
    evs = eng.on_note(BED, T0, "fluid_bolus", volume_ml=500, over_min=10)
    assert [(e.transition, e.details["outcome"]) for e in evs] == [("result",
                                                                    "not_evaluable")]


def test_other_notes_are_ignored_by_the_rules():
    eng = RulesEngine()
    for kind in ("free_text", "deterioration_onset", "reposition"):
        assert eng.on_note(BED, T0, kind) == []


# --------------------------------------------------------------------------- profile


@pytest.mark.parametrize("levels, expected", [
    # classic profiles, common practice (critical care teaching)
    ({"CVP": 1, "PAWP": 4, "CI": 1.9, "SVR": 1600}, "hypovolemic"),
    ({"CVP": 1, "PAWP": None, "CI": 1.9, "SVR": 1600}, "hypovolemic"),
    ({"CVP": 12, "PAWP": 22, "CI": 1.8, "SVR": 1700}, "cardiogenic"),
    ({"CVP": 16, "PAWP": 9, "CI": 1.8, "SVR": 1500}, "obstructive"),
    ({"CVP": 16, "PAWP": None, "CI": 1.8, "SVR": 1500}, "cardiogenic_or_obstructive"),
    ({"CVP": 4, "PAWP": None, "CI": 4.6, "SVR": 550}, "distributive"),
    ({"CVP": 5, "PAWP": 9, "CI": 3.0, "SVR": 1000}, None),
    ({"CVP": 5, "PAWP": None, "CI": 2.1, "SVR": 1000}, None),
    ({"CVP": 5, "PAWP": None, "CI": None, "SVR": 1000}, None),
])
def test_profile_classification(levels, expected):
    assert RulesEngine().classify(levels) == expected


def test_profile_read_out_is_announced_after_holding_and_shown():
    eng = RulesEngine()
    hold = eng.cfg.profile.hold_s
    # low filling, low output, high resistance
    evs = run(eng, T0, T0 + 600, lambda t: patient(110, 95, 65, 1.0, 3.4))
    pr = [e for e in evs if e.rule == "hemodynamic_profile"]
    assert [e.transition for e in pr] == ["profile"]
    assert pr[0].details["profile"] == "hypovolemic"
    assert "not a diagnosis" in pr[0].details["note"]
    assert pr[0].category == "information" and pr[0].priority == "info"
    first_points = eng.cfg.trends.bucket_s
    assert pr[0].time == pytest.approx(T0 + first_points + hold, abs=eng.cfg.trends.bucket_s + 1)
    view = eng.bed_view(BED)
    assert view["profile"] == "hypovolemic"
    assert view["profile_text"].startswith("consistent with")


# --------------------------------------------------------------------------- artifacts


def _cvp_trend(eng):
    return eng.bed_view(BED)["trends"]["CVP"]


def test_noted_zeroing_and_flush_make_no_trend():
    rng = random.Random(9)
    eng = RulesEngine()

    def fn(t):
        v = patient(**STABLE, rng=rng)
        k = t - T0
        if 400 <= k < 415:                # zeroing: reads 0
            v["CVP"] = 0.0
        if 700 <= k < 706:                # flush of the arterial line: pressure bag
            v.update(ABP_SYS=300.0, ABP_DIA=298.0, ABP_MEAN=299.0, MAP=299.0, SBP=300.0)
        return v

    evs = run(eng, T0, T0 + 400, fn)
    evs += eng.on_note(BED, T0 + 400, "zeroing", param="CVP", duration_s=30)
    evs += run(eng, T0 + 400, T0 + 700, fn)
    evs += eng.on_note(BED, T0 + 700, "line_flush", param="ABP", duration_s=20)
    evs += run(eng, T0 + 700, T0 + 1000, fn)
    assert [e for e in evs if e.category != "information"] == []
    view = eng.bed_view(BED)["trends"]
    assert view["CVP"]["direction"] == "steady"
    assert view["MAP"]["direction"] == "steady"
    assert abs(view["MAP"]["slope_per_10min"]) < 2


def test_unnoted_signatures_are_detected_and_kept_out_of_trends():
    rng = random.Random(10)

    def fn(t, artifacts):
        v = patient(**STABLE, rng=rng)
        k = int(t - T0)
        if artifacts and k % 120 < 12 and k > 200:      # a zeroing every 2 minutes
            v["CVP"] = 0.0
            v["SVR"] = 80 * (v["MAP"] - 0.0) / v["CO"]
        return v

    clean = RulesEngine()
    run(clean, T0, T0 + 900, lambda t: fn(t, False))
    dirty = RulesEngine()
    evs = run(dirty, T0, T0 + 900, lambda t: fn(t, True))
    a, b = _cvp_trend(clean), _cvp_trend(dirty)
    assert b["direction"] == "steady"
    assert b["slope_per_10min"] == pytest.approx(a["slope_per_10min"], abs=0.5)
    assert [e for e in evs if e.category == "physiological"] == []


def test_calibrating_status_excludes_the_channel():
    eng = RulesEngine()
    evs = []
    for k in range(120):
        t = T0 + k
        v = {"HR": 72.0, "CVP": 6.0}
        nonvalid = {}
        if 60 <= k < 70:
            nonvalid = {"ABP_MEAN": "calibrating"}
        evs += eng.on_values(BED, t, v, frozenset(v), nonvalid, DEV)
    assert eng.art.excluded(eng.bed_state(BED).art, T0 + 65) >= {"MAP", "ABP_MEAN", "SI"}
    assert "CVP" not in eng.art.excluded(eng.bed_state(BED).art, T0 + 65)


# --------------------------------------------------------------------------- dashboard


def test_bed_view_exposes_trend_directions():
    eng = RulesEngine()
    run(eng, T0, T0 + 900, lambda t: patient(72 + (t - T0) / 60, 120, 70,
                                             6 - (t - T0) / 300, 5.5))
    tr = eng.bed_view(BED)["trends"]
    assert tr["HR"]["direction"] == "rising"        # +10 /min per 10 min
    assert tr["CVP"]["direction"] == "falling"      # -2 mm[Hg] per 10 min
    assert tr["CO"]["direction"] == "steady"
    assert tr["HR"]["slope_per_10min"] == pytest.approx(10, abs=0.2)
    dirs = eng.trend_directions(BED)
    assert dirs["HR"] == "rising" and dirs["CVP"] == "falling"
    assert eng.trend_directions("WARD7/none") == {}
    assert set(RulesEngine().bed_view("WARD7/none")) >= {"trends", "alarms", "profile",
                                                        "fluid_challenge"}


# --------------------------------------------------------------------------- configuration


def test_shipped_toml_equals_the_built_in_defaults():
    with open(ROOT / "configs" / "rules.toml", "rb") as f:
        data = tomllib.load(f)
    assert RulesConfig.model_validate(data["rules"]) == RulesConfig()


def test_every_shipped_rule_is_documented():
    doc = (ROOT / "docs" / "rules.md").read_text()
    cfg = RulesConfig()
    for rid in list(cfg.patterns) + ["fluid_challenge", "hemodynamic_profile", "feed_silent",
                                     "device_silent", "values_not_valid",
                                     "artifact_suspected"]:
        assert f"`{rid}`" in doc, rid
    for p in cfg.limits:
        assert f"`{p}_low`" in doc or f"`{p}_high`" in doc, p
    for p in cfg.patterns.values():
        assert p.source and p.description


@pytest.mark.parametrize("data, where", [
    ({"limits": {"HRX": {"high": 3}}}, "limits"),
    ({"limits": {"HR": {"low": 100, "high": 50}}}, "limits.HR"),
    ({"limits": {"HR": {"high": 120, "priority": "urgent"}}}, "limits.HR.priority"),
    ({"trends": {"window_s": 60}}, "trends"),
    ({"trends": {"params": {"HR": {"steady_abs": 5}}}}, "patterns"),   # CVP trend gone
    ({"patterns": {"Bad-Id": {"terms": [{"param": "HR", "at_least": 1}]}}}, "patterns"),
    ({"patterns": {"x": {"terms": [{"param": "HR"}]}}}, "patterns.x.terms.0"),
    ({"alarms": {"audio_pause_s": -1}}, "alarms.audio_pause_s"),
    ({"technical": {"feed_silent_after_s": {"SI": 10}}}, "technical.feed_silent_after_s"),
    ({"speling": 1}, "speling"),
])
def test_invalid_config_names_the_key(data, where):
    with pytest.raises(ValidationError) as ei:
        RulesConfig.model_validate(data)
    locs = [".".join(str(x) for x in e["loc"]) for e in ei.value.errors()]
    assert any(loc.startswith(where) or (where == "patterns" and loc == "") for loc in locs), \
        locs


def test_disabled_rules_do_nothing():
    eng = RulesEngine(RulesConfig(enabled=False))
    assert run(eng, T0, T0 + 100, lambda t: {"HR": 200.0}) == []


# --------------------------------------------------------------------------- limit merge rule


def test_applied_limits_merges_an_admission_over_the_configuration():
    # the wire format's admit example (docs/wire-format.md): {"HR": {"high": 120},
    # "ABP_SYS": {"low": 95}} overrides the configured limits for that bed only
    from hemostream.core.rules.limits import applied_limits
    cfg = RulesConfig()
    conf = cfg.limits
    got = applied_limits(conf, {"HR": {"high": 120}, "ABP_SYS": {"low": 95}})
    # a side the admission gives replaces the configured side, the other side stays
    assert got["HR"] == {"low": conf["HR"].low, "high": 120.0}
    # a parameter only the admission limits gets the side it gives, after the configured ones
    assert got["ABP_SYS"] == {"low": 95.0}
    assert list(got) == list(conf) + ["ABP_SYS"]
    # every other configured parameter is untouched
    for p, rule in conf.items():
        if p != "HR":
            assert got[p] == {s: getattr(rule, s) for s in ("low", "high")
                              if getattr(rule, s) is not None}
    # no admission, an empty one, and None / unknown keys: the configuration as it is
    assert applied_limits(conf) == applied_limits(conf, {}) == applied_limits(
        conf, {"HR": {"high": None, "priority": "high"}})


def test_the_engine_alarms_at_the_applied_limits():
    from hemostream.core.rules.limits import applied_limits
    eng = RulesEngine()
    eng.on_admit(BED, T0, {"HR": {"high": 100}})
    lim = {(x.param, x.side): x.threshold for x in eng.bed_state(BED).limits}
    want = applied_limits(eng.cfg.limits, {"HR": {"high": 100}})
    assert lim == {(p, s): v for p, sides in want.items() for s, v in sides.items()}
    evs = run(eng, T0, T0 + 60, lambda t: patient(**{**STABLE, "hr": 110}))
    assert raised(evs, "HR_high") and raised(evs, "HR_high")[0].details["limit"] == 100.0
