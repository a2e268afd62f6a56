"""Technical conditions (IEC 60601-1-8 keeps them apart from physiological ones):
configuration, and the conditions themselves.

- ``feed_silent``: a watched parameter sent nothing for its ``feed_silent_after_s`` while its
  device still talks;
- ``device_silent``: a device sent nothing for ``device_silent_after_s`` (its feeds are then
  not listed as well);
- ``values_not_valid``: values with a not-valid status for ``not_valid_after_s``;
- ``artifact_suspected``: a flush / zeroing / damping signature that lasted (see
  :mod:`.artifacts`).

Each is one alarm per bed that lists what it concerns; a change of the list updates it.
Acknowledging one (with ``alarms.acknowledge_clears_technical``) clears it and stops watching
what it listed until that sends again. Pure: no I/O, no clock.
"""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel, Field, field_validator

from ..alarms import Priority, RuleEvent
from ..wire import PARAMS
from .artifacts import ArtifactDetector
from .common import (ARTIFACT, DELAY_TOLERANCE_S, DEVICE_SILENT, FEED_SILENT, NINF, NOT_VALID,
                     STRICT, PosSeconds, Seconds)
from .state import BedState, Shared

__all__ = ["TechnicalConfig", "Technical"]


# --------------------------------------------------------------------------- configuration


def _default_feed_silent() -> dict[str, float]:
    # Continuous channels only (about 1 value a second from a gateway); intermittent ones
    # (cuff, wedge, thermodilution CO) have no expected interval and are not watched.
    return {p: 30.0 for p in ("HR", "PR", "ABP_SYS", "ABP_DIA", "ABP_MEAN", "CVP",
                              "PAP_SYS", "PAP_DIA", "PAP_MEAN", "SPO2", "RR")}


NotValid = Literal["invalid", "questionable", "calibrating", "test"]
_NOT_VALID: tuple[NotValid, ...] = ("invalid", "questionable")

class TechnicalConfig(BaseModel):
    """Technical alarm conditions (IEC 60601-1-8 keeps them apart from physiological ones)."""

    model_config = STRICT
    #: measured parameter -> seconds without a value after which its feed counts as silent
    feed_silent_after_s: dict[str, PosSeconds] = Field(default_factory=_default_feed_silent)
    feed_silent_priority: Priority = "low"
    #: a device that sent nothing for this long is silent (its feeds are then not listed)
    device_silent_after_s: PosSeconds = 30.0
    device_silent_priority: Priority = "medium"
    #: statuses that count as not valid, and how long before it is a condition
    not_valid_statuses: list[NotValid] = Field(default_factory=lambda: list(_NOT_VALID))
    not_valid_after_s: Seconds = 30.0
    not_valid_priority: Priority = "low"

    @field_validator("feed_silent_after_s")
    @classmethod
    def _measured(cls, v: dict[str, float]) -> dict[str, float]:
        bad = [p for p in v if p not in PARAMS]
        if bad:
            raise ValueError(f"unknown measured parameter(s) {bad}; expected names from "
                             + ", ".join(PARAMS))
        return v


# --------------------------------------------------------------------------- conditions


