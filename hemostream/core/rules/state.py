"""State the feature modules of the rules engine share: one :class:`BedState` per bed and
one :class:`Shared` per engine (configuration, alarm book, timer heap, information ids).

Pure: no I/O, no clock. Timers are ``(due, seq, kind, bed, key)`` tuples on a heap; ``seq``
counts schedulings, so timers due at the same time pop in the order they were set.
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


class Shared:
    """The engine-wide pieces every feature module uses."""

    __slots__ = ("cfg", "heap", "seq", "book", "clock", "info_count")

    def __init__(self, cfg: "RulesConfig") -> None:
        self.cfg = cfg
        self.heap: list[tuple[float, int, str, str, str]] = []
        self.seq = 0
        self.book = AlarmBook(cfg.alarms, self.schedule)
        #: latest clock seen by ``tick`` (event time in replay, wall clock live)
        self.clock = NINF
        self.info_count: dict[tuple[str, str], int] = {}

    def schedule(self, due: float, kind: str, bed: str, key: str) -> None:
        self.seq += 1
        heapq.heappush(self.heap, (due, self.seq, kind, bed, key))

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
                 "fc", "fc_last", "fc_meas", "fluid_until", "profile", "cand", "cand_since", "cand_levels")

    def __init__(self, key: str, limits: "list[Limit]") -> None:
        self.key = key
        self.trends: dict[str, RobustTrend] = {}            # trending
        self.conds: dict[str, Cond] = {}                    # conditions
        self.overrides: dict[str, dict[str, float]] = {}    # limits
        self.limits = limits                                # limits
        self.art = ArtifactState()                          # artifacts
        self.last_t = NINF                                  # engine: newest message time
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
