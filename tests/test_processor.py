"""The core's rules of the wire format, one at a time, on hand-made messages."""

import json

import pytest

from hemostream.core.config import Config, UnitConfig
from hemostream.core.processor import Processor

T = 1796119200.0          # 2026-12-01T10:00:00Z


def iso(t):
    from datetime import datetime, timezone
    return datetime.fromtimestamp(t, timezone.utc).isoformat().replace("+00:00", "Z")


def obs(seq, t, items, device="gw-east-1"):
    return {"v": 1, "device": device, "seq": seq, "time": iso(t),
            "obs": [dict(zip(("param", "value", "unit"), i[:3]), **(i[3] if len(i) > 3 else {}))
                    for i in items]}


def derived_of(out, param):
    return [d for d in out.derived if d["param"] == param]


def test_oversized_payload_rejected_without_parsing():
    p = Processor()
    big = b'{"v": 1, "pad": "' + b"x" * (256 * 1024) + b'"}'
    p.feed("hemo/U1/b1/obs", big, T)
    out = p.drain()
    assert [r["category"] for r in out.rejected] == ["too_large"]
    assert len(out.rejected[0]["raw"]) == 64 * 1024          # first 64 KiB kept (wire format)
    assert out.rejected[0]["size"] == len(big)


def test_non_valid_status_is_stored_but_not_used():
    p = Processor()
    p.feed("hemo/U1/b1/obs", json.dumps(obs(1, T, [
        ("HR", 80, "/min"), ("ABP_SYS", 300, "mm[Hg]", {"status": "calibrating"}),
        ("ABP_DIA", 290, "mm[Hg]", {"status": "calibrating"})])), T + 0.1)
    out = p.drain()
    assert len(out.observations) == 3
    assert not derived_of(out, "SI") and not derived_of(out, "MAP")


def test_inputs_older_than_their_max_age_are_not_used():
    cfg = Config()
    age = cfg.derive.max_age_s["NIBP_SYS"]                   # minutes for the cuff
    p = Processor(cfg)
    p.feed("hemo/U1/b1/obs", json.dumps(obs(1, T, [
        ("NIBP_SYS", 120, "mm[Hg]"), ("NIBP_DIA", 80, "mm[Hg]"), ("HR", 60, "/min")])), T)
    p.feed("hemo/U1/b1/obs", json.dumps(obs(2, T + age - 1, [("HR", 66, "/min")])),
           T + age - 1)
    p.feed("hemo/U1/b1/obs", json.dumps(obs(3, T + age + 1, [("HR", 72, "/min")])),
           T + age + 1)
    si = derived_of(p.drain(), "SI")
    # SI = HR / SBP (Allgower and Burri): the cuff reading counts until it is too old
    assert [round(d["value"], 3) for d in si] == [0.5, 0.55]


def test_admit_gives_bsa_and_discharge_resets():
    p = Processor()
    p.feed("hemo/U1/b1/admit", {"v": 1, "time": iso(T), "height_cm": 180, "weight_kg": 80},
           T)
    p.feed("hemo/U1/b1/obs", json.dumps(obs(1, T + 1, [("HR", 80, "/min"),
                                                          ("CO", 5.0, "L/min")])), T + 1)
    out = p.drain()
    assert round(derived_of(out, "BSA")[0]["value"], 2) == 2.00   # [mosteller1987] worked example
    # CI = CO / BSA with the published 2.00 m2 for 180 cm, 80 kg: 5.0 / 2.00 = 2.5 L/min/m2
    assert derived_of(out, "CI")[0]["value"] == pytest.approx(5.0 / 2.00, abs=0.01)
    p.feed("hemo/U1/b1/admit", {"v": 1, "time": iso(T + 2), "discharged": True}, T + 2)
    p.feed("hemo/U1/b1/obs", json.dumps(obs(2, T + 3, [("HR", 80, "/min")])), T + 3)
    out = p.drain()
    assert out.admissions[0]["discharged"] is True
    assert not derived_of(out, "CI") and not derived_of(out, "SV")      # state was reset


def test_repeated_admit_and_note_are_duplicates():
    p = Processor()
    a = {"v": 1, "time": iso(T), "height_cm": 170, "weight_kg": 60}
    n = {"v": 1, "time": iso(T), "kind": "line_flush", "param": "ABP_SYS"}
    for _ in range(3):
        p.feed("hemo/U1/b1/admit", a, T)          # a retained admit comes again on reconnect
        p.feed("hemo/U1/b1/note", n, T)
    out = p.drain()
    assert len(out.admissions) == 1 and len(out.notes) == 1 and out.duplicates == 4


def test_units_not_served_are_rejected():
    cfg = Config(units=[UnitConfig(id="SDU4", beds=["bed-01"])])
    p = Processor(cfg)
    p.feed("hemo/ICU1/bed-01/obs", json.dumps(obs(1, T, [("HR", 80, "/min")])), T)
    p.feed("hemo/SDU4/bed-09/obs", json.dumps(obs(1, T, [("HR", 80, "/min")])), T)
    p.feed("hemo/SDU4/bed-01/obs", json.dumps(obs(1, T, [("HR", 80, "/min")])), T)
    out = p.drain()
    assert [r["category"] for r in out.rejected] == ["unit_not_served", "bed_not_configured"]
    assert len(out.messages) == 1


def test_unix_time_numbers_and_naive_times_are_refused():
    p = Processor()
    m = obs(1, T, [("HR", 80, "/min")])
    m["time"] = T
    p.feed("hemo/U1/b1/obs", json.dumps(m), T)
    m["time"] = "2026-12-01T10:00:00"
    p.feed("hemo/U1/b1/obs", json.dumps(m), T)
    out = p.drain()
    assert [r["category"] for r in out.rejected] == ["bad_field", "bad_field"]
    assert "RFC 3339" in out.rejected[0]["reason"]
    assert "timezone" in out.rejected[1]["reason"]


def test_arrival_time_as_int_float_or_aware_datetime():
    # the core never raises: int epoch seconds (e.g. time.time_ns() // 10**9) are accepted
    from datetime import datetime, timezone
    for i, rx in enumerate([int(T), T, datetime.fromtimestamp(T, timezone.utc)]):
        p = Processor()
        p.feed("hemo/U1/b1/obs", obs(1, T, [("HR", 70, "/min")]), rx)
        out = p.drain()
        assert not out.rejected, rx
        assert out.messages[0]["rx"] == T and isinstance(out.messages[0]["rx"], float)


def test_unusable_arrival_time_is_a_reject():
    from datetime import datetime
    for rx in ["2026-12-01T10:00:00Z", None, True, float("nan"), datetime(2026, 12, 1, 10)]:
        p = Processor()
        p.feed("hemo/U1/b1/obs", obs(1, T, [("HR", 70, "/min")]), rx)
        out = p.drain()
        assert [r["category"] for r in out.rejected] == ["bad_arrival_time"], rx
        assert "arrival time" in out.rejected[0]["reason"]
        assert not out.messages and not out.observations