class Technical:
    """Feeds, devices, values not valid and suspected artifacts of the beds."""

    def __init__(self, sh: Shared, art: ArtifactDetector) -> None:
        self.sh = sh
        self.cfg = cfg = sh.cfg
        self.art = art
        te = cfg.technical
        self.feed_after = dict(te.feed_silent_after_s)
        self.feed_params = tuple(te.feed_silent_after_s)
        self.nv_statuses = tuple(te.not_valid_statuses)

    # ------------------------------------------------------------------ per message

    def on_values(self, b: BedState, t: float, seen: float, new: frozenset[str],
                  nonvalid: dict[str, str], device: str, ev: list[RuleEvent]) -> None:
        """Device and feeds heard at ``seen`` (the later of message time and clock), and the
        statuses of the message at ``t``."""
        sh = self.sh
        bed = b.key
        if device not in b.dev_sched:
            b.dev_sched[device] = None
            sh.schedule(seen + self.cfg.technical.device_silent_after_s, "device", bed, device)
        b.dev_last[device] = seen
        feed_changed = False
        if device in b.dev_silent or device in b.dev_ignored:
            b.dev_silent.pop(device, None)
            b.dev_ignored.pop(device, None)
            ev += self.device_alarm(b, t)
            feed_changed = True
        fa = self.feed_after
        for p in self.feed_params:
            if p in new:
                b.last_seen[p] = seen
                b.param_device[p] = device
                if p not in b.feed_sched:
                    b.feed_sched[p] = None
                    sh.schedule(seen + fa[p], "feed", bed, p)
                if p in b.silent:
                    del b.silent[p]
                    feed_changed = True
                if p in b.ignored:
                    del b.ignored[p]
        if feed_changed:
            ev += self.feed_alarm(b, t)

        # values not valid
        if nonvalid:
            for p, s in nonvalid.items():
                if s in self.nv_statuses and p not in b.notvalid:
                    b.notvalid[p] = (t, s)
                    sh.schedule(t + self.cfg.technical.not_valid_after_s, "notvalid", bed, p)
        if b.notvalid:
            gone = [p for p in b.notvalid if p in new]
            if gone:
                for p in gone:
                    del b.notvalid[p]
            ev += self.not_valid_alarm(b, t)

    # ------------------------------------------------------------------ the alarms

    def _aggregate(self, b: BedState, rule: str, t: float, items: list[str],
                   priority: Priority, details: dict, message: str) -> list[RuleEvent]:
        book = self.sh.book
        if items:
            return book.condition(b.key, rule, t, priority, "technical", None, details,
                                  signature=tuple(items), message=message)
        return book.condition_ended(b.key, rule, t)

    def feed_alarm(self, b: BedState, t: float) -> list[RuleEvent]:
        # a feed counts as silent only while its device still talks; when the device went
        # quiet as a whole, device_silent says so once instead of a list of feeds
        after = self.cfg.technical.device_silent_after_s
        items = []
        for p in sorted(b.silent):
            d = b.param_device.get(p)
            if (d is None or d in b.dev_silent or d in b.dev_ignored
                    or t - b.dev_last.get(d, NINF) >= after):
                continue
            items.append(p)
        if not items and self.sh.book.get(b.key, FEED_SILENT) is None:
            return []
        return self._aggregate(
            b, FEED_SILENT, t, items, self.cfg.technical.feed_silent_priority,
            {"params": items, "silent_since": {p: b.silent[p] for p in items},
             "after_s": {p: self.feed_after[p] for p in items}},
            "no values from " + ", ".join(items) if items else "")

    def device_alarm(self, b: BedState, t: float) -> list[RuleEvent]:
        items = sorted(b.dev_silent)
        if not items and self.sh.book.get(b.key, DEVICE_SILENT) is None:
            return []
        return self._aggregate(
            b, DEVICE_SILENT, t, items, self.cfg.technical.device_silent_priority,
            {"devices": items, "silent_since": {d: b.dev_silent[d] for d in items},
             "after_s": self.cfg.technical.device_silent_after_s},
            "no messages from " + ", ".join(items) if items else "")

    def not_valid_alarm(self, b: BedState, t: float) -> list[RuleEvent]:
        after = self.cfg.technical.not_valid_after_s
        items = sorted(p for p, (s, _) in b.notvalid.items() if t - s >= after - DELAY_TOLERANCE_S)
        if not items and self.sh.book.get(b.key, NOT_VALID) is None:
            return []
        return self._aggregate(
            b, NOT_VALID, t, items, self.cfg.technical.not_valid_priority,
            {"params": items, "status": {p: b.notvalid[p][1] for p in items},
             "since": {p: b.notvalid[p][0] for p in items}, "after_s": after},
            "values not valid: " + ", ".join(items) if items else "")

    def artifact_alarm(self, b: BedState, t: float) -> list[RuleEvent]:
        items = sorted(self.art.suspected(b.art, t))
        if not items and self.sh.book.get(b.key, ARTIFACT) is None:
            return []
        return self._aggregate(
            b, ARTIFACT, t, items, self.cfg.artifacts.suspected_priority,
            {"channels": items, "since": {c: b.art.sig_since[c] for c in items},
             "after_s": self.cfg.artifacts.suspected_after_s},
            "suspected artifact on " + ", ".join(items) if items else "")

    # ------------------------------------------------------------------ timers

    def feed_timer(self, b: BedState, p: str, now: float, ev: list[RuleEvent]) -> None:
        last = b.last_seen.get(p)
        if last is None or p in b.silent or p in b.ignored:
            b.feed_sched.pop(p, None)
            return
        due = last + self.feed_after[p]
        if now >= due:
            b.feed_sched.pop(p, None)
            b.silent[p] = now
            ev += self.feed_alarm(b, now)
        else:
            self.sh.schedule(due, "feed", b.key, p)

    def device_timer(self, b: BedState, d: str, now: float, ev: list[RuleEvent]) -> None:
        last = b.dev_last.get(d)
        if last is None or d in b.dev_silent or d in b.dev_ignored:
            b.dev_sched.pop(d, None)
            return
        due = last + self.cfg.technical.device_silent_after_s
        if now >= due:
            b.dev_sched.pop(d, None)
            b.dev_silent[d] = now
            ev += self.device_alarm(b, now)
            ev += self.feed_alarm(b, now)
        else:
            self.sh.schedule(due, "device", b.key, d)

    def acknowledged(self, b: BedState, rule: str) -> None:
        """A technical alarm was acknowledged (and cleared): stop watching what it listed
        until that sends again."""
        if rule == FEED_SILENT:
            for p in list(b.silent):
                b.ignored[p] = None
            b.silent.clear()
        elif rule == DEVICE_SILENT:
            for d in list(b.dev_silent):
                b.dev_ignored[d] = None
            b.dev_silent.clear()
        elif rule == NOT_VALID:
            b.notvalid.clear()
        elif rule == ARTIFACT:
            for ch in list(b.art.sig_since):
                b.art.ignored[ch] = None
            b.art.sig_since.clear()
