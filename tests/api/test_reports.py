"""POST /api/v1/reports: acceptance, idempotency, all-or-nothing batches, and every kind of bad input."""

from __future__ import annotations

from datetime import timedelta

import pytest
from sqlalchemy import func, select

from fusion.models import Report
from tests.conftest import ADMIN, now_utc


def stored(app) -> int:
    with app.extensions["occfuse.sessions"]() as s:
        return s.scalar(select(func.count()).select_from(Report))


def test_single_report_is_stored_and_acknowledged(app, net):
    net.register("roof-a")
    r = net.post("roof-a", net.report("roof-a", {"ch0": -95.0, "ch1": -99.5}))
    assert r.status_code == 201
    assert r.json == {"seq": 1, "status": "created"}
    assert stored(app) == 1


def test_same_seq_same_content_is_an_idempotent_duplicate(app, net):
    net.register("roof-a")
    body = net.report("roof-a", {"ch0": -95.0})
    assert net.post("roof-a", body).status_code == 201
    again = net.post("roof-a", body)
    assert again.status_code == 200 and again.json["status"] == "duplicate"
    assert stored(app) == 1


def test_measurement_order_does_not_make_a_retry_a_conflict(app, net):
    net.register("roof-a")
    body = net.report("roof-a", {"ch0": -95.0, "ch1": -97.0})
    assert net.post("roof-a", body).status_code == 201
    body["measurements"].reverse()
    assert net.post("roof-a", body).status_code == 200


def test_same_seq_other_content_is_409_and_keeps_the_first(app, net):
    net.register("roof-a")
    body = net.report("roof-a", {"ch0": -95.0})
    net.post("roof-a", body)
    body["measurements"][0]["power_dbm"] = -80.0
    r = net.post("roof-a", body)
    assert r.status_code == 409
    assert r.mimetype == "application/problem+json"
    assert "seq 1" in r.json["detail"]
    assert stored(app) == 1


def test_two_nodes_may_use_the_same_seq(app, net):
    net.register("roof-a")
    net.register("roof-b")
    assert net.post("roof-a", net.report("roof-a", {"ch0": -95.0}, seq=5)).status_code == 201
    assert net.post("roof-b", net.report("roof-b", {"ch0": -95.0}, seq=5)).status_code == 201
    assert stored(app) == 2


def test_batch_stores_every_report(app, net):
    net.register("kit-1")
    batch = {"reports": [net.report("kit-1", {"ch0": -96.0}) for _ in range(3)]}
    r = net.post("kit-1", batch)
    assert r.status_code == 201
    assert r.json["created"] == 3 and r.json["duplicates"] == 0
    assert stored(app) == 3


def test_batch_with_one_bad_item_stores_nothing_and_names_the_item(app, net):
    net.register("kit-1")
    good = net.report("kit-1", {"ch0": -96.0})
    bad = net.report("kit-1", {"nope": -96.0})
    r = net.post("kit-1", {"reports": [good, bad]})
    assert r.status_code == 422
    assert r.json["errors"][0]["path"] == "reports[1].measurements[0].channel"
    assert stored(app) == 0


def test_batch_mixing_new_and_already_stored_reports(app, net):
    net.register("kit-1")
    first = net.report("kit-1", {"ch0": -96.0})
    net.post("kit-1", first)
    r = net.post("kit-1", {"reports": [first, net.report("kit-1", {"ch0": -97.0})]})
    assert r.status_code == 201
    assert (r.json["created"], r.json["duplicates"]) == (1, 1)
    assert stored(app) == 2


def test_batch_with_a_conflicting_item_stores_nothing(app, net):
    net.register("kit-1")
    first = net.report("kit-1", {"ch0": -96.0})
    net.post("kit-1", first)
    changed = {**first, "n_samples": 2000}
    r = net.post("kit-1", {"reports": [net.report("kit-1", {"ch0": -97.0}), changed]})
    assert r.status_code == 409
    assert stored(app) == 1


