"""Reviewing alarm behaviour: comparing configurations on a recording, and per-bed reports.

``compare``  replays one recording under several configurations and measures the alarm
             burden and detection delays of each (:mod:`hemostream.review.compare`).
``report``   a self-contained HTML page per bed (and a unit overview) with aligned plots of
             the stored values, limits, alarm periods and notes (:mod:`hemostream.review.report`).

Both read what the processing core stored (alarm_events, notes, commands, observations,
derived values); :mod:`hemostream.review.data` turns those rows into alarm periods.

Safety: these are aids for reviewing alarm behaviour. hemostream is a secondary display and
notification aid, not a medical device; the bedside monitor stays the primary alarm source.
A comparison describes alarm behaviour on the given recording, not clinical validation.
"""

from .. import CAUTION

COMPARE_CAUTION = ("These figures describe alarm behaviour on the given recording under each "
                   "configuration; they are not a clinical validation of any configuration.")

__all__ = ["CAUTION", "COMPARE_CAUTION"]
