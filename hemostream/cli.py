"""The `hemostream` command: the one place that wires the core, storage and I/O together."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from rich.console import Console

from . import CAUTION

EXAMPLE_RECORDING = (Path(__file__).resolve().parent.parent / "simulators" / "recordings"
                     / "example-ward.jsonl")

err = Console(stderr=True, soft_wrap=True)


def _load_config(path):
    from .config import load_for_command
    return load_for_command(path)


def cmd_replay(args) -> int:
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    from .replay import replay_file
    from .store import StoreError

    cfg = _load_config(args.config)
    path = Path(args.recording)
    if not path.is_file():
        err.print(f"[red]error:[/] recording {str(path)!r} does not exist or is not a file")
        return 2
    url = args.db or cfg.store.url
    show = err.is_terminal and path.stat().st_size > 2_000_000 and not args.quiet
    try:
        with Progress(TextColumn("replaying"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"),
                      TimeRemainingColumn(), console=err, disable=not show,
                      transient=True) as prog:
            task = prog.add_task("replay", total=path.stat().st_size)
            summary = replay_file(path, url, cfg, speed=args.speed,
                                  progress=lambda d, t: prog.update(task, completed=d))
    except StoreError as e:
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 1
    except OSError as e:
        err.print(f"[red]error:[/] cannot read {str(path)!r}: {e.strerror or e}")
        return 1
    if args.json:
        print(json.dumps(summary.as_dict(), indent=2))
        return 0
    out = Console(soft_wrap=True)
    out.print(f"[bold]replayed[/] {summary.path} into {summary.db_url}")
    out.print(f"  lines {summary.lines}   messages stored {summary.messages}   "
              f"observations {summary.observations}   duplicates dropped {summary.duplicates}"
              f"   late {summary.late}")
    out.print(f"  derived values computed {summary.derived_computed}, stored "
              f"{summary.derived_stored}   alarm events {summary.alarm_events}")
    out.print(f"  rejected {summary.rejected_total}"
              + "".join(f"\n    {k}: {v}" for k, v in summary.rejected.items()))
    out.print(f"  {summary.seconds:.2f} s, {summary.messages_per_s:,.0f} lines/s")
    out.print(f"  see them with: hemostream query rejected --db {summary.db_url}"
              if summary.rejected_total else
              f"  see them with: hemostream query derived --db {summary.db_url}")
    return 0


def cmd_query(args) -> int:
    from . import query
    from .store import StoreError, open_engine

    cfg = _load_config(args.config)
    url = args.db or cfg.store.url
    if url.startswith("sqlite:///") and not Path(url[len("sqlite:///"):]).exists():
        err.print(f"[red]error:[/] database file {url[len('sqlite:///'):]!r} does not exist")
        return 1
    try:
        since = query.parse_since(args.since) if args.since else None
    except ValueError as e:
        err.print(f"[red]error:[/] {e}")
        return 2
    try:
        engine = open_engine(url, create=False)
        n = query.write(query.rows(engine, args.kind, args.bed, args.param, since, args.limit),
                        args.format, kind=args.kind)
    except StoreError as e:
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 1
    except BrokenPipeError:
        return 0
    if args.format == "table":
        err.print(f"{n} row(s)")
    return 0


def cmd_check_config(args) -> int:
    from .config import ConfigError, load_config
    bad = 0
    for f in args.files:
        try:
            load_config(f)
            print(f"{f}: ok")
        except ConfigError as e:
            bad += 1
            print(str(e))
    return 1 if bad else 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="hemostream",
        description="Hemodynamic monitoring stream processor: checks and stores bedside "
                    "vitals messages (wire format v1), derives MAP, CI, SVR, shock index and "
                    "more, and keeps every observation and rejected message for audit.",
        epilog=CAUTION)
    sub = p.add_subparsers(dest="command", metavar="COMMAND", required=True)

    r = sub.add_parser("replay", help="push a recording through the pipeline into a database",
                       description="Replay a recording (JSON Lines, one MQTT message per line) "
                       "through the processing core and store the results. Bad lines become "
                       "rejects with a reason; the exit status is 0 unless the file or the "
                       "database cannot be used.", epilog=CAUTION)
    r.add_argument("recording", help="recording file (.jsonl)")
    r.add_argument("--config", metavar="FILE", help="TOML configuration (default: built-in "
                   "defaults, see configs/default.toml)")
    r.add_argument("--db", metavar="URL", help="database URL, e.g. sqlite:///ward.db or "
                   "postgresql+psycopg://127.0.0.1/test (default: the config's store.url)")
    r.add_argument("--speed", type=float, metavar="N", help="pace the replay at N x real "
                   "time (default: as fast as possible)")
    r.add_argument("--json", action="store_true", help="print the summary as JSON")
    r.add_argument("--quiet", action="store_true", help="no progress bar")
    r.set_defaults(func=cmd_replay)

    from .query import KINDS
    q = sub.add_parser("query", help="list stored rows", description="List stored rows, "
                       "oldest first. Times are RFC 3339 UTC; values are in canonical units. "
                       "The table shows the main columns; jsonl and csv carry every field "
                       "(provenance of derived values, alarm details, rejected bytes).")
    q.add_argument("kind", choices=KINDS)
    q.add_argument("--db", metavar="URL", help="database URL (default: the config's store.url)")
    q.add_argument("--config", metavar="FILE", help="TOML configuration")
    q.add_argument("--bed", metavar="BED", help="bed id, or UNIT/BED")
    q.add_argument("--param", metavar="P", help="parameter (or rule id for alarms)")
    q.add_argument("--since", metavar="TIME", help="RFC 3339 time, e.g. 2026-12-01T08:00:00Z")
    q.add_argument("--limit", type=int, metavar="N", help="at most N rows")
    q.add_argument("--format", choices=("table", "jsonl", "csv"), default="table")
    q.set_defaults(func=cmd_query)

    c = sub.add_parser("check-config", help="validate configuration files",
                       description="Report every problem in the given TOML configuration "
                       "files with its file, key and what was expected.")
    c.add_argument("files", nargs="+", metavar="FILE")
    c.set_defaults(func=cmd_check_config)

    from .live.cli import add_parsers as add_live
    add_live(sub)

    from .dashboard.watch import add_parser as add_watch
    add_watch(sub)

    from .review.cli import add_parsers as add_review
    add_review(sub)

    try:
        from simulators.cli import add_parser as add_simulate
    except ImportError:
        pass
    else:
        add_simulate(sub, publisher=_publish_lines)
    return p


def _publish_lines(lines, url: str, speed: float | None) -> int:
    """``simulate --publish``: stream recording lines to a broker at QoS 1 (the live shell)."""
    import asyncio

    from .live.publish import publish_recording_lines
    from .live.transport import TransportError
    try:
        s = asyncio.run(publish_recording_lines(lines, url, speed))
    except TransportError as e:
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 1
    except KeyboardInterrupt:
        return 130
    err.print(f"published {s.published} messages to {url}")
    return 0


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return args.func(args) or 0


if __name__ == "__main__":
    sys.exit(main())
