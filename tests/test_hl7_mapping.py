"""HL7 v2 ORU^R01 (IHE PCD-01) intake: mapping, stored values and rejects.

Messages are written by hand to the HL7 v2.6 ORU^R01 structure (MSH, PID, PV1, OBR, OBX;
field positions from the HL7 v2.6 standard chapter 7 and IHE PCD TF-2 for PCD-01). The ward
(North Wing step-down, unit NW3), devices and patient are invented.
"""

from __future__ import annotations

import sqlite3
from datetime import datetime, timezone

import pint
import pytest

from hemostream.core.processor import Processor
from hemostream.intake.hl7.config import Hl7Config
from hemostream.intake.hl7.files import replay_hl7_file
from hemostream.intake.hl7.mapping import (Hl7Error, control_id_to_seq, feed_hl7, map_message,
                                           parse_dtm)
from hemostream.intake.hl7.terms import load_terms
from hemostream.store import derived_rows, observation_rows

ureg = pint.UnitRegistry()

CFG = Hl7Config(locations={"NW3^R12^B1": {"unit": "NW3", "bed": "bed-01"},
                           "NW3^R12^B2": {"unit": "NW3", "bed": "bed-02"}})

T0 = "20261201081500+0000"
T0_EPOCH = datetime(2026, 12, 1, 8, 15, tzinfo=timezone.utc).timestamp()


def oru(obx: list[str], *, control="100017", loc="NW3^R12^B1", msh9="ORU^R01^ORU_R01",
        msh7="20261201081501.250+0000", obr7=T0, pid="PID|1||NW-884213^^^NWH^MR||Quill^Ada"
        "^^^^^L||19580304|F", extra: list[str] = ()) -> str:
    segs = [f"MSH|^~\\&|GW-NW3^0012A1FFFE00AB01^EUI-64|NORTHWING|hemostream||{msh7}||{msh9}"
            f"|{control}|P|2.6",
            pid,
            f"PV1|1|I|{loc}||||^Rowan^Bea",
            f"OBR|1|||182777000^monitoring of patient^SCT|||{obr7}",
            "OBX|1||69965^MDC_DEV_MON_PHYSIO_MULTI_PARAM_MDS^MDC|1.0.0.0|||||||X",
            *extra, *obx]
    return "\r".join(segs) + "\r"


def nm(i: int, term: str, value: str, unit: str, *, status="F", t=T0,
       dev="mon-nw3-01^^0012A1FFFE00AB11^EUI-64") -> str:
    return f"OBX|{i}|NM|{term}|1.1.1.{i}|{value}|{unit}|||||{status}|||{t}||||{dev}"


MMHG = "266016^MDC_DIM_MMHG^MDC"
CMH2O = "266048^MDC_DIM_CM_H2O^MDC"
BPM = "264864^MDC_DIM_BEAT_PER_MIN^MDC"
LPM = "265216^MDC_DIM_L_PER_MIN^MDC"


def replay(tmp_path, messages: list[str], cfg: Hl7Config = CFG):
    path = tmp_path / "feed.hl7"
    path.write_bytes("".join(messages).encode())
    db = tmp_path / "store.db"
    summary = replay_hl7_file(path, f"sqlite:///{db}", hl7_config=cfg)
    return summary, sqlite3.connect(db)


def rejected(con) -> list[tuple]:
    return con.execute("SELECT category, reason, device, seq, raw FROM rejected "
                       "ORDER BY id").fetchall()


# --------------------------------------------------------------------------- values


