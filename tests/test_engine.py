"""The fusion epoch end to end over the database: the safety rule, freshness, pooling, live settings."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
import pytest
from scipy import stats
from sqlalchemy import select

from fusion.api.schemas import FusionSettingsIn
from fusion.engine import publish_states, run_epoch
from fusion.models import Decision, Epoch
from fusion.settings import update_settings
from tests.conftest import energy_dbm, now_utc


def epoch(app, now=None, **settings):
    with app.extensions["occfuse.sessions"]() as session, session.begin():
        if settings:
            update_settings(session, app.config, FusionSettingsIn(**settings))
        e = run_epoch(session, now or now_utc(), app.config)
        return e.id if e else None


def states(app, epoch_id) -> dict:
    with app.extensions["occfuse.sessions"]() as session:
        rows = session.scalars(select(Decision).where(Decision.epoch_id == epoch_id))
        return {d.channel_id: (d.state, d.p_occupied, d.nodes) for d in rows}


def feed(net, names, occupied, *, rng, snr=1.0, at=None, n=1000):
    for name in names:
        powers = {c: energy_dbm(rng, n, snr if c in occupied else 0.0) for c in ("ch0", "ch1", "ch2", "ch3")}
        assert net.post(name, net.report(name, powers, at=at, n_samples=n)).status_code == 201


class TestSafetyRule:
    """No fresh evidence is never free (DESIGN.md safety principle; common practice in spectrum sharing)."""

    def test_no_reports_at_all_gives_unknown_for_every_channel(self, app, net):
        got = states(app, epoch(app))
        assert {s for s, _, _ in got.values()} == {"unknown"}
        assert len(got) == 4

    def test_fewer_than_min_nodes_is_never_free(self, app, net):
        net.register("only-one")
        feed(net, ["only-one"], set(), rng=np.random.default_rng(1))
        got = states(app, epoch(app, min_nodes=2, rule="egc"))
        assert all(s != "free" for s, _, _ in got.values())
        assert all(n == 1 for _, _, n in got.values())

    def test_reports_of_disabled_nodes_are_no_evidence(self, app, net):
        from fusion.models import Node

        for name in ("a", "b"):
            net.register(name)
        feed(net, ["a", "b"], set(), rng=np.random.default_rng(4))
        with app.extensions["occfuse.sessions"]() as session, session.begin():
            for node in session.scalars(select(Node)):
                node.disabled = True
        got = states(app, epoch(app, rule="egc"))
        assert {s for s, _, _ in got.values()} == {"unknown"}
        assert all(n == 0 for _, _, n in got.values())

    def test_stale_reports_are_no_evidence(self, app, net):
        for name in ("a", "b", "c"):
            net.register(name)
        feed(net, ["a", "b", "c"], set(), rng=np.random.default_rng(2), at=now_utc() - timedelta(seconds=120))
        got = states(app, epoch(app, max_age_s=30, rule="egc"))
        assert {s for s, _, _ in got.values()} == {"unknown"}
        assert all(n == 0 for _, _, n in got.values())

    @pytest.mark.parametrize("rule", ["k_of_n", "majority", "egc", "llr", "weighted_llr", "chair_varshney"])
    def test_enough_fresh_quiet_reports_give_free_and_a_strong_signal_gives_occupied(self, app, net, rule):
        names = [f"n{i}" for i in range(5)]
        for name in names:
            net.register(name)
        feed(net, names, {"ch2"}, rng=np.random.default_rng(3), snr=1.0)
        got = states(app, epoch(app, rule=rule, k=2, min_nodes=3))
        assert got["ch2"][0] == "occupied"
        assert got["ch0"][0] == "free" and got["ch0"][2] == 5

    def test_publish_states_applies_confidence_and_min_nodes(self):
        p = np.array([np.nan, 0.001, 0.001, 0.999, 0.5])
        n = np.array([0, 5, 1, 1, 5])
        assert publish_states(p, n, confidence=0.95, min_nodes=2).tolist() == [
            "unknown", "free", "unknown", "occupied", "unknown"]


def test_every_epoch_writes_one_decision_per_plan_channel_and_keeps_history(app, net):
    net.register("a")
    first, second = epoch(app), epoch(app)
    assert len(states(app, first)) == len(states(app, second)) == 4
    with app.extensions["occfuse.sessions"]() as session:
        assert len(session.scalars(select(Epoch)).all()) == 2


def test_a_fusion_change_applies_from_the_next_epoch(app, net):
    e1 = epoch(app, rule="egc")
    e2 = epoch(app, rule="majority")
    with app.extensions["occfuse.sessions"]() as session:
        assert session.get(Epoch, e1).rule == "egc"
        assert session.get(Epoch, e2).rule == "majority"


def test_window_pooling_meets_the_target_pf_of_the_pooled_gamma_law(app, net):
    """Pooling two reports of N samples is one statistic of 2N samples: under H0, Gamma(2N, 1) (Urkowitz 1967).

    With 200 nodes of pure noise, the fraction of single-node egc-style exceedances at the pooled threshold
    must match Pf within 4 binomial standard errors (common practice).
    """
    from fusion.detection import energy

    rng = np.random.default_rng(11)
    n, reports = 200, 2
    t = rng.gamma(n * reports, 1.0, size=20_000)
    tau = energy.threshold(0.1, n * reports)
    assert tau == pytest.approx(stats.chi2.isf(0.1, 2 * n * reports) / 2, rel=1e-12)  # scipy chi-square quantile
    frac = np.mean(t > tau)
    assert abs(frac - 0.1) < 4 * np.sqrt(0.1 * 0.9 / t.size)


def test_reports_within_the_window_are_pooled(app, net):
    net.register("a")
    net.register("b")
    now = now_utc()
    for name in ("a", "b"):
        for age in (1.0, 3.0, 20.0):
            body = net.report(name, {"ch0": -100.0}, at=now - timedelta(seconds=age), n_samples=100)
            assert net.post(name, body).status_code == 201
    got = states(app, epoch(app, now=now, window_s=5.0, max_age_s=30.0, rule="egc", k=None))
    with app.extensions["occfuse.sessions"]() as session:
        e = session.scalars(select(Epoch).order_by(Epoch.id.desc())).first()
        assert e.n_reports == 4  # two per node inside the 5 s window, the 20 s old ones left out
    assert got["ch0"][2] == 2


def test_learned_state_survives_between_epochs_packed_and_from_the_old_json_layout(app, net):
    # The learner's per-node arrays go to fusion_state.blob (migration 0003); databases written before hold them
    # as JSON per node_reliability row. Both must restore the same model (a restart must not forget learning).
    from fusion.engine import _reliability, _unpack_nodes
    from fusion.models import FusionState, Node, NodeReliability
    from fusion.plan import current_plan

    rng = np.random.default_rng(12)
    for name in ("a", "b", "c"):
        net.register(name)
    for k in range(3):
        feed(net, ["a", "b", "c"], {"ch1"}, rng=rng)
        epoch(app)
    with app.extensions["occfuse.sessions"]() as s, s.begin():
        nodes = list(s.scalars(select(Node).order_by(Node.id)))
        plan = current_plan(s)
        model, rows = _reliability(s, nodes, plan.revision, len(plan.channels))
        assert rows and not any(has_json for _, has_json in rows.values())  # nothing left in the per-node JSON
        assert all(s.get(NodeReliability, n.id).state == {} for n in nodes)
        packed = model.node_arrays(compact=True)  # as the epoch stores them
        assert np.any(packed["nd"] + packed["nf"] > 0)  # something was learned, so the comparison means something
        # The same state written the old way: per-node JSON, no blob.
        stored = s.get(FusionState, "reliability")
        legacy = model.get_state()
        for i, node in enumerate(nodes):
            s.get(NodeReliability, node.id).state = {"model": legacy["nodes"][i]}
        stored_ids, arrays = _unpack_nodes(stored.blob)
        assert sorted(stored_ids) == sorted(n.id for n in nodes)
        for i, node in enumerate(nodes):  # what the epoch wrote is what the model was rebuilt from
            k = stored_ids.index(node.id)
            for name, value in arrays.items():
                np.testing.assert_array_equal(packed[name][i], value[k], err_msg=name)
        stored.blob = None
        s.flush()
        again, rows = _reliability(s, nodes, plan.revision, len(plan.channels))
        assert all(has_json for _, has_json in rows.values())
    for name, value in again.node_arrays().items():
        np.testing.assert_array_equal(value, packed[name], err_msg=name)


def test_row_nanmedian_matches_numpy_with_and_without_a_single_figure_per_row():
    # The engine takes a row whose values are all equal as its own median (speed); other rows go to
    # np.nanmedian. Same answers as np.nanmedian on every kind of row.
    from fusion.engine import _row_nanmedian

    rng = np.random.default_rng(41)
    a = np.full((12, 16), -100.0)
    a[1] = rng.normal(-100.0, 1.0, 16)  # a figure per channel
    a[2, :5] = np.nan  # one figure, some channels without
    a[3] = np.nan  # no figure at all: NaN
    a[4, 7] = -95.0  # one channel differs
    a[5, ::2], a[5, 1::2] = np.nan, rng.normal(size=8)
    want = np.array([np.nan if np.isnan(r).all() else np.nanmedian(r) for r in a])
    assert np.array_equal(_row_nanmedian(a), want, equal_nan=True)


def test_report_times_read_as_sqlite_text_match_the_datetimes(app):
    # On SQLite the epoch parses measured_at from its stored text with numpy (speed); it must give the
    # seconds datetime.timestamp() gives, with and without microseconds, for text written by SQLAlchemy.
    from datetime import datetime, timezone

    from sqlalchemy import DateTime

    from fusion.engine import _posix_seconds

    times = [datetime(2026, 12, 2, 16, 43, 1, tzinfo=timezone.utc),
             datetime(2026, 12, 2, 16, 43, 1, 123456, tzinfo=timezone.utc),
             datetime(1999, 12, 31, 23, 59, 59, 999999, tzinfo=timezone.utc)]
    engine = app.extensions["occfuse.engine"]
    if engine.dialect.name == "sqlite":  # the text exactly as SQLAlchemy's SQLite DateTime writes it
        write = DateTime().dialect_impl(engine.dialect).bind_processor(engine.dialect)
        stored = [write(t.replace(tzinfo=None)) for t in times]
        assert stored[0] == "2026-12-02 16:43:01.000000"  # the format the parse relies on
    else:
        stored = [t.isoformat(sep=" ").replace("+00:00", "") for t in times]
    want = np.array([t.timestamp() for t in times])
    assert np.array_equal(_posix_seconds(stored, as_text=True), want)
    assert np.array_equal(_posix_seconds(times, as_text=False), want)
    assert _posix_seconds([], as_text=True).shape == (0,)
