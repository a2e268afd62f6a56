"""Compact, value-exact columns: the byte format of an observation chunk.

A *block* is a dict of columns (numpy arrays or lists of text). :func:`encode` turns it into
bytes and :func:`decode` back, bit for bit:

- float64: when every value is an integer multiple of 10^-k (k in 0..6) and survives the
  round trip ``round(v * 10^k) / 10^k`` bit for bit, the integers are stored, differenced;
  otherwise the IEEE bits themselves. Either way the eight bytes of each number are then
  regrouped byte by byte ("shuffled"), so the compressor sees long runs of equal high bytes.
- int64: differenced (wrapping, exact) and shuffled.
- text: a dictionary per column and an index array (a chunk holds one topic, one device and a
  handful of parameter names and units).
- free text: lengths and UTF-8 bytes.
- ``perm``: a float column can be stored sorted by another column (e.g. values by parameter,
  so consecutive numbers belong to the same series and difference to small integers).

The whole is compressed once with zlib. A reader needs only numpy and this module.

>>> blk = {"v": np.array([72.0, 36.9, -0.0, 1e300]), "s": ["HR", "TEMP", "HR", "HR"]}
>>> out = decode(encode(blk))
>>> out["v"].tolist(), out["s"]
([72.0, 36.9, -0.0, 1e+300], ['HR', 'TEMP', 'HR', 'HR'])
"""

from __future__ import annotations

import json
import math
import struct
import zlib
from typing import Any

import numpy as np

MAGIC = b"HSC1"
_SCALES = (0, 1, 2, 3, 4, 5, 6)


def _shuffle(a: np.ndarray) -> bytes:
    return a.view(np.uint8).reshape(-1, 8).T.tobytes() if a.size else b""


def _unshuffle(b: bytes, n: int, dtype) -> np.ndarray:
    if not n:
        return np.zeros(0, dtype)
    return np.frombuffer(b, np.uint8).reshape(8, n).T.copy().view(dtype).reshape(n)


def _delta(a: np.ndarray) -> np.ndarray:
    out = a.copy()
    if a.size > 1:
        out[1:] = a[1:] - a[:-1]
    return out


def _undelta(a: np.ndarray) -> np.ndarray:
    return np.cumsum(a, dtype=np.int64)


def _first_scale(v: float) -> int | None:
    """The smallest k for which ``v`` alone passes the round trip (a lower bound for the
    column's k: a smaller k fails for this value, so for the column), or None if none does
    (the column's doubles are stored as bits). Plain float arithmetic, the same as numpy's
    for one element, so the column's own check below decides as before."""
    for k in _SCALES:
        s = float(10 ** k)
        x = v * s
        if abs(x) >= 2.0 ** 53:
            return None
        if float(round(x)) / s == v:
            return k
    return None


def _float_col(a: np.ndarray) -> tuple[dict, bytes]:
    a = np.ascontiguousarray(a, dtype=np.float64)
    k0 = _first_scale(float(a[0])) if a.size and math.isfinite(a[0]) else None
    if k0 is not None and np.all(np.isfinite(a)):
        bits = a.view(np.int64)
        for k in _SCALES[k0:]:
            s = float(10 ** k)
            with np.errstate(over="ignore"):      # a huge value scaled: inf, caught below
                scaled = a * s
            if np.max(np.abs(scaled)) >= 2.0 ** 53:
                break
            ints = np.rint(scaled).astype(np.int64)
            if np.array_equal((ints.astype(np.float64) / s).view(np.int64), bits):
                return {"e": "fd", "k": k}, _shuffle(_delta(ints))
    return {"e": "fb"}, _shuffle(a)