def test_mixed_units_stored_converted_and_derived(tmp_path):
    msg = oru([
        nm(2, "147842^MDC_ECG_HEART_RATE^MDC", "88", BPM),
        nm(3, "150037^MDC_PRESS_BLD_ART_ABP_SYS^MDC", "118", MMHG),      # MDC mm[Hg] term
        nm(4, "150038^MDC_PRESS_BLD_ART_ABP_DIA^MDC", "8.8", "kPa^kPa^UCUM"),  # UCUM code
        nm(5, "150087^MDC_PRESS_BLD_VEN_CENT_MEAN^MDC", "13", CMH2O),
        nm(6, "150276", "5.1", LPM),                                   # numeric code alone
    ])
    summary, con = replay(tmp_path, [msg])
    assert summary.answers == {"AA": 1, "AE": 0, "AR": 0}
    rows = {r["param"]: (r["value"], r["unit"], r["raw_value"], r["raw_unit"], r["status"],
                         r["time"]) for r in observation_rows(tmp_path / "store.db")}
    assert set(rows) == {"HR", "ABP_SYS", "ABP_DIA", "CVP", "CO"}
    dia = ureg.Quantity(8.8, "kPa").to("mmHg").magnitude          # source: pint
    cvp = ureg.Quantity(13, "cmH2O").to("mmHg").magnitude          # source: pint
    assert rows["ABP_DIA"][:4] == (pytest.approx(dia, rel=1e-5), "mm[Hg]", 8.8, "kPa")
    assert rows["CVP"][:4] == (pytest.approx(cvp, rel=1e-5), "mm[Hg]", 13.0, "cm[H2O]")
    assert rows["ABP_SYS"][:4] == (118.0, "mm[Hg]", 118.0, "mm[Hg]")
    assert all(r[4] == "valid" and r[5] == T0_EPOCH for r in rows.values())
    derived = {r["param"]: r["value"] for r in derived_rows(tmp_path / "store.db")}
    # MAP = DIA + (SYS - DIA) / 3 (common practice, estimated mean pressure)
    map_ = dia + (118 - dia) / 3
    assert derived["MAP"] == pytest.approx(map_, rel=1e-5)
    # SV = CO / HR; SVR = (MAP - CVP) / CO in dyn.s/cm5 (Ohm's law of flow; units by pint)
    assert derived["SV"] == pytest.approx(
        ureg.Quantity(5.1 / 88, "L").to("mL").magnitude, rel=1e-6)
    svr = ureg.Quantity((map_ - cvp) / 5.1, "mmHg*min/L").to("dyn*s/cm**5").magnitude
    assert derived["SVR"] == pytest.approx(svr, rel=1e-4)
    msg_row = con.execute("SELECT topic, device, seq, time, n_obs FROM messages").fetchall()
    assert msg_row == [("hemo/NW3/bed-01/obs", "mon-nw3-01", 100017, T0_EPOCH, 5)]


def test_device_from_obx18_else_msh3_and_identity_dedup(tmp_path):
    a = nm(2, "147842^MDC_ECG_HEART_RATE^MDC", "70", BPM)
    b = nm(3, "150456^MDC_PULS_OXIM_SAT_O2^MDC", "97", "262688^MDC_DIM_PERCENT^MDC", dev="")
    msg = oru([a, b])
    summary, con = replay(tmp_path, [msg, msg])        # the resend is a duplicate
    assert summary.answers["AA"] == 2 and summary.duplicates == 2
    rows = con.execute("SELECT device, seq, n_obs FROM messages ORDER BY id").fetchall()
    assert rows == [("mon-nw3-01", 100017, 1), ("GW-NW3", 100017, 1)]
    assert len(observation_rows(tmp_path / "store.db")) == 2


def test_status_time_fallbacks_and_structure_rows():
    cfg = CFG
    msg = oru([nm(2, "150021^MDC_PRESS_BLD_NONINV_SYS^MDC", "131", MMHG, status="P",
                  t="20261201081200+0000"),
               nm(3, "150022^MDC_PRESS_BLD_NONINV_DIA^MDC", "77", MMHG, status="X", t=""),
               nm(4, "151562^MDC_RESP_RATE^MDC", "18", "264928^MDC_DIM_RESP_PER_MIN^MDC",
                  status="R")])
    m = map_message(msg, cfg)
    assert m.skipped_structure == 1 and not m.rejects
    (payload, setids), = m.messages
    assert setids == ["2", "3", "4"]
    o = payload["obs"]
    assert (o[0]["status"], o[0]["time"]) == ("questionable", "2026-12-01T08:12:00.000000Z")
    assert (o[1]["status"], o[1]["time"]) == ("invalid", "2026-12-01T08:15:00.000000Z")
    assert "status" not in o[2]          # R: how devices send live values -> valid
    assert payload["time"] == "2026-12-01T08:15:00.000000Z"      # OBR-7


