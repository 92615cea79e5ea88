"""occfuse replay: stored reports re-run through other rules, compared with the service and a ground truth."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pytest
from sqlalchemy import func, select

from fusion.api.schemas import FusionSettingsIn
from fusion.engine import run_epoch
from fusion.models import Decision, Epoch, FusionState, NodeReliability
from fusion.replay import parse_rule_list, read_truth_log, replay
from fusion.settings import update_settings
from sim_nodes.truth import TruthWriter, load_truth
from tests.conftest import energy_dbm, now_utc

NODES = [f"n{i}" for i in range(5)]
CHANNELS = ["ch0", "ch1", "ch2", "ch3"]
SPACING_S = 40.0  # longer than MAX_AGE_S (30 s), so every epoch sees only its own reports


def run_history(app, net, *, epochs=8, rule="egc", seed=5, occupied=lambda e: {"ch2"}):
    """Post one sweep per node before each of `epochs` epochs and run the service's epoch; epoch times."""
    rng = np.random.default_rng(seed)
    for name in NODES:
        net.register(name)
    start = now_utc() - timedelta(seconds=SPACING_S * (epochs + 1))
    times = []
    sessions = app.extensions["occfuse.sessions"]
    with sessions() as session, session.begin():
        update_settings(session, app.config, FusionSettingsIn(rule=rule, k=2, min_nodes=3))
    for e in range(epochs):
        at = start + timedelta(seconds=SPACING_S * e)
        on = occupied(e)
        for name in NODES:
            powers = {c: energy_dbm(rng, 1000, 0.5 if c in on else 0.0) for c in CHANNELS}
            assert net.post(name, net.report(name, powers, at=at - timedelta(seconds=1))).status_code == 201
        with sessions() as session, session.begin():
            run_epoch(session, at, app.config)
        times.append(at)
    return times


def snapshot(app):
    with app.extensions["occfuse.sessions"]() as s:
        return (s.scalar(select(func.count()).select_from(Decision)), s.scalar(select(func.count()).select_from(Epoch)),
                {r.key: r.value for r in s.scalars(select(FusionState))},
                [(r.node_id, r.trust, r.pd_a, r.pf_a, r.state) for r in s.scalars(select(NodeReliability))])


def do_replay(app, specs, **kw):
    with app.extensions["occfuse.sessions"]() as session:
        out = replay(session, app.config, specs, **kw)
        session.rollback()
    return out


@pytest.mark.parametrize("rule", ["egc", "majority", "chair_varshney", "weighted_llr"])
def test_replaying_the_services_own_rule_reproduces_every_decision_and_writes_nothing(app, net, rule):
    """Same reports, same settings, reliability learning replayed from the same fresh start: identical states."""
    run_history(app, net, epochs=6, rule=rule)
    before = snapshot(app)
    res = do_replay(app, [(rule, None), ("and", None)])
    assert res.epochs == 6
    same = res.rules[0]
    assert same.decisions == 6 * 4 and same.agree == 6 * 4
    assert same.per_channel["ch2"]["occupied"] >= 5  # a strong signal on ch2 (per-sample SNR 0.5, N = 1000)
    assert snapshot(app) == before  # no decision, epoch, tracker or learner state was written


def test_a_rule_that_needs_every_node_differs_where_one_node_alone_reports_a_signal(app, net):
    """ch1 loud at one node only: EGC's energy sum calls it occupied while AND (every node must vote) calls
    it free (Varshney 1997, counting rules); the replay shows the difference on ch1 and not on quiet ch0."""
    rng = np.random.default_rng(9)
    for name in NODES:
        net.register(name)
    sessions = app.extensions["occfuse.sessions"]
    with sessions() as session, session.begin():
        update_settings(session, app.config, FusionSettingsIn(rule="egc", min_nodes=3))
    start = now_utc() - timedelta(seconds=SPACING_S * 6)
    for e in range(3):
        at = start + timedelta(seconds=SPACING_S * e)
        for i, name in enumerate(NODES):
            powers = {c: energy_dbm(rng, 1000, 3.0 if (c == "ch1" and i == 0) else 0.0) for c in CHANNELS}
            assert net.post(name, net.report(name, powers, at=at - timedelta(seconds=1))).status_code == 201
        with sessions() as session, session.begin():
            run_epoch(session, at, app.config)
    res = do_replay(app, [("and", None)])
    svc, rule_and = res.service.per_channel, res.rules[0].per_channel
    assert svc["ch1"]["occupied"] >= 1  # the service (egc) believed the loud node at least at first
    assert rule_and["ch1"]["occupied"] == 0
    assert rule_and["ch1"]["differ"] == svc["ch1"]["occupied"]
    assert rule_and["ch0"]["differ"] == 0


def test_scoring_against_a_ground_truth_log_counts_missed_detections_and_false_alarms(app, net, tmp_path):
    times = run_history(app, net, epochs=6, rule="egc")
    # A truth log that says ch2 is free and ch1 occupied throughout: every rule that hears ch2 scores false
    # alarms there and misses on ch1 (a deliberately wrong truth, so the counts are known in advance).
    path = tmp_path / "truth.jsonl"
    w = TruthWriter(path, "test", CHANNELS, times[0] - timedelta(seconds=5), 1.0)
    w.state(0.0, [False, True, False, False])
    w.close((times[-1] - times[0]).total_seconds() + 10)
    truth = read_truth_log(path)
    ref = load_truth(path)  # the simulator's own reader must agree with fusion's
    for cid in CHANNELS:
        for at in times:
            assert truth.occupied(cid, at) == ref.occupied(cid, at)
    res = do_replay(app, [("egc", None)], truth=truth)
    t = res.rules[0]
    assert t.scored == 6 * 4
    assert t.correct + t.missed + t.false_alarms + t.unknown == t.scored
    ch = t.per_channel
    # Occupied on ch2 is a false alarm against this truth, free on ch1 a missed detection; the quiet channels
    # ch0 and ch3 are free in the truth, so an occupied there is a false alarm too.
    assert t.false_alarms == ch["ch2"]["occupied"] + ch["ch0"]["occupied"] + ch["ch3"]["occupied"]
    assert t.missed == ch["ch1"]["free"]
    assert ch["ch2"]["occupied"] >= 5 and ch["ch1"]["free"] >= 5  # egc hears ch2 and not ch1
    svc = res.as_dict()["service"]["truth"]
    assert svc["false_alarms"] == t.false_alarms and svc["missed_detections"] == t.missed  # same rule, same states


def test_the_time_range_limits_the_epochs_replayed(app, net):
    times = run_history(app, net, epochs=6, rule="egc")
    res = do_replay(app, [("egc", None)], since=times[2], until=times[4])
    assert res.epochs == 3
    assert res.rules[0].decisions == 3 * 4


@pytest.mark.parametrize("text,needle", [("bogus", "unknown rule"), ("k_of_n:x", "integer"), ("egc:2", "only k_of_n"),
                                         ("", "no rule"), ("k_of_n:0", "at least 1")])
def test_bad_rule_lists_are_refused_with_the_item(text, needle):
    with pytest.raises(ValueError, match=needle):
        parse_rule_list(text)


def test_a_file_that_is_not_a_truth_log_is_refused(tmp_path):
    p = tmp_path / "x.jsonl"
    p.write_text('{"kind": "state", "channel": "a"}\n')
    with pytest.raises(ValueError, match="line 1"):
        read_truth_log(p)
