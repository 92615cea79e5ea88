"""Storing prepared reports in one short transaction, on the DBAPI connection itself.

This runs for every report request, so it skips the ORM and SQLAlchemy's statement execution (which cost
several times the SQL itself here: DEVELOPERS.md, Benchmarks) and sends plain SQL on a pooled connection:

1. ``BEGIN IMMEDIATE`` on SQLite (:func:`fusion.db._begin_immediate`), an implicit ``BEGIN`` on PostgreSQL;
2. the newest plan revision, which must be the one the reports were packed against (else :class:`StalePlan`);
3. ``UPDATE node SET last_seen`` for the node *and its token hash*, enabled: this confirms, inside the
   transaction, what the auth check may have taken from its cache (else :class:`StaleNode`);
4. ``INSERT ... ON CONFLICT (node_id, seq) DO NOTHING RETURNING seq`` (atomic against a concurrent copy);
5. for the seqs it skipped, the stored rows, to tell a retry (same content) from a conflict (409);
6. ``COMMIT``: durable before the request is acknowledged.

Column values go through the SQLAlchemy column types' own bind and result processors, so what is written is
exactly what the ORM would write and read. SQLite and PostgreSQL only (``ON CONFLICT ... RETURNING``).
"""

from __future__ import annotations

import sqlite3
from datetime import datetime, timezone
from functools import lru_cache

from sqlalchemy import Engine
from sqlalchemy.exc import OperationalError

from .db import _begin_immediate
from .errors import Conflict
from .ingest import same_content
from .models import PlanRevision, Report
from .plan import PlanIndex

__all__ = ["store_reports", "StalePlan", "StaleNode", "SUPPORTED"]

SUPPORTED = frozenset({"sqlite", "postgresql"})
_COLUMNS = ("node_id", "seq", "measured_at", "received_at", "n_samples", "plan_revision", "powers", "noise",
            "content_hash")
_CHUNK = 500  # rows per INSERT statement: 4,500 parameters, under SQLite's 32,766 and PostgreSQL's 65,535


class StalePlan(Exception):
    """A newer plan than the one the reports were packed against was stored meanwhile."""


class StaleNode(Exception):
    """The node's token changed, or the node was disabled or removed, since the auth check."""


class _Dialect:
    """Statement texts and column processors for one dialect (built once per dialect)."""

    def __init__(self, dialect):
        mark = "?" if dialect.name == "sqlite" else "%s"
        self.name = dialect.name
        self.newest = "SELECT revision, created_at FROM plan_revision ORDER BY revision DESC LIMIT 1"
        self.confirm = (f"UPDATE node SET last_seen = {mark} WHERE id = {mark} AND token_hash = {mark} "
                        f"AND NOT disabled")
        self.stored = ("SELECT seq, measured_at, n_samples, plan_revision, powers, noise FROM report "
                       f"WHERE node_id = {mark} AND seq IN ({{marks}})")
        self.channels = f"SELECT channel_id FROM channel WHERE revision = {mark} ORDER BY position"
        self.mark = mark
        utc = Report.__table__.c.measured_at.type.dialect_impl(dialect)
        self.bind_time = utc.bind_processor(dialect) or (lambda v: v)
        if dialect.name == "sqlite":
            self.bind_time = _sqlite_time  # the same text, ~4x faster (tests/test_store.py compares the two)
        self.read_time = utc.result_processor(dialect, None) or (lambda v: v)
        plan_time = PlanRevision.__table__.c.created_at.type.dialect_impl(dialect)
        self.read_plan_time = plan_time.result_processor(dialect, None) or (lambda v: v)

    @lru_cache(maxsize=64)
    def insert(self, n_rows: int) -> str:
        row = "(" + ", ".join([self.mark] * len(_COLUMNS)) + ")"
        return (f"INSERT INTO report ({', '.join(_COLUMNS)}) VALUES {', '.join([row] * n_rows)} "
                f"ON CONFLICT (node_id, seq) DO NOTHING RETURNING seq")


def _sqlite_time(value: datetime) -> str:
    """What SQLAlchemy's UTCDateTime -> SQLite DATETIME processors write for an aware datetime: naive UTC as
    ``YYYY-MM-DD HH:MM:SS.ffffff`` (always with microseconds, so stored times sort as text)."""
    return value.astimezone(timezone.utc).replace(tzinfo=None).isoformat(" ", "microseconds")


def _sqlite_time_of(utc: str) -> str:
    """:func:`_sqlite_time` from the time's :func:`fusion.ingest.utc_text`
    (``YYYY-MM-DDTHH:MM:SS[.ffffff]+00:00``), which ingest has already computed for the fingerprint: string
    slices instead of a second conversion."""
    return f"{utc[:10]} {utc[11:26]}" if len(utc) == 32 else f"{utc[:10]} {utc[11:19]}.000000"


_DIALECTS: dict[str, _Dialect] = {}


