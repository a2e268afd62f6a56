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

import bisect
import json
import time as _time
from itertools import repeat
from operator import itemgetter
from typing import Any, Iterable, Iterator, Sequence

import numpy as np
from sqlalchemy import delete, func, insert, null, select, union_all
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

#: defaults of [store] chunk_messages / chunk_segments / stage_messages / stage_s (the
#: writer reads the configuration)
CHUNK_MESSAGES = 900
CHUNK_SEGMENTS = 128
STAGE_MESSAGES = 20000
STAGE_S = 60.0
#: beds sealed per write transaction at least (more while a backlog waits)
SEALS_PER_WRITE = 4


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


def block_of(obs: list[tuple], der: list[dict], seq0: int, beds: bool = False
             ) -> dict[str, Any]:
    """The block of one bed's rows (observation tuples, derived dicts); ``beds``: of any
    beds, with each row's bed in ``o_bed``/``d_bed`` (a staged block)."""
    f8, i8 = np.float64, np.int64
    blk: dict[str, Any] = {}
    if obs:
        mid, bed, param, t, value, unit, raw, raw_unit, status, late = list(zip(*obs))[:10]
        if beds:
            blk["o_bed"] = np.array(bed, i8)
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
        if beds:
            blk["d_bed"] = np.array([d["bed_id"] for d in der], i8)
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


def split_block(blk: dict[str, Any], want: Any = None) -> dict[int, dict[str, Any]]:
    """A staged block's rows by bed, as per-bed blocks (rows keep their order); ``want``:
    only these beds.

    >>> blk = block_of([(1, 7, "HR", 10.0, 60.0, "/min", 60.0, "/min", "valid", False),
    ...                 (2, 8, "HR", 10.0, 70.0, "/min", 70.0, "/min", "valid", False),
    ...                 (3, 7, "HR", 11.0, 61.0, "/min", 61.0, "/min", "valid", False)],
    ...                [], 1, beds=True)
    >>> {b: x["o_value"].tolist() for b, x in split_block(blk).items()}
    {7: [60.0, 61.0], 8: [70.0]}
    """
    out: dict[int, dict[str, Any]] = {}
    for kind in ("o", "d"):
        bed = blk.get(f"{kind}_bed")
        if bed is None or not len(bed):
            continue
        cols = {n: c for n, c in blk.items() if n.startswith(f"{kind}_")
                and n not in (f"{kind}_bed", f"{kind}_quality", "o_raw")}
        if kind == "o":                              # raw values: whole length while split
            raw = blk["o_value"].copy()
            raw[blk["o_conv"]] = blk["o_raw"]
            cols["o_raw"] = raw
        cols[f"{kind}_quality"] = qualities(blk, kind)
        order = np.argsort(bed, kind="stable")
        sb = bed[order]
        cuts = [0, *(np.flatnonzero(np.diff(sb)) + 1).tolist(), len(sb)]
        ol = order.tolist()
        sorted_cols = {n: (c[order] if isinstance(c, np.ndarray) else [c[i] for i in ol])
                       for n, c in cols.items()}
        for a, b in zip(cuts[:-1], cuts[1:]):
            bed_id = int(sb[a])
            if want is not None and bed_id not in want:
                continue
            part = out.setdefault(bed_id, {})
            for n, c in sorted_cols.items():
                part[n] = c[a:b]
            if kind == "o":
                part["o_raw"] = part["o_raw"][part["o_conv"]]
                if all(q == from_status(st) for q, st in zip(part["o_quality"],
                                                                part["o_status"])):
                    del part["o_quality"]
            elif all(q == OK for q in part["d_quality"]):
                del part["d_quality"]
    return out


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


def decode(data: bytes, columns: Any = None) -> dict[str, Any]:
    return codec.decode(data, columns)


