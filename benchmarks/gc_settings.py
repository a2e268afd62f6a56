"""The collector settings of hemostream/runtime.py, measured: ``hemostream replay`` of one
recording as whole processes, with Python's own settings (``HEMOSTREAM_GC=default``) and
with hemostream's, alternating, best of ``--repeats``; CPU seconds (user + system of the
child) and wall seconds.

    python -m benchmarks.gc_settings [--beds 100] [--seconds 300] [--repeats 2]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import tempfile
import time
from pathlib import Path

from . import make_load
from .machine import child_env, load_average
from .figures import hemostream_cmd


def one(rec: Path, db: Path, gc_mode: str) -> tuple[float, float]:
    for p in (db, Path(f"{db}-wal"), Path(f"{db}-shm")):
        p.unlink(missing_ok=True)
    env = child_env()
    if gc_mode == "default":
        env["HEMOSTREAM_GC"] = "default"
    else:
        env.pop("HEMOSTREAM_GC", None)
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    subprocess.run(hemostream_cmd("replay", str(rec), "--db", f"sqlite:///{db}"),
                   env=env, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    wall = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return (after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime), wall


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--beds", type=int, default=100)
    ap.add_argument("--seconds", type=int, default=300)
    ap.add_argument("--repeats", type=int, default=2)
    a = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="hemogc-") as d:
        rec = Path(d) / "rec.jsonl"
        lines = make_load.write(str(rec), a.beds, a.seconds)
        best: dict[str, tuple[float, float]] = {}
        la0 = load_average()
        for _ in range(a.repeats):
            for mode in ("default", "hemostream"):
                cpu, wall = one(rec, Path(d) / f"{mode}.db", mode)
                print(f"{mode:>10}: {cpu:.2f} s CPU, {wall:.2f} s wall", flush=True)
                if mode not in best or cpu < best[mode][0]:
                    best[mode] = (cpu, wall)
        out = {"lines": lines, "beds": a.beds, "seconds": a.seconds, "load_average":
               [la0, load_average()], "python_default": best["default"],
               "hemostream": best["hemostream"],
               "cpu_ratio": best["hemostream"][0] / best["default"][0]}
        print(json.dumps(out))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
