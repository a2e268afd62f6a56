"""Delay timers in event time: the sample that completes a condition delay raises the alarm
itself, in the message's own processing, not at the next clock tick.

What is checked against what: IEC 60601-1-8 (from memory) defines the alarm condition delay
as the time from the onset of an alarm condition until the alarm system decides it exists,
so the raise belongs to the first moment the condition has held for the configured delay
(configs/rules.toml: HR high limit 140 /min, delay_s 10). The expected raise time in every
check is computed here from the sample times themselves: the first sample whose time is at
least the delay after the onset, to within half a millisecond (the wire's resolution is the
millisecond, docs/wire-format.md: hemostream writes its times to the millisecond). That
tolerance is what the code promises (``DELAY_TOLERANCE_S``); the spacing of doubles near
epoch seconds of 2026 comes from Python's ``math.ulp`` (a general-purpose reference).

The streams tick the clock half a second after every sample (as tests/streams.py does) unless
said otherwise, so a raise that waited for a tick would carry the tick's time, not the
sample's: that is what would fail here.
"""

from __future__ import annotations

import json
import math
import random

from sqlalchemy import select

from hemostream.core.rules import RulesEngine
from hemostream.core.rules.common import DELAY_TOLERANCE_S
from hemostream.core.wire import parse_time
from hemostream.replay import replay_file
from hemostream.store import TABLES, open_engine

BED = "WARD9/bed-07"
DEV = "gw-w9-07"
CALM = {"HR": 72.0, "SPO2": 97.0, "MAP": 88.0, "SBP": 120.0, "SI": 0.6}
HIGH = dict(CALM, HR=152.0)
DELAY = 10.0                     # configs/rules.toml [rules.limits.HR] delay_s


def wire(second: int, micro: int) -> str:
    """An RFC 3339 time 2026-12-01T08:00:00Z + ``second`` s + ``micro`` us (to the us)."""
    m, s = divmod(second, 60)
    return f"2026-12-01T08:{m:02d}:{s:02d}.{micro:06d}Z"


def feed(eng, samples, *, tick: bool = True):
    """Feed (t, values) in order; return [(source, event)], source 'msg k' or 'tick k'."""
    out = []
    for k, (t, v) in enumerate(samples):
        out += [(f"msg {k}", e) for e in eng.on_values(BED, t, v, frozenset(v), {}, DEV)]
        if tick:
            out += [(f"tick {k}", e) for e in eng.tick(t + 0.5)]
    return out


def raises(evs, rule="HR_high"):
    return [(src, e) for src, e in evs if e.rule == rule and e.transition == "raised"]


def first_completing(times, onset_index):
    """Index of the first sample at least DELAY after the onset sample (within 0.5 ms)."""
    t0 = times[onset_index]
    return next(k for k, t in enumerate(times) if k > onset_index and t - t0 >= DELAY - 0.0005)


def test_the_shipped_delay_is_the_one_the_checks_assume():
    assert RulesEngine().cfg.limits["HR"].delay_s == DELAY
    assert DELAY_TOLERANCE_S == 0.0005


def test_epoch_floats_are_coarser_than_the_old_margin():
    """Why 1e-9 s could not work: doubles near 1.8e9 s are 2.4e-7 s apart (math.ulp)."""
    t = parse_time(wire(0, 0))
    assert math.ulp(t) > 1e-7 > 1e-9
    assert math.ulp(t) < DELAY_TOLERANCE_S / 1000


def test_microsecond_stamps_a_hair_short_raise_at_the_completing_sample():
    """A 1 Hz gateway stamping each sample with its own clock to the microsecond: the tenth
    sample after the onset is 300 us short of 10 s (its sleep woke early)."""
    rng = random.Random(7)
    micros = [400] + [rng.randrange(150, 650) for _ in range(9)] + [100] \
        + [rng.randrange(150, 650) for _ in range(10)]
    times = [parse_time(wire(k, u)) for k, u in enumerate(micros)]
    assert DELAY - DELAY_TOLERANCE_S <= times[10] - times[0] < DELAY      # a hair short
    evs = feed(RulesEngine(), [(t, HIGH) for t in times])
    r = raises(evs)
    assert len(r) == 1
    k = first_completing(times, 0)
    assert k == 10
    assert r[0][0] == "msg 10"
    assert r[0][1].time == times[10]


def test_times_built_by_repeated_float_addition_raise_at_the_completing_sample():
    """A sender whose clock advances in 0.1 s steps (ten additions a second): the float sum
    ends a little short of the whole seconds."""
    t = parse_time(wire(0, 250_000))
    times = [t]
    for _ in range(20):
        for _ in range(10):
            t += 0.1
        times.append(t)
    assert times[10] - times[0] < DELAY                       # short, by float rounding
    assert times[10] - times[0] > DELAY - 1e-5
    evs = feed(RulesEngine(), [(t, HIGH) for t in times])
    r = raises(evs)
    assert len(r) == 1 and r[0][0] == "msg 10" and r[0][1].time == times[10]