def staging_row(blk: dict[str, Any]) -> dict[str, Any]:
    """The ``obs_staging`` row of a staged block (zlib level 1: it lives about a minute)."""
    times = [blk[c] for c in ("o_time", "d_time") if c in blk]
    allt = np.concatenate(times)
    m = blk.get("o_mid", np.zeros(0, np.int64))
    return {"t_min": float(allt.min()), "t_max": float(allt.max()),
            "n_messages": int(len(np.unique(m))), "n_obs": len(m),
            "n_derived": len(blk.get("d_seq", ())),
            "mid_max": int(m.max()) if len(m) else None,
            "seq_max": int(blk["d_seq"].max()) if "d_seq" in blk else None,
            "data": codec.encode(blk, level=1, perm=PERM)}


class Chunker:
    """Per engine: the next derived sequence number, what is staged, each bed's unsealed
    segments, and the beds waiting to be sealed.

    A write batch becomes one staged row (every bed of the batch in one block). Every
    ``stage_messages`` staged messages or ``stage_s`` seconds the staged rows are split
    into one segment per bed; a bed with ``messages`` observation messages in segments is
    queued for sealing, and each write seals a few queued beds (a ward that started at
    once does not seal every bed in one transaction)."""

    def __init__(self, messages: int = CHUNK_MESSAGES, segments: int = CHUNK_SEGMENTS,
                 stage_messages: int = STAGE_MESSAGES, stage_s: float = STAGE_S) -> None:
        self.messages, self.segments = messages, segments
        self.stage_messages, self.stage_s = stage_messages, stage_s
        self.next_seq: int | None = None
        self.open: dict[int, list[int]] = {}      # bed_id -> [segments, messages] unsealed
        self.staged: int | None = None            # messages in obs_staging (as far as known)
        self.staged_since: float | None = None    # monotonic time the oldest was staged
        self.to_seal: dict[int, bool] = {}        # bed_id -> final, in the order queued

    def write(self, conn: Connection, obs: list[Any], der: list[Any]) -> None:
        t, st = TABLES["obs_chunks"], TABLES["obs_staging"]
        if self.next_seq is None:
            self.next_seq = max(conn.execute(select(func.max(t.c.seq_max))).scalar() or 0,
                                conn.execute(select(func.max(st.c.seq_max))).scalar() or 0) + 1
        if self.staged is None:
            self.staged = int(conn.execute(
                select(func.coalesce(func.sum(st.c.n_messages), 0))).scalar() or 0)
            if self.staged:
                self.staged_since = _time.monotonic()
        if obs or der:
            blk = block_of(obs, der, self.next_seq, beds=True)
            self.next_seq += len(der)
            row = staging_row(blk)
            conn.execute(insert(st), [row])
            self.staged += max(row["n_messages"], 1)
            if self.staged_since is None:
                self.staged_since = _time.monotonic()
        if self.staged and (self.staged >= self.stage_messages or
                            _time.monotonic() - (self.staged_since or 0) >= self.stage_s):
            self.split(conn)
        self._seal_some(conn)

    def split(self, conn: Connection) -> int:
        """Turn the staged rows into per-bed segments; how many staged rows went."""
        st = TABLES["obs_staging"]
        # SKIP LOCKED (PostgreSQL): two writers splitting at once take disjoint rows
        staged = conn.execute(select(st.c.id, st.c.data).order_by(st.c.id)
                              .with_for_update(skip_locked=True)).all()
        self.staged, self.staged_since = 0, None
        if not staged:
            return 0
        per = split_block(merge([decode(r.data) for r in staged]))
        rows = [chunk_row(bed_id, blk, False, 1) for bed_id, blk in sorted(per.items())]
        if rows:
            _insert(conn, rows)
        ids = [r.id for r in staged]
        for k in range(0, len(ids), 500):
            conn.execute(delete(st).where(st.c.id.in_(ids[k:k + 500])))
        t = TABLES["obs_chunks"]
        for r in rows:
            b = r["bed_id"]
            op = self.open.get(b)
            if op is None:               # read once per bed: it includes the rows just made
                op = self.open[b] = list(conn.execute(
                    select(func.count(), func.coalesce(func.sum(t.c.n_messages), 0))
                    .where(t.c.bed_id == b, t.c.sealed.is_(False))).one())
            else:
                op[0] += 1
                op[1] += r["n_messages"]
            if op[1] >= self.messages:
                self.to_seal[b] = True
            elif op[0] >= self.segments:
                self.to_seal.setdefault(b, False)
        return len(staged)

    def _seal_some(self, conn: Connection) -> None:
        n = SEALS_PER_WRITE + len(self.to_seal) // 16      # keeps up with any backlog
        for b in list(self.to_seal)[:n]:
            final = self.to_seal.pop(b)
            seal(conn, b, final=final)
            op = self.open.get(b)
            if op is not None:
                op[0], op[1] = (0, 0) if final else (1, op[1])

    def compact_all(self, conn: Connection) -> int:
        """A writer closing: split what is staged, seal the beds that are due, and merge
        every other bed's open segments into one (fewer, smaller rows; the messages stay in
        ``messages`` until the bed's chunk is really sealed)."""
        self.split(conn)
        while self.to_seal:
            self._seal_some(conn)
        t = TABLES["obs_chunks"]
        beds = [r[0] for r in conn.execute(
            select(t.c.bed_id).where(t.c.sealed.is_(False)).group_by(t.c.bed_id)
            .having(func.count() > 1))]
        for b in beds:
            seal(conn, b, final=False)
            if b in self.open:
                self.open[b][0] = 1
        return len(beds)


