"""Files of HL7 v2 messages: reading (CR, LF, CRLF, MLLP frame bytes) and the PCD-01 writer.

The check of record: a file of PCD-01 messages made from the simulator's ward stream replays
into the same observation rows (and derived values) as the same messages as JSON through
the MQTT recording path.
"""

from __future__ import annotations

import json
import sqlite3

import pytest

from hemostream.intake.hl7.config import Hl7Config
from hemostream.intake.hl7.files import (iter_messages, pcd01_stream, replay_hl7_file,
                                         write_hl7_file)
from hemostream.intake.hl7.mapping import map_message
from hemostream.replay import replay_file
from hemostream.store import derived_rows, observation_rows
from simulators.ward import dumps, generate

from test_hl7_mapping import BPM, CFG, nm, oru


@pytest.mark.parametrize("ending", [b"\r", b"\n", b"\r\n"])
def test_line_endings_and_mllp_frames(ending):
    a = oru([nm(2, "147842^MDC_ECG_HEART_RATE^MDC", "70", BPM)], control="1")
    b = oru([nm(2, "147842^MDC_ECG_HEART_RATE^MDC", "71", BPM)], control="2")
    plain = (a + b).encode().replace(b"\r", ending)
    framed = b"\x0b" + a.encode().replace(b"\r", ending) + b"\x1c\r" + \
        b"\x0b" + b.encode() + b"\x1c\r"
    batch = b"FHS|^~\\&\rBHS|^~\\&\r" + a.encode() + b.encode() + b"BTS|2\rFTS|1\r"
    for data in (plain, framed, batch):
        got = list(iter_messages(data))
        assert [m for _, m in got] == [a.encode(), b.encode()]
        assert [map_message(m, CFG).control_id for _, m in got] == ["1", "2"]


def test_text_before_the_first_msh_is_kept_as_its_own_message():
    a = oru([nm(2, "147842^MDC_ECG_HEART_RATE^MDC", "70", BPM)])
    got = [m for _, m in iter_messages(b"PID|1\nOBX|1\n" + a.encode())]
    assert got == [b"PID|1\rOBX|1\r", a.encode()]


def _obs_only(lines):
    """The stream as the PCD-01 writer carries it: obs lines, statuses with an OBX-11 form."""
    out = []
    for line in lines:
        if not line["topic"].endswith("/obs"):
            continue
        p = dict(line["payload"])
        p["obs"] = [o for o in p["obs"] if o.get("status", "valid") in
                    ("valid", "questionable", "invalid")]
        if p["obs"]:
            out.append({**line, "payload": p})
    return out


def _rows(db):
    from hemostream.store import iter_messages
    con = sqlite3.connect(db)
    try:
        beds = dict((i, (u, b)) for i, u, b in con.execute("SELECT id, unit, bed FROM beds"))
    finally:
        con.close()
    msgs = {m["id"]: m for m in iter_messages(db_engine(db))}
    obs = sorted((*beds[o["bed_id"]], o["param"], o["time"], o["value"], o["unit"],
                  o["raw_value"], o["raw_unit"], o["status"], o["late"],
                  msgs[o["message_id"]]["device"], msgs[o["message_id"]]["seq"])
                 for o in observation_rows(db))
    derived = sorted((*beds[d["bed_id"]], d["param"], d["time"], d["value"])
                     for d in derived_rows(db))
    return obs, derived


def db_engine(db):
    from sqlalchemy import create_engine
    return create_engine(f"sqlite:///{db}")


def test_pcd01_file_replays_to_the_same_rows_as_json(tmp_path):
    lines = _obs_only(generate("stable", beds=3, duration_s=240, seed=11))
    assert len(lines) > 100
    units = {o["unit"] for line in lines for o in line["payload"]["obs"]}
    assert {"mm[Hg]", "/min", "%"} <= units
    jsonl = tmp_path / "ward.jsonl"
    jsonl.write_text("".join(dumps(line) + "\n" for line in lines))
    hl7_path = tmp_path / "ward.hl7"
    hcfg = Hl7Config(locations_from_components=True)
    skipped: dict[str, int] = {}
    n = write_hl7_file(lines, hl7_path, hcfg)
    list(pcd01_stream(lines, hcfg, skipped))
    assert n == len(lines) and skipped == {}
    db_json, db_hl7 = tmp_path / "json.db", tmp_path / "hl7.db"
    rj = replay_file(jsonl, f"sqlite:///{db_json}")
    rh = replay_hl7_file(hl7_path, f"sqlite:///{db_hl7}", hl7_config=hcfg)
    assert rh.answers == {"AA": n, "AE": 0, "AR": 0}
    assert rj.rejected == {} and rh.rejected == {}
    obs_j, der_j = _rows(db_json)
    obs_h, der_h = _rows(db_hl7)
    assert len(obs_j) == rj.observations > 0
    assert obs_h == obs_j
    assert der_h == der_j and len(der_j) > 0


