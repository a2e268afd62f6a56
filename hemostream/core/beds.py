"""Per-bed state of the core: latest valid values, newest measurement time, body surface
area, and what was last stored of each derived value."""

from __future__ import annotations

import math

from .derive import Current


class BedState:
    __slots__ = ("id", "unit", "bed", "key", "latest", "newest", "bsa", "stored")

    def __init__(self, bed_id: int, unit: str, bed: str) -> None:
        self.id = bed_id
        self.unit = unit
        self.bed = bed
        self.key = f"{unit}/{bed}"
        self.latest: dict[str, Current] = {}
        self.newest = -math.inf            # newest measurement time seen (event time)
        self.bsa: tuple[float, float] | None = None
        #: derived param -> (time, value, quality) last stored
        self.stored: dict[str, tuple[float, float, str]] = {}

    def reset(self) -> None:
        self.latest.clear()
        self.bsa = None
        self.stored.clear()
