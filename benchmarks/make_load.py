"""Write a synthetic load recording: N beds x M seconds of 1 Hz messages, 10 observations each.

Not physiology (the simulators do that): steady made-up values with seeded jitter, shaped
like a bedside gateway's feed, for throughput measurements only.

    python benchmarks/make_load.py OUT --beds 200 --seconds 600
    python benchmarks/make_load.py OUT --beds 2000 --scale --fill-s 1800 --fill-every 4 --seconds 60

``write`` is the replay figure's recording (one admit per bed, then every bed every second).
``write_scale`` is the scale figure's: a *fill* phase of ``fill_s`` seconds in which each bed
sends one message every ``fill_every`` seconds (enough to fill the trend windows, one point
per bucket needs only one sample, and the duplicate memory), then a *measured* phase at 1 Hz
per bed; it returns the line number where the measured phase starts. It builds lines from
pre-made text (64 value variants), so multi-million-line files take seconds.
"""

from __future__ import annotations

import argparse
import json
import random
from datetime import datetime, timedelta, timezone

START = datetime(2026, 12, 1, 6, 0, 0, tzinfo=timezone.utc)


def _t(t: datetime) -> str:
    return t.isoformat(timespec="milliseconds").replace("+00:00", "Z")


def write(path: str, beds: int, seconds: int, seed: int = 7, unit: str = "LOAD") -> int:
    rnd = random.Random(seed)
    n = 0
    with open(path, "w", encoding="utf-8") as f:
        for b in range(beds):
            t = START - timedelta(minutes=1)
            f.write(json.dumps({"rx": _t(t), "topic": f"hemo/{unit}/bed-{b:04d}/admit",
                                "payload": {"v": 1, "time": _t(t), "height_cm": 160 + b % 30,
                                            "weight_kg": 60 + b % 40}}) + "\n")
            n += 1
        for s in range(seconds):
            t = START + timedelta(seconds=s)
            rx = _t(t + timedelta(milliseconds=40))
            tt = _t(t)
            for b in range(beds):
                j = rnd.random
                payload = {"v": 1, "device": f"gw-{b:04d}", "seq": s, "time": tt, "obs": [
                    {"param": "HR", "value": round(70 + 10 * j()), "unit": "/min"},
                    {"param": "ABP_SYS", "value": round(115 + 10 * j()), "unit": "mm[Hg]"},
                    {"param": "ABP_DIA", "value": round(65 + 8 * j()), "unit": "mm[Hg]"},
                    {"param": "ABP_MEAN", "value": round(82 + 6 * j()), "unit": "mm[Hg]"},
                    {"param": "CVP", "value": round(8 + 2 * j(), 1), "unit": "mm[Hg]"},
                    {"param": "PAP_MEAN", "value": round(18 + 3 * j()), "unit": "mm[Hg]"},
                    {"param": "CO", "value": round(5 + 0.4 * j(), 2), "unit": "L/min"},
                    {"param": "SPO2", "value": round(96 + 3 * j()), "unit": "%"},
                    {"param": "RR", "value": round(14 + 4 * j()), "unit": "/min"},
                    {"param": "TEMP", "value": round(36.8 + 0.4 * j(), 1), "unit": "Cel"}]}
                f.write(json.dumps({"rx": rx, "topic": f"hemo/{unit}/bed-{b:04d}/obs",
                                    "payload": payload}, separators=(",", ":")) + "\n")
                n += 1
    return n


VARIANTS = 64


def obs_variants(rnd: random.Random, high_hr: bool = False, n: int = VARIANTS) -> list[str]:
    """``n`` observation arrays (compact JSON text) with the same values and jitter as
    :func:`write`; ``high_hr`` puts the heart rate at 150-154 /min (above the shipped limit)."""
    out = []
    for _ in range(n):
        j = rnd.random
        hr = round(150 + 4 * j()) if high_hr else round(70 + 10 * j())
        obs = [("HR", hr, "/min"), ("ABP_SYS", round(115 + 10 * j()), "mm[Hg]"),
               ("ABP_DIA", round(65 + 8 * j()), "mm[Hg]"),
               ("ABP_MEAN", round(82 + 6 * j()), "mm[Hg]"),
               ("CVP", round(8 + 2 * j(), 1), "mm[Hg]"),
               ("PAP_MEAN", round(18 + 3 * j()), "mm[Hg]"),
               ("CO", round(5 + 0.4 * j(), 2), "L/min"),
               ("SPO2", round(96 + 3 * j()), "%"), ("RR", round(14 + 4 * j()), "/min"),
               ("TEMP", round(36.8 + 0.4 * j(), 1), "Cel")]
        out.append(json.dumps([{"param": p, "value": v, "unit": u} for p, v, u in obs],
                              separators=(",", ":")))
    return out


def write_scale(path: str, beds: int, fill_s: int, fill_every: int, measure_s: int,
                seed: int = 7, unit: str = "SCALE") -> tuple[int, int]:
    """The scale figure's recording; returns (lines, first line of the measured phase)."""
    rnd = random.Random(seed)
    variants = obs_variants(rnd)
    n = 0
    with open(path, "w", encoding="utf-8", buffering=1 << 20) as f:
        t = _t(START - timedelta(minutes=1))
        for b in range(beds):
            f.write(f'{{"rx":"{t}","topic":"hemo/{unit}/bed-{b:04d}/admit","payload":'
                    f'{{"v":1,"time":"{t}","height_cm":{160 + b % 30},'
                    f'"weight_kg":{60 + b % 40}}}}}\n')
            n += 1
        first_measured = 0
        heads = [f'","topic":"hemo/{unit}/bed-{b:04d}/obs","payload":{{"v":1,'
                 f'"device":"gw-{b:04d}","seq":' for b in range(beds)]
        for s in range(fill_s + measure_s):
            if s == fill_s:
                first_measured = n + 1
            tt = START + timedelta(seconds=s)
            rx = _t(tt + timedelta(milliseconds=40))
            ts = _t(tt)
            tail = f',"time":"{ts}","obs":'
            every = fill_every if s < fill_s else 1
            chunk = []
            for b in range(beds):
                if every > 1 and (s + b) % every:
                    continue
                chunk.append(f'{{"rx":"{rx}{heads[b]}{s}{tail}'
                             f'{variants[(b * 7 + s) % VARIANTS]}}}}}\n')
            f.write("".join(chunk))
            n += len(chunk)
    return n, first_measured


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out")
    ap.add_argument("--beds", type=int, default=200)
    ap.add_argument("--seconds", type=int, default=600,
                    help="seconds at 1 Hz (with --scale: of the measured phase)")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--scale", action="store_true", help="the scale figure's recording")
    ap.add_argument("--fill-s", type=int, default=1800)
    ap.add_argument("--fill-every", type=int, default=4)
    a = ap.parse_args()
    if a.scale:
        lines, first = write_scale(a.out, a.beds, a.fill_s, a.fill_every, a.seconds, a.seed)
        print(lines, "lines; the measured phase starts at line", first)
    else:
        print(write(a.out, a.beds, a.seconds, a.seed), "lines")


if __name__ == "__main__":
    main()
