"""hemostream: a hemodynamic monitoring stream processor.

The public interface: :data:`CAUTION`, :class:`Config`, :class:`Processor` (the pure core, one
message in, rows and publications out), :func:`replay_file` (a recording into a database),
:func:`load_config` and :func:`open_engine`. The rest is internal to its module (see
DEVELOPERS.md for the layout).
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

__version__ = "0.1.0"

#: the caution every command, screen and report carries
CAUTION = ("hemostream is a secondary display and notification aid, not a medical device. "
           "The bedside monitor stays the primary alarm source; confirm every value and alarm "
           "there, and follow local policy and licensed clinical judgement.")

_PUBLIC = {"Config": ".core.config", "Processor": ".core.processor",
           "replay_file": ".replay", "load_config": ".config", "open_engine": ".store"}

__all__ = ["CAUTION", "__version__", *sorted(_PUBLIC)]


def __getattr__(name: str) -> Any:       # loaded on first use: `import hemostream` stays light
    if name in _PUBLIC:
        return getattr(import_module(_PUBLIC[name], __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
