"""Observations and derived values as per-bed chunks of compact columns.

The writer turns each batch's ``observations`` (tuples, :data:`OBSERVATION_COLUMNS`) and
``derived`` rows into one *segment* per bed: a row of ``obs_chunks`` whose ``data`` is a
:mod:`.codec` block. When a bed has ``chunk_messages`` observation messages (or
``chunk_segments`` segments) unsealed, its segments are merged into one *sealed* chunk,
compressed harder, in the same transaction. Chunks may overlap in time (late messages,
interleaved segments); readers merge them in order.

Writing lives here (staging, splitting, sealing); reading in :mod:`.reading`.
"""

from __future__ import annotations

import threading
import time as _time
from typing import Any, Sequence

import numpy as np
from sqlalchemy import delete, func, insert, select
from sqlalchemy.engine import Connection

from ..core.quality import OK, from_status
from . import codec
from .provenance import pack_inputs
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
#: default of [store] stage_groups: a batch is staged as one row per group of beds (bed id
#: modulo this), and the groups are split in turn, one every 1/groups of the staging period.
#: 1 (default): one encoded row per batch, a whole split at once, the most throughput. More
#: groups spread the split (which holds the interpreter for about 0.5 s at 1,000 beds) at
#: the price of one encoded row per group per batch: at 1,000 msg/s, 16 groups cut the alarm
#: p99 from 425-930 ms to 87 ms, and at 2,000 beds cost a fifth of the broker path's rate
#: (docs/performance.md)
STAGE_GROUPS = 1
#: beds sealed per write transaction at least (more while a backlog waits)
SEALS_PER_WRITE = 4


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
                   d_inputs_text=[pack_inputs(t, d["inputs"], d.get("pairs"))
                                  for t, d in zip(times, der)])
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


_STAGING_KEYS = ("t_min", "t_max", "n_messages", "n_obs", "n_derived", "mid_max", "seq_max",
                 "data")


def staging_row(blk: dict[str, Any]) -> dict[str, Any]:
    """The ``obs_staging`` row of a staged block: a segment's row without the bed and the
    sealed messages' columns (zlib level 1: it lives about a minute)."""
    row = chunk_row(0, blk, False, 1)
    return {k: row[k] for k in _STAGING_KEYS}


class Chunker:
    """Per engine: the next derived sequence number, what is staged, each bed's unsealed
    segments, and the beds waiting to be sealed.

    A write batch becomes one staged row per group of beds (``groups``). Every 1/groups of
    ``stage_messages`` staged messages or of ``stage_s`` seconds, the next group's staged
    rows (in turn) become one segment per bed; a bed with ``messages`` observation messages
    in segments is queued for sealing, and each write seals a few queued beds (a ward that
    started at once does not seal every bed in one transaction)."""

    def __init__(self, messages: int = CHUNK_MESSAGES, segments: int = CHUNK_SEGMENTS,
                 stage_messages: int = STAGE_MESSAGES, stage_s: float = STAGE_S,
                 groups: int = STAGE_GROUPS) -> None:
        self.messages, self.segments = messages, segments
        self.stage_messages, self.stage_s = stage_messages, stage_s
        self.groups = groups
        self.next_seq: int | None = None
        self.open: dict[int, list[int]] = {}      # bed_id -> [segments, messages] unsealed
        self.staged: int | None = None            # messages staged since the last split
        self.staged_since: float | None = None    # monotonic: last split, or first staging
        self.to_seal: dict[int, bool] = {}        # bed_id -> final, in the order queued
        self.next_group = 0                       # the group of beds to split next
        self.group_staged = [0] * groups          # messages staged per group (as known)
        #: where derived sequence numbers come from: this chunker, or the engine's one that
        #: several writers of a process share (under its lock)
        self.seq_source: Chunker = self
        self._seq_lock = threading.Lock()

    def take_seq(self, conn: Connection, n: int) -> int:
        """The first of ``n`` new derived-value sequence numbers."""
        src = self.seq_source
        with src._seq_lock:
            if src.next_seq is None:
                t, st = TABLES["obs_chunks"], TABLES["obs_staging"]
                src.next_seq = max(
                    conn.execute(select(func.max(t.c.seq_max))).scalar() or 0,
                    conn.execute(select(func.max(st.c.seq_max))).scalar() or 0) + 1
            first = src.next_seq
            src.next_seq += n
        return first

    def write(self, conn: Connection, obs: list[Any], der: list[Any]) -> None:
        st = TABLES["obs_staging"]
        G = self.groups
        if len(self.group_staged) != G:                   # configured after it was made
            self.group_staged = [0] * G
            self.next_group = 0
        if self.staged is None:
            for g, n in conn.execute(select(st.c.grp, func.sum(st.c.n_messages))
                                     .group_by(st.c.grp)):
                self.group_staged[int(g) % G] += int(n or 0)
            self.staged = sum(self.group_staged)
            if self.staged:
                self.staged_since = _time.monotonic()
        if obs or der:
            per: dict[int, tuple[list, list]] = {}        # the batch by group of beds
            for o in obs:
                per.setdefault(o[1] % G, ([], []))[0].append(o)
            for d in der:
                per.setdefault(d["bed_id"] % G, ([], []))[1].append(d)
            rows = []
            for g, (o_g, d_g) in sorted(per.items()):
                row = staging_row(block_of(o_g, d_g, self.take_seq(conn, len(d_g)),
                                           beds=True))
                row["grp"] = g
                rows.append(row)
                self.staged += max(row["n_messages"], 1)
                self.group_staged[g] += max(row["n_messages"], 1)
            conn.execute(insert(st), rows)
            if self.staged_since is None:
                self.staged_since = _time.monotonic()
        # one group at a time, in turn, every 1/groups of the staging period: each group's
        # rows wait about stage_messages / stage_s, and the work comes in even parts
        if self.staged and (self.staged * G >= self.stage_messages or
                            (_time.monotonic() - (self.staged_since or 0)) * G
                            >= self.stage_s):
            self.staged, self.staged_since = 0, _time.monotonic()
            for k in range(G):                       # the next group that holds anything
                g = (self.next_group + k) % G
                if self.group_staged[g]:
                    self.split(conn, g)
                    self.next_group = (g + 1) % G
                    break
        self._seal_some(conn)

    def split(self, conn: Connection, group: int | None = None) -> int:
        """Turn the staged rows (of one group of beds, or all) into per-bed segments; how
        many staged rows went."""
        st = TABLES["obs_staging"]
        # SKIP LOCKED (PostgreSQL): two writers splitting at once take disjoint rows
        stmt = select(st.c.id, st.c.data)
        if group is not None:        # (rows of an earlier setting of groups: by modulo)
            stmt = stmt.where(st.c.grp % self.groups == group)
        staged = conn.execute(stmt.order_by(st.c.id).with_for_update(skip_locked=True)).all()
        if group is None:
            self.staged, self.staged_since = 0, None
            self.group_staged = [0] * self.groups
        else:
            self.group_staged[group] = 0
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
