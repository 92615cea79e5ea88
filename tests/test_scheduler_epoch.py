"""The scheduler's epoch in two transactions (computed in a read transaction, written in a write transaction)
gives what run_epoch gives in one, and computes again when another epoch or a node landed in between."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
from sqlalchemy import select

from fusion.engine import run_epoch
from fusion.models import Decision, Epoch, FusionState, NodeReliability
from fusion.scheduler import FusionScheduler
from tests.conftest import energy_dbm, now_utc

NAMES = [f"n{i}" for i in range(4)]


def _feed(net, rng, at):
    for name in NAMES:
        powers = {c: energy_dbm(rng, 1000, 1.0 if c == "ch1" else 0.0) for c in ("ch0", "ch1", "ch2", "ch3")}
        assert net.post(name, net.report(name, powers, at=at, n_samples=1000)).status_code == 201


def _outcome(session, epoch_id):
    """Everything an epoch writes, minus ids and timestamps: decisions, node rows, learned state."""
    decisions = sorted((d.channel_id, d.state, d.p_occupied, d.nodes, d.statistic) for d in session.scalars(
        select(Decision).where(Decision.epoch_id == epoch_id)))
    nodes = sorted((r.node_id, r.pd_a, r.pd_b, r.pf_a, r.pf_b, r.noise_dbm, r.trust, tuple(r.flags))
                   for r in session.scalars(select(NodeReliability)))
    state = {r.key: (r.value, r.blob) for r in session.scalars(select(FusionState))}
    return decisions, nodes, state


def _one_transaction(app, now):
    """What run_epoch in one write transaction would write at `now` (rolled back afterwards)."""
    with app.extensions["occfuse.sessions"]() as s:
        s.begin()
        e = run_epoch(s, now, app.config)
        out = _outcome(s, e.id)
        s.rollback()
    return out


def _newest(app):
    with app.extensions["occfuse.sessions"]() as s:
        e = s.scalars(select(Epoch).order_by(Epoch.id.desc()).limit(1)).first()
        return _outcome(s, e.id)


def test_two_transactions_write_what_one_would(app, net):
    for name in NAMES:
        net.register(name)
    rng = np.random.default_rng(31)
    sched = FusionScheduler(app)
    start = now_utc()
    for k in range(3):  # from the second epoch on, learned state is read back and carried forward
        now = start + timedelta(seconds=10 * k)
        _feed(net, rng, now - timedelta(seconds=1))
        want = _one_transaction(app, now)
        sched.tick(now)
        assert sched.last_error is None
        assert _newest(app) == want
    assert sched.epochs == 3 and sched.recomputed == 0 and sched.last_write_s > 0


def test_an_epoch_landing_in_between_is_not_overwritten(app, net, monkeypatch):
    # Another leader's epoch commits after this one was computed: writing the result computed before it
    # would drop what that epoch learned. The scheduler sees the changed basis and computes again.
    for name in NAMES:
        net.register(name)
    rng = np.random.default_rng(32)
    now = now_utc()
    _feed(net, rng, now - timedelta(seconds=11))
    sched = FusionScheduler(app)
    sched.current_interval()  # as start() does: the settings row exists, so the epoch is prepared
    sched.tick(now - timedelta(seconds=20))  # learned state exists: the one in between updates it
    assert sched.epochs == 1 and sched.recomputed == 0
    prepare, want = sched._prepare, {}

    def prepare_then_another_epoch(at):
        prep = prepare(at)
        with app.extensions["occfuse.sessions"]() as s, s.begin():
            run_epoch(s, at - timedelta(seconds=10), app.config)
        want["outcome"] = _one_transaction(app, at)
        return prep

    monkeypatch.setattr(sched, "_prepare", prepare_then_another_epoch)
    sched.tick(now)
    assert sched.last_error is None and sched.recomputed == 1
    assert _newest(app) == want["outcome"]


def test_a_node_reliability_row_made_in_between_does_not_break_the_write(app, net, monkeypatch):
    # A node with no node_reliability row when the epoch is prepared (a database from before the rows were
    # made at registration) gets one from an admin's PATCH before the epoch writes: the write must update
    # that row, not insert a second one.
    from sqlalchemy import delete

    for name in NAMES:
        net.register(name)
    _feed(net, np.random.default_rng(33), now_utc() - timedelta(seconds=1))
    with app.extensions["occfuse.sessions"]() as s, s.begin():
        s.execute(delete(NodeReliability))
    sched = FusionScheduler(app)
    sched.current_interval()  # as start() does: the settings row exists, so the epoch is prepared
    prepare = sched._prepare

    def prepare_then_pin(at):
        prep = prepare(at)
        assert prep is not None and not prep.rel_rows
        r = net.client.patch("/api/v1/nodes/n0", json={"pinned": "trusted"}, headers=net.admin)
        assert r.status_code == 200
        return prep

    monkeypatch.setattr(sched, "_prepare", prepare_then_pin)
    sched.tick()
    assert sched.last_error is None and sched.epochs == 1 and sched.recomputed == 0
    with app.extensions["occfuse.sessions"]() as s:
        rows = {r.node_id: r for r in s.scalars(select(NodeReliability))}
        assert len(rows) == len(NAMES) and all(r.updated_at is not None for r in rows.values())
        assert sorted(r.pinned for r in rows.values() if r.pinned) == ["trusted"]  # the pin survives the write
