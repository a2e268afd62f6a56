"""The pure core: wire format, validation and units, derived values, trends, rules, alarms.

No I/O and no clock: time comes with the messages. The names below are the core's public
interface (loaded on first use, so importing one part does not load the rest); everything
else is internal to its module.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

#: public name -> the module that defines it
_PUBLIC = {
    "Config": ".config", "Processor": ".processor", "Outputs": ".outputs",
    "derive_all": ".derive", "Current": ".derive", "DERIVED_UNITS": ".derive",
    "PARAMS": ".params", "ParamSpec": ".params",
    "parse_topic": ".wire", "topic": ".wire", "parse_time": ".wire", "format_epoch": ".wire",
    "epoch": ".wire", "ObsMessage": ".wire", "AdmitMessage": ".wire", "NoteMessage": ".wire",
    "CommandMessage": ".wire",
    "RulesEngine": ".rules", "RulesLayer": ".rules", "RuleEvent": ".alarms",
    "redact": ".redact",
}

__all__ = sorted(_PUBLIC)


def __getattr__(name: str) -> Any:
    if name in _PUBLIC:
        return getattr(import_module(_PUBLIC[name], __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
