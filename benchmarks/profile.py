"""Where the time goes: py-spy profiles of ``hemostream replay`` and of ``hemostream run``.

    python -m benchmarks.profile replay [--quick]    # the replay figure's 200-bed recording
    python -m benchmarks.profile run [--quick]       # the broker figure's stream, live
    python -m benchmarks.profile summarize RAW       # a py-spy raw file you recorded yourself

py-spy (``pip install py-spy``; a sampling profiler in its own process, so the profiled
program runs unmodified and every thread is seen) records ``--rate`` samples per second of
every thread's stack. The summary gives each thread's share of the samples, then functions
by inclusive share (in the stack at all) and by own share (the innermost frame), and the
same by source file, and a split by area of the pipeline (writer thread, rules layer,
derived values, validation, core, MQTT client ...). Percentages are of all samples of busy
threads (py-spy leaves idle threads out unless ``--idle`` is given). Summaries (and the raw
samples, not committed) go to ``benchmarks/profiles/``.
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

from . import make_load
from .broker import Broker
from .figures import (QUICK, FULL, Service, hemostream_cmd, last_json, publishers, remove_db,
                      sqlite_url, stored_count, write_config)
from .machine import PY, ROOT, child_env, load_average

OUT_DIR = ROOT / "benchmarks" / "profiles"
_FRAME = re.compile(r"^(?P<fn>.*) \((?P<file>.*?)(?::\d+)?\)$")


def py_spy() -> str:
    p = Path(sys.executable).parent / "py-spy"
    found = str(p) if p.exists() else shutil.which("py-spy")
    if not found:
        raise SystemExit("needs py-spy: .venv/bin/pip install py-spy")
    return found


def _short_file(f: str) -> str:
    for marker in ("site-packages/", "lib/python3", "/work/main/"):
        if marker in f:
            f = f.split(marker, 1)[1]
    return f


def _frame(text: str) -> tuple[str, str]:
    m = _FRAME.match(text.strip())
    if not m:
        return text.strip(), ""
    f = _short_file(m.group("file"))
    return f"{m.group('fn')} ({f})", f


#: areas of the pipeline, first match wins (thread name, or a file/function in the stack)
AREAS = [
    ("storage: writer thread (SQLite inserts, commits)",
     lambda th, fr: th == "hemostream-writer"),
    ("start-up: imports", lambda th, fr: any("importlib" in f for _, f in fr)),
    ("rules layer (limits, trends, patterns, artifacts, alarms)",
     lambda th, fr: any(re.search(r"hemostream/core/(rules|trends|alarms)", f) for _, f in fr)),
    ("derived values (derive_all, freshness, cadence, publish body)",
     lambda th, fr: any(fn.startswith(("derive_all", "Processor._derive")) for fn, _ in fr)),
    ("parse and validate (json, pydantic)",
     lambda th, fr: any(f.startswith("pydantic") or "model_validate" in fn or
                        f.startswith("json/decoder") for fn, f in fr)),
    ("core ingest (topic, duplicates, units, plausibility, rows)",
     lambda th, fr: any(f.startswith("hemostream/core/") for _, f in fr)),
    ("MQTT client (paho, aiomqtt: receive, acknowledge, publish)",
     lambda th, fr: any(f.startswith(("paho/", "aiomqtt/")) for _, f in fr)),
    ("encoding published outputs (json)",
     lambda th, fr: any(f.startswith("json/encoder") for _, f in fr)),
    ("live service and replay loop (hemostream/live, replay.py)",
     lambda th, fr: any(f.startswith(("hemostream/live/", "hemostream/replay"))
                        for _, f in fr)),
    ("other (event loop, executor threads, interpreter)", lambda th, fr: True),
]


def summarize(raw: Path, top: int = 25) -> str:
    """A text summary of a py-spy ``--format raw --threads`` file."""
    threads: Counter = Counter()
    areas: Counter = Counter()
    inclusive: Counter = Counter()
    own: Counter = Counter()
    files_incl: Counter = Counter()
    files_own: Counter = Counter()
    total = 0
    for line in raw.read_text(errors="replace").splitlines():
        stack, _, n = line.rpartition(" ")
        if not stack or not n.isdigit():
            continue
        n = int(n)
        parts = stack.split(";")
        head = parts[0]
        name = head.split(":", 1)[1].strip() if ":" in head else head
        threads[name or head] += n
        frames = [_frame(p) for p in parts[1:]]
        total += n
        if not frames:
            continue
        for fn in {f for f, _ in frames}:
            inclusive[fn] += n
        for f in {f for _, f in frames if f}:
            files_incl[f] += n
        own[frames[-1][0]] += n
        files_own[frames[-1][1]] += n
        th = name.strip()
        areas[next(a for a, match in AREAS if match(th, frames))] += n
    if total == 0:
        return "no samples\n"

    def pct(c: int) -> str:
        return f"{100 * c / total:5.1f} %"

    out = [f"samples: {total}", "", "threads (share of samples):"]
    out += [f"  {pct(c)}  {t}" for t, c in threads.most_common()]
    out += ["", "by area (first that applies: writer thread, imports, rules, derived values, "
            "validation, core, MQTT, encoding, glue):"]
    out += [f"  {pct(c)}  {a}" for a, c in areas.most_common()]
    out += ["", f"top {top} functions, inclusive (in the stack):"]
    out += [f"  {pct(c)}  {f}" for f, c in inclusive.most_common(top)]
    out += ["", f"top {top} functions, own time (innermost frame):"]
    out += [f"  {pct(c)}  {f}" for f, c in own.most_common(top)]
    out += ["", "source files, own time:"]
    out += [f"  {pct(c)}  {f}" for f, c in files_own.most_common(top)]
    out += ["", "source files, inclusive:"]
    out += [f"  {pct(c)}  {f}" for f, c in files_incl.most_common(top)]
    return "\n".join(out) + "\n"


def profile_replay(work: Path, quick: bool, rate: int) -> Path:
    sz = QUICK if quick else FULL
    rec = work / "replay.jsonl"
    make_load.write(str(rec), sz.replay_beds, sz.replay_seconds)
    db = work / "replay.db"
    remove_db(db)
    raw = work / "replay.raw"
    print(f"profiling hemostream replay of {sz.replay_beds} beds x {sz.replay_seconds} s, "
          f"load average {load_average()}", file=sys.stderr)
    subprocess.run([py_spy(), "record", "--rate", str(rate), "--format", "raw", "--threads",
                    "--output", str(raw), "--", *hemostream_cmd("replay", str(rec), "--db",
                                                                 sqlite_url(db), "--json")],
                   cwd=ROOT, env=child_env(), check=True, stdout=subprocess.DEVNULL)
    remove_db(db)
    return raw


def profile_run(work: Path, quick: bool, rate: int) -> Path:
    sz = QUICK if quick else FULL
    beds, rounds = sz.broker_beds, sz.broker_rounds
    raw = work / "run.raw"
    with Broker(work / "broker") as br:
        db = work / "run.db"
        remove_db(db)
        cfg = write_config(work / "run.toml", db, broker_url=br.url)
        svc = Service(cfg, work / "run.log")
        try:
            svc.wait_connected()
            spy = subprocess.Popen([py_spy(), "record", "--rate", str(rate), "--format", "raw",
                                    "--threads", "--output", str(raw), "--pid",
                                    str(svc.proc.pid)], cwd=ROOT, env=child_env(),
                                   stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
            time.sleep(1.0)
            print(f"profiling hemostream run: {beds} beds x {rounds} s as fast as QoS 1 "
                  f"allows, load average {load_average()}", file=sys.stderr)
            pubs = publishers(br.url, sz.publishers, "--beds", str(beds), "--rounds",
                              str(rounds))
            for p in pubs:
                last_json(p, "publisher", 600)
            deadline = time.monotonic() + 600
            while stored_count(db) < beds * (rounds + 1) and time.monotonic() < deadline:
                time.sleep(0.05)
            spy.send_signal(signal.SIGINT)
            spy.wait(60)
            svc.stop()
        except BaseException:
            svc.kill()
            raise
        remove_db(db)
    return raw


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchmarks.profile",
                                 description=__doc__.splitlines()[0])
    ap.add_argument("what", choices=("replay", "run", "summarize"))
    ap.add_argument("raw", nargs="?", help="summarize: the py-spy raw file")
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--rate", type=int, default=200, help="samples per second")
    ap.add_argument("--top", type=int, default=30)
    ap.add_argument("--out-dir", type=Path, default=OUT_DIR)
    a = ap.parse_args(argv)
    if a.what == "summarize":
        if not a.raw:
            ap.error("summarize needs the raw file")
        print(summarize(Path(a.raw), a.top), end="")
        return 0
    work = Path(tempfile.mkdtemp(prefix="hemoprof-"))
    try:
        raw = (profile_replay if a.what == "replay" else profile_run)(work, a.quick, a.rate)
        text = (f"# py-spy profile of hemostream {a.what} ({'quick' if a.quick else 'full'}"
                f" size), {time.strftime('%Y-%m-%d %H:%M')}, load average "
                f"{load_average()}\n\n" + summarize(raw, a.top))
        a.out_dir.mkdir(parents=True, exist_ok=True)
        shutil.copy(raw, a.out_dir / f"{a.what}.raw")      # for summarize, or a flame graph
        dest = a.out_dir / f"{a.what}.txt"
        dest.write_text(text)
        print(text, end="")
        print(f"summary written to {dest}", file=sys.stderr)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
