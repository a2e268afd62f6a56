"""State the feature modules of the rules engine share: one :class:`BedState` per bed and
one :class:`Shared` per engine (configuration, alarm book, timer heap, information ids).

Pure: no I/O, no clock. Timers are :class:`Timer` records on a heap, ordered by ``(due,
seq)``; ``seq`` counts schedulings, so timers due at the same time pop in the order they were
set. A delay timer of a bed (a condition's onset or clear delay, the profile's hold) is also
on that bed's own heap (``BedState.timers``), so that the bed's next message fires it in the
bed's event time; whichever heap pops it first fires it and marks it spent, the other then
drops it.
"""

from __future__ import annotations

import heapq
from typing import TYPE_CHECKING

from ..alarms import AlarmBook
from .artifacts import ArtifactState
from .common import NINF

if TYPE_CHECKING:
    from ..trends import RobustTrend
    from .conditions import Cond
    from .config import RulesConfig
    from .fluid import Eval
    from .limits import Limit


class Timer:
    """One scheduled call-back: at ``due``, ``kind`` for ``key`` of ``bed``."""

    __slots__ = ("due", "seq", "kind", "bed", "key", "spent", "local", "orig")

    def __init__(self, due: float, seq: int, kind: str, bed: str, key: str) -> None:
        self.due = due
        self.seq = seq
        self.kind = kind
        self.bed = bed
        self.key = key
        #: fired from one of its heaps (the other drops it)
        self.spent = False
        #: a delay in the bed's event time (also on the bed's own heap)
        self.local = False
        #: a tick put this timer off (the bed's data lags the clock): the timer it stands for
        self.orig: Timer | None = None

    def __lt__(self, other: "Timer") -> bool:
        return self.due < other.due or (self.due == other.due and self.seq < other.seq)


class Shared:
    """The engine-wide pieces every feature module uses."""

    __slots__ = ("cfg", "heap", "seq", "book", "clock", "info_count")

    def __init__(self, cfg: "RulesConfig") -> None:
        self.cfg = cfg
        self.heap: list[Timer] = []
        self.seq = 0
        self.book = AlarmBook(cfg.alarms, self.schedule)
        #: latest clock seen by ``tick`` (event time in replay, wall clock live)
        self.clock = NINF
        self.info_count: dict[tuple[str, str], int] = {}

    def schedule(self, due: float, kind: str, bed: str, key: str,
                 local: "list[Timer] | None" = None) -> None:
        """Call ``kind`` back at ``due`` (on the engine's clock); ``local``: the bed's own
        heap as well, for a delay timer its next message fires (see the module docstring)."""
        self.seq += 1
        tm = Timer(due, self.seq, kind, bed, key)
        heapq.heappush(self.heap, tm)
        if local is not None:
            tm.local = True
            heapq.heappush(local, tm)

    def info_id(self, bed: str, rule: str) -> str:
        """Id of an information result: ``<rule>@<bed>#<n>``, n counting from 1."""
        n = self.info_count.get((bed, rule), 0) + 1
        self.info_count[(bed, rule)] = n
        return f"{rule}@{bed}#{n}"


class BedState:
    """Everything the engine keeps about one bed (the owning module is named per field)."""

    __slots__ = ("key", "trends", "conds", "overrides", "limits", "art", "last_t",
                 "last_seen", "param_device", "feed_sched", "silent", "ignored",
                 "dev_last", "dev_sched", "dev_silent", "dev_ignored", "notvalid",
                 "fc", "fc_last", "fc_meas", "fluid_until", "profile", "cand", "cand_since",
                 "cand_levels", "timers", "lag")

    def __init__(self, key: str, limits: "list[Limit]") -> None:
        self.key = key
        self.trends: dict[str, RobustTrend] = {}            # trending
        self.conds: dict[str, Cond] = {}                    # conditions
        self.overrides: dict[str, dict[str, float]] = {}    # limits
        self.limits = limits                                # limits
        self.art = ArtifactState()                          # artifacts
        self.last_t = NINF                                  # engine: newest message time
        #: engine: how far the newest message's arrival was behind its own time (s)
        self.lag = 0.0
        # technical: feeds, devices, values not valid
        self.last_seen: dict[str, float] = {}
        self.param_device: dict[str, str] = {}
        self.feed_sched: dict[str, None] = {}
        self.silent: dict[str, float] = {}
        self.ignored: dict[str, None] = {}
        self.dev_last: dict[str, float] = {}
        self.dev_sched: dict[str, None] = {}
        self.dev_silent: dict[str, float] = {}
        self.dev_ignored: dict[str, None] = {}
        self.notvalid: dict[str, tuple[float, str]] = {}
        # fluid challenge
        self.fc: Eval | None = None
        self.fc_last: dict | None = None
        #: latest measurement (measurement time, value) of each fluid-challenge parameter
        self.fc_meas: dict[str, tuple[float, float]] = {}
        #: patterns: end of the latest fluid bolus or transfusion (from its note)
        self.fluid_until = NINF
        # profile
        self.profile: str | None = None
        self.cand: str | None = None
        self.cand_since: float | None = None
        self.cand_levels: dict[str, float | None] = {}
        #: engine: this bed's delay timers, fired by its messages in event time
        self.timers: list[Timer] = []
