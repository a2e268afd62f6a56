"""Write the small shipped example recording (simulators/recordings/example-ward.jsonl).

An invented ward, "step-down unit 4" (unit id SDU4), three beds for ten minutes at 1 Hz:
  bed-01  arterial line, CVP in cm[H2O] and continuous CO (gateway gw-a41)
  bed-02  cuff only, pressures in kPa every 2 minutes, HR and SpO2 each second (gw-a42)
  bed-03  arterial line and pulmonary artery catheter, wedge and thermodilution CO now and
          then, a line flush at minute 6 (gw-a43)
plus a few deliberately broken lines so the reject path shows in the summary.
The values are smooth made-up curves with seeded noise, not a physiological model; the
simulators' circulation model produces the realistic streams.

    python -m simulators.make_example [OUT]
"""

from __future__ import annotations

import json
import math
import random
import sys
from datetime import datetime, timedelta, timezone
from pathlib import Path

from hemostream.core.wire import format_time, topic

UNIT = "SDU4"
START = datetime(2026, 12, 1, 8, 0, 0, tzinfo=timezone.utc)
OUT = Path(__file__).resolve().parent / "recordings" / "example-ward.jsonl"


def _line(rx: datetime, topic: str, payload) -> str:
    return json.dumps({"rx": format_time(rx), "topic": topic, "payload": payload},
                      separators=(",", ":"))


def lines(seconds: int = 600, seed: int = 4) -> list[str]:
    rnd = random.Random(seed)
    out: list[tuple[datetime, str]] = []

    def emit(t: datetime, topic: str, payload) -> None:
        rx = t + timedelta(milliseconds=rnd.randint(15, 90))
        out.append((rx, _line(rx, topic, payload)))

    admits = {"bed-01": (176, 82.0), "bed-02": (163, 58.5), "bed-03": (181, 95.0)}
    for bed, (h, w) in admits.items():
        emit(START - timedelta(minutes=5), topic(UNIT, bed, "admit"),
             {"v": 1, "time": format_time(START - timedelta(minutes=5)), "height_cm": h,
              "weight_kg": w})
    seqs = {"gw-a41": 1000, "gw-a42": 52, "gw-a43": 7}

    def obs(t, bed, device, items):
        seqs[device] += 1
        emit(t, topic(UNIT, bed, "obs"),
             {"v": 1, "device": device, "seq": seqs[device], "time": format_time(t),
              "obs": items})

    def n(sd):
        return rnd.gauss(0, sd)

    for s in range(seconds):
        t = START + timedelta(seconds=s)
        x = s / seconds
        # bed-01: slowly rising HR, CVP in cm[H2O], continuous CO
        hr = 78 + 10 * x + n(1)
        sys_, dia = 124 - 8 * x + n(2), 70 - 3 * x + n(1.5)
        obs(t, "bed-01", "gw-a41", [
            {"param": "HR", "value": round(hr), "unit": "/min"},
            {"param": "ABP_SYS", "value": round(sys_), "unit": "mm[Hg]"},
            {"param": "ABP_DIA", "value": round(dia), "unit": "mm[Hg]"},
            {"param": "ABP_MEAN", "value": round(dia + (sys_ - dia) / 3 + n(0.5)),
             "unit": "mm[Hg]"},
            {"param": "CVP", "value": round(10.5 + 2 * x + n(0.4), 1), "unit": "cm[H2O]"},
            {"param": "CO", "value": round(5.2 - 0.4 * x + n(0.05), 2), "unit": "L/min"},
            {"param": "SPO2", "value": round(97 + n(0.5)), "unit": "%"},
            {"param": "RR", "value": round(16 + n(1)), "unit": "/min"},
        ])
        # bed-02: cuff only, kPa, every 120 s; HR and SpO2 each second
        items = [{"param": "HR", "value": round(92 + 4 * math.sin(s / 90) + n(1)),
                  "unit": "/min"},
                 {"param": "SPO2", "value": round(95 + n(0.6)), "unit": "%"}]
        if s % 120 == 30:
            cs, cd = 108 + n(3), 64 + n(2)
            items += [{"param": "NIBP_SYS", "value": round(cs * 0.133322, 2), "unit": "kPa"},
                      {"param": "NIBP_DIA", "value": round(cd * 0.133322, 2), "unit": "kPa"}]
        obs(t, "bed-02", "gw-a42", items)
        # bed-03: arterial line + PA catheter; flush at 360-364 s flagged questionable
        flushing = 360 <= s < 365
        a_sys, a_dia = 112 + n(2), 62 + n(1.5)
        items = [
            {"param": "HR", "value": round(101 + n(1)), "unit": "/min"},
            {"param": "ABP_SYS", "value": round(290 if flushing else a_sys), "unit": "mm[Hg]",
             "status": "questionable" if flushing else "valid"},
            {"param": "ABP_DIA", "value": round(280 if flushing else a_dia), "unit": "mm[Hg]",
             "status": "questionable" if flushing else "valid"},
            {"param": "CVP", "value": round(12 + n(0.5), 1), "unit": "mm[Hg]"},
            {"param": "PAP_SYS", "value": round(38 + n(1)), "unit": "mm[Hg]"},
            {"param": "PAP_DIA", "value": round(18 + n(1)), "unit": "mm[Hg]"},
            {"param": "PAP_MEAN", "value": round(26 + n(0.7)), "unit": "mm[Hg]"},
        ]
        if s % 300 == 10:
            items.append({"param": "PAWP", "value": round(16 + n(0.8)), "unit": "mm[Hg]"})
            items.append({"param": "CO", "value": round(4.1 + n(0.1), 2), "unit": "L/min",
                          "time": format_time(t - timedelta(seconds=40))})
        obs(t, "bed-03", "gw-a43", items)
        if s == 359:
            emit(t, topic(UNIT, "bed-03", "note"),
                 {"v": 1, "time": format_time(t), "kind": "line_flush", "param": "ABP_SYS",
                  "by": "RN K. Ostrava"})
    # broken input, as a real feed sometimes carries
    t = START + timedelta(seconds=200)
    emit(t, topic(UNIT, "bed-01", "obs"), "{\"v\": 1, \"device\": \"gw-a41\", \"seq\": 9")
    emit(t, topic(UNIT, "bed-02", "obs"),
         {"v": 1, "device": "gw-a42", "seq": 9001, "time": format_time(t),
          "obs": [{"param": "NIBP_SYS", "value": 118, "unit": "mmHg"}]})
    emit(t, topic(UNIT, "bed 9", "obs"), {"v": 1})
    emit(t, topic(UNIT, "bed-03", "obs"),
         {"v": 2, "device": "gw-a43", "seq": 9002, "time": format_time(t), "obs": []})
    emit(t, topic(UNIT, "bed-01", "obs"),
         {"v": 1, "device": "gw-a41", "seq": 9003, "time": format_time(t),
          "obs": [{"param": "HR", "value": 900, "unit": "/min"}]})
    out.sort(key=lambda x: x[0])
    return [line for _, line in out]


def main(argv: list[str]) -> int:
    path = Path(argv[0]) if argv else OUT
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("\n".join(lines()) + "\n", encoding="utf-8")
    print(f"wrote {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
