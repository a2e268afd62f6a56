"""The clinical scenarios ``hemostream validate`` judges the rules on, by default (a module
of its own so that the command line's parser names them without importing the cohort run,
:mod:`.validate`)."""

from __future__ import annotations

SCENARIOS = ("stable", "hemorrhage", "bolus_responder", "bolus_nonresponder", "rv_failure",
             "lv_failure", "vasodilation")