def test_millisecond_wire_times_raise_at_the_completing_sample():
    times = [parse_time(wire(k, 37_000)) for k in range(20)]   # .037 every second
    evs = feed(RulesEngine(), [(t, HIGH) for t in times])
    r = raises(evs)
    assert len(r) == 1 and r[0][0] == "msg 10" and r[0][1].time == times[10]


def test_a_condition_that_ends_at_the_completing_sample_never_raises():
    """High from sample 0 to 9; the sample at 10 s (a hair short) is back in range: the
    condition did not hold at the end of the delay, with or without the clock."""
    for tick in (True, False):
        times = [parse_time(wire(k, 400)) for k in range(30)]
        times[10] = parse_time(wire(10, 100))
        samples = [(t, HIGH if k < 10 else CALM) for k, t in enumerate(times)]
        assert raises(feed(RulesEngine(), samples, tick=tick)) == []


def test_an_excursion_shorter_than_the_delay_never_raises():
    times = [parse_time(wire(k, 0)) for k in range(40)]
    # high for 9 samples (8 s), twice, with a calm sample between
    samples = [(t, HIGH if k < 9 or 10 <= k < 19 else CALM) for k, t in enumerate(times)]
    assert raises(feed(RulesEngine(), samples)) == []


def test_a_sample_short_by_more_than_the_tolerance_does_not_complete_the_delay():
    """2 ms short is a real shortfall: that sample does not raise; the delay matures at its
    due time, fired by the bed's next message (no clock tick in this stream)."""
    times = [parse_time(wire(k, 3000)) for k in range(20)]
    times[10] = parse_time(wire(10, 1000))
    assert times[10] - times[0] < DELAY - DELAY_TOLERANCE_S
    evs = feed(RulesEngine(), [(t, HIGH) for t in times], tick=False)
    r = raises(evs)
    assert len(r) == 1
    assert r[0][0] == "msg 11"
    assert r[0][1].time == times[0] + DELAY          # the due time, before sample 11's time


def test_another_parameters_message_matures_a_delay_in_event_time():
    """HR reported every 4 s (its own messages), SpO2 every second: the HR condition matures
    on the first message of the bed at or after its due time, whatever that message carries,
    before any clock tick."""
    eng = RulesEngine()
    t0 = parse_time(wire(0, 500_000))
    evs = []
    for k in range(20):
        t = t0 + k
        if k % 4 == 0:
            v = {"HR": 152.0}
            evs += [(f"hr {k}", e) for e in eng.on_values(BED, t, v, frozenset(v), {}, DEV)]
        v = {"SPO2": 97.0}
        evs += [(f"spo2 {k}", e) for e in eng.on_values(BED, t + 0.25, v, frozenset(v), {},
                                                        DEV)]
        evs += [(f"tick {k}", e) for e in eng.tick(t + 0.75)]
    r = raises(evs)
    assert len(r) == 1
    # due at t0 + 10: the SpO2 message at t0 + 9.25 is before it, the one at 10.25 after it;
    # no HR sample at 10 s (they come at 8 and 12 s), and the tick at 9.75 is too early
    assert r[0][0] == "spo2 10"
    assert r[0][1].time == t0 + DELAY


def test_clear_delay_also_ends_at_the_completing_sample():
    """The clear delay (5 s, back inside the limit less hysteresis) ends the condition at
    the sample that completes it, with microsecond stamps a hair short."""
    eng = RulesEngine()
    clear = eng.cfg.limits["HR"].clear_delay_s
    assert clear == 5.0                               # configs/rules.toml clear_delay_s
    times = [parse_time(wire(k, 400)) for k in range(30)]
    times[20] = parse_time(wire(20, 150))             # 5 s after sample 15, 250 us short
    samples = [(t, HIGH if k < 15 else CALM) for k, t in enumerate(times)]
    evs = feed(eng, samples)
    ended = [(s, e) for s, e in evs if e.rule == "HR_high" and e.transition == "condition_ended"]
    assert raises(evs)[0][0] == "msg 10"
    assert len(ended) == 1 and ended[0][0] == "msg 20" and ended[0][1].time == times[20]


def test_same_stream_same_events_whether_or_not_the_clock_ticks():
    """On a 1 Hz feed the raise and the end come from the messages themselves, so the
    clock's ticks change nothing (determinism between a replay and a live run)."""
    rng = random.Random(3)
    times = [parse_time(wire(k, rng.randrange(0, 450))) for k in range(60)]
    samples = [(t, HIGH if 5 <= k < 30 else CALM) for k, t in enumerate(times)]

    def rows(tick):
        return [(e.time, e.rule, e.transition) for _, e in feed(RulesEngine(), samples,
                                                                tick=tick)]
    with_ticks = rows(True)
    assert with_ticks == rows(False)
    assert ("raised" in [r[2] for r in with_ticks])


