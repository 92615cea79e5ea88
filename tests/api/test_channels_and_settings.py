"""Channels, free channels, history, and the fusion settings resource (live re-timing of the scheduler)."""

from __future__ import annotations

import time
from datetime import timedelta

import numpy as np
import pytest

from fusion.scheduler import FusionScheduler
from tests.conftest import now_utc
from tests.test_engine import epoch, feed


def test_channels_before_any_epoch_are_unknown(net):
    body = net.client.get("/api/v1/channels").json
    assert body["as_of"] is None
    assert [c["state"] for c in body["channels"]] == ["unknown"] * 4


def test_channels_free_and_history_after_epochs(app, net):
    names = [f"n{i}" for i in range(4)]
    for name in names:
        net.register(name)
    rng = np.random.default_rng(5)
    for _ in range(2):
        feed(net, names, {"ch1"}, rng=rng, snr=1.0)
        epoch(app, rule="egc", min_nodes=2)
    chans = {c["id"]: c for c in net.client.get("/api/v1/channels").json["channels"]}
    assert chans["ch1"]["state"] == "occupied" and chans["ch1"]["confidence"] == pytest.approx(
        chans["ch1"]["p_occupied"])
    assert chans["ch0"]["state"] == "free" and chans["ch0"]["confidence"] == pytest.approx(
        1 - chans["ch0"]["p_occupied"])
    free = net.client.get("/api/v1/channels/free?min_confidence=0.9").json
    assert "ch1" not in [c["id"] for c in free["channels"]] and "ch0" in [c["id"] for c in free["channels"]]
    assert all(c["confidence"] >= 0.9 and c["state"] == "free" for c in free["channels"])
    hist = net.client.get("/api/v1/channels/ch1/history").json
    assert len(hist["decisions"]) == 2 and hist["occupancy"] == 1.0


@pytest.mark.parametrize("query", ["min_confidence=2", "min_confidence=abc", "bogus=1"])
def test_bad_free_query_is_422(client, query):
    r = client.get(f"/api/v1/channels/free?{query}")
    assert r.status_code == 422 and r.json["errors"][0]["path"].startswith("query")


def test_history_of_an_unknown_channel_is_404(net):
    assert net.client.get("/api/v1/channels/zz/history").status_code == 404


def test_history_rejects_since_after_until(net):
    until = now_utc()
    r = net.client.get("/api/v1/channels/ch0/history",
                       query_string={"since": (until + timedelta(hours=1)).isoformat(), "until": until.isoformat()})
    assert r.status_code == 422


def test_fusion_settings_defaults_and_put(client, admin):
    got = client.get("/api/v1/fusion").json
    assert got["rule"] == "weighted_llr" and got["k"] == 2  # the default for a new deployment
    r = client.put("/api/v1/fusion", json={"rule": "majority", "confidence": 0.99}, headers=admin)
    assert r.status_code == 200 and r.json["rule"] == "majority" and r.json["confidence"] == 0.99
    assert client.get("/api/v1/fusion").json["target_pf"] == got["target_pf"]  # untouched fields stay


@pytest.mark.parametrize("body,path", [
    ({"rule": "vote"}, "rule"), ({"target_pf": 0}, "target_pf"), ({"confidence": 1.0}, "confidence"),
    ({"interval_s": 0.01}, "interval_s"), ({"rule": "k_of_n", "k": None}, "k"),
    ({"window_s": 100, "max_age_s": 10}, "window_s"), ({"min_nodes": "3"}, "min_nodes")])
def test_bad_fusion_settings_are_422(client, admin, body, path):
    r = client.put("/api/v1/fusion", json=body, headers=admin)
    assert r.status_code == 422 and path in [e["path"] for e in r.json["errors"]]


def test_put_interval_retimes_the_scheduler_without_restart(app, client, admin):
    client.put("/api/v1/fusion", json={"interval_s": 3600}, headers=admin)
    sched = FusionScheduler(app).start()
    try:
        deadline = time.monotonic() + 10
        while sched.epochs < 1 and time.monotonic() < deadline:  # the first epoch runs at start
            time.sleep(0.05)
        assert sched.interval_s == 3600
        client.put("/api/v1/fusion", json={"interval_s": 0.5}, headers=admin)
        sched.tick()  # the epoch that reads the new setting (next one of the hourly schedule, brought forward)
        assert sched.interval_s == 0.5
        before = sched.epochs
        deadline = time.monotonic() + 20
        while sched.epochs < before + 2 and time.monotonic() < deadline:
            time.sleep(0.05)
        assert sched.epochs >= before + 2  # runs every 0.5 s now, not hourly
    finally:
        sched.shutdown()
    assert sched.last_error is None


def test_health(client):
    body = client.get("/healthz").json
    assert body["status"] == "ok" and body["database"] is True


def test_fusion_settings_warn_below_the_snr_wall(make_app, admin):
    # Tandra & Sahai (IEEE JSTSP 2008): with noise uncertainty x dB the energy detector's SNR wall is
    # 10 log10(rho - 1/rho), rho = 10^(x/10): -3.33 dB at x = 1 dB. A design SNR of -10 dB is below it.
    client = make_app(NOISE_UNCERTAINTY_DB=1.0).test_client()
    got = client.get("/api/v1/fusion").json
    assert got["snr_db"] == -10.0 and len(got["warnings"]) == 1
    assert "SNR wall of -3.3 dB" in got["warnings"][0] and got["warnings"][0].startswith("snr_db:")
    r = client.put("/api/v1/fusion", json={"snr_db": -3.0}, headers=admin)
    assert r.status_code == 200 and r.json["warnings"] == []
    # Unstated uncertainty (the default, 0 dB): no wall, no warning.
    assert make_app().test_client().get("/api/v1/fusion").json["warnings"] == []


def test_cached_answers_follow_each_new_epoch_and_plan(app, net):
    """Answers are cached per (newest epoch, newest plan): a new epoch or a new plan must show at once."""
    names = [f"n{i}" for i in range(3)]
    for name in names:
        net.register(name)
    rng = np.random.default_rng(6)
    feed(net, names, {"ch1"}, rng=rng, snr=1.0)
    epoch(app, rule="egc", min_nodes=2)
    first = net.client.get("/api/v1/channels").json
    assert net.client.get("/api/v1/channels").json == first  # the cached answer, unchanged
    feed(net, names, {"ch1"}, rng=rng, snr=1.0)
    epoch(app, rule="egc", min_nodes=2)
    second = net.client.get("/api/v1/channels").json
    assert second["as_of"] != first["as_of"]
    net.plan({"channels": [{"id": "new0", "center_hz": 9e8, "bandwidth_hz": 6e6}]})
    after_plan = net.client.get("/api/v1/channels").json
    assert [c["id"] for c in after_plan["channels"]] == ["new0"]
    assert net.client.get("/api/v1/channels/free").json["channels"] == []  # new0 has no decision yet