def test_training_processing_id_marks_values_test():
    msg = oru([nm(2, "147842^MDC_ECG_HEART_RATE^MDC", "70", BPM)]).replace("|P|2.6", "|T|2.6")
    (payload, _), = map_message(msg, CFG).messages
    assert payload["obs"][0]["status"] == "test"


def test_control_id_mapping():
    assert control_id_to_seq("42") == 42
    assert control_id_to_seq("0042") == 42
    a, b = control_id_to_seq("NW3-000042"), control_id_to_seq("NW3-000043")
    assert a != b and a >= 2 ** 62 and b < 2 ** 63        # fits the BIGINT seq column
    assert control_id_to_seq(str(2 ** 62)) >= 2 ** 62      # too big for the number range


def test_hl7_times():
    # HL7 v2.6 DTM: YYYY[MM[DD[HH[MM[SS[.S[S[S[S]]]]]]]]][+/-ZZZZ]
    assert parse_dtm("202612010815-0500").isoformat() == "2026-12-01T08:15:00-05:00"
    assert parse_dtm("20261201081500.1234+0000").microsecond == 123400
    assert parse_dtm("202612010815", "+0100").isoformat() == "2026-12-01T08:15:00+01:00"
    for bad in ("20261301081500+0000", "2026120108", "20261201081500", "2026-12-01T08:15Z",
                "20261231246000+0000"):
        with pytest.raises(ValueError):
            parse_dtm(bad)


# --------------------------------------------------------------------------- rejects

GOOD = nm(2, "147842^MDC_ECG_HEART_RATE^MDC", "70", BPM)


@pytest.mark.parametrize("text, code, category, words", [
    ("PID|1||X\rPV1|1|I|NW3^R12^B1\r", "AR", "unreadable", "no MSH segment"),
    ("", "AR", "unreadable", "no MSH segment"),
    ("MSH", "AR", "unreadable", "cannot be parsed"),
    (oru([GOOD], msh9="ADT^A01^ADT_A01"), "AR", "unsupported_message",
     "MSH-9: message type 'ADT^A01' is not ORU^R01"),
    (oru([GOOD], control=""), "AR", "missing_field", "MSH-10"),
    (oru([GOOD], loc="SOUTH^1^9"), "AE", "unknown_location",
     "PV1-3: location 'SOUTH^1^9' is not in [intake.hl7.locations]"),
    (oru([GOOD], msh7="20261201"), "AE", "bad_field", "MSH-7"),
    (oru([GOOD], obr7="2026120108150+0000"), "AE", "bad_field", "OBR-7"),
    (oru([]), "AE", "missing_field", "no OBX segment with a value"),
])
def test_whole_message_rejects(text, code, category, words):
    proc = Processor()
    oc = feed_hl7(proc, text.encode(), T0_EPOCH + 2, CFG)
    assert (oc.code, oc.category) == (code, category)
    assert words in oc.text
    (row,) = proc.drain().rejected
    assert row["category"] == category and words in row["reason"]


