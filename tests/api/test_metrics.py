"""GET /metrics (one process, the default registry), read back with prometheus_client's own text parser.

Counters are process-wide, so each check compares a scrape before and after the action. The several-worker
(multiprocess) case is tested in tests/test_workers.py.
"""

from __future__ import annotations

from prometheus_client.parser import text_string_to_metric_families

from fusion.metrics import rejection_reason
from fusion.scheduler import FusionScheduler


def scrape(client) -> dict:
    """{(sample name, frozenset(labels)): value} from /metrics."""
    r = client.get("/metrics")
    assert r.status_code == 200
    assert r.headers["Content-Type"].startswith("text/plain; version=0.0.4")  # Prometheus text format 0.0.4
    return {(s.name, frozenset(s.labels.items())): s.value
            for fam in text_string_to_metric_families(r.get_data(as_text=True)) for s in fam.samples}


def value(samples: dict, name: str, **labels) -> float:
    return sum(v for (n, ls), v in samples.items() if n == name and set(labels.items()) <= ls)


def test_reports_accepted_and_rejected_by_reason(client, net):
    net.register("a")
    before = scrape(client)
    assert net.post("a", net.report("a", {"ch0": -90.0, "ch1": -95.0})).status_code == 201
    body = net.report("a", {"ch0": -91.0})
    assert net.post("a", body).status_code == 201
    assert net.post("a", body).status_code == 200  # the same report again: a duplicate
    assert net.post("a", net.report("a", {"nope": -91.0})).status_code == 422
    assert client.post("/api/v1/reports", json=body, headers={"Authorization": "Bearer bad"}).status_code == 401
    assert client.post("/api/v1/reports", data="{", headers={**net.headers("a"),
                                                               "Content-Type": "application/json"}).status_code == 400
    after = scrape(client)

    def delta(name, **labels):
        return value(after, name, **labels) - value(before, name, **labels)

    assert delta("occfuse_reports_accepted_total", outcome="created") == 2
    assert delta("occfuse_reports_accepted_total", outcome="duplicate") == 1
    assert delta("occfuse_reports_rejected_total", reason="invalid") == 1
    assert delta("occfuse_reports_rejected_total", reason="unauthenticated") == 1
    assert delta("occfuse_reports_rejected_total", reason="malformed") == 1
    # request latency: one observation per request, labelled by route and status (6 report posts)
    assert delta("occfuse_http_request_duration_seconds_count", endpoint="/api/v1/reports") == 6
    assert delta("occfuse_http_request_duration_seconds_count", endpoint="/api/v1/reports", status="401") == 1


def test_epoch_duration_decisions_and_database_gauges(app, client, net):
    for name in ("a", "b", "c"):
        net.register(name)
        assert net.post(name, net.report(name, {"ch0": -60.0, "ch1": -100.0})).status_code == 201
    client.patch("/api/v1/nodes/c", json={"disabled": True}, headers=net.admin)
    before = scrape(client)
    FusionScheduler(app).tick()  # no lease: this test drives one epoch directly
    after = scrape(client)
    count = "occfuse_epoch_duration_seconds_count"
    assert value(after, count) - value(before, count) == 1
    channels = client.get("/api/v1/channels").json["channels"]
    by_state = {s: sum(c["state"] == s for c in channels) for s in ("free", "occupied", "unknown")}
    for state, n in by_state.items():
        assert value(after, "occfuse_channels", state=state) == n
        assert value(after, "occfuse_decisions_total", state=state) - value(before, "occfuse_decisions_total",
                                                                             state=state) == n
    assert sum(by_state.values()) == 4  # every channel of the plan has a state
    nodes = client.get("/api/v1/nodes").json["nodes"]
    enabled = [n for n in nodes if not n["disabled"]]
    flagged = {}
    for n in enabled:
        for f in n["flags"] or ["none"]:
            flagged[f] = flagged.get(f, 0) + 1
    for flag, n in flagged.items():
        assert value(after, "occfuse_nodes", flag=flag) == n
    assert value(after, "occfuse_nodes_registered", disabled="false") == 2
    assert value(after, "occfuse_nodes_registered", disabled="true") == 1
    assert value(after, "occfuse_last_epoch_age_seconds") >= 0


def test_metrics_need_the_read_token_when_one_is_set(make_app):
    app = make_app(READ_TOKEN="reader-secret")
    c = app.test_client()
    assert c.get("/metrics").status_code == 401
    assert c.get("/metrics", headers={"Authorization": "Bearer reader-secret"}).status_code == 200


def test_rejection_reasons_name_the_status():
    assert [rejection_reason(s) for s in (400, 401, 403, 409, 413, 415, 422, 500, 418)] == [
        "malformed", "unauthenticated", "forbidden", "conflict", "too_large", "media_type", "invalid",
        "server_error", "http_418"]


def test_openmetrics_when_the_scraper_asks_for_it(client):
    """Content negotiation (prometheus_client choose_encoder): one OpenMetrics document ending in a single # EOF."""
    r = client.get("/metrics", headers={"Accept": "application/openmetrics-text; version=1.0.0"})
    assert r.status_code == 200 and r.headers["Content-Type"].startswith("application/openmetrics-text")
    text = r.get_data(as_text=True)
    assert text.endswith("# EOF\n") and text.count("# EOF") == 1
    assert "occfuse_channels" in text
