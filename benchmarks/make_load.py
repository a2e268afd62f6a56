"""Write a synthetic load recording: N beds x M seconds of 1 Hz messages, 10 observations each.

Not physiology (the simulators do that): steady made-up values with seeded jitter, shaped
like a bedside gateway's feed, for throughput measurements only.

    python benchmarks/make_load.py OUT --beds 200 --seconds 600
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


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out")
    ap.add_argument("--beds", type=int, default=200)
    ap.add_argument("--seconds", type=int, default=600)
    ap.add_argument("--seed", type=int, default=7)
    a = ap.parse_args()
    print(write(a.out, a.beds, a.seconds, a.seed), "lines")


if __name__ == "__main__":
    main()
