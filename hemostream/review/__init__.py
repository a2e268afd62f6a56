"""Reviewing alarm behaviour: comparing configurations on a recording, and per-bed reports.

``compare``  replays one recording under several configurations and measures the alarm
             burden and detection delays of each.
``report``   a self-contained HTML page per bed (and a unit overview) with aligned plots of
             the stored values, limits, alarm periods and notes.

Both read what the processing core stored (alarm_events, notes, commands, observations,
derived values, the configuration in force). Modules by concern:

- database reads: :mod:`.queries`
- pure computation: :mod:`.periods` (alarm periods, alarm state over time), :mod:`.metrics`
  (alarm burden, detection), :mod:`.limits` (limits in force), :mod:`.panels` (panel data)
- running: :mod:`.runner` (compare and report, in order), :mod:`.cli` (the commands)
- output: :mod:`.tables` (terminal, CSV, JSON), :mod:`.plots` and :mod:`.svg` (figures),
  :mod:`.pages` (HTML), :mod:`.text` (times and events in words)

Safety: these are aids for reviewing alarm behaviour. hemostream is a secondary display and
notification aid, not a medical device; the bedside monitor stays the primary alarm source.
A comparison describes alarm behaviour on the given recording, not clinical validation.
"""

from .. import CAUTION

COMPARE_CAUTION = ("These figures describe alarm behaviour on the given recording under each "
                   "configuration; they are not a clinical validation of any configuration.")

__all__ = ["CAUTION", "COMPARE_CAUTION"]
