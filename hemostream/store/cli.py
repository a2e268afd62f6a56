"""``hemostream db upgrade | prune | stats``: schema versions, retention and sizes."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from ..consoles import LazyConsole

err = LazyConsole(stderr=True, soft_wrap=True)
out = LazyConsole(soft_wrap=True)


def _url(args) -> tuple[str, Any]:
    from ..config import load_for_command

    cfg = load_for_command(args.config)
    return args.db or cfg.store.url, cfg


def _exists(url: str) -> bool:
    if url.startswith("sqlite:///") and not Path(url[len("sqlite:///"):]).exists():
        err.print(f"[red]error:[/] database file {url[len('sqlite:///'):]!r} does not exist")
        return False
    return True


def cmd_upgrade(args) -> int:
    from ..core.redact import redact
    from . import Base, versions

    url, _ = _url(args)
    if not _exists(url):
        return 1
    try:
        before, after = versions.upgrade(url, Base.metadata)
    except Exception as e:  # noqa: BLE001 - shown, the database is unchanged
        err.print(f"[red]error:[/] upgrade of {redact(url)} failed, nothing was changed: "
                  f"{e.__class__.__name__}: {str(e).splitlines()[0] if str(e) else ''}",
                  highlight=False)
        return 1
    if before == after:
        err.print(f"{redact(url)}: schema already at revision {after}", highlight=False)
    else:
        err.print(f"{redact(url)}: schema upgraded from revision {before or '(empty)'} to "
                  f"{after}", highlight=False)
    return 0


def cmd_prune(args) -> int:
    from ..core.wire import format_epoch, parse_time
    from . import StoreError, open_engine
    from .retention import prune

    url, cfg = _url(args)
    if not _exists(url):
        return 1
    try:
        now = parse_time(args.now, "--now") if args.now else None
    except ValueError as e:
        err.print(f"[red]error:[/] {e}")
        return 2
    try:
        engine = open_engine(url, create=False)
        rep = prune(engine, cfg.store.retention, now, dry_run=args.dry_run)
    except StoreError as e:
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 1
    if args.json:
        print(json.dumps(rep.as_dict()))
        return 0
    verb = "would remove" if rep.dry_run else "removed"
    cut = {k: (format_epoch(v) if v is not None else "kept forever")
           for k, v in rep.cutoffs.items()}
    out.print(f"cutoffs: full rate {cut['full_rate']}, minute statistics "
              f"{cut['minute_stats']}, audit {cut['audit']}", highlight=False)
    if not rep.removed:
        out.print(f"nothing to prune ({'dry run' if rep.dry_run else 'nothing removed'})")
    for name, n in sorted(rep.removed.items()):
        out.print(f"{verb} {n} {name}", highlight=False)
    if rep.minute_stats_added:
        out.print(f"{'would add' if rep.dry_run else 'added'} {rep.minute_stats_added} "
                  "minute statistics rows", highlight=False)
    if rep.partitions_dropped:
        out.print(f"{'would drop' if rep.dry_run else 'dropped'} {rep.partitions_dropped} "
                  "day partitions of obs_chunks whole", highlight=False)
    return 0


def cmd_stats(args) -> int:
    from . import StoreError, open_engine
    from .retention import stats

    url, _ = _url(args)
    if not _exists(url):
        return 1
    try:
        s = stats(open_engine(url, create=False))
    except StoreError as e:
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 1
    if args.json:
        print(json.dumps(s))
        return 0
    from rich import box
    from rich.table import Table

    t = Table("table", "rows", "bytes", box=box.SIMPLE_HEAD, pad_edge=False)
    for name, v in s["tables"].items():
        t.add_row(name, str(v["rows"]), "" if v["bytes"] is None else f"{v['bytes']:,}")
    out.print(t)
    per = s["bytes_per_bed_day"]
    out.print(f"{s['messages']} messages, {s['observations']} observations, {s['derived']} "
              f"derived values; {s['beds_with_data']} bed(s), {s['bed_days']:.3f} bed-days; "
              + (f"{per / 1e6:.2f} MB per bed-day" if per else "size per bed-day unknown"),
              highlight=False)
    return 0


def add_parser(sub) -> None:
    d = sub.add_parser("db", help="database schema upgrades, retention and sizes",
                       description="Upgrade a database to this release's schema, prune data "
                       "past its retention ([store.retention]), show sizes.")
    dsub = d.add_subparsers(dest="db_command", metavar="ACTION", required=True)

    def common(p):
        p.add_argument("--db", metavar="URL", help="database URL (default: the config's "
                       "store.url)")
        p.add_argument("--config", metavar="FILE", help="TOML configuration")

    u = dsub.add_parser("upgrade", help="migrate the database to this release's schema",
                        description="Migrate a database made by an earlier release (0.1.0 "
                        "on) to this release's schema, in one transaction, keeping every row.")
    common(u)
    u.set_defaults(func=cmd_upgrade)
    p = dsub.add_parser("prune", help="remove data past its retention",
                        description="Remove full-rate data older than "
                        "store.retention.full_rate_days (kept as per-minute statistics), "
                        "minute statistics older than minute_stats_days, and alarm events, "
                        "notes, commands, admissions and rejects older than audit_days.")
    common(p)
    p.add_argument("--dry-run", action="store_true", help="say what would go, remove nothing")
    p.add_argument("--now", metavar="TIME", help="RFC 3339 time to count the ages from "
                   "(default: now)")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.set_defaults(func=cmd_prune)
    s = dsub.add_parser("stats", help="sizes per table and per bed-day")
    common(s)
    s.add_argument("--json", action="store_true", help="print the figures as JSON")
    s.set_defaults(func=cmd_stats)
