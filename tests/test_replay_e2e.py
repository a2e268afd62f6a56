"""End to end: a hand-written recording replayed into SQLite, checked from first principles.

The expected derived values are recomputed here from the published formulas, with unit
conversions taken from pint, not from hemostream's own code.
"""

import json
import math
from pathlib import Path

import pint
import pytest
from sqlalchemy import select

from hemostream.replay import replay_file
from hemostream.store import TABLES, open_engine
from hemostream import query

ureg = pint.UnitRegistry()
K_RES = ureg.Quantity(1, "mmHg*min/L").to("dyn*s/cm**5").magnitude   # pint; about 79.99
K_SW = ureg.Quantity(1, "mmHg*mL").to("gram_force*m").magnitude      # pint; about 0.0136


def mmhg(v, unit):
    return ureg.Quantity(v, unit).to("mmHg").magnitude


def first_derived(engine, bed):
    rows = list(query.rows(engine, "derived", bed=bed))
    out = {}
    for r in rows:
        out.setdefault(r["param"], r)
    return out


def test_handmade_recording(handmade, db_url):
    s = replay_file(handmade, db_url)
    # 21 lines: 8 stored messages, 12 whole-message rejects, 1 duplicate (wire-format identity)
    assert s.lines == 21
    assert s.messages == 8
    assert s.duplicates == 1
    assert s.rejected_total == 16   # 12 messages + 4 single observations inside stored ones
    assert s.rejected == {"bad_field": 2, "bad_topic": 2, "bad_unit": 1, "bad_version": 1,
                          "clock_skew": 1, "implausible": 2, "invalid_json": 1,
                          "missing_field": 1, "unknown_param": 1, "unreadable": 4}
    engine = open_engine(db_url, create=False)

    # bed-A1: arterial line, CVP in cm[H2O], continuous CO; Mosteller BSA from 170 cm, 70 kg
    d = first_derived(engine, "bed-A1")
    bsa = math.sqrt(170 * 70 / 3600)               # [mosteller1987], the published formula
    assert round(bsa, 2) == 1.82                   # BSA tables for 170 cm, 70 kg (from memory)
    cvp = mmhg(10.0, "cmH2O")
    map_ = 80 + (120 - 80) / 3                                     # common practice
    assert d["BSA"]["value"] == pytest.approx(bsa, rel=1e-9)
    assert d["MAP"]["value"] == pytest.approx(map_)
    assert d["PP"]["value"] == pytest.approx(40)
    assert d["SV"]["value"] == pytest.approx(5.0 * 1000 / 80)      # CO = HR x SV
    assert d["CI"]["value"] == pytest.approx(5.0 / bsa)
    assert d["SVI"]["value"] == pytest.approx(62.5 / bsa)
    assert d["SVR"]["value"] == pytest.approx(K_RES * (map_ - cvp) / 5.0)
    assert d["SVRI"]["value"] == pytest.approx(K_RES * (map_ - cvp) / (5.0 / bsa))
    assert d["SI"]["value"] == pytest.approx(80 / 120)              # Allgower and Burri
    assert d["MSI"]["value"] == pytest.approx(80 / map_)
    assert "PVR" not in d and "LVSWI" not in d                      # no PA catheter
    # provenance: which inputs, measured when
    assert ["CVP", "2026-12-01T10:00:00.000Z"] in d["SVR"]["inputs"]
    temp = [r for r in query.rows(engine, "observations", bed="bed-A1", param="TEMP")]
    assert temp[0]["value"] == pytest.approx(37.0) and temp[0]["raw_unit"] == "[degF]"

    # bed-A2: cuff only, in kPa, measured 90 s before the message
    d = first_derived(engine, "bed-A2")
    sbp, dbp = mmhg(16.0, "kPa"), mmhg(10.0, "kPa")
    assert d["MAP"]["value"] == pytest.approx(dbp + (sbp - dbp) / 3)
    assert d["SI"]["value"] == pytest.approx(90 / sbp)
    assert ["NIBP_SYS", "2026-12-01T09:58:30.000Z"] in d["SI"]["inputs"]
    assert "CI" not in d and "SVR" not in d                         # no CO, no admission

    # bed-A3: measured mean, PA catheter with wedge, thermodilution CO in mL/min
    d = first_derived(engine, "bed-A3")
    co, hr, bsa = 4.8, 75, 2.00      # [mosteller1987] worked example: 180 cm, 80 kg -> 2.00 m2
    pam = mmhg(3.0, "kPa")
    sv = co * 1000 / hr
    svi = sv / bsa
    assert "MAP" not in d                                           # measured, not derived
    assert d["SVR"]["value"] == pytest.approx(K_RES * (92 - 8) / co)
    assert d["PVR"]["value"] == pytest.approx(K_RES * (pam - 12) / co)
    assert d["LVSWI"]["value"] == pytest.approx(svi * (92 - 12) * K_SW)
    assert d["RVSWI"]["value"] == pytest.approx(svi * (pam - 8) * K_SW)
    assert d["SI"]["value"] == pytest.approx(75 / 130)

    # every reject has a reason a person can act on
    rej = list(query.rows(engine, "rejected"))
    assert len(rej) == 16 and all(r["reason"] for r in rej)
    reasons = " | ".join(r["reason"] for r in rej)
    assert "obs[3].unit: 'mmHg' is not a pressure unit; expected one of mm[Hg], kPa, " \
           "cm[H2O]" in reasons
    assert "obs[1].param: unknown parameter 'ETCO2'" in reasons
    assert "obs[0].value: Input should be a valid number" in reasons
    assert "device: Field required" in reasons
    assert "ahead of arrival" in reasons
    assert "HR 900 /min is outside the plausible range" in reasons
    assert "fluid_bolus note needs volume_ml" in reasons
    # the invalid-status SpO2 is stored as received but does not count as current
    spo2 = list(query.rows(engine, "observations", bed="bed-A2", param="SPO2"))
    assert [r["status"] for r in spo2] == ["valid", "invalid"]
    notes = list(query.rows(engine, "notes"))
    assert len(notes) == 1 and notes[0]["volume_ml"] == 250
    engine.dispose()