@pytest.mark.parametrize("obx, category, words", [
    (nm(2, "147842^MDC_ECG_HEART_RATE^MDC", "7O", BPM), "bad_field",
     "OBX 2: OBX-5 value '7O' is not an HL7 NM number"),
    (nm(2, "147842^MDC_ECG_HEART_RATE^MDC", "1e2", BPM), "bad_field", "not an HL7 NM"),
    (nm(2, "188888^MDC_PRESS_BLD_NOT_A_TERM^MDC", "12", MMHG), "unknown_param",
     "OBX 2: unknown MDC term 188888^MDC_PRESS_BLD_NOT_A_TERM"),
    (nm(2, "150037^MDC_ECG_HEART_RATE^MDC", "12", MMHG), "unknown_param", "disagree"),
    (nm(2, "150037^MDC_PRESS_BLD_ART_ABP_SYS^MDC", "120", "262999^MDC_DIM_NOPE^MDC"),
     "bad_unit", "OBX 2: unknown MDC unit term 262999^MDC_DIM_NOPE"),
    (nm(2, "150037^MDC_PRESS_BLD_ART_ABP_SYS^MDC", "120", "mmHg^mmHg^UCUM"), "bad_unit",
     "OBX 2: obs[0].unit: 'mmHg' is not a pressure unit"),
    (nm(2, "150037^MDC_PRESS_BLD_ART_ABP_SYS^MDC", "120", MMHG, t="20261201251500+0000"),
     "bad_field", "OBX 2: OBX-14"),
    (nm(2, "150037^MDC_PRESS_BLD_ART_ABP_SYS^MDC", "120", MMHG, t="20261201081500"),
     "bad_field", "no UTC offset"),
    (nm(2, "150037^MDC_PRESS_BLD_ART_ABP_SYS^MDC", "120", MMHG, status="Q"), "bad_field",
     "OBX-11 result status 'Q'"),
    (nm(2, "150037^MDC_PRESS_BLD_ART_ABP_SYS^MDC", "120", MMHG, status=""), "missing_field",
     "OBX-11"),
    (nm(2, "150037^MDC_PRESS_BLD_ART_ABP_SYS^MDC", "120", ""), "missing_field", "OBX-6"),
    (nm(2, "150037^MDC_PRESS_BLD_ART_ABP_SYS^MDC", "400", MMHG), "implausible",
     "OBX 2: obs[0].value: ABP_SYS 400"),
    ("OBX|2|ST|150037^MDC_PRESS_BLD_ART_ABP_SYS^MDC|1.1.1.2|high|||||F", "bad_field",
     "OBX 2: OBX-2 value type 'ST' is not NM"),
])
def test_observation_rejects_keep_the_rest(tmp_path, obx, category, words):
    ok = nm(9, "150456^MDC_PULS_OXIM_SAT_O2^MDC", "96", "262688^MDC_DIM_PERCENT^MDC")
    summary, con = replay(tmp_path, [oru([obx, ok])])
    assert summary.answers == {"AA": 0, "AE": 1, "AR": 0}
    (cat, reason, device, seq, raw), = rejected(con)
    assert cat == category and words in reason, reason
    assert seq == 100017
    assert [(r["param"], r["value"]) for r in observation_rows(tmp_path / "store.db")] == [
        ("SPO2", 96.0)]


def test_unparseable_file_content_is_a_reject(tmp_path):
    summary, con = replay(tmp_path, ["this is not HL7\n", oru([GOOD])])
    assert summary.answers == {"AA": 1, "AE": 0, "AR": 1}
    (cat, reason, *_), = rejected(con)
    assert cat == "unreadable" and "no MSH segment" in reason


def test_locations_from_components():
    cfg = Hl7Config(locations_from_components=True)
    m = map_message(oru([GOOD], loc="ICU2^^bed-7"), cfg)
    assert m.topic == "hemo/ICU2/bed-7/obs"
    with pytest.raises(Hl7Error) as e:
        map_message(oru([GOOD], loc="ICU 2^^bed 7"), cfg)
    assert e.value.category == "unknown_location"


# --------------------------------------------------------------------------- privacy


