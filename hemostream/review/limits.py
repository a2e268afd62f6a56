"""The limits and pattern thresholds that applied, for drawing (pure).

The configuration is the one stored with the data (``config_snapshots``, written by replay and
run when a configuration comes into force), so a review shows what the alarms were computed
with, not today's file. Only for a database that holds no stored configuration does the
report fall back to the configuration it was given.

:func:`limit_lines` holds the one piece of override logic of the review: the configuration's
limits with low/high replaced by the admission in effect. It is meant to give way to the
rules package's own merge function once that exists.
"""

from __future__ import annotations

import json
import warnings
from dataclasses import dataclass
from typing import Any

from pydantic import ValidationError

from ..core.config import Config
from ..core.rules.limits import applied_limits, limit_overrides
from ..store import canonical_config


@dataclass
class LimitLine:
    name: str                  # e.g. "HR high"
    side: str                  # low | high
    steps: list[tuple[float, float, float]]   # (from, to, threshold)
    source: str = "configuration"


@dataclass
class RefLine:
    label: str
    value: float


@dataclass
class LimitsSource:
    """The configuration the limits are drawn from, and where it came from."""

    config: Config
    stored: bool                 # from the data (True) or the report's own (False)
    sha256: str
    note: str = ""


def config_for_limits(snapshot: dict[str, Any] | None, fallback: Config) -> LimitsSource:
    """The stored configuration ``snapshot`` (parsed JSON) as a model, else ``fallback``.

    >>> s = config_for_limits(None, Config())
    >>> s.stored, len(s.sha256)
    (False, 64)
    """
    if snapshot is not None:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                cfg = Config.model_validate(snapshot)
            return LimitsSource(cfg, True, canonical_config(snapshot)[1])
        except ValidationError as e:
            note = (f"the stored configuration could not be read by this version "
                    f"({e.error_count()} problem(s)); ")
        else:  # pragma: no cover
            note = ""
    else:
        note = "the database holds no stored configuration; "
    return LimitsSource(fallback, False, canonical_config(fallback)[1],
                        note + "limits are those of the configuration given to the report")


def limit_lines(cfg: Config, admissions: list[dict[str, Any]], params: tuple[str, ...],
                t0: float, t1: float) -> list[LimitLine]:
    """The limits in effect over [t0, t1]: the configuration's, with low/high replaced by the
    admission in effect (a later admission replaces the earlier; a discharge resets)."""
    if not cfg.rules.enabled:
        return []
    cuts = sorted({t0, t1, *[float(a["time"]) for a in admissions if t0 < a["time"] < t1]})
    segs = list(zip(cuts, cuts[1:])) or [(t0, t1)]

    def override_at(t: float) -> dict[str, dict[str, float]]:
        cur: dict[str, dict[str, float]] = {}
        for a in admissions:
            if a["time"] > t:
                break
            if a["discharged"]:
                cur = {}
                continue
            try:
                cur = json.loads(a["limits"] or "{}")
            except ValueError:
                cur = {}
        return cur

    out = []
    for p in params:
        for side in ("low", "high"):
            steps: list[tuple[float, float, float]] = []
            overridden = False
            for a, b in segs:
                raw = override_at(a)        # the one merge rule, as the rules engine applies it
                thr = applied_limits(cfg.rules.limits, raw).get(p, {}).get(side)
                if side in limit_overrides(raw).get(p, {}):
                    overridden = True
                if thr is None:
                    continue
                if steps and steps[-1][2] == thr and steps[-1][1] == a:
                    steps[-1] = (steps[-1][0], b, thr)
                else:
                    steps.append((a, b, float(thr)))
            if steps:
                out.append(LimitLine(f"{p} {side}", side, steps,
                                     "admission override" if overridden else "configuration"))
    return out


def ref_lines(cfg: Config, params: tuple[str, ...]) -> list[RefLine]:
    """Level thresholds of the enabled pattern rules on these parameters (e.g. SI >= 0.9)."""
    if not cfg.rules.enabled:
        return []
    out: list[RefLine] = []
    for rid, pat in cfg.rules.patterns.items():
        if not pat.enabled:
            continue
        terms = list(pat.terms) + [t for tier in pat.tiers for t in tier.terms]
        for term in terms:
            ps = [term.param] if isinstance(term.param, str) else list(term.param)
            if not ps or ps[0] not in params:
                continue
            if term.at_least is not None:
                out.append(RefLine(f"{rid} \u2265 {term.at_least:g}", term.at_least))
            if term.below is not None:
                out.append(RefLine(f"{rid} < {term.below:g}", term.below))
    seen, uniq = set(), []
    for r in out:
        if (r.label, r.value) not in seen:
            seen.add((r.label, r.value))
            uniq.append(r)
    return uniq
