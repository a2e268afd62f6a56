"""What the core hands to the shell: rows per table, messages to publish, and counters."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Iterable

_INPUT_TEXT: dict[tuple[str, float], str] = {}


def inputs_json(inputs: Iterable[tuple[str, float]]) -> str:
    """Provenance of a derived value as compact JSON: ``[["HR",<epoch s>],...]``.

    The text of each (param, time) pair is cached: the inputs of one message's derived values
    share a few measurement times, and float formatting dominated this step.

    >>> inputs_json((("HR", 1.5), ("CO", 2.0)))
    '[["HR",1.5],["CO",2.0]]'
    """
    cache = _INPUT_TEXT
    parts = []
    for pair in inputs:
        s = cache.get(pair)
        if s is None:
            if len(cache) > 50_000:
                cache.clear()
            s = cache[pair] = f'["{pair[0]}",{pair[1]!r}]'
        parts.append(s)
    return "[" + ",".join(parts) + "]"


#: column order of the observation row tuples
OBSERVATION_COLUMNS = ("message_id", "bed_id", "param", "time", "value", "unit", "raw_value",
                       "raw_unit", "status", "late", "quality")


@dataclass
class Outputs:
    """What the core produced since the last drain: rows per table and messages to publish."""

    beds: list[dict] = field(default_factory=list)
    messages: list[dict] = field(default_factory=list)
    #: the hot table: tuples in the order of :data:`OBSERVATION_COLUMNS`
    observations: list[tuple] = field(default_factory=list)
    derived: list[dict] = field(default_factory=list)
    admissions: list[dict] = field(default_factory=list)
    notes: list[dict] = field(default_factory=list)
    commands: list[dict] = field(default_factory=list)
    rejected: list[dict] = field(default_factory=list)
    alarm_events: list[dict] = field(default_factory=list)
    #: (topic, JSON-able payload, retain) for the live path
    publish: list[tuple[str, Any, bool]] = field(default_factory=list)
    duplicates: int = 0

    TABLES = ("beds", "messages", "observations", "derived", "admissions", "notes",
              "commands", "rejected", "alarm_events")

    def row_count(self) -> int:
        return sum(len(getattr(self, t)) for t in self.TABLES)


@dataclass
class Counters:
    messages: int = 0
    observations: int = 0
    duplicates: int = 0
    late: int = 0
    derived_computed: int = 0
    derived_stored: int = 0
    alarm_events: int = 0
    #: faults of hemostream itself while processing a message (each kept as a reject)
    internal_errors: int = 0
    rejected: dict[str, int] = field(default_factory=dict)

    def reject(self, category: str) -> None:
        self.rejected[category] = self.rejected.get(category, 0) + 1
