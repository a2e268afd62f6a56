"""CPU used by the dashboard for a 24-bed unit at 1 Hz, redrawn at 2 Hz (200x50 screen).

Feeds a :class:`UnitView` with one derived message per bed per (simulated) second and draws
the unit screen twice a second to a 200x50 console writing to /dev/null, for N seconds of
wall time; prints the process CPU time as a share of one core.

    python -m benchmarks.dashboard_cpu [SECONDS]
"""

from __future__ import annotations

import os
import resource
import sys
import time
from datetime import datetime, timezone

from rich.console import Console

from hemostream.dashboard import Screen, UnitView, unit_screen


def _iso(t: float) -> str:
    return datetime.fromtimestamp(t, timezone.utc).isoformat().replace("+00:00", "Z")


def main(seconds: float = 20.0) -> None:
    view = UnitView()
    console = Console(file=open(os.devnull, "w"), width=200, height=50, force_terminal=True)
    scr = Screen(unit="SDU2", source="benchmark")
    t_sim = time.time()
    cpu0 = resource.getrusage(resource.RUSAGE_SELF)
    wall0 = time.monotonic()
    frames = 0
    next_feed = wall0
    while time.monotonic() - wall0 < seconds:
        now = time.monotonic()
        if now >= next_feed:                      # 24 beds, one message each per second
            t_sim += 1
            for b in range(24):
                view.apply(f"hemo/SDU2/bed-{b + 1:02d}/derived", {
                    "v": 1, "time": _iso(t_sim),
                    "values": {"MAP": 85.0 + b % 5, "SI": 0.6, "SVR": 1200.0, "CI": 2.8},
                    "measured": {p: [v, _iso(t_sim)] for p, v in (
                        ("HR", 72 + b % 7), ("ABP_SYS", 120), ("ABP_DIA", 70),
                        ("ABP_MEAN", 87), ("CVP", 8), ("CO", 5.1), ("SPO2", 97))},
                    "trends": {"HR": "steady", "MAP": "falling"}})
            next_feed += 1.0
        console.print(unit_screen(view, scr, t_sim, 200, 50))
        frames += 1
        time.sleep(max(0.0, 0.5 - (time.monotonic() - now)))
    cpu1 = resource.getrusage(resource.RUSAGE_SELF)
    wall = time.monotonic() - wall0
    cpu = (cpu1.ru_utime - cpu0.ru_utime) + (cpu1.ru_stime - cpu0.ru_stime)
    print(f"{frames} frames in {wall:.1f} s; CPU {cpu:.2f} s = {100 * cpu / wall:.1f} % of one "
          f"core ({1000 * cpu / frames:.1f} ms per frame)")


if __name__ == "__main__":
    main(float(sys.argv[1]) if len(sys.argv) > 1 else 20.0)
