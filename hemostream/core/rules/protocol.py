"""What the processor, the replay and the live service need of a rules layer.

:class:`RulesLayer` is a structural type (``typing.Protocol``): :class:`.engine.RulesEngine`
satisfies it, and so does any stand-in with these methods. Callers annotate with it instead
of ``Any``. Every method takes times as float epoch seconds (UTC) and returns the lifecycle
events it caused, in order.
"""

from __future__ import annotations

from typing import Any, Mapping, Protocol, runtime_checkable

from ..alarms import RuleEvent

__all__ = ["RulesLayer"]


@runtime_checkable
class RulesLayer(Protocol):
    def on_values(self, bed: str, t: float, fresh: dict[str, float], new: frozenset[str],
                  nonvalid: dict[str, str], device: str,
                  times: Mapping[str, float] | None = None,
                  rx: float | None = None) -> list[RuleEvent]:
        """One accepted observation message after derivations: ``fresh`` the current valid
        values, ``new`` the names this message brought, ``nonvalid`` name -> status,
        ``times`` the measurement time of new values (default: ``t``), ``rx`` its arrival
        (on the clock of ``tick``)."""
        ...

    def on_note(self, bed: str, t: float, kind: str, volume_ml: float | None = None,
                over_min: float | None = None, param: str | None = None,
                duration_s: float | None = None) -> list[RuleEvent]:
        """A clinical or technical note (fluid bolus, line flush, zeroing ...)."""
        ...

    def on_admit(self, bed: str, t: float, limits: dict[str, dict[str, float]] | None = None,
                 discharged: bool = False) -> list[RuleEvent]:
        """An admission (with limit overrides) or a discharge."""
        ...

    def on_command(self, bed: str, t: float, action: str, alarm: str,
                   by: str) -> list[RuleEvent]:
        """Acknowledge or pause the audio of an alarm; raises ``CommandError`` when the
        command addresses no active alarm."""
        ...

    def tick(self, now: float) -> list[RuleEvent]:
        """Advance time-driven conditions to ``now``."""
        ...

    def trend_directions(self, bed: str) -> dict[str, str]:
        """Current trend direction per trended parameter."""
        ...

    def alarm_state(self, bed: str) -> dict[str, Any]:
        """Current alarm state of the bed (JSON-able)."""
        ...
