"""Rejects: bad input becomes a row with a category and a reason that names the field, what
was expected and what came."""

from __future__ import annotations

import json
from typing import Any

from pydantic import ValidationError


class RecordingLineBytes(bytes):
    """A whole recording line standing in for its payload (the replay's fast path); a reject
    stores the payload part of it, like any other reject."""


class Reject(Exception):
    def __init__(self, category: str, reason: str) -> None:
        super().__init__(reason)
        self.category = category
        self.reason = reason


def format_validation_error(err: ValidationError, limit: int = 5, prefix: str = "") -> str:
    """Turn pydantic's errors into one line a person can act on: field path, problem, input.
    ``prefix`` names where the validated part sits (``obs[1].``)."""
    parts = []
    for e in err.errors(include_url=False)[:limit]:
        loc = prefix.rstrip(".")
        for item in e["loc"]:
            if isinstance(item, int):
                loc += f"[{item}]"
            else:
                loc += ("." if loc else "") + str(item)
        msg = e["msg"].removeprefix("Value error, ")
        if e["type"] == "json_invalid":
            parts.append(f"payload is not valid JSON ({e.get('ctx', {}).get('error', msg)})")
            continue
        if e["type"] == "model_type" or e["type"] == "model_attributes_type":
            parts.append("payload must be a JSON object")
            continue
        got = e.get("input")
        shown = "" if e["type"] == "missing" or not e["loc"] else f" (got {short(got)})"
        parts.append(f"{loc or 'payload'}: {msg}{shown}")
    more = len(err.errors()) - limit
    if more > 0:
        parts.append(f"and {more} more problem(s)")
    return "; ".join(parts)


def short(v: Any) -> str:
    r = json.dumps(v, default=str) if not isinstance(v, str) else repr(v)
    return r if len(r) <= 60 else r[:57] + "..."


def category_of(err: ValidationError) -> str:
    errs = err.errors(include_url=False)
    first = errs[0]
    if first["type"] == "json_invalid":
        return "invalid_json"
    if first["loc"] and first["loc"][0] == "v":
        return "bad_version"
    if any(e["type"] == "missing" for e in errs):
        return "missing_field"
    return "bad_field"


def reject_row(category: str, reason: str, topic: str, payload: bytes | str | dict,
               rx: float | None, obs_index: int | None, device: str | None,
               seq: int | None, keep_bytes: int) -> dict[str, Any]:
    """The ``rejected`` row: the first ``keep_bytes`` of the payload's bytes and its size."""
    if isinstance(payload, RecordingLineBytes):
        try:
            payload = json.loads(payload)["payload"]
        except (ValueError, KeyError, TypeError):
            pass
    if isinstance(payload, dict):
        raw = json.dumps(payload, separators=(",", ":"), default=str).encode()
    elif isinstance(payload, str):
        raw = payload.encode("utf-8", "surrogateescape")
    else:
        raw = bytes(payload)
    return {"rx": rx, "topic": topic[:512], "category": category, "reason": reason,
            "obs_index": obs_index, "device": device, "seq": seq,
            "raw": raw[:keep_bytes], "size": len(raw)}
