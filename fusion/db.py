"""Database engine and sessions, SQLite pragmas, and the migration runner.

SQLite notes (see DEVELOPERS.md): write transactions start with ``BEGIN IMMEDIATE`` so a read-then-write
transaction never fails with "database is locked" when another writer commits first; read-only requests (GET)
use ``BEGIN DEFERRED`` sessions, so they never queue behind a writer (WAL lets them read during writes);
foreign keys are switched on per connection. A writer waits up to the busy timeout for the lock, then the
request is answered 503 with Retry-After (fusion/api/problems.py). Python 3.11's sqlite3 has no ``autocommit``
attribute, hence the ``isolation_level = None`` + ``begin`` event recipe.
"""

from __future__ import annotations

import sqlite3
import time
from pathlib import Path

from flask import Flask, current_app, g, request
from sqlalchemy import create_engine, event, inspect
from sqlalchemy.exc import OperationalError
from sqlalchemy.engine import Engine
from sqlalchemy.orm import Session, sessionmaker

from .errors import ConfigError

__all__ = ["make_engine", "init_app", "get_session", "read_session", "alembic_config", "upgrade", "current_revision",
           "head_revision", "backup_sqlite", "MIGRATIONS"]

MIGRATIONS = Path(__file__).resolve().parent.parent / "migrations"


def make_engine(url: str, *, foreign_keys: bool = True, synchronous: str = "NORMAL",
                busy_timeout_s: float = 15.0) -> Engine:
    """Create an engine; on SQLite set WAL, busy timeout, `synchronous` and foreign keys on each connection.

    Transactions begin IMMEDIATE (they take the write lock at once) unless the connection carries the
    execution option ``sqlite_begin="DEFERRED"`` (see :func:`read_session`).
    """
    if synchronous.upper() not in {"OFF", "NORMAL", "FULL", "EXTRA"}:
        raise ConfigError(f"SQLITE_SYNCHRONOUS must be OFF, NORMAL, FULL or EXTRA, was {synchronous!r}")
    busy_ms = int(busy_timeout_s * 1000)
    try:
        engine = create_engine(url, connect_args={"timeout": busy_timeout_s} if url.startswith("sqlite") else {},
                               pool_pre_ping=not url.startswith("sqlite"))
    except Exception as exc:  # ArgumentError, missing driver, ...
        raise ConfigError(f"DATABASE_URL {url!r} cannot be used: {exc}") from None
    if engine.dialect.name == "sqlite":

        @event.listens_for(engine, "connect")
        def _on_connect(dbapi_conn, _record):
            dbapi_conn.isolation_level = None  # SQLAlchemy emits BEGIN itself (see module docstring)
            for pragma in ("journal_mode=WAL", f"busy_timeout={busy_ms}", f"synchronous={synchronous.upper()}",
                           f"foreign_keys={'ON' if foreign_keys else 'OFF'}"):
                dbapi_conn.execute(f"PRAGMA {pragma}")

        @event.listens_for(engine, "begin")
        def _on_begin(conn):
            mode = conn.get_execution_options().get("sqlite_begin", "IMMEDIATE")
            if mode == "IMMEDIATE":
                _begin_immediate(conn.connection.dbapi_connection, busy_timeout_s, busy_ms)
            else:
                conn.exec_driver_sql(f"BEGIN {mode}")

    return engine


def _begin_immediate(raw, timeout_s: float, busy_ms: int) -> None:
    """``BEGIN IMMEDIATE`` on a raw sqlite3 connection, retried every 50 us to 2 ms while another connection
    holds the write lock, for up to `timeout_s`.

    SQLite's own busy handler sleeps 1, 2, 5, 10, ... ms between tries (sqliteDefaultBusyCallback, from
    memory), so a writer queued behind a 0.3 ms transaction waits a millisecond or more: with two processes
    writing small reports, that idled the cores (measured: tests/bench/bench_ingest.py). The handler stays
    off only for this statement; every other statement keeps the busy timeout.
    """
    raw.execute("PRAGMA busy_timeout=0")
    try:
        deadline = time.monotonic() + timeout_s
        pause = 5e-5
        while True:
            try:
                raw.execute("BEGIN IMMEDIATE")
                return
            except sqlite3.OperationalError as exc:
                busy = "locked" in str(exc) or "busy" in str(exc)
                if not busy or time.monotonic() >= deadline:
                    raise OperationalError("BEGIN IMMEDIATE", None, exc) from exc
                time.sleep(pause)
                pause = min(2 * pause, 2e-3)
    finally:
        raw.execute(f"PRAGMA busy_timeout={busy_ms}")


