"""Replay a recording (JSON Lines, wire format) through the core into a database."""

from __future__ import annotations

import hashlib
import json
import time as _time
from collections import Counter
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any, Callable, Literal

from pydantic import BaseModel, ConfigDict, StrictStr, ValidationError
from sqlalchemy import select
from sqlalchemy.engine import Engine

from .core.config import Config
from .core.outputs import Outputs
from .core.processor import Counters, Processor, RecordingLineBytes
from .core.rules.protocol import RulesLayer
from .core.wire import ObsMessage, Time, epoch, parse_time
from .pipeline import make_rules
from .runtime import settle_gc
from .store import TABLES, Writer, load_resume, open_engine, record_config, rows_of


@dataclass
class ReplaySummary(Counters):
    """The core's counters for the whole replay, plus what the file and the clock say."""

    path: str = ""
    db_url: str = ""
    lines: int = 0
    blank_lines: int = 0
    seconds: float = 0.0
    #: rejects (counted in ``rejected``) that the database already held from an earlier
    #: replay of the same lines, and that were not stored again
    rejects_known: int = 0

    @property
    def rejected_total(self) -> int:
        return sum(self.rejected.values())

    @property
    def messages_per_s(self) -> float:
        return self.lines / self.seconds if self.seconds > 0 else 0.0

    def as_dict(self) -> dict[str, Any]:
        d = dict(self.__dict__)
        d["rejected_total"] = self.rejected_total
        d["messages_per_s"] = round(self.messages_per_s, 1)
        return d


def _parse_rx(v: Any) -> float:
    return parse_time(v, "'rx'")


class _ObsLine(BaseModel):
    """A recording line holding a well-formed obs message: parsed in one pass (fast path)."""

    model_config = ConfigDict(extra="ignore")
    rx: Time
    topic: StrictStr
    payload: ObsMessage


_validate_obs_line = _ObsLine.model_validate_json


def feed_line(proc: Processor, line: bytes, lineno: int, max_bytes: int) -> float | None:
    """Feed one recording line to the processor; return its arrival time if readable.

    Lines that look like obs messages are first parsed and validated in one pass; anything
    that fails takes the general path, which finds and words the problem.
    """
    if b'/obs"' in line and len(line) <= max_bytes:
        try:
            rec = _validate_obs_line(line)
        except ValidationError:
            pass
        else:
            rx = epoch(rec.rx)
            proc.feed_obs(rec.topic, rec.payload, rx, RecordingLineBytes(line))
            return rx
    try:
        rec = json.loads(line)
    except (ValueError, UnicodeDecodeError) as e:
        proc.reject_unreadable("", line, None, f"recording line {lineno}: not valid JSON ({e})")
        return None
    if not isinstance(rec, dict):
        proc.reject_unreadable("", line, None,
                               f"recording line {lineno}: expected an object with rx, topic, "
                               "payload")
        return None
    topic = rec.get("topic")
    try:
        rx = _parse_rx(rec.get("rx"))
    except (ValueError, TypeError) as e:
        proc.reject_unreadable(topic if isinstance(topic, str) else "", line, None,
                               f"recording line {lineno}: {e}")
        return None
    if not isinstance(topic, str) or "payload" not in rec:
        proc.reject_unreadable(topic if isinstance(topic, str) else "", line, rx,
                               f"recording line {lineno}: needs a string 'topic' and a "
                               "'payload'")
        return rx
    payload = rec["payload"]
    if not isinstance(payload, dict | str):
        payload = json.dumps(payload)   # e.g. a JSON array: the core rejects it with a reason
    elif isinstance(payload, dict) and len(line) > max_bytes:
        # the original bytes are gone; the line length is an upper bound of their size
        payload = json.dumps(payload, separators=(",", ":"))
    proc.feed(topic, payload, rx)
    return rx


def _reject_key(r: Any) -> tuple:
    """What makes two ``rejected`` rows the same reject of the same input: topic, arrival,
    category, reason (it names the recording line), size and a digest of the kept bytes."""
    return (r["topic"], r["rx"], r["category"], r["reason"], r["size"],
            hashlib.blake2b(bytes(r["raw"]), digest_size=16).digest())