def _insert(conn: Connection, rows: list[dict[str, Any]]) -> None:
    if conn.dialect.name == "postgresql":
        from .pg import insert_chunks      # day partitions, COPY
        insert_chunks(conn, rows)
    else:
        conn.execute(insert(TABLES["obs_chunks"]), rows)


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
        # only messages up to the newest whose observations are in these segments: a later
        # message's observations may still be staged, and go into the next chunk with it
        upto = int(blk["o_mid"].max()) if len(blk.get("o_mid", ())) else -1
        msgs = conn.execute(select(*[mt.c[c] for c in _M_COLS]).where(
            mt.c.bed_id == bed_id, mt.c.kind == "obs", mt.c.id <= upto)
            .order_by(mt.c.id)).all()
        if msgs:
            cols = list(zip(*msgs))
            ids = list(cols[0])
            blk.update(m_id=np.array(cols[0], np.int64), m_rx=np.array(cols[1], np.float64),
                       m_topic=list(cols[2]), m_device=list(cols[3]),
                       m_seq=np.array(cols[4], np.int64).view(np.int64),
                       m_time=np.array(cols[5], np.float64),
                       m_late=np.array([bool(x) for x in cols[6]], bool),
                       m_nobs=np.array(cols[7], np.int64))
    _insert(conn, [chunk_row(bed_id, blk, final, 9 if final else 6)])
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
        b = decode(c.data, "m_")
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

class _Piece:
    """One bed's rows of a chunk or segment (decoded when asked), or of a staged block."""

    __slots__ = ("t_min", "id", "bed_id", "_data", "_blk")

    def __init__(self, t_min: float, id_: int, bed_id: int, data: bytes | None = None,
                 blk: dict[str, Any] | None = None) -> None:
        self.t_min, self.id, self.bed_id, self._data, self._blk = t_min, id_, bed_id, data, blk

    def block(self, columns: str) -> dict[str, Any]:
        if self._blk is not None:
            return self._blk
        assert self._data is not None
        return decode(self._data, columns)


