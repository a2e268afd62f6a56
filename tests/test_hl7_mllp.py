"""The MLLP listener over real TCP, driven by the ``hl7`` package's own clients.

ACK rules checked: original-mode acknowledgement (HL7 v2.6 chapter 2, MSA-1 AA/AE/AR) sent
only after the message is committed to the database; a SIGKILL of the listener loses nothing
that was acknowledged (the server runs in a subprocess).
"""

from __future__ import annotations

import asyncio
import os
import signal
import sqlite3
import ssl
import subprocess
import sys
import threading
import time
from pathlib import Path

import hl7
from hl7.client import MLLPClient
from hl7.mllp import open_hl7_connection

from hemostream.intake.hl7.config import Hl7Config
from hemostream.intake.hl7.mllp import serve
from hemostream.store import observation_rows

from test_hl7_mapping import BPM, CFG, MMHG, nm, oru

ROOT = Path(__file__).resolve().parent.parent


def msa(ack: hl7.Message) -> tuple[str, str, str]:
    seg = ack.segment("MSA")
    return str(seg(1)), str(seg(2)), str(seg(3)) if len(seg) > 3 else ""


def run_server(db_url: str, cfg: Hl7Config, body, *, ssl_ctx=None):
    """Start :func:`serve` on a free port, run ``body(port)`` (a coroutine), stop."""
    async def main():
        stop = asyncio.Event()
        ready = asyncio.get_running_loop().create_future()
        task = asyncio.create_task(serve(db_url, "127.0.0.1", 0, hl7_config=cfg,
                                         ssl=ssl_ctx, stop=stop,
                                         on_ready=lambda h, p: ready.set_result(p)))
        port = await asyncio.wait_for(ready, 20)
        try:
            return await body(port)
        finally:
            stop.set()
            await asyncio.wait_for(task, 30)
    return asyncio.run(main())


def count(db: Path, sql: str, *args):
    con = sqlite3.connect(db)
    try:
        return con.execute(sql, args).fetchall()
    finally:
        con.close()


def hr(i: int, value: str = "72") -> str:
    return oru([nm(2, "147842^MDC_ECG_HEART_RATE^MDC", value, BPM)], control=str(1000 + i))


def test_aa_ae_ar_and_commit_before_ack(tmp_path):
    db = tmp_path / "s.db"

    async def body(port):
        reader, writer = await open_hl7_connection("127.0.0.1", port)
        answers = []
        # AA: a good message; its rows are in the database when the ACK arrives
        writer.writemessage(hl7.parse(hr(1)))
        ack = await asyncio.wait_for(reader.readmessage(), 20)
        answers.append(msa(ack))
        assert str(ack.segment("MSH")(9)) == "ACK^R01^ACK"
        stored_at_ack = count(db, "SELECT seq FROM messages")
        # AE: parsed, one observation rejected (unknown MDC term), the other stored
        bad = oru([nm(2, "188888^MDC_NOT_A_TERM^MDC", "3", MMHG),
                   nm(3, "147842^MDC_ECG_HEART_RATE^MDC", "75", BPM)], control="2002")
        writer.writemessage(hl7.parse(bad))
        ack_ae = await asyncio.wait_for(reader.readmessage(), 20)
        answers.append(msa(ack_ae))
        # AR: not ORU^R01
        writer.writemessage(hl7.parse(hr(3).replace("ORU^R01^ORU_R01", "ADT^A01^ADT_A01")))
        answers.append(msa(await asyncio.wait_for(reader.readmessage(), 20)))
        # AR: not HL7 at all
        writer.writeblock(b"hello, is this thing on?")
        answers.append(msa(await asyncio.wait_for(reader.readmessage(), 20)))
        # the same good message again: a duplicate, acknowledged AA, stored once
        writer.writemessage(hl7.parse(hr(1)))
        answers.append(msa(await asyncio.wait_for(reader.readmessage(), 20)))
        writer.close()
        return answers, stored_at_ack, ack_ae

    answers, stored_at_ack, ack_ae = run_server(f"sqlite:///{db}", CFG, body)
    assert stored_at_ack == [(1001,)]
    assert [a[:2] for a in answers] == [("AA", "1001"), ("AE", "2002"), ("AR", "1003"),
                                        ("AR", ""), ("AA", "1001")]
    assert "OBX 2: unknown MDC term 188888" in answers[1][2]
    err = ack_ae.segment("ERR")
    assert str(err(3)).startswith("103^") and "OBX 2: unknown MDC term" in str(err(8))
    assert "MSH-9" in answers[2][2] and "no MSH segment" in answers[3][2]
    assert count(db, "SELECT count(*) FROM messages") == [(2,)]
    cats = [r[0] for r in count(db, "SELECT category FROM rejected ORDER BY id")]
    assert cats == ["unknown_param", "unsupported_message", "unreadable"]


def test_concurrent_connections(tmp_path):
    db = tmp_path / "s.db"

    async def client(port, k):
        reader, writer = await open_hl7_connection("127.0.0.1", port)
        codes = []
        for i in range(8):
            writer.writemessage(hl7.parse(hr(k * 100 + i, str(60 + i))))
            codes.append(msa(await asyncio.wait_for(reader.readmessage(), 20))[0])
        writer.close()
        return codes

    async def body(port):
        return await asyncio.gather(*(client(port, k) for k in range(6)))

    results = run_server(f"sqlite:///{db}", CFG, body)
    assert all(c == ["AA"] * 8 for c in results)
    assert count(db, "SELECT count(DISTINCT seq) FROM messages") == [(48,)]


