"""The scale figure's driver: hemostream's own replay of a two-phase recording, timed per phase.

    python -m benchmarks.scale_replay RECORDING --config CFG --db URL --measured-from LINE

Calls :func:`hemostream.replay.replay_file` (the function behind ``hemostream replay``: the
whole pipeline, rules and batched SQLite storage included) with its progress callback, which
it calls every 2,000 lines. The measured phase starts at the first callback at or after line
``--measured-from`` (the fill phase is done: the trend windows and the duplicate memory are
full) and ends with the replay (after the last batch committed). At that first callback the
fill phase's rows still held by the processor are handed to the writer and the writer's
queue is waited for, so the measured phase pays for its own rows only, not for a backlog of
the fill phase's. (The processor and writer replay_file creates are reached by wrapping the
two classes in its module; nothing in hemostream changes.)

By default the fill phase's rows are not written (only the ``beds`` rows, which later rows
refer to): the measured phase then writes into a database that holds nothing else, the same
for every bed count, so its cost reflects the pipeline's in-memory state (bed count, window
length) and not the size of the database. ``--store-fill`` writes them too (a database
holding the fill phase's rows: the cost of inserting into a grown database).

Prints one JSON line: per-message cost of the measured phase, the fill phase's time, the
replay summary, this process's peak resident set size, its resident set size when the
measured phase began (the fill phase's rows all written: the pipeline's state, plus whatever
the allocator kept), the deepest the writer's queue got (batches waiting), and for the
measured phase the CPU time of the main thread (parse, validate, core, rules) and of the
writer thread (inside ``hemostream.store.write_rows``, timed by wrapping it), per message.
"""

from __future__ import annotations

import argparse
import json
import resource
import sys
import time


def rss_kb() -> int:
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1])
    except OSError:
        pass
    return 0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("recording")
    ap.add_argument("--config", required=True)
    ap.add_argument("--db", required=True)
    ap.add_argument("--measured-from", type=int, required=True)
    ap.add_argument("--store-fill", action="store_true",
                    help="write the fill phase's rows too (default: only its beds rows)")
    a = ap.parse_args(argv)

    import hemostream.replay as rp
    import hemostream.store as store
    from hemostream.config import load_config
    from hemostream.store import rows_of

    made: dict[str, object] = {}
    writer_cpu = [0.0, 0.0]                  # [cpu s, wall s] of write_rows while measuring
    measuring = [False]                      # set at the start of the measured phase
    write_rows = store.write_rows

    def timed_write_rows(*args, **kw):
        c0, w0 = time.thread_time(), time.perf_counter()
        try:
            return write_rows(*args, **kw)
        finally:
            if measuring[0]:
                writer_cpu[0] += time.thread_time() - c0
                writer_cpu[1] += time.perf_counter() - w0

    store.write_rows = timed_write_rows

    class Processor(rp.Processor):
        def __init__(self, *args, **kw) -> None:
            super().__init__(*args, **kw)
            made["proc"] = self

    class Writer(rp.Writer):
        def __init__(self, *args, **kw) -> None:
            super().__init__(*args, **kw)
            made["writer"] = self

        def submit(self, rows, on_done=None) -> None:
            if not measuring[0] and not a.store_fill:
                rows = {k: v for k, v in rows.items() if k == "beds"}
                if not rows:
                    return
            super().submit(rows, on_done)

    rp.Processor, rp.Writer = Processor, Writer
    cfg = load_config(a.config)
    calls = [0]
    start: list[tuple[float, int]] = []
    t0 = time.perf_counter()
    flush_s = [0.0]
    state_kb = [0]
    depth = [0]
    main_cpu0 = [0.0]

    def progress(done: int, total: int) -> None:
        calls[0] += 1
        line = calls[0] * 2000
        w = made.get("writer")
        if w is not None:
            depth[0] = max(depth[0], w.q.qsize())
        if not start and line >= a.measured_from and done < total:
            t = time.perf_counter()
            made["writer"].submit(rows_of(made["proc"].drain()))
            made["writer"].flush()
            flush_s[0] = time.perf_counter() - t
            state_kb[0] = rss_kb()
            measuring[0] = True
            main_cpu0[0] = time.thread_time()
            start.append((time.perf_counter(), line))

    s = rp.replay_file(a.recording, a.db, cfg, progress=progress)
    t_end = time.perf_counter()
    main_cpu = time.thread_time() - main_cpu0[0]
    if not start:
        print(json.dumps({"error": "measured phase shorter than one progress interval"}))
        return 1
    t_start, line_start = start[0]
    measured = s.lines + s.blank_lines - line_start
    peak_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({
        "lines": s.lines, "measured_lines": measured,
        "measured_s": t_end - t_start, "fill_s": t_start - t0,
        "us_per_message": (t_end - t_start) / measured * 1e6,
        "fill_us_per_message": (t_start - t0) / max(line_start, 1) * 1e6,
        "backlog_flush_s": flush_s[0], "rss_at_measure_start_kb": state_kb[0],
        "max_writer_queue_batches": depth[0],
        "main_cpu_us_per_message": main_cpu / measured * 1e6,
        "writer_cpu_us_per_message": writer_cpu[0] / measured * 1e6,
        "writer_wall_us_per_message": writer_cpu[1] / measured * 1e6,
        "max_rss_kb": peak_kb, "summary": s.as_dict()}), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