def test_writer_uses_the_location_map_and_mdc_terms():
    hcfg = Hl7Config(locations={"NW3^R12^B1": {"unit": "NW3", "bed": "bed-01"}})
    line = {"rx": "2026-12-01T08:15:00.310Z", "topic": "hemo/NW3/bed-01/obs",
            "payload": {"v": 1, "device": "gw-nw3", "seq": 7, "time": "2026-12-01T08:15:00.250Z",
                        "obs": [{"param": "RR", "value": 16, "unit": "/min"},
                                {"param": "CVP", "value": 11.5, "unit": "cm[H2O]",
                                 "status": "questionable"}]}}
    (msg,) = list(pcd01_stream([line], hcfg))
    segs = msg.split("\r")
    assert segs[0].split("|")[8:12] == ["ORU^R01^ORU_R01", "7", "P", "2.6"]
    assert segs[2] == "PV1|1|I|NW3^R12^B1"
    assert "151562^MDC_RESP_RATE^MDC" in segs[4] and "264928^MDC_DIM_RESP_PER_MIN^MDC" in segs[4]
    assert "|11.5|266048^MDC_DIM_CM_H2O^MDC|||||P|" in segs[5]
    m = map_message(msg, hcfg)
    (payload, _), = m.messages
    assert json.loads(json.dumps(payload))["obs"][1] == {
        "param": "CVP", "value": 11.5, "unit": "cm[H2O]", "status": "questionable",
        "time": "2026-12-01T08:15:00.250000Z"}


def test_simulated_ward_published_over_mllp(tmp_path):
    """``simulate --publish-hl7``: the ward stream as PCD-01 over MLLP into a listener."""
    from hemostream.intake.hl7.mllp import send_messages
    from test_hl7_mllp import count, run_server

    lines = _obs_only(generate("stable", beds=2, duration_s=30, seed=5))
    hcfg = Hl7Config(locations_from_components=True)
    msgs = list(pcd01_stream(lines, hcfg))
    db = tmp_path / "s.db"

    async def body(port):
        return await send_messages("127.0.0.1", port, msgs)

    assert run_server(f"sqlite:///{db}", hcfg, body) == {"AA": len(msgs)}
    n_obs = sum(len(line["payload"]["obs"]) for line in lines)
    assert len(observation_rows(db)) == n_obs


def test_cli_pieces_replay_write_publish(tmp_path, capsys):
    """The functions the hemostream commands call: replay FILE.hl7, simulate --format hl7,
    simulate --publish-hl7."""
    from hemostream.intake.hl7 import cli
    from test_hl7_mllp import count, run_server

    lines = _obs_only(generate("stable", beds=1, duration_s=20, seed=2))
    out = tmp_path / "sim.hl7"
    assert cli.write_command(lines, str(out)) == len(lines)
    assert cli.looks_like_hl7(out) and not cli.looks_like_hl7(__file__)
    conf = tmp_path / "c.toml"
    conf.write_text("[intake.hl7]\nlocations_from_components = true\n")
    db = tmp_path / "r.db"
    assert cli.replay_command(out, f"sqlite:///{db}", str(conf)) == 0
    text = capsys.readouterr().out
    assert f"AA {len(lines)}  AE 0  AR 0" in text
    n_obs = sum(len(line["payload"]["obs"]) for line in lines)
    assert len(observation_rows(db)) == n_obs
    conf.write_text("[intake.hl7]\nno_such_key = 1\n")
    assert cli.replay_command(out, f"sqlite:///{db}", str(conf)) == 2

    db2 = tmp_path / "p.db"

    async def body(port):
        import asyncio
        return await asyncio.to_thread(cli.publisher, iter(lines), f"127.0.0.1:{port}", 0)

    assert run_server(f"sqlite:///{db2}", Hl7Config(locations_from_components=True),
                      body) == 0
    assert len(observation_rows(db2)) == n_obs