def known_rejects(engine: Engine) -> set[tuple]:
    """The :func:`_reject_key` of every stored reject (a replay again into the same database
    stores none of them twice, as it stores no message twice)."""
    rj = TABLES["rejected"]
    with engine.connect() as conn:
        rows = conn.execution_options(yield_per=1000).execute(
            select(rj.c.topic, rj.c.rx, rj.c.category, rj.c.reason, rj.c.size, rj.c.raw))
        return {_reject_key(r._mapping) for r in rows}


class _NewRejects:
    """Drops the rejects a database already holds from a drained batch, counting them."""

    def __init__(self, known: set[tuple]) -> None:
        self.known = known
        self.dropped = 0

    def __call__(self, out: Outputs) -> Outputs:
        if self.known and out.rejected:
            keep = [r for r in out.rejected if _reject_key(r) not in self.known]
            self.dropped += len(out.rejected) - len(keep)
            out.rejected = keep
        return out


def _count_lines(p: Path) -> int:
    n = 0
    with open(p, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            n += block.count(b"\n")
    return n


def replay_file(path: str | Path, db_url: str | None = None, config: Config | None = None, *,
                speed: float | None = None,
                progress: Callable[[int, int], None] | None = None,
                rules: RulesLayer | None | Literal["default"] = "default") -> ReplaySummary:
    """Replay ``path`` into ``db_url`` (default: the config's store URL).

    ``speed`` paces the replay at N x real time (by arrival times); None is as fast as
    possible. ``progress(bytes_done, bytes_total)`` is called now and then.
    """
    cfg = config or Config()
    url = db_url or cfg.store.url
    p = Path(path)
    total = p.stat().st_size
    engine = open_engine(url)
    record_config(engine, cfg)             # the configuration in force, kept with the data
    # a recording replayed again into the same database: every message it already holds is
    # known by its identity, however old, so nothing is stored twice (the live service only
    # needs the recent ones: redeliveries are recent)
    resume = load_resume(engine, recent=max(200_000, _count_lines(p)))
    fresh = _NewRejects(known_rejects(engine))
    per_key = Counter(k for k, _ in resume.messages)
    proc_cfg = cfg
    if per_key and max(per_key.values()) > cfg.ingest.dedup_per_device // 2:
        proc_cfg = cfg.model_copy(update={"ingest": cfg.ingest.model_copy(update={
            "dedup_per_device": max(per_key.values()) + cfg.ingest.dedup_per_device})})
    if rules == "default":
        rules = make_rules(cfg)
    proc = Processor(proc_cfg, rules=rules, publish=False, next_ids=resume.next_ids,
                     known_beds=resume.beds,
                     known_messages=resume.messages)
    writer = Writer(engine, max_batches=4, store_cfg=cfg.store)   # bounded: paces the reader
    settle_gc()
    summary = ReplaySummary(path=str(p), db_url=url)
    batch_rows = cfg.store.batch_rows
    max_bytes = cfg.ingest.max_payload_bytes
    t0 = _time.perf_counter()
    last_tick = None
    first_rx = None
    done = 0
    try:
        with open(p, "rb") as f:
            for lineno, line in enumerate(f, 1):
                done += len(line)
                if not line.strip():
                    summary.blank_lines += 1
                    continue
                summary.lines += 1
                rx = feed_line(proc, line, lineno, max_bytes)
                if rx is not None:
                    if last_tick is None or rx - last_tick >= 1.0:
                        proc.tick(rx)
                        last_tick = rx
                    if speed:
                        if first_rx is None:
                            first_rx, wall0 = rx, _time.perf_counter()
                        delay = (rx - first_rx) / speed - (_time.perf_counter() - wall0)
                        if delay > 0:
                            _time.sleep(delay)
                if (lineno & 255 == 0 and proc.out.row_count() >= batch_rows) or (
                        speed and proc.out.row_count()):
                    writer.submit(rows_of(fresh(proc.drain())))
                if progress is not None and lineno % 2000 == 0:
                    progress(done, total)
        writer.submit(rows_of(fresh(proc.drain())))
        writer.close()
    finally:
        engine.dispose()
    if progress is not None:
        progress(total, total)
    for c in fields(Counters):
        setattr(summary, c.name, getattr(proc.counters, c.name))
    summary.rejected = dict(sorted(summary.rejected.items()))
    summary.rejects_known = fresh.dropped
    summary.seconds = _time.perf_counter() - t0
    return summary