def encode(block: dict[str, Any], level: int = 6, perm: dict[str, str] | None = None) -> bytes:
    """Bytes of ``block``; ``perm`` maps a float column to the text column it is sorted by."""
    perm = perm or {}
    meta, parts = [], []
    seen: dict[str, tuple[list, np.ndarray]] = {}     # each text column's codes, made once

    def codes(name: str) -> tuple[list, np.ndarray]:
        if name not in seen:
            seen[name] = _codes(block[name])
        return seen[name]

    for name, col in block.items():
        if isinstance(col, np.ndarray) and col.dtype.kind == "f":
            if name in perm:
                key = np.asarray(codes(perm[name])[1])
                order = np.argsort(key, kind="stable")
                m, b = _float_col(col[order])
                m["p"] = perm[name]
            else:
                m, b = _float_col(col)
        elif isinstance(col, np.ndarray) and col.dtype.kind == "b":
            m, b = {"e": "b"}, np.packbits(col).tobytes()
        elif isinstance(col, np.ndarray):
            m, b = {"e": "i"}, _shuffle(_delta(col.astype(np.int64)))
        elif col and isinstance(col[0], str) and name.endswith("_text"):
            enc = [s.encode() for s in col]
            lens = np.array([len(x) for x in enc], np.int64)
            m, b = {"e": "t", "L": len(lens) * 8}, _shuffle(lens) + b"".join(enc)
        else:
            uniq, idx = codes(name)
            m, b = {"e": "s", "d": uniq}, idx.astype(np.uint16 if len(uniq) > 255
                                                      else np.uint8).tobytes()
        m["c"], m["n"], m["z"] = name, len(col), len(b)
        meta.append(m)
        parts.append(b)
    head = json.dumps(meta, separators=(",", ":")).encode()
    return MAGIC + zlib.compress(struct.pack("<I", len(head)) + head + b"".join(parts), level)


_CODE_CACHE: dict[int, tuple[list, np.ndarray]] = {}


def _codes(col: list) -> tuple[list, np.ndarray]:
    """The distinct values in first-seen order, and each value's index among them.

    >>> d, c = _codes(["HR", "CVP", "HR", None])
    >>> d, c.tolist()
    (['HR', 'CVP', None], [0, 1, 0, 2])
    """
    uniq = list(dict.fromkeys(col))
    index = {v: i for i, v in enumerate(uniq)}
    return uniq, np.fromiter(map(index.__getitem__, col), np.int64, len(col))


def decode(data: bytes, columns: Any = None) -> dict[str, Any]:
    """The block of ``data``; ``columns``: only these (a container of names, or a prefix
    string such as ``"o_"``), to read less of a chunk."""
    if data[:4] != MAGIC:
        raise ValueError("not an observation chunk")
    raw = zlib.decompress(data[4:])
    (hl,) = struct.unpack_from("<I", raw)
    meta = json.loads(raw[4:4 + hl])
    pos = 4 + hl
    if columns is not None:
        def wanted(c: str) -> bool:
            return c.startswith(columns) if isinstance(columns, str) else c in columns
        keep = {m["c"] for m in meta if wanted(m["c"])}
        keep |= {m["p"] for m in meta if m["c"] in keep and "p" in m}
        starts = []
        for m in meta:
            starts.append(pos)
            pos += m["z"]
        pairs = [(m, p) for m, p in zip(meta, starts) if m["c"] in keep]
    else:
        pairs = []
        for m in meta:
            pairs.append((m, pos))
            pos += m["z"]
    out: dict[str, Any] = {}
    codes_of: dict[str, np.ndarray] = {}      # text columns' indexes (first-seen order)
    sorted_by: list[tuple[str, str]] = []
    for m, pos in pairs:
        b = raw[pos:pos + m["z"]]
        n, e = m["n"], m["e"]
        v: Any
        if e == "fd":
            v = _undelta(_unshuffle(b, n, np.int64)).astype(np.float64) / float(10 ** m["k"])
        elif e == "fb":
            v = _unshuffle(b, n, np.float64)
        elif e == "b":
            v = np.unpackbits(np.frombuffer(b, np.uint8))[:n].astype(bool)
        elif e == "i":
            v = _undelta(_unshuffle(b, n, np.int64))
        elif e == "t":
            lens = _unshuffle(b[:m["L"]], n, np.int64)
            body = b[m["L"]:]
            v, p = [], 0
            for ln in lens.tolist():
                v.append(body[p:p + ln].decode())
                p += ln
        else:
            d = m["d"]
            codes = np.frombuffer(b, np.uint16 if len(d) > 255 else np.uint8)
            codes_of[m["c"]] = codes
            v = np.array(d, dtype=object)[codes].tolist() if d else []
        if "p" in m:
            sorted_by.append((m["c"], m["p"]))
        out[m["c"]] = v
    for name, key in sorted_by:
        # the dictionary is in first-seen order, so the stored indexes are _codes' own
        key_codes = codes_of.get(key)
        if key_codes is None:
            key_codes = _codes(out[key])[1]
        order = np.argsort(key_codes, kind="stable")
        v = np.empty_like(out[name])
        v[order] = out[name]
        out[name] = v
    return out