def test_batch_over_the_configured_size_is_refused(app, net):
    app.config["MAX_BATCH"] = 2
    net.register("kit-1")
    r = net.post("kit-1", {"reports": [net.report("kit-1", {"ch0": -96.0}) for _ in range(3)]})
    assert r.status_code == 422 and r.json["errors"][0]["path"] == "reports"
    assert "at most 2 reports per batch, got 3" in r.json["detail"]
    # the same over-size batch with invalid items: refused for its size, before any item is looked at
    r = net.post("kit-1", {"reports": [{"seq": "x"}] * 3})
    assert r.status_code == 422 and r.json["errors"] == [{"path": "reports", "message": "more than 2 items"}]
    assert stored(app) == 0


def test_single_report_that_mentions_reports_is_still_a_single_report(net):
    """The route first validates a body holding the text "reports" as a batch; a single report naming a node
    "reports" fails that guess and must still be taken as the single report it is."""
    net.register("reports")
    r = net.post("reports", {**net.report("reports", {"ch0": -96.0}), "node": "reports"})
    assert r.status_code == 201 and r.json == {"seq": 1, "status": "created"}


def test_report_before_any_plan_is_409(client, admin):
    token = client.post("/api/v1/nodes", json={"name": "early"}, headers=admin).json["token"]
    body = {"seq": 1, "measured_at": now_utc().isoformat(), "n_samples": 10,
            "measurements": [{"channel": "ch0", "power_dbm": -90.0}]}
    r = client.post("/api/v1/reports", json=body, headers={"Authorization": f"Bearer {token}"})
    assert r.status_code == 409 and "PUT /api/v1/plan" in r.json["detail"]


def _base():
    return {"seq": 1, "measured_at": now_utc().isoformat(), "n_samples": 1000, "noise_dbm": -100.0,
            "measurements": [{"channel": "ch0", "power_dbm": -95.0}]}


BAD_BODIES = [
    ("wrong type for seq", lambda b: {**b, "seq": "1"}, "seq"),
    ("bool is not a number", lambda b: {**b, "measurements": [{"channel": "ch0", "power_dbm": True}]},
     "measurements[0].power_dbm"),
    ("zero n_samples", lambda b: {**b, "n_samples": 0}, "n_samples"),
    ("negative n_samples", lambda b: {**b, "n_samples": -5}, "n_samples"),
    ("fractional n_samples", lambda b: {**b, "n_samples": 10.5}, "n_samples"),
    ("empty measurement list", lambda b: {**b, "measurements": []}, "measurements"),
    ("unknown channel", lambda b: {**b, "measurements": [{"channel": "ch9", "power_dbm": -90.0}]},
     "measurements[0].channel"),
    ("channel twice", lambda b: {**b, "measurements": b["measurements"] * 2}, "measurements[1].channel"),
    ("timestamp without offset", lambda b: {**b, "measured_at": "2026-01-01T00:00:00"}, "measured_at"),
    ("timestamp far in the future", lambda b: {**b, "measured_at": (now_utc() + timedelta(hours=1)).isoformat()},
     "measured_at"),
    ("not a timestamp", lambda b: {**b, "measured_at": "yesterday"}, "measured_at"),
    ("missing seq", lambda b: {k: v for k, v in b.items() if k != "seq"}, "seq"),
    ("unknown field", lambda b: {**b, "powr": 1}, "powr"),
    ("absurd power", lambda b: {**b, "measurements": [{"channel": "ch0", "power_dbm": 1e9}]},
     "measurements[0].power_dbm"),
    ("body is a list", lambda b: [b], "(body)"),
    ("empty batch", lambda b: {"reports": []}, "reports"),
]


