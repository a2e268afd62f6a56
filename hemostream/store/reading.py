"""Reading observations and derived values back out of chunks, segments and staged rows.

Order: observations come back by (time, message id, position in the message), which is the
order of the old one-row-per-observation table (by time, then insertion); derived values by
(time, writer sequence number), likewise. Chunks may overlap in time (late messages,
interleaved segments, staged rows); the readers merge them in order.
"""

from __future__ import annotations

import bisect
from itertools import repeat
from operator import itemgetter
from typing import Any, Iterable, Iterator, Sequence

import numpy as np
from sqlalchemy import null, select, union_all
from sqlalchemy.engine import Connection

from ..core.quality import from_status
from .chunks import decode, qualities, split_block
from .provenance import unpack_inputs
from .schema import TABLES


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

    def meeting(stmt, tab):             # rows with values of the kind, in the time range
        stmt = stmt.where((tab.c.n_obs if need == "obs" else tab.c.n_derived) > 0)
        if t0 is not None:
            stmt = stmt.where(tab.c.t_max >= t0)
        if t1 is not None:
            stmt = stmt.where(tab.c.t_min <= t1)
        return stmt

    a = meeting(select(t.c.id, t.c.bed_id, t.c.t_min, t.c.data), t)
    if beds is not None:
        a = a.where(t.c.bed_id.in_(beds))
    b = meeting(select(st.c.id, null().label("bed_id"), st.c.t_min, st.c.data), st)
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
        sel = np.ones(len(t), bool)         # the asked parameters and times: arrays
        if want is not None:
            sel &= np.isin(np.array(b["o_param"], dtype=object), list(want))
        if t0 is not None:
            sel &= t >= t0
        if t1 is not None:
            sel &= t <= t1
        idx = np.flatnonzero(sel)
        ks = idx.tolist()

        def pick(col: list) -> list:
            return [col[k] for k in ks]

        # qualities of the kept rows only (a one-parameter query keeps about a tenth)
        stored_q = b.get("o_quality")
        q = pick(stored_q) if stored_q is not None else [
            from_status(s) for s in pick(b["o_status"])]
        if qs is not None:
            keep = [i for i, x in enumerate(q) if x in qs]
            if len(keep) < len(ks):
                idx = idx[keep]
                ks = idx.tolist()
                q = [q[i] for i in keep]

        return list(zip(t[idx].tolist(), b["o_mid"][idx].tolist(), ks,
                        repeat(c.bed_id, len(ks)), pick(b["o_param"]),
                        b["o_value"][idx].tolist(), pick(b["o_unit"]), pick(b["o_status"]),
                        raw[idx].tolist(), pick(b["o_raw_unit"]), b["o_late"][idx].tolist(),
                        q))

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
            out.append((t, sq, c.bed_id, p, v, u, unpack_inputs(t, it), q))
        return out

    yield from _merge_rows(_chunks(conn, bed_ids, t0, t1, "derived"), rows_of)