def test_patient_identifiers_not_stored_by_default(tmp_path, caplog):
    caplog.set_level("DEBUG")
    bad = nm(2, "188888^MDC_NOT_A_TERM^MDC", "1", MMHG)
    _, con = replay(tmp_path, [oru([bad]), oru([GOOD], loc="SOUTH^1^9", control="7")])
    raws = [r[4] for r in rejected(con)]
    assert len(raws) == 2
    for raw in raws:
        assert b"NW-884213" not in raw and b"Quill" not in raw and b"19580304" not in raw
        assert b"Rowan" not in raw                  # PV1 beyond the location
        assert b"PID|1|[removed]" in raw and b"MSH|" in raw
    assert "NW-884213" not in caplog.text and "Quill" not in caplog.text


def test_patient_identifiers_stored_when_configured(tmp_path):
    cfg = CFG.model_copy(update={"store_patient_ids": True})
    _, con = replay(tmp_path, [oru([nm(2, "188888^MDC_NOT_A_TERM^MDC", "1", MMHG)])], cfg)
    (raw,) = [r[4] for r in rejected(con)]
    assert b"NW-884213" in raw


# --------------------------------------------------------------------------- the table


def test_table_rows_are_consistent():
    """Every row: a known target, the 32-bit code in its partition (IEEE 11073-10101:
    code = partition x 65536 + term code; parameters in partition 2 SCADA, units in 4 DIM),
    a source and a check status; every wire parameter and unit has a writer row."""
    from hemostream.core.units import UNITS
    from hemostream.core.wire import PARAMS
    terms = load_terms()
    for t in terms.rows:
        assert t.source and t.checked in {"table", "secondary", "from memory"}
        if t.kind == "param":
            assert t.maps_to in PARAMS and t.code >> 16 == 2
        else:
            assert t.maps_to in UNITS and t.code >> 16 == 4
    for p in PARAMS:
        assert terms.for_param(p).maps_to == p
    for u in UNITS:
        assert terms.for_unit(u, "HR").maps_to == u
    assert terms.for_unit("/min", "RR").ref_id == "MDC_DIM_RESP_PER_MIN"


def test_docs_example_and_table_match_the_code():
    """docs/hl7.md: the example message maps as the page says; its table is mdc.csv."""
    from pathlib import Path
    doc = (Path(__file__).resolve().parent.parent / "docs" / "hl7.md").read_text()
    block = doc.split("## An example message", 1)[1].split("```", 2)[1].strip()
    proc = Processor()
    cfg = Hl7Config(locations={"NW3^R12^B1": {"unit": "NW3", "bed": "bed-01"}})
    oc = feed_hl7(proc, block.replace("\n", "\r").encode(), T0_EPOCH + 2, cfg)
    assert (oc.code, oc.text) == ("AA", "4 observation(s) stored")
    out = proc.drain()
    vals = {r[2]: r[4] for r in out.observations}
    assert round(vals["ABP_DIA"], 1) == 66.0 and round(vals["CVP"], 2) == 9.56
    assert round({d["param"]: d["value"] for d in out.derived}["MAP"], 1) == 83.3
    for t in load_terms().rows:
        row = (f"| {t.kind} | {t.code} | `{t.ref_id}` | `{t.maps_to}` | {t.writer} | "
               f"{t.checked} |").replace("|  |", "|  |")
        assert row in doc, row


def test_oversized_message_rejected_without_parsing():
    cfg = CFG.model_copy(update={"max_message_bytes": 1024})
    big = oru([nm(i, "147842^MDC_ECG_HEART_RATE^MDC", "70", BPM) for i in range(2, 30)])
    proc = Processor()
    oc = feed_hl7(proc, big.encode(), T0_EPOCH + 2, cfg)
    assert (oc.code, oc.category) == ("AR", "too_large")
    assert f"message is {len(big)} bytes; the limit is 1024 bytes" in oc.text
    (row,) = proc.drain().rejected
    assert b"NW-884213" not in row["raw"] and row["raw"].startswith(b"MSH|")
