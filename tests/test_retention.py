"""Retention: old raw reports are deleted in bounded batches, young ones and everything else stay."""

from __future__ import annotations

from datetime import timedelta

import pytest
from sqlalchemy import event, func, select, update

from fusion.models import Report, utcnow
from fusion.retention import prune_reports
from fusion.scheduler import FusionScheduler


def _age_reports(app, seqs, seconds):
    with app.extensions["occfuse.sessions"]() as s, s.begin():
        s.execute(update(Report).where(Report.seq.in_(seqs)).values(received_at=utcnow() - timedelta(seconds=seconds)))


def _count(app):
    with app.extensions["occfuse.sessions"]() as s:
        return s.scalar(select(func.count()).select_from(Report))


def test_prune_deletes_only_old_reports_in_bounded_batches(app, net):
    net.register("a")
    for _ in range(10):
        assert net.post("a", net.report("a", {"ch0": -90.0})).status_code == 201
    _age_reports(app, list(range(1, 8)), 2 * 86400)  # seqs 1..7 received two days ago
    engine = app.extensions["occfuse.engine"]
    deletes = []

    @event.listens_for(engine, "before_cursor_execute")
    def _spy(conn, cursor, statement, params, context, executemany):
        if statement.lstrip().upper().startswith("DELETE FROM REPORT"):
            deletes.append(statement)

    # Two batches of 3 at most per call: 6 deleted, then the last old one on the next call.
    assert prune_reports(engine, 86400, batch=3, max_batches=2, pause_s=0) == 6
    assert len(deletes) == 2  # one DELETE per batch, each in its own transaction
    assert _count(app) == 4
    assert prune_reports(engine, 86400, batch=3, max_batches=2, pause_s=0) == 1
    assert prune_reports(engine, 86400, batch=3, pause_s=0) == 0
    with app.extensions["occfuse.sessions"]() as s:
        assert sorted(s.scalars(select(Report.seq))) == [8, 9, 10]  # the young ones stay
    assert _count(app) == 3
    event.remove(engine, "before_cursor_execute", _spy)


def test_retention_off_deletes_nothing(app, net):
    net.register("a")
    assert net.post("a", net.report("a", {"ch0": -90.0})).status_code == 201
    _age_reports(app, [1], 10 * 86400)
    assert prune_reports(app.extensions["occfuse.engine"], 0) == 0
    assert _count(app) == 1


def test_prune_refuses_a_zero_batch(app):
    with pytest.raises(ValueError, match="batch"):
        prune_reports(app.extensions["occfuse.engine"], 10, batch=0)


def test_scheduler_prunes_only_while_leading(make_app, net):
    app = make_app(RETENTION_S=3600.0, RETENTION_BATCH=2)
    client = app.test_client()
    from tests.conftest import Network

    n = Network(client, net.admin)
    n.register("b")
    for _ in range(3):
        assert n.post("b", n.report("b", {"ch0": -90.0})).status_code == 201
    _age_reports(app, [1, 2, 3], 7200)
    sched = FusionScheduler(app)
    assert sched.prune() == 0 and _count(app) == 3  # not the leader: nothing
    sched.leading = True
    assert sched.prune() == 3 and _count(app) == 0  # batches of 2 until done (bounded by max_batches)


def test_ingest_goes_on_while_a_prune_pass_runs(app, net):
    # A pass over 300 old reports, one row per transaction with a 5 ms pause, takes over a second; reports
    # posted meanwhile are all acknowledged, and some of them land between its first and last DELETE, i.e.
    # ingest takes the write lock between batches instead of waiting for the whole pass.
    import threading
    import time

    net.register("old")
    for start in range(0, 300, 50):
        batch = {"reports": [net.report("old", {"ch0": -90.0}, seq=s + 1) for s in range(start, start + 50)]}
        assert net.post("old", batch).status_code == 201
    _age_reports(app, list(range(1, 301)), 2 * 86400)
    net.register("young")
    engine = app.extensions["occfuse.engine"]
    deletes = []

    @event.listens_for(engine, "after_cursor_execute")
    def _spy(conn, cursor, statement, params, context, executemany):
        if statement.lstrip().upper().startswith("DELETE FROM REPORT"):
            deletes.append(time.monotonic())

    pruned = []
    worker = threading.Thread(target=lambda: pruned.append(
        prune_reports(engine, 86400, batch=1, max_batches=1000, pause_s=0.005)))
    worker.start()
    try:
        deadline = time.monotonic() + 30  # bounded wait for the pass to start
        while not deletes and time.monotonic() < deadline:
            time.sleep(0.001)
        acked = []
        for _ in range(20):
            assert net.post("young", net.report("young", {"ch0": -95.0})).status_code == 201
            acked.append(time.monotonic())
    finally:
        worker.join(timeout=60)
        event.remove(engine, "after_cursor_execute", _spy)
    assert pruned == [300]
    assert any(deletes[0] < t < deletes[-1] for t in acked)
    assert _count(app) == 20
