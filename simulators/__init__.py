"""Physiological simulators: a closed-loop model of the circulation that streams wards.

The model (:class:`Circulation`) is a beat-averaged ring of five compliant compartments with
two Frank-Starling ventricles and an arterial baroreflex; :class:`Patient` describes one
adult and :class:`Params` the parameters derived from them. Scenarios (TOML files, shipped
ones listed by :func:`list_scenarios`) lay out a ward and the time line of each bed;
:func:`generate` streams the ward as wire-format recording lines, :func:`write_recording`
writes them as JSON Lines. See docs/simulators.md.

>>> from simulators import list_scenarios
>>> [s.id for s in list_scenarios()][:3]
['bolus_nonresponder', 'bolus_responder', 'demo']

The names are imported on first use (module ``__getattr__``): ``hemostream``'s command line
registers ``simulators.cli`` for every command and loads the model only to simulate.
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from .model import Circulation, Controls
    from .patient import Params, Patient
    from .scenario import (Scenario, ScenarioError, ScenarioInfo, list_scenarios,
                           load_scenario, parse_duration)
    from .ward import generate, write_recording

_WHERE = {**dict.fromkeys(("Circulation", "Controls"), ".model"),
          **dict.fromkeys(("Params", "Patient"), ".patient"),
          **dict.fromkeys(("Scenario", "ScenarioError", "ScenarioInfo", "list_scenarios",
                           "load_scenario", "parse_duration"), ".scenario"),
          **dict.fromkeys(("generate", "write_recording"), ".ward")}

__all__ = ["Circulation", "Controls", "Params", "Patient", "Scenario", "ScenarioError",
           "ScenarioInfo", "list_scenarios", "load_scenario", "parse_duration", "generate",
           "write_recording", "DEMO_WARD", "SCENARIO_IDS"]

#: id of the demo ward scenario (a handful of beds in different scenarios)
DEMO_WARD = "demo"

#: the physiological scenarios the project ships (besides the demo ward)
SCENARIO_IDS = ("stable", "hemorrhage", "bolus_responder", "bolus_nonresponder",
                "rv_failure", "lv_failure", "vasodilation", "exercise")


def __getattr__(name: str) -> Any:
    if name in _WHERE:
        value = getattr(import_module(_WHERE[name], __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
