"""Running the reviews: ``compare`` (replay a recording under each configuration, then
measure) and ``report`` (read each bed, draw, write the pages).

The pieces: :mod:`.queries` reads the database, :mod:`.periods`, :mod:`.metrics`,
:mod:`.limits` and :mod:`.panels` compute, :mod:`.tables`, :mod:`.plots` and :mod:`.pages`
present; this module puts them in order.
"""

from __future__ import annotations

import os
import tempfile
import time as _time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

from ..core.config import Config
from . import COMPARE_CAUTION, plots
from .limits import config_for_limits
from .metrics import bed_counts, burden
from .pages import bed_page, unit_page
from .panels import DER_PARAMS, OBS_PARAMS
from .periods import build_periods
from .queries import (BedInfo, alarm_rows, commands, find_beds, load_bed, load_beds, notes,
                      stored_config)
from .text import parse_time  # noqa: F401  (the report command's time option)

#: recordings at least this large are replayed in two worker processes by default
PARALLEL_FROM_BYTES = 8_000_000


# ------------------------------------------------------------------------ compare


def metrics(engine, *, ack_within_s: float = 300.0,
            detect_within_s: float = 3600.0) -> dict[str, Any]:
    """The alarm-burden and detection figures of one stored replay (:func:`.metrics.burden`)."""
    periods, _info = build_periods(alarm_rows(engine))
    return burden(load_beds(engine), periods, notes(engine), commands(engine),
                  ack_within_s=ack_within_s, detect_within_s=detect_within_s)


@dataclass
class Job:
    index: int
    label: str
    config_path: str
    recording: str
    db_path: str


_QUEUE = None


def _init_worker(q) -> None:
    global _QUEUE
    _QUEUE = q


def run_job(job: Job, ack_within_s: float, detect_within_s: float,
            progress: Callable[[int, int, int], None] | None = None) -> dict[str, Any]:
    """Replay ``job.recording`` under ``job.config_path`` into ``job.db_path``; figures."""
    from ..config import load_config
    from ..replay import replay_file
    from ..store import open_engine

    cfg = load_config(job.config_path)
    q = _QUEUE
    last = [0.0]

    def prog(done: int, total: int) -> None:
        if progress is not None:
            progress(job.index, done, total)
        elif q is not None:
            now = _time.monotonic()
            if now - last[0] > 0.2 or done >= total:
                last[0] = now
                q.put((job.index, done, total))

    url = f"sqlite:///{job.db_path}"
    t0 = _time.perf_counter()
    s = replay_file(job.recording, url, cfg, progress=prog)
    engine = open_engine(url, create=False)
    try:
        m = metrics(engine, ack_within_s=ack_within_s, detect_within_s=detect_within_s)
    finally:
        engine.dispose()
    return {"label": job.label, "config": job.config_path, "database": job.db_path,
            "replay": {"lines": s.lines, "messages": s.messages, "observations":
                       s.observations, "rejected": s.rejected_total,
                       "alarm_events": s.alarm_events, "seconds": round(s.seconds, 3)},
            "seconds": round(_time.perf_counter() - t0, 3),
            "metrics": m}


def labels_for(paths: list[str]) -> list[str]:
    """Short names for the configurations: their file stems, numbered where they repeat.

    >>> labels_for(["a/wide.toml", "b/narrow.toml", "c/wide.toml"])
    ['wide#1', 'narrow', 'wide#3']
    """
    stems = [Path(p).stem for p in paths]
    return [s if stems.count(s) == 1 else f"{s}#{i + 1}" for i, s in enumerate(stems)]


def compare(recording: str | Path, config_paths: list[str], *, ack_within_s: float = 300.0,
            detect_within_s: float = 3600.0, keep_dir: str | Path | None = None,
            workers: int | None = None,
            progress: Callable[[int, int, int], None] | None = None,
            labels: list[str] | None = None) -> dict[str, Any]:
    """Replay ``recording`` under each configuration; return the comparison as a dict.

    Configuration files are expected to be valid (check them with
    :func:`hemostream.config.load_config` first for readable errors). ``progress(index,
    bytes_done, bytes_total)`` is called in this process as the replays advance.
    """
    rec = str(Path(recording))
    labels = labels or labels_for(config_paths)
    tmp = None
    if keep_dir is None:
        tmp = tempfile.TemporaryDirectory(prefix="hemostream-compare-")
        base = Path(tmp.name)
    else:
        base = Path(keep_dir)
        base.mkdir(parents=True, exist_ok=True)
    jobs = []
    for i, (lab, path) in enumerate(zip(labels, config_paths)):
        safe = "".join(c if c.isalnum() or c in "-_." else "_" for c in lab)
        db = base / f"{i + 1:02d}-{safe}.db"
        for suffix in ("", "-wal", "-shm"):
            Path(str(db) + suffix).unlink(missing_ok=True)
        jobs.append(Job(i, lab, str(path), rec, str(db)))
    if workers is None:
        # a worker process costs about a second to start (imports) and the replays compete
        # for two shared cores: worth it only when each replay takes several seconds
        workers = 2 if Path(rec).stat().st_size >= PARALLEL_FROM_BYTES else 1
    n_workers = max(1, min(workers, 2, len(jobs), os.cpu_count() or 1))
    t0 = _time.perf_counter()
    try:
        if n_workers == 1:
            results = [run_job(j, ack_within_s, detect_within_s, progress) for j in jobs]
        else:
            results = _run_parallel(jobs, n_workers, ack_within_s, detect_within_s, progress)
    finally:
        if tmp is not None:
            tmp.cleanup()
    if tmp is not None:
        for r in results:
            r["database"] = None
    return {
        "recording": rec,
        "caution": COMPARE_CAUTION,
        "ack_within_s": ack_within_s,
        "detect_within_s": detect_within_s,
        "seconds": round(_time.perf_counter() - t0, 3),
        "workers": n_workers,
        "configs": results,
    }