def _for(engine: Engine) -> _Dialect:
    d = _DIALECTS.get(engine.dialect.name)
    if d is None:
        d = _DIALECTS[engine.dialect.name] = _Dialect(engine.dialect)
    return d


def store_reports(engine: Engine, rows: dict[int, dict], *, plan: PlanIndex, token_hash: str, now: datetime,
                  busy_timeout_s: float) -> list[tuple[int, str]]:
    """Store the new rows, acknowledge the identical ones, refuse a seq stored with other content.

    `rows` come from :func:`fusion.ingest.prepare_reports` (one node, packed against `plan`, received at
    `now`: their ``received_at`` is not read). Returns ``[(seq, "created" | "duplicate"), ...]`` in the
    order of `rows`, after the commit. Raises
    :class:`StalePlan` or :class:`StaleNode` (nothing stored; the caller re-checks and may retry),
    :class:`~fusion.errors.Conflict` (nothing stored), or ``sqlalchemy.exc.OperationalError`` when the
    database stayed locked past `busy_timeout_s` (nothing stored; answered 503).
    """
    d = _for(engine)
    node_id = next(iter(rows.values()))["node_id"]
    pooled = engine.raw_connection()
    conn = pooled.driver_connection
    try:
        if d.name == "sqlite":
            _begin_immediate(conn, busy_timeout_s, int(busy_timeout_s * 1000))
        cur = conn.cursor()
        cur.execute(d.newest)
        newest = cur.fetchone()
        if newest is None or (newest[0], d.read_plan_time(newest[1])) != (plan.revision, plan.created_at):
            raise StalePlan()
        received = d.bind_time(now)  # the request's receipt time, bound once rather than once per row
        cur.execute(d.confirm, (received, node_id, token_hash))
        if cur.rowcount != 1:
            raise StaleNode()
        times = ([_sqlite_time_of(r["measured_utc"]) for r in rows.values()] if d.name == "sqlite"
                 else [d.bind_time(r["measured_at"]) for r in rows.values()])
        params = [(r["node_id"], r["seq"], at, received, r["n_samples"], r["plan_revision"], r["powers"],
                   r["noise"], r["content_hash"]) for r, at in zip(rows.values(), times)]
        created: set[int] = set()
        for i in range(0, len(params), _CHUNK):
            chunk = params[i:i + _CHUNK]
            cur.execute(d.insert(len(chunk)), [v for p in chunk for v in p])
            created.update(seq for (seq,) in cur.fetchall())
        skipped = [seq for seq in rows if seq not in created]
        if skipped:
            _check_skipped(cur, d, node_id, skipped, rows)
        conn.commit()
    except (sqlite3.OperationalError, _pg_operational_error()) as exc:
        _rollback(conn)
        if d.name != "sqlite":
            pooled.invalidate()  # a server-side failure may have broken the connection: never reuse it
        raise OperationalError("storing reports", None, exc) from exc
    except BaseException:
        _rollback(conn)
        raise
    finally:
        pooled.close()  # back to the pool (which rolls back anything left open)
    return [(seq, "created" if seq in created else "duplicate") for seq in rows]


def _check_skipped(cur, d: _Dialect, node_id: int, skipped: list[int], rows: dict[int, dict]) -> None:
    """Raise Conflict unless every skipped seq is stored with the same content (a retry)."""
    stored = {}
    for i in range(0, len(skipped), _CHUNK):
        part = skipped[i:i + _CHUNK]
        cur.execute(d.stored.format(marks=", ".join([d.mark] * len(part))), (node_id, *part))
        for seq, at, n, revision, powers, noise in cur.fetchall():
            stored[seq] = {"measured_at": d.read_time(at), "n_samples": n, "plan_revision": revision,
                           "powers": bytes(powers), "noise": bytes(noise) if noise is not None else None}
    revisions = {s["plan_revision"] for s in stored.values()} | {r["plan_revision"] for r in rows.values()}
    ids = {}
    if len(revisions) > 1:  # a retry across a plan change: compare channel by channel (rare)
        for revision in revisions:
            cur.execute(d.channels, (revision,))
            ids[revision] = tuple(c for (c,) in cur.fetchall())
    clashes = sorted(seq for seq in skipped
                     if seq not in stored or not same_content(stored[seq], rows[seq],
                                                              ids.get(stored[seq]["plan_revision"]),
                                                              ids.get(rows[seq]["plan_revision"], ())))
    if clashes:
        raise Conflict(f"seq {clashes[0]} was already stored with other content; a retry must re-send "
                       f"exactly the same report, a new report needs a new seq",
                       errors=[{"path": "seq", "message": f"seq {s} conflicts"} for s in clashes])


def _rollback(conn) -> None:
    try:
        conn.rollback()
    except Exception:  # the connection may be broken; the pool discards it on return
        pass


@lru_cache(maxsize=1)
def _pg_operational_error():
    try:
        import psycopg
    except ImportError:  # PostgreSQL support not installed: nothing to catch
        return sqlite3.OperationalError
    return psycopg.OperationalError
