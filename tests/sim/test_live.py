"""End to end: the ten-node scenario drives the real service over loopback HTTP for 60 simulated seconds."""

from datetime import timedelta

import httpx
import numpy as np
import pytest

from fusion import create_app
from fusion.db import upgrade
from fusion.server import LiveServer
from sim_nodes.client import run_scenario
from sim_nodes.scenario import load_scenario
from sim_nodes.truth import format_time_query, load_truth, parse_time, score_decisions

ADMIN = "live-admin-token"


@pytest.mark.http
def test_ten_node_run_matches_ground_truth_on_95_percent_of_channel_epochs(tmp_path):
    url = f"sqlite:///{tmp_path / 'live.db'}"
    upgrade(url)
    # Epochs every wall second; reports older than 3 wall s (15 simulated s at 5x) do not count.
    app = create_app({"DATABASE_URL": url, "ADMIN_TOKEN": ADMIN, "INTERVAL_S": 1.0, "MAX_AGE_S": 3.0})
    scenario = load_scenario("ridge10")
    truth_path = tmp_path / "truth.jsonl"
    with LiveServer(app, port=0) as server:
        summary = run_scenario(scenario, server.url, ADMIN, duration_s=60.0, speedup=5.0, seed=1,
                               truth_path=truth_path)
        with httpx.Client(base_url=server.url) as client:
            # Score epochs from 1 wall s after the start (the first sweeps are in) to the end.
            since = summary.started_at + timedelta(seconds=1.0)
            until = summary.started_at + timedelta(seconds=summary.sim_duration_s / summary.speedup)
            decisions = []
            for cid in scenario.channel_ids:
                h = client.get(f"/api/v1/channels/{cid}/history",
                               params={"since": format_time_query(since), "until": format_time_query(until)})
                assert h.status_code == 200
                decisions += [(cid, parse_time(d["decided_at"]), d["state"]) for d in h.json()["decisions"]]
    app.extensions["occfuse.engine"].dispose()

    assert summary.nodes == 10 and summary.undelivered == 0 and summary.rejected == 0
    # The links' per-sample SNRs before fading span about -12 to +25 dB with this seed (shadowing 4 dB).
    lo, hi = summary.snr_db_range
    assert -20.0 < lo < -5.0 and 10.0 < hi < 30.0
    truth = load_truth(truth_path)
    # A decision may lag a change by what its freshest evidence can know: a report interval (0.2 wall s
    # at 5x) plus an epoch interval (1 s); scored with that 1.2 s grace, and unknown never counts as right.
    score = score_decisions(decisions, truth, grace_s=1.2)
    assert score.n >= 6 * 10  # six channels, ~11 epochs each
    assert score.accuracy >= 0.95, (score, score.strict_accuracy)
    assert np.isfinite(score.strict_accuracy)
