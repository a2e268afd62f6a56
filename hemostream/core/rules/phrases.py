"""Words on the screens: the short phrase a nurse reads at a glance for every rule id.

The rule id (``right_heart_mismatch``, ``CVP_high`` ...) stays the key in data, logs and the
store; screens (dashboard, watch, report, the plain demo output) show the phrase. Each rule of
the shipped configuration has its own phrase here (a test checks every one); a limit on any
parameter reads "<parameter> low/high" from :data:`PARAM_WORDS`; a rule a unit configures
itself reads its ``message``, else its id with spaces.

Wording: plain clinical English, trade abbreviations only where the trade uses them on its
own screens (HR, MAP, CVP, SpO2, CI, SVR: common practice), no diagnosis (a pattern is a
prompt to look). Published with every alarm event and state as ``phrase`` (wire format,
extension). Pure: no I/O.
"""

from __future__ import annotations

from typing import Mapping

from .common import ARTIFACT, DEVICE_SILENT, FEED_SILENT, FLUID, NOT_VALID, PROFILE

__all__ = ["PHRASES", "PARAM_WORDS", "phrase"]

#: one phrase per rule id of the shipped rules (patterns, technical, information)
PHRASES: dict[str, str] = {
    "right_heart_mismatch": "CVP rising, output falling",
    "left_heart_mismatch": "PA pressure rising, output falling",
    "shock_index_high": "shock index high",
    "shock_index_rising": "shock index rising",
    "low_output": "low cardiac output",
    "hypovolemia_pattern": "CVP and output falling, HR rising",
    "vasodilation_pattern": "SVR falling, HR rising",
    FEED_SILENT: "no data from a channel",
    DEVICE_SILENT: "no data from the monitor",
    NOT_VALID: "values not valid",
    ARTIFACT: "check the line (artifact)",
    FLUID: "fluid challenge",
    PROFILE: "hemodynamic profile",
}

#: how a parameter is named in a limit phrase ("HR high", "SpO2 low")
PARAM_WORDS: dict[str, str] = {
    "HR": "HR", "PR": "pulse rate", "ABP_SYS": "arterial systolic",
    "ABP_DIA": "arterial diastolic", "ABP_MEAN": "arterial mean", "NIBP_SYS": "cuff systolic",
    "NIBP_DIA": "cuff diastolic", "NIBP_MEAN": "cuff mean", "CVP": "CVP",
    "PAP_SYS": "PA systolic", "PAP_DIA": "PA diastolic", "PAP_MEAN": "PA mean",
    "PAWP": "wedge pressure", "CO": "cardiac output", "SV": "stroke volume", "SPO2": "SpO2",
    "RR": "resp. rate", "TEMP": "temperature", "MAP": "MAP", "SBP": "systolic pressure",
    "PP": "pulse pressure", "BSA": "body surface area", "CI": "cardiac index",
    "SVI": "stroke volume index", "SVR": "SVR", "SVRI": "SVR index", "PVR": "PVR",
    "LVSWI": "LV stroke work", "RVSWI": "RV stroke work", "SI": "shock index",
    "MSI": "modified shock index",
}


def phrase(rule: str, messages: Mapping[str, str] | None = None) -> str:
    """The phrase for ``rule``: its entry in :data:`PHRASES`, a limit's "<param> low/high",
    else ``messages[rule]`` (a configured pattern's message), else the id with spaces.

    >>> phrase("right_heart_mismatch"), phrase("SPO2_low"), phrase("my_rule")
    ('CVP rising, output falling', 'SpO2 low', 'my rule')
    """
    p = PHRASES.get(rule)
    if p is not None:
        return p
    param, _, side = rule.rpartition("_")
    if side in ("low", "high") and param in PARAM_WORDS:
        return f"{PARAM_WORDS[param]} {side}"
    if messages and messages.get(rule):
        return messages[rule]
    return rule.replace("_", " ")