def _chunks(conn: Connection, bed_ids: Iterable[int] | None, t0: float | None,
            t1: float | None, need: str) -> list[_Piece]:
    """The pieces to read, by t_min: the chunks and segments of the asked beds and times,
    and the asked beds' rows of the staged blocks, read in the same statement (one
    snapshot: a split committing meanwhile cannot show a row twice or not at all)."""
    t, st = TABLES["obs_chunks"], TABLES["obs_staging"]
    beds = list(bed_ids) if bed_ids is not None else None
    a = select(t.c.id, t.c.bed_id, t.c.t_min, t.c.data).where(
        (t.c.n_obs if need == "obs" else t.c.n_derived) > 0)
    b = select(st.c.id, null().label("bed_id"), st.c.t_min, st.c.data).where(
        (st.c.n_obs if need == "obs" else st.c.n_derived) > 0)
    if beds is not None:
        a = a.where(t.c.bed_id.in_(beds))
    for q, tab in ((0, t), (1, st)):
        cond = []
        if t0 is not None:
            cond.append(tab.c.t_max >= t0)
        if t1 is not None:
            cond.append(tab.c.t_min <= t1)
        if q == 0:
            a = a.where(*cond)
        else:
            b = b.where(*cond)
    u = union_all(a, b).subquery()
    out: list[_Piece] = []
    want = set(beds) if beds is not None else None
    prefix = "o_" if need == "obs" else "d_"
    for r in conn.execute(select(u).order_by(u.c.t_min, u.c.id)).all():
        if r.bed_id is not None:
            out.append(_Piece(r.t_min, r.id, r.bed_id, data=r.data))
            continue
        for bed_id, blk in sorted(split_block(decode(r.data, prefix), want).items()):
            out.append(_Piece(r.t_min, r.id, bed_id, blk=blk))
    return out


def _merge_rows(chunks: Sequence[Any], rows_of) -> Iterator[tuple]:
    """Rows (sort key first) of chunks sorted by t_min, merged into one ordered stream.

    Rows earlier than the next chunk's t_min cannot be overtaken and go out; the rest wait,
    sorted (each chunk's rows are nearly in order already, so the sorts are merges)."""
    pending: list[tuple] = []
    first = itemgetter(0)
    for c in chunks:
        if pending:
            k = bisect.bisect_left(pending, c.t_min, key=first)
            if k:
                yield from pending[:k]
                del pending[:k]
        pending.extend(rows_of(c))
        pending.sort()
    yield from pending


def iter_observations(conn: Connection, bed_ids: Iterable[int] | None = None,
                      params: Iterable[str] | None = None, t0: float | None = None,
                      t1: float | None = None, quality: Iterable[str] | None = None
                      ) -> Iterator[tuple]:
    """(time, message_id, bed_id, param, value, unit, status, raw_value, raw_unit, late,
    quality), ordered by time then arrival; ``quality``: only values of these qualities."""
    want = set(params) if params is not None else None
    qs = set(quality) if quality is not None else None

    def rows_of(c):
        b = c.block("o_")
        if "o_value" not in b:
            return []
        raw = b["o_value"].copy()
        raw[b["o_conv"]] = b["o_raw"]
        t = b["o_time"]
        q = qualities(b, "o")
        sel = np.ones(len(t), bool)         # the asked parameters, times, qualities: arrays
        if want is not None:
            sel &= np.isin(np.array(b["o_param"], dtype=object), list(want))
        if t0 is not None:
            sel &= t >= t0
        if t1 is not None:
            sel &= t <= t1
        if qs is not None:
            sel &= np.isin(np.array(q, dtype=object), list(qs))
        idx = np.flatnonzero(sel)
        ks = idx.tolist()

        def pick(col: list) -> list:
            return [col[k] for k in ks]

        return list(zip(t[idx].tolist(), b["o_mid"][idx].tolist(), ks,
                        repeat(c.bed_id, len(ks)), pick(b["o_param"]),
                        b["o_value"][idx].tolist(), pick(b["o_unit"]), pick(b["o_status"]),
                        raw[idx].tolist(), pick(b["o_raw_unit"]), b["o_late"][idx].tolist(),
                        pick(q)))

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
        b = c.block("d_")
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
