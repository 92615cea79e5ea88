"""`occfuse db backup`: SQLite's online backup API copies a consistent database, WAL content included."""

from __future__ import annotations

import sqlite3

import pytest
from click.testing import CliRunner

from fusion.cli import cli
from fusion.db import backup_sqlite, upgrade
from fusion.errors import ConfigError


def test_backup_copies_committed_rows_still_in_the_wal(tmp_path):
    db = tmp_path / "live.db"
    upgrade(f"sqlite:///{db}")
    writer = sqlite3.connect(db)
    writer.execute("PRAGMA journal_mode=WAL")
    writer.execute("PRAGMA wal_autocheckpoint=0")  # keep the rows in occfuse.db-wal, as under a busy service
    with writer:
        writer.executemany("INSERT INTO node (name, token_hash, created_at, disabled) VALUES (?, ?, ?, 0)",
                           [(f"n{i}", f"{i:064x}", "2026-12-01 00:00:00.000000") for i in range(50)])
    assert (tmp_path / "live.db-wal").stat().st_size > 0
    try:
        r = CliRunner().invoke(cli, ["db", "backup", str(tmp_path / "copy.db")],
                               env={"OCCFUSE_DATABASE_URL": f"sqlite:///{db}", "OCCFUSE_CONFIG": ""})
        assert r.exit_code == 0, r.output
    finally:
        writer.close()
    copy = sqlite3.connect(tmp_path / "copy.db")
    try:
        assert copy.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert copy.execute("SELECT count(*) FROM node").fetchone()[0] == 50
        assert copy.execute("SELECT version_num FROM alembic_version").fetchone() is not None
    finally:
        copy.close()


def test_backup_refuses_an_existing_target_and_other_databases(tmp_path):
    db = tmp_path / "a.db"
    upgrade(f"sqlite:///{db}")
    (tmp_path / "taken.db").write_bytes(b"x")
    with pytest.raises(ConfigError, match="already exists"):
        backup_sqlite(f"sqlite:///{db}", tmp_path / "taken.db")
    with pytest.raises(ConfigError, match="pg_dump"):
        backup_sqlite("postgresql+psycopg://u@127.0.0.1/x", tmp_path / "b.db")
    with pytest.raises(ConfigError, match="no database"):
        backup_sqlite(f"sqlite:///{tmp_path / 'absent.db'}", tmp_path / "c.db")
