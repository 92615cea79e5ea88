"""Leader election, so exactly one of several workers runs the fusion epoch (and the retention job).

Two kinds, chosen by the database (:func:`make_lease`):

* PostgreSQL, :class:`AdvisoryLease`: ``pg_try_advisory_lock`` on a dedicated connection that never goes back to
  the pool. The server drops the lock when that connection ends, so a dead leader's lock is gone as soon as the
  server sees its socket close (at once for a killed process; after the TCP keepalives set below for a dead
  host). Workers that do not lead retry every ``renew_s``. The lock is per database *and* schema (the key
  hashes both), so several occfuse databases on one server never block each other.
* SQLite (and anything else), :class:`RowLease`: one ``job_lease`` row per job holding the leader's name and
  when its claim expires, taken or renewed by one atomic upsert that only succeeds when the caller already
  holds the row or the claim has expired. The leader renews every ``renew_s`` (TTL/3); when it dies its claim
  runs out and the next attempt by another worker takes over, i.e. within ``ttl_s + renew_s`` of the death.

Fencing: before an epoch commits, :meth:`holds` re-checks leadership inside the epoch's own transaction, so a
leader that lost its lease (stalled past the TTL, or its lock connection died) cannot publish over a new one.
"""

from __future__ import annotations

import logging
import os
import socket
import threading
import time
import uuid
import zlib

from sqlalchemy import text
from sqlalchemy.engine import Engine

__all__ = ["EPOCH_LEASE", "make_holder", "make_lease", "RowLease", "AdvisoryLease"]

log = logging.getLogger("fusion.lease")

EPOCH_LEASE = "fusion-epoch"
_PG_CLASS = 0x6F636366  # "occf": the first half of the two-int advisory key, the second hashes db + schema

_ACQUIRE = text(
    "INSERT INTO job_lease (name, holder, expires_at) VALUES (:n, :h, :e) "
    "ON CONFLICT (name) DO UPDATE SET holder = excluded.holder, expires_at = excluded.expires_at "
    "WHERE job_lease.holder = excluded.holder OR job_lease.expires_at < :now RETURNING holder")


def make_holder() -> str:
    """A holder name unique to this process ("host:pid:random"); make it after fork, the pid is part of it."""
    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"


class RowLease:
    """A TTL lease in the ``job_lease`` table (one atomic upsert; SQLite >= 3.35 and PostgreSQL)."""

    kind = "row"

    def __init__(self, engine: Engine, ttl_s: float, name: str = EPOCH_LEASE):
        if not ttl_s > 0:
            raise ValueError(f"the lease TTL must be positive, was {ttl_s!r}")
        self.engine, self.ttl_s, self.name = engine, float(ttl_s), name
        self.renew_s = self.ttl_s / 3
        self.holder = make_holder()

    def acquire(self, now: float | None = None) -> bool:
        """Take or renew the lease; True when this process holds it afterwards."""
        now = time.time() if now is None else now
        with self.engine.begin() as conn:
            row = conn.execute(_ACQUIRE, {"n": self.name, "h": self.holder, "e": now + self.ttl_s,
                                          "now": now}).first()
        return row is not None

    def holds(self, session, now: float | None = None) -> bool:
        """Fencing check inside `session`'s transaction: is our claim still there and unexpired?"""
        now = time.time() if now is None else now
        lock = " FOR UPDATE" if session.get_bind().dialect.name == "postgresql" else ""  # SQLite: BEGIN IMMEDIATE
        row = session.execute(text(f"SELECT holder, expires_at FROM job_lease WHERE name = :n{lock}"),
                              {"n": self.name}).first()
        return row is not None and row[0] == self.holder and row[1] >= now

    def release(self) -> None:
        """Give the lease up (clean shutdown), so another worker need not wait for the TTL."""
        with self.engine.begin() as conn:
            conn.execute(text("DELETE FROM job_lease WHERE name = :n AND holder = :h"),
                         {"n": self.name, "h": self.holder})


