"""A derived value's provenance (its inputs and their times) as stored in a chunk: each input
time written as its offset from the value's own time when that round-trips exactly."""

from __future__ import annotations

import json
from typing import Any

from ..core.outputs import inputs_json


def pack_inputs(d_time: float, text: str, given: Any = None) -> str:
    """Provenance text, with each input time written as its offset from the value's own time
    when that round-trips exactly ('=' prefix keeps any other text verbatim). ``given``: the
    (param, time) pairs the text was made of by :func:`inputs_json` (the core's derived rows
    carry them as ``pairs``), which saves parsing the text back."""
    try:
        if given is not None:
            pairs = given
        else:
            pairs = json.loads(text)
            if inputs_json((p, t) for p, t in pairs) != text:
                raise ValueError
        parts = []
        for p, t in pairs:
            off = d_time - t
            if type(t) is not float or d_time - off != t or "," in p or ":" in p:
                raise ValueError
            parts.append(f"{p}:{off!r}" if off else p)
        return ",".join(parts)
    except (ValueError, TypeError):
        return "=" + text


def unpack_inputs(d_time: float, s: str) -> str:
    if s.startswith("="):
        return s[1:]
    if not s:
        return "[]"
    pairs = []
    for part in s.split(","):
        p, _, off = part.partition(":")
        pairs.append((p, d_time - float(off) if off else d_time))
    return inputs_json(pairs)
