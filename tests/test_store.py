"""fusion.store pieces that need no database: the SQLite time text matches SQLAlchemy's own processors."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

from hypothesis import given, settings
from hypothesis import strategies as st
from sqlalchemy.dialects import sqlite

from fusion.models import Report
from fusion.ingest import utc_text
from fusion.store import _sqlite_time, _sqlite_time_of


@settings(max_examples=300, deadline=None, derandomize=True, database=None)
@given(at=st.datetimes(min_value=datetime(1970, 1, 2), max_value=datetime(9999, 12, 30),
                       timezones=st.sampled_from([timezone.utc, timezone(timedelta(hours=5, minutes=30)),
                                                  timezone(timedelta(hours=-8))])))
def test_sqlite_time_text_is_what_sqlalchemy_writes(at):
    """Stored times are compared as text by the epoch's range queries, so the fast path must write exactly
    what the column type (UTCDateTime on SQLite's DATETIME) writes, microseconds included."""
    dialect = sqlite.dialect()
    reference = Report.__table__.c.measured_at.type.dialect_impl(dialect).bind_processor(dialect)
    assert _sqlite_time(at) == reference(at)
    assert _sqlite_time_of(utc_text(at)) == reference(at)  # the path ingest takes, from the fingerprint's text


def test_whole_seconds_keep_their_microseconds():
    at = datetime(2026, 12, 1, 21, 14, 5, tzinfo=timezone.utc)
    assert _sqlite_time(at) == "2026-12-01 21:14:05.000000"
    assert _sqlite_time_of(utc_text(at)) == "2026-12-01 21:14:05.000000"