class AdvisoryLease:
    """A session-level PostgreSQL advisory lock held on a dedicated connection (see the module docstring)."""

    kind = "advisory"
    # Server-side keepalives on the lock connection: a vanished host is noticed after about 10 + 3 * 5 s.
    _KEEPALIVES = ("SET tcp_keepalives_idle = 10", "SET tcp_keepalives_interval = 5",
                   "SET tcp_keepalives_count = 3")

    def __init__(self, engine: Engine, renew_s: float, name: str = EPOCH_LEASE):
        if not renew_s > 0:
            raise ValueError(f"the lease retry period must be positive, was {renew_s!r}")
        self.engine, self.renew_s, self.name = engine, float(renew_s), name
        self.ttl_s = 0.0  # nothing expires: the server releases the lock with the connection
        self.holder = make_holder()
        self._conn = None
        self._key: tuple[int, int] | None = None
        self._backend_pid: int | None = None
        self._held = False
        self._lock = threading.Lock()

    def _connect(self) -> None:
        conn = self.engine.connect().execution_options(isolation_level="AUTOCOMMIT")
        try:
            for stmt in self._KEEPALIVES:
                conn.exec_driver_sql(stmt)
            db, schema, pid = conn.execute(text("SELECT current_database(), current_schema(), pg_backend_pid()")).one()
        except Exception:
            conn.close()
            raise
        digest = zlib.crc32(f"{db}/{schema}/{self.name}".encode())
        self._key = (_PG_CLASS, digest - (1 << 32) if digest >= 1 << 31 else digest)  # int4 is signed
        self._conn, self._backend_pid = conn, pid

    def _drop(self) -> None:
        conn, self._conn, self._backend_pid, self._held = self._conn, None, None, False
        if conn is not None:
            try:
                conn.invalidate()  # never hand a connection of unknown lock state back to the pool
                conn.close()
            except Exception:  # already broken; nothing more to release
                pass

    def acquire(self, now: float | None = None) -> bool:
        """Check that the lock is still ours, or try to take it; reconnect after a lost connection."""
        with self._lock:
            try:
                if self._conn is None:
                    self._connect()
                if self._held:
                    if self._still_held(self._conn):
                        return True
                    log.warning("the advisory lock vanished from its connection; retrying")
                    self._held = False
                a, b = self._key
                self._held = bool(self._conn.execute(text("SELECT pg_try_advisory_lock(:a, :b)"),
                                                     {"a": a, "b": b}).scalar())
                return self._held
            except Exception as exc:  # connection lost: the server has released (or will release) the lock
                log.warning("advisory lock connection failed (%s: %s); retrying in %.3g s",
                            type(exc).__name__, exc, self.renew_s)
                self._drop()
                return False

    def _lock_pid(self, conn) -> int | None:
        a, b = self._key
        return conn.execute(text(
            "SELECT pid FROM pg_locks WHERE locktype = 'advisory' AND classid = CAST(:a AS oid) "
            "AND objid = CAST(:b AS oid) AND objsubid = 2 AND granted AND database = "
            "(SELECT oid FROM pg_database WHERE datname = current_database())"),
            {"a": a & 0xFFFFFFFF, "b": b & 0xFFFFFFFF}).scalar()

    def _still_held(self, conn) -> bool:
        return self._lock_pid(conn) == self._backend_pid

    def holds(self, session, now: float | None = None) -> bool:
        """Fencing check on the epoch's own connection: does our lock connection still hold the lock?"""
        if not self._held or self._key is None:
            return False
        return self._lock_pid(session) == self._backend_pid

    def release(self) -> None:
        with self._lock:
            if self._conn is not None and self._held:
                try:
                    a, b = self._key
                    self._conn.execute(text("SELECT pg_advisory_unlock(:a, :b)"), {"a": a, "b": b})
                except Exception:  # closing the connection releases it anyway
                    pass
            if self._conn is not None:
                conn, self._conn, self._held = self._conn, None, False
                try:
                    conn.close()
                except Exception:
                    pass


def make_lease(engine: Engine, ttl_s: float):
    """The lease for `engine`'s database: an advisory lock on PostgreSQL, a lease row elsewhere."""
    if engine.dialect.name == "postgresql":
        return AdvisoryLease(engine, renew_s=ttl_s / 3)
    return RowLease(engine, ttl_s)