def _dump(url):
    engine = open_engine(url, create=False)
    with engine.connect() as c:
        out = {n: [tuple(r) for r in c.execute(select(t).order_by(*t.primary_key.columns))]
               for n, t in TABLES.items()}
    engine.dispose()
    return out


def test_replay_is_deterministic(tmp_path):
    rec = Path(__file__).resolve().parent.parent / "simulators" / "recordings" / "example-ward.jsonl"
    a, b = f"sqlite:///{tmp_path/'a.db'}", f"sqlite:///{tmp_path/'b.db'}"
    replay_file(rec, a)
    replay_file(rec, b)
    assert _dump(a) == _dump(b)


def test_duplicates_dropped_across_restarts(handmade, db_url):
    first = replay_file(handmade, db_url)
    again = replay_file(handmade, db_url)        # a second process over the same database
    assert again.messages == 0
    assert again.duplicates == first.messages + first.duplicates
    engine = open_engine(db_url, create=False)
    with engine.connect() as c:
        n = len(c.execute(select(TABLES["messages"])).all())
    assert n == first.messages


def _line(rx, seq, t, hr, device="gw-south-1"):
    return json.dumps({"rx": rx, "topic": "hemo/SDU9/bed-B1/obs", "payload": {
        "v": 1, "device": device, "seq": seq, "time": t,
        "obs": [{"param": "HR", "value": hr, "unit": "/min"}]}})


def test_out_of_order_and_late(tmp_path, db_url):
    lines = [
        _line("2026-12-01T10:01:00.1Z", 10, "2026-12-01T10:01:00Z", 70),
        _line("2026-12-01T10:01:00.2Z", 9, "2026-12-01T10:00:58Z", 71),   # out of order
        _line("2026-12-01T10:01:01.1Z", 11, "2026-12-01T10:01:01Z", 72),
        _line("2026-12-01T10:01:02.1Z", 3, "2026-12-01T09:59:00Z", 99),   # 2 min old: late
        _line("2026-12-01T10:01:03.1Z", 0, "2026-12-01T10:01:03Z", 73),   # gateway restarted
    ]
    p = tmp_path / "r.jsonl"
    p.write_text("\n".join(lines) + "\n")
    s = replay_file(p, db_url)
    assert s.messages == 5 and s.late == 1 and s.duplicates == 0
    engine = open_engine(db_url, create=False)
    obs = list(query.rows(engine, "observations", param="HR"))
    assert [(o["value"], o["late"]) for o in obs] == [   # ordered by measurement time
        (99, True), (71, False), (70, False), (72, False), (73, False)]
    # the late value is kept for audit but never became the current HR
    msgs = engine.connect().execute(select(TABLES["messages"].c.late)).scalars().all()
    assert sum(msgs) == 1


def test_replay_bad_database_url_is_clear_error(handmade, tmp_path):
    from hemostream.store import StoreError
    with pytest.raises(StoreError, match="cannot open database"):
        replay_file(handmade, f"sqlite:///{tmp_path}/no/such/dir/x.db")


def test_reject_inside_a_good_line_keeps_the_payload_bytes(tmp_path, db_url):
    line = _line("2026-12-01T10:01:00.1Z", 10, "2026-12-01T10:01:00Z", 900)   # HR 900
    p = tmp_path / "r.jsonl"
    p.write_text(line + "\n")
    replay_file(p, db_url)
    rej = list(query.rows(open_engine(db_url, create=False), "rejected"))
    assert len(rej) == 1 and rej[0]["category"] == "implausible"
    assert json.loads(rej[0]["raw"]) == json.loads(line)["payload"]


def test_configuration_in_force_is_stored_with_the_data(handmade, db_url):
    import hashlib

    from hemostream.core.config import Config
    from hemostream.store import config_in_force, config_snapshots

    replay_file(handmade, db_url)
    replay_file(handmade, db_url)                 # the same configuration: no second row
    engine = open_engine(db_url, create=False)
    snaps = config_snapshots(engine)
    assert len(snaps) == 1 and snaps[0]["time"] == 0.0      # empty database: from the start
    with engine.connect() as c:
        stored = c.execute(select(TABLES["config_snapshots"])).one()
    # sha256 of the stored canonical JSON (hashlib), and the JSON is the whole configuration
    assert stored.sha256 == hashlib.sha256(stored.config.encode()).hexdigest()
    assert Config.model_validate(json.loads(stored.config)) == Config()

    changed = Config.model_validate({"derive": {"bsa_formula": "dubois"}})
    replay_file(handmade, db_url, changed)
    snaps = config_snapshots(engine)
    with engine.connect() as c:
        newest_rx = max(r.rx for r in c.execute(select(TABLES["messages"].c.rx)))
    assert [s["config"]["derive"]["bsa_formula"] for s in snaps] == ["mosteller", "dubois"]
    assert snaps[1]["time"] == newest_rx          # in force for what came after
    assert config_in_force(engine, newest_rx - 1)["derive"]["bsa_formula"] == "mosteller"
    assert config_in_force(engine, newest_rx + 1)["derive"]["bsa_formula"] == "dubois"
    listed = list(query.rows(engine, "configs"))
    assert [r["sha256"] for r in listed] == [s["sha256"] for s in snaps]
    assert listed[0]["time"] == "1970-01-01T00:00:00.000Z"
