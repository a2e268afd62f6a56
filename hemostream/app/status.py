"""``hemostream status --db URL``: which worker owns which unit, since when, and its lag
(docs/workers.md)."""

from __future__ import annotations

import json
from typing import Any

from ..core.redact import redact

# the store, rich and the wire format are imported by the command itself: every other
# command builds this parser too (hemostream.app.cli)


def read_status(url: str) -> dict[str, Any]:
    """Leases and live workers as plain data (times: epoch seconds of the database)."""
    from sqlalchemy import text

    from ..store import open_engine

    engine = open_engine(url, create=False)
    try:
        with engine.connect() as conn:
            now = float(conn.execute(text(
                "SELECT extract(epoch from clock_timestamp())" if engine.dialect.name ==
                "postgresql" else "SELECT strftime('%s','now')")).scalar_one())
            leases = [dict(r._mapping) for r in conn.execute(text(
                "SELECT unit, owner, token, since, renewed, expires, lag_s, stored_at "
                "FROM worker_leases ORDER BY unit"))]
            members = [dict(r._mapping) for r in conn.execute(text(
                "SELECT name, started, seen, expires FROM worker_members ORDER BY name"))]
    finally:
        engine.dispose()
    for r in leases:
        r["live"] = r["expires"] >= now
    return {"now": now, "leases": leases, "workers": members}


def _ago(now: float, t: float | None) -> str:
    return "-" if t is None else f"{max(0.0, now - t):.1f} s ago"


def cmd_status(args) -> int:
    from rich import box
    from rich.console import Console
    from rich.table import Table

    from ..core.timetext import format_epoch
    from ..store import StoreError

    out = Console(soft_wrap=True)
    err = Console(stderr=True, soft_wrap=True)
    try:
        st = read_status(args.db)
    except StoreError as e:
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 1
    except Exception as e:  # noqa: BLE001 - no lease tables yet, unreachable database
        err.print(f"[red]error:[/] {redact(args.db)}: {e.__class__.__name__}: "
                  f"{str(e).splitlines()[0] if str(e) else ''}", highlight=False)
        return 1
    if args.json:
        out.print_json(json.dumps(st))
        return 0
    now = st["now"]
    t = Table(title="Units and their workers", box=box.SIMPLE_HEAD)
    for col in ("unit", "worker", "since", "lease", "lag", "last stored"):
        t.add_column(col)
    for r in st["leases"]:
        left = r["expires"] - now
        lease = f"{left:.1f} s left" if r["live"] else f"ran out {-left:.1f} s ago"
        t.add_row(r["unit"], r["owner"], format_epoch(r["since"]), lease,
                  "-" if r["lag_s"] is None else f"{r['lag_s']:.2f} s",
                  _ago(now, r["stored_at"]))
    out.print(t)
    if not st["leases"]:
        out.print("no unit is held by a worker", highlight=False)
    w = Table(title="Workers", box=box.SIMPLE_HEAD)
    for col in ("worker", "started", "seen", "units"):
        w.add_column(col)
    for m in st["workers"]:
        n = sum(1 for r in st["leases"] if r["owner"] == m["name"] and r["live"])
        w.add_row(m["name"], format_epoch(m["started"]), _ago(now, m["seen"]), str(n))
    out.print(w)
    return 0


def add_parser(sub) -> None:
    s = sub.add_parser("status", help="which worker owns which unit, since when, its lag",
                       description="Show the unit leases of workers sharing a PostgreSQL "
                       "database (docs/workers.md): each unit's worker, since when, how "
                       "long its lease still runs, the arrival-to-commit lag of its last "
                       "batch and when it last stored; then the live workers.")
    s.add_argument("--db", metavar="URL", required=True, help="the workers' database URL")
    s.add_argument("--json", action="store_true", help="the same as JSON")
    s.set_defaults(func=cmd_status)