# --------------------------------------------------------------------------- replay


def test_replay_raises_at_the_completing_sample(tmp_path):
    """A recording (1 Hz, times on the wire to the microsecond, the tenth sample after the
    onset 300 us short of 10 s) replayed into SQLite: the stored raise is at that sample."""
    rng = random.Random(11)
    topic = "hemo/WARD9/bed-07"
    lines = [json.dumps({"rx": wire(0, 0), "topic": f"{topic}/admit",
                         "payload": {"v": 1, "time": wire(0, 0), "height_cm": 175,
                                     "weight_kg": 70}})]
    micros = {k: rng.randrange(350, 700) for k in range(1, 40)}
    onset, short = 12, 22
    micros[short] = micros[onset] - 300
    stamps = {}
    for k in range(1, 40):
        hr = 152 if onset <= k < 32 else 72
        stamps[k] = wire(k, micros[k])
        obs = [{"param": "HR", "value": hr, "unit": "/min"},
               {"param": "SPO2", "value": 97, "unit": "%"}]
        lines.append(json.dumps({"rx": wire(k, micros[k] + 4000), "topic": f"{topic}/obs",
                                 "payload": {"v": 1, "device": DEV, "seq": k,
                                             "time": stamps[k], "obs": obs}}))
    rec = tmp_path / "short.jsonl"
    rec.write_text("\n".join(lines) + "\n")
    url = f"sqlite:///{tmp_path / 'short.db'}"
    replay_file(rec, url)
    t_on, t_short = parse_time(stamps[onset]), parse_time(stamps[short])
    assert DELAY - DELAY_TOLERANCE_S <= t_short - t_on < DELAY
    eng = open_engine(url)
    try:
        a = TABLES["alarm_events"]
        with eng.connect() as c:
            got = c.execute(select(a.c.time, a.c.transition)
                            .where(a.c.rule == "HR_high").order_by(a.c.id)).all()
    finally:
        eng.dispose()
    raised = [t for t, tr in got if tr == "raised"]
    assert raised == [t_short]


def _lagging(high_s: int, lag: float):
    """1 Hz samples of one bed whose messages arrive ``lag`` s after their own time (a
    backlogged broker or network), HR high for ``high_s`` s from sample 2, then calm; the
    clock (arrival time) ticks every half second, in arrival order, as the live service's
    tick does. Returns [(source, event)]."""
    eng = RulesEngine()
    t0 = parse_time("2026-12-01T08:00:00Z")
    out = []
    for k in range(40):
        t = t0 + k
        v = HIGH if 2 <= k < 2 + high_s else CALM
        out += [(f"msg {k}", e) for e in eng.on_values(BED, t, v, frozenset(v), {}, DEV,
                                                        rx=t + lag)]
        for half in (0.0, 0.5):
            out += [(f"tick {k}", e) for e in eng.tick(t + lag + half)]
    return t0, out


def test_a_clock_ahead_of_the_beds_data_does_not_settle_its_delay():
    """Arrival 7 s behind the samples' own times: by the clock the 10 s delay of a 6 s HR
    excursion has run out before the sample that ends it has arrived. The delay is the
    condition holding for 10 s in the bed's own time (IEC 60601-1-8, from memory), so it
    must not raise; a 16 s excursion raises at the sample that completes 10 s."""
    _, short = _lagging(6, 7.0)
    assert raises(short) == []
    t0, long = _lagging(16, 7.0)
    got = raises(long)
    assert [src for src, _ in got] == ["msg 12"]            # onset at sample 2, + 10 s
    assert got[0][1].time == t0 + 12


def test_a_lagging_bed_gone_quiet_is_settled_by_the_clock():
    """A bed whose last sample is still in the condition, and then nothing: the clock settles
    the delay once the bed's own time would have reached it (due + its lag)."""
    eng = RulesEngine()
    t0 = parse_time("2026-12-01T08:00:00Z")
    lag = 3.0
    for k in range(5):                                      # HR high from sample 0 to 4
        eng.on_values(BED, t0 + k, HIGH, frozenset(HIGH), {}, DEV, rx=t0 + k + lag)
    assert raises([("t", e) for e in eng.tick(t0 + 10 + lag - 0.1)]) == []
    got = raises([("t", e) for e in eng.tick(t0 + 10 + lag + 0.1)])
    assert len(got) == 1 and got[0][1].time == t0 + 10.1    # the bed's clock: tick - lag
