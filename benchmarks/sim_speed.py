"""How fast the simulators run: the circulation model alone, and whole recordings.

    python benchmarks/sim_speed.py            # prints the figures (seconds of wall time)

Figures from this script are what docs/simulators.md quotes; they are measurements, not a
timed test.
"""

from __future__ import annotations

import io
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from simulators import Circulation, Patient, generate, write_recording  # noqa: E402


def best_of(n: int, fn) -> float:
    times = []
    for _ in range(n):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def model_hour(beds: int) -> float:
    c = Circulation([Patient.reference()] * beds)
    c.controls.bleed_ml_min = 20.0
    return best_of(3, lambda: c.run(3600))


def recording(beds: int, seconds: int) -> tuple[float, int]:
    out = io.StringIO()
    count = [0]

    def go() -> None:
        out.seek(0)
        out.truncate()
        count[0] = write_recording(generate("demo", beds=beds, duration_s=seconds, seed=1), out)

    return best_of(1, go), count[0]


def main() -> None:
    print(f"python {sys.version.split()[0]}")
    for beds in (1, 24):
        print(f"model only, {beds:>2} bed(s), 1 h simulated: {model_hour(beds):.3f} s")
    for beds, seconds in ((1, 3600), (24, 3600)):
        secs, n = recording(beds, seconds)
        print(f"recording, {beds:>2} bed(s), 1 h simulated: {secs:.2f} s, {n} lines "
              f"({n / secs:,.0f} lines/s)")
    print("a 24-bed, 8-hour ward is about 8 x the 24-bed hour")


if __name__ == "__main__":
    main()
