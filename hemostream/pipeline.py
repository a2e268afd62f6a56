"""What every path through the core (replay, the live service, the demo) builds the same way."""

from __future__ import annotations

from .core.config import Config
from .core.rules import RulesEngine
from .core.rules.protocol import RulesLayer


def make_rules(cfg: Config) -> RulesLayer | None:
    """The rules engine for ``cfg`` (None when ``[rules] enabled = false``)."""
    if not cfg.rules.enabled:
        return None
    return RulesEngine(cfg.rules)
