"""Process settings for the long-running loops (``replay``, ``run``, the workers).

CPython's cyclic garbage collector runs a young-generation pass every 700 net allocations
and, now and then, a full pass over every live object. A stream processor allocates and
frees a few hundred small objects per message (parsed payloads, rows, published bodies),
almost none of them in reference cycles, while it holds a large long-lived state (per-bed
windows, duplicate memory, the imported modules). So the default thresholds make it scan
the same long-lived objects over and over. :func:`settle_gc` (once per process) collects
what garbage exists, moves every object alive after start-up out of the collector's sight
(``gc.freeze``) and makes the young generation larger; reference counting still frees
almost everything at once, and cycles are still collected, less often.

Measured (``python -m benchmarks.gc_settings``, docs/performance.md): about a fifth less
CPU for ``hemostream replay``. ``HEMOSTREAM_GC=default`` in the environment keeps
Python's own settings (for comparison).
"""

from __future__ import annotations

import gc
import os

#: young generation after this many net allocations (default 700); the older generations
#: after 50 and 1,000 passes of the one below (defaults 10, 10)
THRESHOLDS = (100_000, 50, 1_000)

_settled = False


def settle_gc() -> None:
    """Collect once, freeze the start-up objects, raise the thresholds (idempotent)."""
    global _settled
    if _settled:
        return
    _settled = True
    if os.environ.get("HEMOSTREAM_GC") == "default":
        return
    gc.collect()
    gc.freeze()
    gc.set_threshold(*THRESHOLDS)