def _run_parallel(jobs: list[Job], n_workers: int, ack_within_s: float,
                  detect_within_s: float,
                  progress: Callable[[int, int, int], None] | None) -> list[dict[str, Any]]:
    import multiprocessing as mp
    import queue as _queue

    # workers start from a clean process (forkserver, or spawn where there is none) rather
    # than a fork of this one, whose progress-bar thread may hold a lock at fork time
    methods = mp.get_all_start_methods()
    ctx = mp.get_context("forkserver" if "forkserver" in methods else "spawn")
    q = ctx.Queue() if progress is not None else None
    with ProcessPoolExecutor(max_workers=n_workers, mp_context=ctx, initializer=_init_worker,
                             initargs=(q,)) as ex:
        futs = [ex.submit(run_job, j, ack_within_s, detect_within_s) for j in jobs]
        while True:
            if q is not None:
                try:
                    while True:
                        progress(*q.get(timeout=0.1))
                except _queue.Empty:
                    pass
            else:
                _time.sleep(0.05)
            if all(f.done() for f in futs):
                break
        results = [f.result() for f in futs]
        if q is not None:
            try:
                while True:
                    progress(*q.get_nowait())
            except _queue.Empty:
                pass
    return results


# ------------------------------------------------------------------------ report


class ReportError(RuntimeError):
    """A report that cannot be written; the message says why."""


def bed_report(engine, cfg: Config, bed: BedInfo, t_from: float | None, t_to: float | None,
               *, png: bool = False, db_label: str = "", back: str | None = None
               ) -> tuple[str, dict[str, plots.Figures]]:
    """Read one bed and the configuration in force at the window's start; its page."""
    if bed.start is None or bed.end is None:
        raise ReportError(f"bed {bed.key} has no observations in the database")
    t0 = bed.start if t_from is None else t_from
    t1 = bed.end if t_to is None else t_to
    if t1 <= t0:
        t1 = t0 + 60.0
    bd = load_bed(engine, bed, t0, t1, OBS_PARAMS, DER_PARAMS)
    end = max(bed.end, t1) if t_to is None else t1
    lim = config_for_limits(stored_config(engine, t0), cfg)
    return bed_page(bd, lim, t0, t1, end, png=png, db_label=db_label, back=back)


def _safe(name: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in name)


def write_report(engine, cfg: Config, *, out: str | Path, bed: str | None = None,
                 unit: str | None = None, t_from: float | None = None,
                 t_to: float | None = None, png: bool = False,
                 db_label: str = "") -> list[str]:
    """Write the page(s); return the paths written (HTML first, then PNGs)."""
    out = Path(out)
    beds = load_beds(engine)
    written: list[str] = []

    def write_bed(b: BedInfo, path: Path, back: str | None) -> None:
        html, figs = bed_report(engine, cfg, b, t_from, t_to, png=png, db_label=db_label,
                                back=back)
        path.write_text(html, encoding="utf-8")
        written.append(str(path))
        if png:
            for key, f in figs.items():
                p = path.with_name(f"{path.stem}-{key}.png")
                p.write_bytes(f.png or b"")
                written.append(str(p))

    out.parent.mkdir(parents=True, exist_ok=True)
    if bed is not None:
        found = find_beds(beds, bed)
        if not found:
            have = ", ".join(b.key for b in beds.values()) or "none"
            raise ReportError(f"no bed {bed!r} in the database (beds: {have})")
        if len(found) > 1:
            raise ReportError(f"bed {bed!r} is in several units; give UNIT/BED "
                              f"({', '.join(b.key for b in found)})")
        write_bed(found[0], out, None)
        return written
    unit_beds = [b for b in beds.values() if b.unit == unit]
    if not unit_beds:
        units = sorted({b.unit for b in beds.values()})
        raise ReportError(f"no unit {unit!r} in the database (units: "
                          f"{', '.join(units) or 'none'})")
    links = {b.id: f"{out.stem}-{_safe(b.bed)}.html" for b in unit_beds
             if b.start is not None}
    counts = {}
    for b in unit_beds:
        periods, info = build_periods(alarm_rows(engine, [b.id]))
        counts[b.id] = bed_counts(b, periods, info, notes(engine, [b.id]), t_from, t_to)
    out.write_text(unit_page(unit_beds, counts, links, unit, db_label, t_from, t_to),
                   encoding="utf-8")
    written.append(str(out))
    for b in unit_beds:
        if b.start is None:
            continue
        write_bed(b, out.with_name(links[b.id]), out.name)
    return written