def init_app(app: Flask) -> None:
    """Give the app an engine and a session factory; close the request's session at teardown."""
    engine = make_engine(app.config["DATABASE_URL"], synchronous=app.config["SQLITE_SYNCHRONOUS"],
                         busy_timeout_s=app.config["SQLITE_BUSY_TIMEOUT_S"])
    app.extensions["occfuse.engine"] = engine
    app.extensions["occfuse.sessions"] = sessionmaker(engine, expire_on_commit=False)
    # Same pool; only the BEGIN differs (ignored on other databases).
    app.extensions["occfuse.read_engine"] = read_engine = engine.execution_options(sqlite_begin="DEFERRED")
    app.extensions["occfuse.read_sessions"] = sessionmaker(read_engine, expire_on_commit=False)
    app.teardown_appcontext(_close_session)


_READ_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})


def get_session() -> Session:
    """The current request's session (one per request, closed at teardown).

    GET requests get a read session (``BEGIN DEFERRED`` on SQLite), so reads run beside a writer instead of
    queueing for the write lock; every other method gets a write session (``BEGIN IMMEDIATE``).
    """
    if "db_session" not in g:
        kind = "occfuse.read_sessions" if request.method in _READ_METHODS else "occfuse.sessions"
        g.db_session = current_app.extensions[kind]()
    return g.db_session


def read_session() -> Session:
    """A new read-only session (``BEGIN DEFERRED`` on SQLite); the caller closes it (use ``with``)."""
    return current_app.extensions["occfuse.read_sessions"]()


def _close_session(_exc=None) -> None:
    session = g.pop("db_session", None)
    if session is not None:
        session.close()


# --- migrations -------------------------------------------------------------------------------------------

def alembic_config(url: str):
    """An Alembic Config built in code (no alembic.ini, so no logging.fileConfig surprises)."""
    from alembic.config import Config

    if not (MIGRATIONS / "env.py").exists():
        raise ConfigError(f"migrations not found at {MIGRATIONS}; install occfuse from a checkout (pip install -e .)")
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    cfg.set_main_option("sqlalchemy.url", url.replace("%", "%%"))  # configparser escaping
    return cfg


def upgrade(url: str, revision: str = "head") -> None:
    """Upgrade the database at `url` to `revision` in one transaction (foreign keys off during batch copies)."""
    from alembic import command

    cfg = alembic_config(url)
    engine = make_engine(url, foreign_keys=False)
    try:
        with engine.begin() as conn:
            cfg.attributes["connection"] = conn
            command.upgrade(cfg, revision)
            if conn.dialect.name == "sqlite":
                broken = conn.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
                if broken:
                    raise RuntimeError(f"migration left dangling foreign keys: {broken[:5]}")
    finally:
        engine.dispose()


def current_revision(engine: Engine) -> str | None:
    """The revision the database is at, or None for an empty database."""
    from alembic.runtime.migration import MigrationContext

    with engine.connect() as conn:
        if not inspect(conn).has_table("alembic_version"):
            return None
        return MigrationContext.configure(conn).get_current_revision()


def head_revision(url: str) -> str | None:
    from alembic.script import ScriptDirectory

    return ScriptDirectory.from_config(alembic_config(url)).get_current_head()


def backup_sqlite(url: str, target: str | Path) -> int:
    """Copy the SQLite database at `url` to the file `target` with the online backup API; return its pages.

    The copy is consistent (WAL content included) even while other processes write; pages are copied in steps
    so writers are held up only briefly. Refuses a non-SQLite URL and an existing target.
    """
    import sqlite3

    from sqlalchemy.engine import make_url

    parsed = make_url(url)
    if parsed.get_backend_name() != "sqlite" or not parsed.database or parsed.database == ":memory:":
        raise ConfigError(f"backup copies a SQLite database file; DATABASE_URL is {parsed.get_backend_name()} "
                          f"(use pg_dump for PostgreSQL)")
    source_path, target = Path(parsed.database), Path(target)
    if not source_path.exists():
        raise ConfigError(f"no database at {source_path}")
    if target.exists():
        raise ConfigError(f"{target} already exists; choose a new file name")
    source = sqlite3.connect(f"file:{source_path}?mode=ro", uri=True, timeout=15)
    dest = sqlite3.connect(target)
    try:
        source.backup(dest, pages=1024)  # 1024 pages per step: other connections may write between steps
        return dest.execute("PRAGMA page_count").fetchone()[0]
    finally:
        dest.close()
        source.close()
