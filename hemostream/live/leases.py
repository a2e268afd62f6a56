"""Unit leases in PostgreSQL: which worker processes which unit (docs/workers.md).

A lease is a row of ``worker_leases`` (unit, owner, fencing token, since, renewed, expires);
every time is the database's own clock (``clock_timestamp()``), so the workers' clocks never
decide ownership. A worker renews its leases every ``workers.check_every_s``; one that stops
(SIGKILL, a lost network) loses them ``workers.lease_s`` after its last renewal, when another
worker's conditional ``UPDATE ... WHERE expires < now`` takes them.

Fencing (the reason for a table rather than advisory locks): each claim draws a new token
from the sequence ``worker_lease_tokens``. The owner's every write transaction first reads
its lease row ``FOR SHARE`` with its token (:meth:`Leases.guard`); if the row carries another
token the transaction raises :class:`~hemostream.store.writer.Fenced` and rolls back. A
claim by another worker updates that row, so it waits for a write in progress to commit and
every later write of the old owner fails: a worker that was paused past its lease cannot
commit a row for a unit it no longer owns. The token also gives each claim its own block of
message and bed ids (:func:`id_base`), so owners never hand out the same id.

The members table lists the live workers (renewed with their leases), which is what the
even sharing counts (:func:`share`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

from sqlalchemy import text
from sqlalchemy.engine import Connection, Engine

from ..store.writer import Fenced

NOW = "extract(epoch from clock_timestamp())"

#: message ids of a claim: token * 2^32 + 1 ... (4 billion per claim); bed ids (a 32-bit
#: column): BED_BASE + token * BEDS_PER_CLAIM + 1 ...
MESSAGE_BLOCK = 1 << 32
BED_BASE, BEDS_PER_CLAIM = 1_000_000, 1024


def id_base(token: int) -> dict[str, int]:
    """The first message and bed id of the claim with ``token``.

    >>> id_base(3) == {"messages": 3 * 2**32 + 1, "beds": 1_000_000 + 3 * 1024 + 1}
    True
    """
    return {"messages": token * MESSAGE_BLOCK + 1, "beds": BED_BASE + token * BEDS_PER_CLAIM + 1}


def share(units: list[str], members: list[str], me: str) -> int:
    """How many of ``units`` worker ``me`` should own among the live ``members``: the units
    divided evenly, the first ``len(units) % len(members)`` names (sorted) taking one more,
    so no two workers are more than one unit apart.

    >>> [share(list("abcdefghijkl"), ["w1", "w2", "w3", "w4", "w5"], w)
    ...  for w in ["w1", "w2", "w3", "w4", "w5"]]
    [3, 3, 2, 2, 2]
    """
    live = sorted(set(members) | {me})
    q, r = divmod(len(units), len(live))
    return q + (1 if live.index(me) < r else 0)


@dataclass(frozen=True)
class Lease:
    unit: str
    owner: str
    token: int
    since: float
    renewed: float
    expires: float
    lag_s: float | None
    stored_at: float | None


class Leases:
    """The lease and member rows of one worker (blocking calls: run them on a thread)."""

    def __init__(self, engine: Engine, name: str, lease_s: float) -> None:
        if engine.dialect.name != "postgresql":
            raise ValueError("workers share units through PostgreSQL leases: store.url must "
                             "be a postgresql+psycopg:// URL")
        self.engine = engine
        self.name = name
        self.lease_s = lease_s

    def now(self, conn: Connection) -> float:
        return float(conn.execute(text(f"SELECT {NOW}")).scalar_one())

    def heartbeat(self) -> list[str]:
        """Mark this worker alive, drop members that are not, and list the live ones."""
        with self.engine.begin() as conn:
            conn.execute(text(
                f"INSERT INTO worker_members (name, started, seen, expires) "
                f"VALUES (:n, {NOW}, {NOW}, {NOW} + :s) ON CONFLICT (name) DO UPDATE "
                f"SET seen = {NOW}, expires = {NOW} + :s"), {"n": self.name, "s": self.lease_s})
            conn.execute(text(f"DELETE FROM worker_members WHERE expires < {NOW}"))
            return [r[0] for r in conn.execute(text(
                "SELECT name FROM worker_members ORDER BY name"))]

    def leave(self) -> None:
        with self.engine.begin() as conn:
            conn.execute(text("DELETE FROM worker_members WHERE name = :n"), {"n": self.name})

    def table(self) -> tuple[float, list[Lease]]:
        """The database's time and every lease."""
        with self.engine.connect() as conn:
            now = self.now(conn)
            rows = conn.execute(text(
                "SELECT unit, owner, token, since, renewed, expires, lag_s, stored_at "
                "FROM worker_leases ORDER BY unit")).all()
        return now, [Lease(*r) for r in rows]

    def renew(self, owned: dict[str, int], lag: dict[str, tuple[float, float]]) -> set[str]:
        """Extend the leases this worker still holds (unit -> token), recording each unit's
        last commit (time, lag); returns the units it still holds."""
        if not owned:
            return set()
        kept: set[str] = set()
        with self.engine.begin() as conn:
            for unit, token in owned.items():
                at, lag_s = lag.get(unit, (None, None))
                r = conn.execute(text(
                    f"UPDATE worker_leases SET renewed = {NOW}, expires = {NOW} + :s, "
                    "lag_s = coalesce(:lag, lag_s), stored_at = coalesce(:at, stored_at) "
                    "WHERE unit = :u AND owner = :n AND token = :t RETURNING unit"),
                    {"s": self.lease_s, "u": unit, "n": self.name, "t": token,
                     "lag": lag_s, "at": at}).first()
                if r is not None:
                    kept.add(unit)
        return kept

    def claim(self, unit: str) -> int | None:
        """Take ``unit`` if no live lease holds it; its new fencing token, else None."""
        with self.engine.begin() as conn:
            r = conn.execute(text(
                "INSERT INTO worker_leases (unit, owner, token, since, renewed, expires) "
                f"VALUES (:u, :n, nextval('worker_lease_tokens'), {NOW}, {NOW}, {NOW} + :s) "
                "ON CONFLICT (unit) DO UPDATE SET owner = excluded.owner, "
                "token = excluded.token, since = excluded.since, renewed = excluded.renewed, "
                "expires = excluded.expires, lag_s = NULL, stored_at = NULL "
                f"WHERE worker_leases.expires < {NOW} RETURNING token"),
                {"u": unit, "n": self.name, "s": self.lease_s}).first()
        return int(r[0]) if r is not None else None

    def release(self, unit: str, token: int) -> None:
        """Give ``unit`` up (after its last batch committed): free for the next claim."""
        with self.engine.begin() as conn:
            conn.execute(text("DELETE FROM worker_leases WHERE unit = :u AND token = :t"),
                         {"u": unit, "t": token})

    @staticmethod
    def guard(unit: str, token: int) -> Callable[[Any], None]:
        """The write guard of the owner of ``unit`` with ``token`` (see the module text)."""
        sql = text("SELECT 1 FROM worker_leases WHERE unit = :u AND token = :t FOR SHARE")

        def check(conn: Any) -> None:
            if conn.execute(sql, {"u": unit, "t": token}).first() is None:
                raise Fenced(f"the lease of unit {unit!r} (token {token}) moved to another "
                             "worker; this worker's uncommitted rows of it are dropped "
                             "unacknowledged (the new owner receives them again)")
        return check
