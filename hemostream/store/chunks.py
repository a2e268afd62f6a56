"""Observations and derived values as per-bed chunks of compact columns.

The writer turns each batch's ``observations`` (tuples, :data:`OBSERVATION_COLUMNS`) and
``derived`` rows into one *segment* per bed: a row of ``obs_chunks`` whose ``data`` is a
:mod:`.codec` block. When a bed has ``chunk_messages`` observation messages (or
``chunk_segments`` segments) unsealed, its segments are merged into one *sealed* chunk,
compressed harder, in the same transaction. Chunks may overlap in time (late messages,
interleaved segments); readers merge them in order.

Order: observations come back by (time, message id, position in the message), which is the
order of the old one-row-per-observation table (by time, then insertion); derived values by
(time, writer sequence number), likewise.
"""

from __future__ import annotations

import heapq
import json
from typing import Any, Iterable, Iterator, Sequence

import numpy as np
from sqlalchemy import delete, func, insert, select
from sqlalchemy.engine import Connection

from ..core.outputs import inputs_json
from ..core.quality import OK, from_status
from . import codec
from .schema import TABLES

OBS_COLS = ("o_mid", "o_param", "o_time", "o_value", "o_unit", "o_conv", "o_raw",
            "o_raw_unit", "o_status", "o_late", "o_quality")
DER_COLS = ("d_seq", "d_param", "d_time", "d_value", "d_unit", "d_inputs_text", "d_quality")
#: quality columns (core/quality.py), present in a block only when needed: observations
#: when some value's quality is not the one its status gives (an artifact), derived values
#: when some is not ok. Without one (every chunk written before quality existed, too) an
#: observation's quality is its status's and a derived value is ok.
QUALITY_COLS = ("o_quality", "d_quality")
PERM = {"o_value": "o_param", "d_value": "d_param"}

#: defaults of [store] chunk_messages / chunk_segments (the writer reads the configuration)
CHUNK_MESSAGES = 900
CHUNK_SEGMENTS = 128


def _pack_inputs(d_time: float, text: str) -> str:
    """Provenance text, with each input time written as its offset from the value's own time
    when that round-trips exactly ('=' prefix keeps any other text verbatim)."""
    try:
        pairs = json.loads(text)
        if inputs_json((p, t) for p, t in pairs) != text:
            raise ValueError
        parts = []
        for p, t in pairs:
            off = d_time - t
            if d_time - off != t or not isinstance(t, float) or "," in p or ":" in p:
                raise ValueError
            parts.append(f"{p}:{off!r}" if off else p)
        return ",".join(parts)
    except (ValueError, TypeError):
        return "=" + text


def _unpack_inputs(d_time: float, s: str) -> str:
    if s.startswith("="):
        return s[1:]
    if not s:
        return "[]"
    pairs = []
    for part in s.split(","):
        p, _, off = part.partition(":")
        pairs.append((p, d_time - float(off) if off else d_time))
    return inputs_json(pairs)


def block_of(obs: list[tuple], der: list[dict], seq0: int) -> dict[str, Any]:
    """The block of one bed's rows (observation tuples, derived dicts)."""
    f8, i8 = np.float64, np.int64
    blk: dict[str, Any] = {}
    if obs:
        mid, _bed, param, t, value, unit, raw, raw_unit, status, late = list(zip(*obs))[:10]
        quality = [o[10] if len(o) > 10 else from_status(o[8]) for o in obs]
        v = np.array(value, f8)
        r = np.array(raw, f8)
        conv = v.view(i8) != r.view(i8)
        blk.update(o_mid=np.array(mid, i8), o_param=list(param), o_time=np.array(t, f8),
                   o_value=v, o_unit=list(unit), o_conv=conv, o_raw=r[conv],
                   o_raw_unit=list(raw_unit), o_status=list(status),
                   o_late=np.array(late, bool))
        if any(q != from_status(s) for q, s in zip(quality, status)):
            blk["o_quality"] = quality
    if der:
        times = [d["time"] for d in der]
        blk.update(d_seq=np.arange(seq0, seq0 + len(der), dtype=i8),
                   d_param=[d["param"] for d in der], d_time=np.array(times, f8),
                   d_value=np.array([d["value"] for d in der], f8),
                   d_unit=[d["unit"] for d in der],
                   d_inputs_text=[_pack_inputs(t, d["inputs"]) for t, d in zip(times, der)])
        dq = [d.get("quality", OK) for d in der]
        if any(q != OK for q in dq):
            blk["d_quality"] = dq
    return blk