def test_size_limit_and_idle_timeout(tmp_path):
    db = tmp_path / "s.db"
    cfg = CFG.model_copy(update={"max_message_bytes": 2048, "idle_timeout_s": 0.5})
    big = oru([nm(i, "147842^MDC_ECG_HEART_RATE^MDC", "70", BPM) for i in range(2, 60)])
    assert len(big) > 2048

    async def body(port):
        reader, writer = await open_hl7_connection("127.0.0.1", port)
        writer.writemessage(hl7.parse(big))
        over = msa(await asyncio.wait_for(reader.readmessage(), 20))
        closed_after_big = await asyncio.wait_for(reader.read(), 20) == b""
        r2, w2 = await open_hl7_connection("127.0.0.1", port)
        t0 = time.monotonic()
        idle_closed = await asyncio.wait_for(r2.read(), 20) == b""
        return over, closed_after_big, idle_closed, time.monotonic() - t0

    over, closed_after_big, idle_closed, waited = run_server(f"sqlite:///{db}", cfg, body)
    assert over[0] == "AR" and "larger than 2048 bytes" in over[2]
    assert closed_after_big and idle_closed and 0.3 < waited < 10


def test_tls(tmp_path):
    key, cert = tmp_path / "k.pem", tmp_path / "c.pem"
    subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout",
                    str(key), "-out", str(cert), "-days", "2", "-subj", "/CN=127.0.0.1",
                    "-addext", "subjectAltName=IP:127.0.0.1"],
                   check=True, capture_output=True)
    server_ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    server_ctx.load_cert_chain(cert, key)
    client_ctx = ssl.create_default_context(cafile=str(cert))
    db = tmp_path / "s.db"

    async def body(port):
        reader, writer = await open_hl7_connection("127.0.0.1", port, ssl=client_ctx)
        writer.writemessage(hl7.parse(hr(1)))
        code = msa(await asyncio.wait_for(reader.readmessage(), 20))[0]
        writer.close()
        return code

    assert run_server(f"sqlite:///{db}", CFG, body, ssl_ctx=server_ctx) == "AA"
    assert len(observation_rows(db)) == 1


def _start_subprocess(db_url: str) -> tuple[subprocess.Popen, int]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    p = subprocess.Popen([sys.executable, "-m", "hemostream.intake.hl7.mllp", "--db", db_url,
                          "--listen", "127.0.0.1:0", "--locations-from-components"],
                         stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, env=env,
                         cwd=ROOT)
    line = p.stdout.readline()
    assert line.startswith("listening "), line
    return p, int(line.rsplit(":", 1)[1])


def test_sigkill_mid_stream_loses_nothing_acknowledged(tmp_path):
    db = tmp_path / "s.db"
    url = f"sqlite:///{db}"
    msgs = [oru([nm(2, "147842^MDC_ECG_HEART_RATE^MDC", str(60 + i % 40), BPM),
                 nm(3, "150037^MDC_PRESS_BLD_ART_ABP_SYS^MDC", str(100 + i % 30), MMHG)],
                control=str(5000 + i), loc="NW3^^bed-03") for i in range(300)]
    proc, port = _start_subprocess(url)
    acked: list[int] = []
    killed = threading.Event()

    def killer():
        while len(acked) < 40:
            time.sleep(0.001)
        os.kill(proc.pid, signal.SIGKILL)
        killed.set()

    threading.Thread(target=killer, daemon=True).start()
    try:
        with MLLPClient("127.0.0.1", port) as client:
            for i, m in enumerate(msgs):
                ack = client.send_message(m)
                if not ack:
                    break
                parsed = hl7.parse(ack.strip(b"\x0b\x1c\r").decode())
                assert msa(parsed)[:2] == ("AA", str(5000 + i))
                acked.append(5000 + i)
    except OSError:
        pass
    assert killed.wait(20)
    proc.wait(20)
    assert proc.returncode == -signal.SIGKILL
    assert 40 <= len(acked) < 300
    stored = {r[0] for r in count(db, "SELECT seq FROM messages")}
    assert set(acked) <= stored                       # nothing acknowledged was lost
    mids = {r[0] for r in count(db, "SELECT id FROM messages WHERE seq IN (%s)"
                                % ",".join(map(str, acked)))}
    assert len([o for o in observation_rows(db) if o["message_id"] in mids]) == 2 * len(acked)
    # the sender retransmits everything not acknowledged (and, to be sure, the rest too)
    proc2, port2 = _start_subprocess(url)
    try:
        with MLLPClient("127.0.0.1", port2) as client:
            for i, m in enumerate(msgs):
                parsed = hl7.parse(client.send_message(m).strip(b"\x0b\x1c\r").decode())
                assert msa(parsed)[:2] == ("AA", str(5000 + i))
    finally:
        proc2.send_signal(signal.SIGTERM)
        assert proc2.wait(30) == 0
    assert count(db, "SELECT count(*), count(DISTINCT seq) FROM messages") == [(300, 300)]
    assert len(observation_rows(db)) == 600
