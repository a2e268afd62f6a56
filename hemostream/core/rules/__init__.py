"""The rules layer: trends, limit and pattern rules, fluid-challenge evaluation, hemodynamic
profile read-out and technical conditions, feeding the alarm lifecycle of :mod:`..alarms`.

Layout (one module per feature, each with its slice of the configuration):

- :mod:`.engine` — :class:`RulesEngine`, which dispatches the inputs to the features;
- :mod:`.protocol` — :class:`RulesLayer`, the type callers annotate with;
- :mod:`.config` — the root :class:`RulesConfig`, re-exporting every slice;
- :mod:`.conditions` — delayed conditions (onset and clear delays, tiers);
- :mod:`.limits` — low/high limits and :func:`applied_limits`, the one override merge rule;
- :mod:`.patterns` — pattern rules over trends and levels;
- :mod:`.trending` — feeding and reading the robust trends of :mod:`..trends`;
- :mod:`.technical` — silent feeds and devices, values not valid, suspected artifacts;
- :mod:`.artifacts` — flush / zeroing / damping spans kept out of trends and alarms;
- :mod:`.fluid` — fluid-challenge evaluation;
- :mod:`.profile` — hemodynamic profile read-out;
- :mod:`.state`, :mod:`.common` — per-bed and engine-wide state, shared names and helpers.

The package is pure core: it imports nothing from the I/O shell (live, dashboard, review,
store, app). ``RulesEngine``, ``RuleEvent``, ``CommandError`` and ``RulesLayer`` are loaded
on first use, so importing :mod:`.config` does not load the engine.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

__all__ = ["RulesEngine", "RuleEvent", "CommandError", "RulesLayer"]

if TYPE_CHECKING:
    from ..alarms import CommandError, RuleEvent
    from .engine import RulesEngine
    from .protocol import RulesLayer


def __getattr__(name: str) -> Any:
    if name == "RulesEngine":
        from .engine import RulesEngine
        return RulesEngine
    if name in ("RuleEvent", "CommandError"):
        from .. import alarms
        return getattr(alarms, name)
    if name == "RulesLayer":
        from .protocol import RulesLayer
        return RulesLayer
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
