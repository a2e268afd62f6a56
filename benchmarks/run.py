"""Measure hemostream's four performance figures and print them as a table.

    python -m benchmarks.run                  # full run (under ~10 minutes on 2 cores)
    python -m benchmarks.run --quick          # the same figures, smaller (about a minute)
    python -m benchmarks.run --out benchmarks/results.json --only replay,latency

Every figure is a ratio against a baseline measured in the same run (see
benchmarks/figures.py and docs/performance.md). Needs Mosquitto (Debian package
``mosquitto``) for figures 2 and 3; the brokers it starts listen on free loopback ports and
are stopped before it exits. Writes the figures, the machine and the load average as JSON.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

from rich.console import Console
from rich.table import Table

import dataclasses

from .figures import SIZES, fig_broker, fig_latency, fig_replay, fig_scale
from .machine import ROOT, load_average, machine, source_version

FIGURES = {"replay": fig_replay, "broker": fig_broker, "latency": fig_latency,
           "scale": fig_scale}
DEFAULT_OUT = ROOT / "benchmarks" / "results.json"


def _num(v, unit: str = "") -> str:
    if v is None:
        return "-"
    if unit in ("messages/s",):
        return f"{v:,.0f}/s"
    if unit == "ms":
        return f"{v:.1f} ms"
    if unit == "us":
        return f"{v:.1f} us"
    if unit == "MB":
        return f"{v:.0f} MB"
    return f"{v:.3g}"


def rows_of(figures: dict) -> list[dict]:
    """One table row per figure (the scale figure has three)."""
    rows = []
    for key, f in figures.items():
        if "error" in f:
            rows.append({"figure": key, "measured": "-", "baseline": "-", "ratio": "-",
                         "target": "-", "result": "error: " + f["error"][:60]})
            continue
        for r in f.get("rows") or [f]:
            rows.append({
                "figure": r["title"],
                "measured": _num(r["measured"], r["unit"]),
                "baseline": _num(r["baseline"], r["unit"]),
                "ratio": "-" if r["ratio"] is None else f"{r['ratio']:.3f}",
                "target": r["target_text"],
                "result": {True: "pass", False: "FAIL", None: "-"}[r["pass"]],
            })
    return rows


def table(rows: list[dict], title: str) -> Table:
    t = Table(title=title, title_justify="left")
    for col in ("figure", "measured", "baseline", "ratio", "target", "result"):
        t.add_column(col, justify="left" if col in ("figure", "target") else "right")
    for r in rows:
        style = {"pass": "green", "FAIL": "bold red"}.get(r["result"])
        t.add_row(*(r[c] for c in ("figure", "measured", "baseline", "ratio", "target")),
                  f"[{style}]{r['result']}[/]" if style else r["result"])
    return t


def markdown(rows: list[dict]) -> str:
    out = ["| figure | measured | baseline | ratio | target | result |",
           "|---|---|---|---|---|---|"]
    out += [f"| {r['figure']} | {r['measured']} | {r['baseline']} | {r['ratio']} | "
            f"{r['target']} | {r['result']} |" for r in rows]
    return "\n".join(out)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchmarks.run",
                                 description=__doc__.splitlines()[0])
    size = ap.add_mutually_exclusive_group()
    size.add_argument("--quick", action="store_true", help="smaller runs, about a minute")
    size.add_argument("--smoke", action="store_true",
                      help="tiny runs for the test suite (checks that it works)")
    ap.add_argument("--out", type=Path, default=None,
                    help=f"JSON results (default {DEFAULT_OUT.relative_to(ROOT)} for a full "
                    "run; quick and smoke runs write only when asked)")
    ap.add_argument("--only", default="", help="comma-separated: replay,broker,latency,scale")
    ap.add_argument("--scale-beds", default="",
                    help="comma-separated bed counts for the scale figure (default: 100,500,"
                    "2000,5000 in a full run)")
    ap.add_argument("--repeats", type=int, default=0,
                    help="runs of figures 1 and 2, best taken (default: 2 full, 1 quick)")
    ap.add_argument("--latency-rate", type=float, default=0.0,
                    help="messages per second of the latency figure (default 2,000 in a full "
                         "or quick run; its beds follow at 1 Hz each)")
    ap.add_argument("--keep", action="store_true", help="keep the working directory")
    ap.add_argument("--workdir", type=Path, default=None)
    a = ap.parse_args(argv)
    sz = SIZES["smoke" if a.smoke else "quick" if a.quick else "full"]
    if a.scale_beds:
        beds = tuple(int(x) for x in a.scale_beds.split(",") if x.strip())
        sz = dataclasses.replace(sz, scale_beds=beds)
    if a.repeats:
        sz = dataclasses.replace(sz, repeats=a.repeats)
    if a.latency_rate:
        sz = dataclasses.replace(sz, latency_rate=a.latency_rate,
                                 latency_beds=max(10, int(a.latency_rate)))
    only = [x.strip() for x in a.only.split(",") if x.strip()] or list(FIGURES)
    unknown = [x for x in only if x not in FIGURES]
    if unknown:
        ap.error(f"unknown figure(s) {', '.join(unknown)}; choose from {', '.join(FIGURES)}")
    out_path = a.out or (DEFAULT_OUT if sz.name == "full" else None)
    err = Console(stderr=True, soft_wrap=True, highlight=False)
    work = Path(tempfile.mkdtemp(prefix="hemobench-", dir=a.workdir))
    t0 = time.monotonic()

    def log(msg: str) -> None:
        err.print(f"[dim]{time.monotonic() - t0:6.1f} s[/] {msg}")

    result = {"version": 1, "size": sz.name,
              "started": datetime.now(timezone.utc).isoformat(timespec="seconds"),
              "machine": machine(), "source": source_version(),
              "sizes": dataclasses.asdict(sz),
              "load_average": {"start": load_average()},
              "figures": {}}
    log(f"{sz.name} run on {result['machine']['cpu']} x {result['machine']['cores']}, "
        f"load average {result['load_average']['start']}; working in {work}")
    code = 0
    try:
        for key in only:
            la = load_average()
            t = time.monotonic()
            try:
                f = FIGURES[key](work, sz, log)
            except Exception as e:  # noqa: BLE001 - reported in the table and the JSON
                log(f"[red]{key} failed:[/] {e}")
                f = {"error": f"{e.__class__.__name__}: {e}"}
                code = 1
            f["seconds"] = round(time.monotonic() - t, 1)
            f["source_after"] = source_version()
            f["load_average_before"] = la
            f["load_average_after"] = load_average()
            result["figures"][key] = f
            log(f"{key}: done in {f['seconds']} s, load average {f['load_average_after']}")
            if out_path is not None:           # a run stopped half-way keeps what it has
                out_path.parent.mkdir(parents=True, exist_ok=True)
                out_path.write_text(json.dumps(result, indent=2) + "\n")
    finally:
        if not a.keep:
            shutil.rmtree(work, ignore_errors=True)
    result["load_average"]["end"] = load_average()
    codes = {result["source"]["code"]} | {f["source_after"]["code"]
                                          for f in result["figures"].values()}
    #: False when hemostream's code changed while the run went on (a shared working tree):
    #: the figures then do not all describe the same code
    result["same_code_throughout"] = len(codes) == 1
    if not result["same_code_throughout"]:
        err.print("[bold red]warning:[/] hemostream/ changed during the run; the figures "
                  "describe different code (see source and source_after in the JSON)")
    result["seconds"] = round(time.monotonic() - t0, 1)
    rows = rows_of(result["figures"])
    result["table"] = rows
    result["markdown"] = markdown(rows)
    m = result["machine"]
    title = (("[bold red]CODE CHANGED DURING THE RUN[/] " if not result["same_code_throughout"]
              else "")
             + f"hemostream benchmarks ({sz.name}) - {m['cpu']}, {m['cores']} cores, Python "
             f"{m['python']}, load average {result['load_average']['start']} -> "
             f"{result['load_average']['end']}")
    Console(soft_wrap=True).print(table(rows, title))
    if out_path is not None:
        out_path.parent.mkdir(parents=True, exist_ok=True)
        out_path.write_text(json.dumps(result, indent=2) + "\n")
        err.print(f"results written to {out_path}")
    if any(r["result"] == "FAIL" for r in rows):
        code = code or 0          # a missed target is a result, not a harness failure
    return code


if __name__ == "__main__":
    sys.exit(main())
