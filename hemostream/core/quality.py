"""The quality every stored and published value carries (docs/rules.md, "Quality").

A value is ``ok``, or it says why it is not a measurement of the patient as it is now:

- ``questionable``, ``invalid``, ``calibrating``, ``test``: the status the device sent
  (wire format: ``status``; ``valid`` is ``ok``);
- ``artifact``: the artifact detector holds its channel out (a flush, zeroing, sample-draw or
  damping signature, a ``calibrating`` status of the channel, or a note such as
  ``sample_draw`` or ``line_flush`` for its window);
- a derived value: the worst quality of its inputs (and ``artifact`` when its own channel is
  held out).

Worst first: ``invalid``, ``test``, ``calibrating``, ``artifact``, ``questionable``, ``ok``.

>>> from_status("valid"), from_status("calibrating")
('ok', 'calibrating')
>>> worst(["ok", "artifact", "questionable"])
'artifact'
>>> worst([])
'ok'
"""

from __future__ import annotations

from typing import Iterable

OK = "ok"
ARTIFACT = "artifact"

#: every quality, best first (the rank is the position)
QUALITIES: tuple[str, ...] = ("ok", "questionable", "artifact", "calibrating", "test",
                              "invalid")
RANK: dict[str, int] = {q: i for i, q in enumerate(QUALITIES)}

#: wire status -> quality
_STATUS = {"valid": OK, "questionable": "questionable", "invalid": "invalid",
           "calibrating": "calibrating", "test": "test"}


def from_status(status: str) -> str:
    """The quality of a value as received (an unknown status counts as ``questionable``)."""
    return _STATUS.get(status, "questionable")


def worst(qualities: Iterable[str]) -> str:
    out, rank = OK, 0
    for q in qualities:
        r = RANK.get(q, RANK["questionable"])
        if r > rank:
            out, rank = q, r
    return out