def merge(blocks: Sequence[dict[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    names = [n for b in blocks for n in b]
    for name in dict.fromkeys(names):
        if name in QUALITY_COLS:
            out[name] = [x for b in blocks for x in qualities(b, name[0])]
            continue
        parts = [b[name] for b in blocks if name in b]
        if isinstance(parts[0], np.ndarray):
            out[name] = np.concatenate(parts)
        else:
            out[name] = [x for p in parts for x in p]
    return out


def qualities(b: dict[str, Any], kind: str) -> list[str]:
    """A block's observation (``kind`` "o") or derived ("d") qualities."""
    q = b.get(f"{kind}_quality")
    if q is not None:
        return q
    if kind == "o":
        return [from_status(s) for s in b.get("o_status", ())]
    return [OK] * len(b.get("d_seq", ()))


def chunk_row(bed_id: int, blk: dict[str, Any], sealed: bool, level: int) -> dict[str, Any]:
    times = [blk[c] for c in ("o_time", "d_time") if c in blk]
    allt = np.concatenate(times) if times else np.zeros(0)
    m = blk.get("o_mid", np.zeros(0, np.int64))
    mm: Any = blk.get("m_id")
    has = mm is not None and len(mm) > 0
    if has:
        allt = np.concatenate([allt, blk["m_time"]])
    return {"bed_id": bed_id, "t_min": float(allt.min()), "t_max": float(allt.max()),
            "n_messages": int(len(np.unique(m))), "n_obs": len(m),
            "m_count": int(len(mm)) if has else 0,
            "mid_max": int(max(mm.max(), m.max() if len(m) else 0)) if has else (
                int(m.max()) if len(m) else None),
            "rx_max": float(blk["m_rx"].max()) if has else None,
            "msg_t_min": float(blk["m_time"].min()) if has else None,
            "msg_t_max": float(blk["m_time"].max()) if has else None,
            "n_derived": len(blk.get("d_seq", ())),
            "seq_max": int(blk["d_seq"].max()) if "d_seq" in blk else None,
            "sealed": sealed, "data": codec.encode(blk, level=level, perm=PERM)}


def decode(data: bytes) -> dict[str, Any]:
    return codec.decode(data)


class Chunker:
    """Per engine: next derived sequence number and each bed's unsealed segments."""

    def __init__(self, messages: int = CHUNK_MESSAGES, segments: int = CHUNK_SEGMENTS) -> None:
        self.messages, self.segments = messages, segments
        self.next_seq: int | None = None
        self.open: dict[int, list[int]] = {}      # bed_id -> [segments, messages] unsealed

    def write(self, conn: Connection, obs: list[Any], der: list[Any]) -> None:
        t = TABLES["obs_chunks"]
        if self.next_seq is None:
            self.next_seq = (conn.execute(select(func.max(t.c.seq_max))).scalar() or 0) + 1
        per: dict[int, tuple[list[tuple], list[dict]]] = {}
        for o in obs:
            per.setdefault(o[1], ([], []))[0].append(o)
        for d in der:
            per.setdefault(d["bed_id"], ([], []))[1].append(d)
        rows = []
        for bed_id, (obs_b, der_b) in per.items():
            blk = block_of(obs_b, der_b, self.next_seq)
            self.next_seq += len(der_b)
            rows.append(chunk_row(bed_id, blk, False, 1))
        if not rows:
            return
        conn.execute(insert(t), rows)
        for r in rows:
            st = self.open.get(r["bed_id"])
            if st is None:
                st = self.open[r["bed_id"]] = list(conn.execute(
                    select(func.count(), func.coalesce(func.sum(t.c.n_messages), 0))
                    .where(t.c.bed_id == r["bed_id"], t.c.sealed.is_(False))).one())
            else:
                st[0] += 1
                st[1] += r["n_messages"]
            if st[1] >= self.messages:
                seal(conn, r["bed_id"])
                st[0] = st[1] = 0
            elif st[0] >= self.segments:
                seal(conn, r["bed_id"], final=False)
                st[0] = 1

    def compact_all(self, conn: Connection) -> int:
        """Merge every bed's open segments into one (a writer closing): fewer, smaller rows;
        the messages stay in ``messages`` until the bed's chunk is really sealed."""
        t = TABLES["obs_chunks"]
        beds = [r[0] for r in conn.execute(
            select(t.c.bed_id).where(t.c.sealed.is_(False)).group_by(t.c.bed_id)
            .having(func.count() > 1))]
        for b in beds:
            seal(conn, b, final=False)
            if b in self.open:
                self.open[b][0] = 1
        return len(beds)


_M_COLS = ("id", "rx", "topic", "device", "seq", "time", "late", "n_obs")


def seal(conn: Connection, bed_id: int, final: bool = True) -> int:
    """Merge a bed's unsealed segments into one chunk; ``final``: a sealed chunk, which also
    takes in the bed's observation messages from ``messages``. How many were merged."""
    t = TABLES["obs_chunks"]
    # FOR UPDATE (PostgreSQL): two writers sealing one bed at once do not merge it twice
    segs = conn.execute(select(t.c.id, t.c.data).where(t.c.bed_id == bed_id,
                                                       t.c.sealed.is_(False))
                        .order_by(t.c.id).with_for_update()).all()
    if not segs:
        return 0
    blk = merge([decode(s.data) for s in segs])
    mt = TABLES["messages"]
    ids: list[int] = []
    if final:
        msgs = conn.execute(select(*[mt.c[c] for c in _M_COLS]).where(
            mt.c.bed_id == bed_id, mt.c.kind == "obs").order_by(mt.c.id)).all()
        if msgs:
            cols = list(zip(*msgs))
            ids = list(cols[0])
            blk.update(m_id=np.array(cols[0], np.int64), m_rx=np.array(cols[1], np.float64),
                       m_topic=list(cols[2]), m_device=list(cols[3]),
                       m_seq=np.array(cols[4], np.int64).view(np.int64),
                       m_time=np.array(cols[5], np.float64),
                       m_late=np.array([bool(x) for x in cols[6]], bool),
                       m_nobs=np.array(cols[7], np.int64))
    conn.execute(insert(t), [chunk_row(bed_id, blk, final, 9 if final else 6)])
    conn.execute(delete(t).where(t.c.id.in_([s.id for s in segs])))
    for k in range(0, len(ids), 500):
        conn.execute(delete(mt).where(mt.c.id.in_(ids[k:k + 500])))
    return len(segs)


def sealed_messages(conn: Connection, min_mid: int | None = None,
                    bed_ids: Iterable[int] | None = None,
                    rx_from: float | None = None) -> Iterator[dict[str, Any]]:
    """Observation messages kept inside sealed chunks (as ``messages`` rows, kind obs);
    ``rx_from``: only those that arrived then or later."""
    t = TABLES["obs_chunks"]
    stmt = select(t.c.bed_id, t.c.data).where(t.c.m_count > 0)
    if min_mid is not None:
        stmt = stmt.where(t.c.mid_max >= min_mid)
    if rx_from is not None:
        stmt = stmt.where(t.c.rx_max >= rx_from)
    if bed_ids is not None:
        stmt = stmt.where(t.c.bed_id.in_(list(bed_ids)))
    for c in conn.execute(stmt.order_by(t.c.id)):
        b = decode(c.data)
        for mid, rx, topic, dev, seq, tm, late, n in zip(
                b["m_id"].tolist(), b["m_rx"].tolist(), b["m_topic"], b["m_device"],
                b["m_seq"].tolist(), b["m_time"].tolist(), b["m_late"].tolist(),
                b["m_nobs"].tolist()):
            if (min_mid is not None and mid < min_mid) or (rx_from is not None and rx < rx_from):
                continue
            yield {"id": mid, "bed_id": c.bed_id, "rx": rx, "topic": topic, "kind": "obs",
                   "device": dev, "seq": seq, "time": tm, "late": late, "n_obs": n,
                   "digest": None}


# --------------------------------------------------------------------------- reading

def _chunks(conn: Connection, bed_ids: Iterable[int] | None, t0: float | None,
            t1: float | None, need: str) -> Sequence[Any]:
    t = TABLES["obs_chunks"]
    stmt = select(t.c.id, t.c.bed_id, t.c.t_min, t.c.data).where(
        (t.c.n_obs if need == "obs" else t.c.n_derived) > 0)
    if bed_ids is not None:
        stmt = stmt.where(t.c.bed_id.in_(list(bed_ids)))
    if t0 is not None:
        stmt = stmt.where(t.c.t_max >= t0)
    if t1 is not None:
        stmt = stmt.where(t.c.t_min <= t1)
    return conn.execute(stmt.order_by(t.c.t_min, t.c.id)).all()


def _merge_rows(chunks: Sequence[Any], rows_of) -> Iterator[tuple]:
    """Rows (sort key first) of chunks sorted by t_min, merged into one ordered stream."""
    heap: list[tuple] = []
    for c in chunks:
        while heap and heap[0][0] < c.t_min:
            yield heapq.heappop(heap)
        for r in rows_of(c):
            heapq.heappush(heap, r)
    while heap:
        yield heapq.heappop(heap)


def iter_observations(conn: Connection, bed_ids: Iterable[int] | None = None,
                      params: Iterable[str] | None = None, t0: float | None = None,
                      t1: float | None = None, quality: Iterable[str] | None = None
                      ) -> Iterator[tuple]:
    """(time, message_id, bed_id, param, value, unit, status, raw_value, raw_unit, late,
    quality), ordered by time then arrival; ``quality``: only values of these qualities."""
    want = set(params) if params is not None else None
    qs = set(quality) if quality is not None else None

    def rows_of(c):
        b = decode(c.data)
        raw = b["o_value"].copy()
        raw[b["o_conv"]] = b["o_raw"]
        cols = (b["o_time"].tolist(), b["o_mid"].tolist(), b["o_param"],
                b["o_value"].tolist(), b["o_unit"], b["o_status"], raw.tolist(),
                b["o_raw_unit"], b["o_late"].tolist(), qualities(b, "o"))
        out = []
        for k, (t, mid, p, v, u, s, rv, ru, late, q) in enumerate(zip(*cols)):
            if want is not None and p not in want:
                continue
            if (t0 is not None and t < t0) or (t1 is not None and t > t1):
                continue
            if qs is not None and q not in qs:
                continue
            out.append((t, mid, k, c.bed_id, p, v, u, s, rv, ru, late, q))
        return out

    for r in _merge_rows(_chunks(conn, bed_ids, t0, t1, "obs"), rows_of):
        yield (r[0], r[1]) + r[3:]


def iter_derived(conn: Connection, bed_ids: Iterable[int] | None = None,
                 params: Iterable[str] | None = None, t0: float | None = None,
                 t1: float | None = None, quality: Iterable[str] | None = None
                 ) -> Iterator[tuple]:
    """(time, seq, bed_id, param, value, unit, inputs JSON text, quality), ordered by time,
    storage; ``quality``: only values of these qualities."""
    want = set(params) if params is not None else None
    qs = set(quality) if quality is not None else None

    def rows_of(c):
        b = decode(c.data)
        out = []
        dq = qualities(b, "d")
        for t, sq, p, v, u, it, q in zip(b["d_time"].tolist(), b["d_seq"].tolist(),
                                         b["d_param"], b["d_value"].tolist(), b["d_unit"],
                                         b["d_inputs_text"], dq):
            if want is not None and p not in want:
                continue
            if (t0 is not None and t < t0) or (t1 is not None and t > t1):
                continue
            if qs is not None and q not in qs:
                continue
            out.append((t, sq, c.bed_id, p, v, u, _unpack_inputs(t, it), q))
        return out

    yield from _merge_rows(_chunks(conn, bed_ids, t0, t1, "derived"), rows_of)
