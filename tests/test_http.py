"""Through a real HTTP server on loopback: the scheduler fuses what nodes post, and the demo runs."""

from __future__ import annotations

import time

import httpx
import numpy as np
import pytest

from fusion.server import LiveServer
from tests.conftest import ADMIN, PLAN, energy_dbm, now_utc

pytestmark = pytest.mark.http


def test_nodes_post_over_http_and_the_scheduled_epochs_publish(make_app):
    app = make_app(TESTING=False, INTERVAL_S=0.5, RULE="egc", MIN_NODES=2)
    admin = {"Authorization": f"Bearer {ADMIN}"}
    rng = np.random.default_rng(21)
    with LiveServer(app, "127.0.0.1", 0) as server, httpx.Client(base_url=server.url, timeout=10) as http:
        assert http.put("/api/v1/plan", json=PLAN, headers=admin).status_code == 200
        tokens = [http.post("/api/v1/nodes", json={"name": f"h{i}"}, headers=admin).json()["token"]
                  for i in range(3)]
        for seq in range(1, 4):
            for token in tokens:
                body = {"seq": seq, "measured_at": now_utc().isoformat(), "n_samples": 1000, "noise_dbm": -100.0,
                        "measurements": [{"channel": c["id"], "power_dbm": energy_dbm(
                            rng, 1000, 1.0 if c["id"] == "ch3" else 0.0)} for c in PLAN["channels"]]}
                r = http.post("/api/v1/reports", json=body, headers={"Authorization": f"Bearer {token}"})
                assert r.status_code == 201
        deadline = time.monotonic() + 20
        states = {}
        while time.monotonic() < deadline:
            got = http.get("/api/v1/channels").json()
            states = {c["id"]: c["state"] for c in got["channels"]}
            if got["as_of"] and all(c["nodes"] == 3 for c in got["channels"]):
                break
            time.sleep(0.2)
        assert states == {"ch0": "free", "ch1": "free", "ch2": "free", "ch3": "occupied"}
        assert http.get("/healthz").json()["last_epoch_at"] is not None
        assert http.get("/api/v1/nope").headers["content-type"].startswith("application/problem+json")


def test_demo_runs_end_to_end_and_scores_against_ground_truth(capsys):
    from fusion.demo import run_demo

    assert run_demo(duration_s=6, seed=3, interval_s=1.0) == 0
    out = capsys.readouterr().out
    assert "free now:" in out
    assert "channel-epochs" in out and "ground truth" in out