@pytest.mark.parametrize("change,path", [(c, p) for _, c, p in BAD_BODIES], ids=[i for i, _, _ in BAD_BODIES])
def test_invalid_reports_are_422_with_the_field_path_and_store_nothing(app, net, change, path):
    net.register("roof-a")
    r = net.post("roof-a", change(_base()))
    assert r.status_code == 422, r.json
    assert r.mimetype == "application/problem+json"
    assert path in [e["path"] for e in r.json["errors"]]
    assert stored(app) == 0


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity"])
def test_non_finite_numbers_are_422(app, net, literal):
    net.register("roof-a")
    raw = (f'{{"seq": 1, "measured_at": "{now_utc().isoformat()}", "n_samples": 10, '
           f'"measurements": [{{"channel": "ch0", "power_dbm": {literal}}}]}}')
    r = net.client.post("/api/v1/reports", data=raw, content_type="application/json", headers=net.headers("roof-a"))
    assert r.status_code == 422 and literal in r.json["detail"]
    assert stored(app) == 0


def test_malformed_json_is_400(app, net):
    net.register("roof-a")
    r = net.client.post("/api/v1/reports", data=b'{"seq": 1,', content_type="application/json",
                        headers=net.headers("roof-a"))
    assert r.status_code == 400 and "not valid JSON" in r.json["detail"]


def test_non_json_content_type_is_415(net):
    net.register("roof-a")
    r = net.client.post("/api/v1/reports", data="seq=1", content_type="text/plain", headers=net.headers("roof-a"))
    assert r.status_code == 415 and r.mimetype == "application/problem+json"


def test_body_over_the_limit_is_413(app, net):
    app.config["MAX_CONTENT_LENGTH"] = 2_000
    net.register("roof-a")
    body = {"reports": [_base() for _ in range(40)]}
    r = net.post("roof-a", body)
    assert r.status_code == 413
    assert r.mimetype == "application/problem+json" and "2000 bytes" in r.json["detail"]
    assert stored(app) == 0


def test_missing_token_is_401_with_a_bearer_challenge(net):
    r = net.client.post("/api/v1/reports", json=_base())
    assert r.status_code == 401
    assert r.headers["WWW-Authenticate"].startswith("Bearer")


def test_unknown_token_is_401(net):
    r = net.client.post("/api/v1/reports", json=_base(), headers={"Authorization": "Bearer not-a-token"})
    assert r.status_code == 401


def test_admin_token_cannot_post_reports(net):
    r = net.client.post("/api/v1/reports", json=_base(), headers={"Authorization": f"Bearer {ADMIN}"})
    assert r.status_code == 403


def test_a_node_can_only_post_as_itself(app, net):
    net.register("roof-a")
    net.register("roof-b")
    r = net.post("roof-a", {**_base(), "node": "roof-b"})
    assert r.status_code == 403 and "roof-a" in r.json["detail"]
    assert stored(app) == 0
    assert net.post("roof-a", {**_base(), "node": "roof-a"}).status_code == 201


def test_a_disabled_node_is_refused(app, net):
    net.register("roof-a")
    assert net.client.patch("/api/v1/nodes/roof-a", json={"disabled": True}, headers=net.admin).status_code == 200
    r = net.post("roof-a", _base())
    assert r.status_code == 403 and "disabled" in r.json["detail"]


def test_reports_follow_a_new_plan_at_once(net):
    """Ingest validates against the plan it saw last and confirms it inside the write transaction: right after
    a PUT of a new plan, a channel only the new plan has is accepted and one it dropped is refused."""
    net.register("roof-a")
    assert net.post("roof-a", net.report("roof-a", {"ch0": -90.0})).status_code == 201  # the old plan is seen
    new = {"channels": [{"id": "ch0", "center_hz": 470e6, "bandwidth_hz": 6e6},
                        {"id": "new9", "center_hz": 900e6, "bandwidth_hz": 6e6}]}
    assert net.plan(new)["revision"] == 2
    assert net.post("roof-a", net.report("roof-a", {"new9": -90.0})).status_code == 201
    r = net.post("roof-a", net.report("roof-a", {"ch1": -90.0}))
    assert r.status_code == 422 and r.json["errors"][0]["path"] == "measurements[0].channel"
