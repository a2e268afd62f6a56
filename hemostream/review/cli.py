"""The ``compare`` and ``report`` subcommands (added to ``hemostream`` by cli.build_parser)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path


from ..consoles import LazyConsole
from . import CAUTION, COMPARE_CAUTION

err = LazyConsole(stderr=True, soft_wrap=True)


def cmd_compare(args) -> int:
    from ..config import ConfigError, load_config
    from . import runner, tables

    rec = Path(args.recording)
    if not rec.is_file():
        err.print(f"[red]error:[/] recording {str(rec)!r} does not exist or is not a file",
                  highlight=False)
        return 2
    bad = 0
    for c in args.config:
        try:
            load_config(c)
        except ConfigError as e:
            bad += 1
            err.print(f"[bold red]invalid configuration[/]\n{e}", highlight=False)
    if bad:
        return 2
    if args.ack_within <= 0 or args.detect_within <= 0:
        err.print("[red]error:[/] --ack-within and --detect-within must be positive minutes")
        return 2
    labels = runner.labels_for(args.config)
    if args.label:
        if len(args.label) != len(args.config):
            err.print(f"[red]error:[/] {len(args.label)} --label for {len(args.config)} "
                      "--config; give one label per configuration, in the same order")
            return 2
        labels = list(args.label)
    show = err.is_terminal and not args.quiet
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    size = rec.stat().st_size or 1
    try:
        with Progress(TextColumn("{task.description}"), BarColumn(),
                      TextColumn("{task.percentage:>3.0f}%"), TimeElapsedColumn(),
                      console=err.real, disable=not show, transient=True) as prog:
            tasks = [prog.add_task(f"replaying under {lab}", total=size) for lab in labels]
            result = runner.compare(
                rec, list(args.config), ack_within_s=args.ack_within * 60.0,
                detect_within_s=args.detect_within * 60.0, keep_dir=args.keep,
                workers=args.workers, labels=labels,
                progress=(lambda i, d, t: prog.update(tasks[i], completed=d, total=t))
                if show else None)
    except OSError as e:
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 1
    except Exception as e:  # a store error inside a worker comes back as itself
        from ..store import StoreError
        if isinstance(e, StoreError):
            err.print(f"[red]error:[/] {e}", highlight=False)
            return 1
        raise
    if args.json:
        Path(args.json).write_text(tables.to_json(result) + "\n", encoding="utf-8")
    if args.csv:
        Path(args.csv).write_text(tables.to_csv(result), encoding="utf-8", newline="")
    if args.format == "json":
        sys.stdout.write(tables.to_json(result) + "\n")
    elif args.format == "csv":
        sys.stdout.write(tables.to_csv(result))
    else:
        tables.render(result, LazyConsole(soft_wrap=True).real)
    sys.stdout.flush()
    for f in (args.json, args.csv):
        if f:
            err.print(f"wrote {f}", highlight=False)
    return 0


def cmd_report(args) -> int:
    from ..config import ConfigError, load_config
    from ..store import StoreError, open_engine
    from . import runner as rep

    try:
        cfg = load_config(args.config)
    except ConfigError as e:
        err.print(f"[bold red]invalid configuration[/]\n{e}", highlight=False)
        return 2
    if Path(args.out).suffix.lower() not in (".html", ".htm"):
        err.print(f"[red]error:[/] --out {args.out!r}: the report is an HTML page; give a "
                  "name ending in .html (print it to PDF from a browser if you need one; "
                  "--png writes every figure as PNG)", highlight=False)
        return 2
    url = args.db or cfg.store.url
    if url.startswith("sqlite:///") and not Path(url[len("sqlite:///"):]).exists():
        err.print(f"[red]error:[/] database file {url[len('sqlite:///'):]!r} does not exist",
                  highlight=False)
        return 1
    try:
        t_from = rep.parse_time(args.t_from, "--from") if args.t_from else None
        t_to = rep.parse_time(args.t_to, "--to") if args.t_to else None
    except ValueError as e:
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 2
    if t_from is not None and t_to is not None and t_to <= t_from:
        err.print("[red]error:[/] --to must be later than --from")
        return 2
    try:
        engine = open_engine(url, create=False)
    except StoreError as e:
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 1
    try:
        written = rep.write_report(engine, cfg, out=args.out, bed=args.bed, unit=args.unit,
                                   t_from=t_from, t_to=t_to, png=args.png, db_label=url)
    except rep.ReportError as e:
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 1
    except OSError as e:
        err.print(f"[red]error:[/] --out {args.out!r}: cannot write there "
                  f"({e.strerror or e}); give a path in a writable folder", highlight=False)
        return 1
    finally:
        engine.dispose()
    for f in written:
        print(f)
    return 0


def add_parsers(sub) -> None:
    c = sub.add_parser(
        "compare", help="replay a recording under several configurations and compare alarms",
        description="Replay one recording under each configuration (each into its own "
        "temporary SQLite database, two at a time) and show side by side: alarms per bed-day "
        "by priority and by rule, alarm-hours, the share of time in each alarm state, "
        "acknowledgements within N minutes (when the recording holds them) and the "
        "detection delay of every deterioration marked by a deterioration_onset note. "
        + COMPARE_CAUTION, epilog=CAUTION)
    c.add_argument("recording", help="recording file (.jsonl)")
    c.add_argument("--config", metavar="FILE", action="append", required=True,
                   help="TOML configuration; give it once per configuration to compare")
    c.add_argument("--label", metavar="NAME", action="append",
                   help="a column name per --config, in the same order (default: file names)")
    c.add_argument("--ack-within", type=float, default=5.0, metavar="MIN",
                   help="count alarms acknowledged within MIN minutes (default 5)")
    c.add_argument("--detect-within", type=float, default=60.0, metavar="MIN",
                   help="an onset with no alarm within MIN minutes counts as missed "
                   "(default 60); one with less than MIN minutes of recording after it and "
                   "no alarm is counted apart, as too late in the recording to judge")
    c.add_argument("--format", choices=("table", "json", "csv"), default="table",
                   help="what to print on stdout (default table)")
    c.add_argument("--json", metavar="FILE", help="also write the full result as JSON")
    c.add_argument("--csv", metavar="FILE", help="also write the side-by-side rows as CSV")
    c.add_argument("--keep", metavar="DIR", help="keep each replay's SQLite database in DIR "
                   "(for hemostream report or query)")
    c.add_argument("--workers", type=int, metavar="N", choices=(1, 2),
                   help="replays at a time, 1 or 2 (default: 2 for recordings of 8 MB or "
                   "more, where the second process pays for its start-up)")
    c.add_argument("--quiet", action="store_true", help="no progress bar")
    c.set_defaults(func=cmd_compare)

    r = sub.add_parser(
        "report", help="write an HTML review of a bed (or a unit) with plots",
        description="Write a self-contained HTML file (plots embedded as SVG, no scripts, "
        "nothing fetched) for one bed: aligned time axes of arterial pressure, HR, CVP, "
        "CO/CI, SVR and shock index, with the configured limits, alarm periods shaded by "
        "priority, notes as markers, fluid-challenge results and the provenance of the "
        "derived values. With --unit, a unit overview page that links one page per bed.",
        epilog=CAUTION)
    r.add_argument("--db", metavar="URL", help="database URL (default: the config's store.url)")
    r.add_argument("--config", metavar="FILE", help="TOML configuration whose limits are "
                   "drawn (default: built-in defaults); admission overrides come from the "
                   "database")
    g = r.add_mutually_exclusive_group(required=True)
    g.add_argument("--bed", metavar="BED", help="bed id, or UNIT/BED")
    g.add_argument("--unit", metavar="U", help="unit overview page plus one page per bed")
    r.add_argument("--from", dest="t_from", metavar="TIME", help="RFC 3339 start, e.g. "
                   "2026-12-01T08:00:00Z (default: the bed's first value)")
    r.add_argument("--to", dest="t_to", metavar="TIME", help="RFC 3339 end (default: the "
                   "bed's last value)")
    r.add_argument("--out", metavar="FILE.html", required=True, help="HTML file to write "
                   "(with --unit, bed pages go beside it as FILE-<bed>.html)")
    r.add_argument("--png", action="store_true", help="also write every figure as PNG "
                   "beside the HTML file")
    r.set_defaults(func=cmd_report)


def main(argv: list[str] | None = None) -> int:   # pragma: no cover - for python -m
    p = argparse.ArgumentParser(prog="hemostream")
    add_parsers(p.add_subparsers(dest="command", required=True))
    a = p.parse_args(argv)
    return a.func(a)
