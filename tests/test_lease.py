"""The leader lease (fusion/lease.py): one holder at a time, takeover bound, fencing, release.

The row lease is checked with an injected clock, so the takeover bound (the dead holder's claim lasts TTL after
its last renewal; others retry every TTL/3) is shown without timing anything. The advisory lock is checked on
PostgreSQL by terminating the holder's backend (pg_terminate_backend), which is what the death of the holding
process does to its connection.
"""

from __future__ import annotations

import pytest
from sqlalchemy import text
from sqlalchemy.orm import Session

from fusion.db import make_engine
from fusion.lease import AdvisoryLease, RowLease, make_lease


@pytest.fixture
def engine(db_url):
    eng = make_engine(db_url)
    yield eng
    eng.dispose()


def test_make_lease_picks_advisory_lock_on_postgresql_and_row_elsewhere(engine):
    lease = make_lease(engine, 15.0)
    assert lease.kind == ("advisory" if engine.dialect.name == "postgresql" else "row")
    assert lease.renew_s == pytest.approx(5.0)  # TTL / 3 (exact arithmetic; approx only for float repr)


def test_row_lease_one_holder_then_takeover_only_after_expiry(engine):
    ttl = 15.0
    a, b = RowLease(engine, ttl), RowLease(engine, ttl)
    assert a.holder != b.holder
    t0 = 1_000_000.0
    assert a.acquire(now=t0)
    assert not b.acquire(now=t0 + 1)
    assert a.acquire(now=t0 + a.renew_s)  # renewal moves the expiry to t0 + renew_s + ttl
    last_renewal = t0 + a.renew_s
    # a dies now. b keeps trying every renew_s: refused while a's claim is valid ...
    t = last_renewal + b.renew_s
    while t <= last_renewal + ttl:
        assert not b.acquire(now=t)
        t += b.renew_s
    # ... and the first attempt after the expiry wins: within ttl + renew_s of a's last renewal.
    assert b.acquire(now=t)
    assert t - last_renewal <= ttl + b.renew_s
    assert not a.acquire(now=t)  # a stalled holder that wakes up cannot take it back while b renews
    with Session(engine) as s, s.begin():
        assert b.holds(s, now=t) and not a.holds(s, now=t)
        assert not b.holds(s, now=t + ttl + 1)  # fencing: an expired claim is not held
    b.release()
    assert a.acquire(now=t + 1)  # released: no need to wait for the TTL


def test_row_lease_refuses_a_nonpositive_ttl(engine):
    with pytest.raises(ValueError, match="TTL"):
        RowLease(engine, 0.0)


def _pg(engine):
    if engine.dialect.name != "postgresql":
        pytest.skip("advisory locks are PostgreSQL's")


def test_advisory_lock_one_holder_and_released_when_its_connection_dies(engine):
    _pg(engine)
    a, b = AdvisoryLease(engine, renew_s=1.0), AdvisoryLease(engine, renew_s=1.0)
    try:
        assert a.acquire()
        assert a.acquire()  # re-checks the lock on its own connection, still held
        assert not b.acquire()
        with Session(engine) as s:
            assert a.holds(s) and not b.holds(s)
        with engine.connect() as c:  # what the death of the holding process does to its connection
            # the two-argument form waits (up to 10 s) until the backend has exited (PostgreSQL >= 14)
            assert c.execute(text("SELECT pg_terminate_backend(:p, 10000)"), {"p": a._backend_pid}).scalar()
            c.commit()
        assert b.acquire()
        with Session(engine) as s:
            assert b.holds(s) and not a.holds(s)  # fencing on the epoch's own connection
        assert not a.acquire()  # a finds its connection dead and drops it ...
        assert not a.acquire()  # ... then reconnects and finds the lock taken
        assert a._conn is not None and a._backend_pid is not None
    finally:
        a.release()
        b.release()


def test_advisory_lock_key_is_per_schema(db_url, engine):
    """Two occfuse databases (here: schemas) on one server each get their own leader."""
    _pg(engine)
    from tests.conftest import PG_ENV, _pg_schema_url
    import os

    other_url, drop = _pg_schema_url(os.environ[PG_ENV])
    other = make_engine(other_url)
    a, b = AdvisoryLease(engine, renew_s=1.0), AdvisoryLease(other, renew_s=1.0)
    try:
        assert a.acquire() and b.acquire()
        assert a._key != b._key
    finally:
        a.release()
        b.release()
        other.dispose()
        drop()
