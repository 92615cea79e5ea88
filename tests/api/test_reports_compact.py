"""POST /api/v1/reports in the compact form (`channels` + `powers_dbm`), retries across forms and plan changes,
and the node check inside the write transaction (a cached token that was rotated or disabled elsewhere)."""

from __future__ import annotations

import numpy as np
import pytest
from sqlalchemy import select

from fusion.api.schemas import BatchAck
from fusion.ingest import fingerprint
from fusion.models import Report, unpack
from tests.conftest import ADMIN


def rows(app) -> list[Report]:
    with app.extensions["occfuse.sessions"]() as s:
        return list(s.scalars(select(Report).order_by(Report.id)))


def compact(net, name, powers: dict, *, seq=None, noise_dbm=-100.0, channels=True):
    """The compact twin of ``net.report(name, powers)``: same seq, time, n_samples and noise."""
    body = net.report(name, powers, seq=seq, noise_dbm=noise_dbm)
    del body["measurements"]
    body["powers_dbm"] = list(powers.values())
    if channels:
        body["channels"] = list(powers)
    return body


def test_compact_report_is_stored_like_the_object_form(app, net):
    net.register("roof-a")
    net.register("roof-b")
    values = {"ch2": -95.25, "ch0": -99.5}  # not in plan order: the list says which is which
    objects = net.report("roof-a", values, seq=7)
    packed = compact(net, "roof-b", values, seq=7)
    packed["measured_at"] = objects["measured_at"]
    assert net.post("roof-a", objects).status_code == 201
    r = net.post("roof-b", packed)
    assert r.status_code == 201 and r.json == {"seq": 7, "status": "created"}
    a, b = rows(app)
    assert (a.powers, a.noise, a.content_hash) == (b.powers, b.noise, b.content_hash)
    # float32 storage (DESIGN.md "reports"); NaN where not measured
    np.testing.assert_array_equal(unpack(b.powers), np.float32([-99.5, np.nan, -95.25, np.nan]))
    np.testing.assert_array_equal(unpack(b.noise), np.float32([-100.0, np.nan, -100.0, np.nan]))
    assert b.content_hash == fingerprint(b.seq, b.measured_at, b.n_samples, b.powers, b.noise)


def test_null_means_not_measured(app, net):
    net.register("roof-a")
    body = compact(net, "roof-a", {"ch0": -90.0, "ch1": None, "ch3": -91.0})
    assert net.post("roof-a", body).status_code == 201
    np.testing.assert_array_equal(unpack(rows(app)[0].powers), np.float32([-90.0, np.nan, np.nan, -91.0]))


def test_batch_shares_one_channel_list(app, net):
    net.register("kit-1")
    reports = [compact(net, "kit-1", {"ch1": -90.0 - k, "ch3": -80.0}, channels=False) for k in range(3)]
    r = net.post("kit-1", {"channels": ["ch1", "ch3"], "reports": reports})
    assert r.status_code == 201 and (r.json["created"], r.json["duplicates"]) == (3, 0)
    assert [s["seq"] for s in r.json["results"]] == [1, 2, 3]
    assert BatchAck.model_validate_json(r.data).results[0].status == "created"  # the documented shape
    again = net.post("kit-1", {"channels": ["ch1", "ch3"], "reports": reports[:2]})
    assert again.status_code == 200
    assert BatchAck.model_validate_json(again.data).model_dump() == {
        "created": 0, "duplicates": 2,
        "results": [{"seq": 1, "status": "duplicate"}, {"seq": 2, "status": "duplicate"}]}
    stored = [unpack(row.powers) for row in rows(app)]
    np.testing.assert_array_equal(stored, np.float32([[np.nan, -90.0 - k, np.nan, -80.0] for k in range(3)]))


def test_batch_may_mix_both_forms_and_own_channel_lists(app, net):
    net.register("kit-1")
    reports = [compact(net, "kit-1", {"ch0": -90.0}, channels=False), net.report("kit-1", {"ch1": -91.0}),
               compact(net, "kit-1", {"ch2": -92.0})]
    r = net.post("kit-1", {"channels": ["ch0"], "reports": reports})
    assert r.status_code == 201 and r.json["created"] == 3


def test_a_retry_in_the_other_form_is_a_duplicate(app, net):
    """Same content, whichever form carries it: the fingerprint is of what is stored."""
    net.register("roof-a")
    objects = net.report("roof-a", {"ch0": -95.0, "ch1": -97.0})
    assert net.post("roof-a", objects).status_code == 201
    packed = {k: v for k, v in objects.items() if k != "measurements"}
    packed.update(channels=["ch1", "ch0"], powers_dbm=[-97.0, -95.0])
    again = net.post("roof-a", packed)
    assert again.status_code == 200 and again.json["status"] == "duplicate"
    packed["powers_dbm"] = [-97.0, -94.0]
    assert net.post("roof-a", packed).status_code == 409
    assert len(rows(app)) == 1


def test_a_retry_across_a_plan_change_is_still_a_duplicate(app, net):
    """The stored row was packed for plan revision 1; the retry is packed for revision 2, where the channels
    sit at other positions. Compared channel by channel, it is the same report."""
    net.register("roof-a")
    body = net.report("roof-a", {"ch2": -95.0, "ch3": -96.0})
    assert net.post("roof-a", body).status_code == 201
    net.plan({"channels": [{"id": c, "center_hz": 470e6 + 8e6 * j, "bandwidth_hz": 6e6}
                           for j, c in enumerate(["new0", "ch3", "ch2"])]})
    again = net.post("roof-a", body)
    assert again.status_code == 200 and again.json["status"] == "duplicate"
    body["measurements"][0]["power_dbm"] = -90.0
    assert net.post("roof-a", body).status_code == 409
    assert len(rows(app)) == 1


BAD = [
    ("both forms", lambda b: {**b, "measurements": [{"channel": "ch0", "power_dbm": -90.0}]}, "powers_dbm"),
    ("neither form", lambda b: {k: v for k, v in b.items() if k not in ("powers_dbm", "channels")},
     "measurements"),
    ("channels without powers", lambda b: {**{k: v for k, v in b.items() if k != "powers_dbm"},
                                           "measurements": [{"channel": "ch0", "power_dbm": -90.0}]}, "channels"),
    ("one value short", lambda b: {**b, "powers_dbm": b["powers_dbm"][:1]}, "powers_dbm"),
    ("only nulls", lambda b: {**b, "powers_dbm": [None, None]}, "powers_dbm"),
    ("no channel list at all", lambda b: {k: v for k, v in b.items() if k != "channels"}, "channels"),
    ("unknown channel", lambda b: {**b, "channels": ["ch0", "ch9"]}, "channels[1]"),
    ("channel twice", lambda b: {**b, "channels": ["ch0", "ch0"]}, "channels[1]"),
    ("power out of range", lambda b: {**b, "powers_dbm": [-90.0, 1e9]}, "powers_dbm[1]"),
    ("string power", lambda b: {**b, "powers_dbm": [-90.0, "-91"]}, "powers_dbm[1]"),
    ("empty lists", lambda b: {**b, "channels": [], "powers_dbm": []}, "channels"),
]


@pytest.mark.parametrize("change,path", [(c, p) for _, c, p in BAD], ids=[i for i, _, _ in BAD])
def test_invalid_compact_reports_are_422_with_the_path_and_store_nothing(app, net, change, path):
    net.register("roof-a")
    r = net.post("roof-a", change(compact(net, "roof-a", {"ch0": -90.0, "ch1": -91.0})))
    assert r.status_code == 422, r.json
    assert r.mimetype == "application/problem+json"
    assert path in [e["path"] for e in r.json["errors"]], r.json["errors"]
    assert rows(app) == []


@pytest.mark.parametrize("batch,path", [
    ({"channels": ["ch0", "nope"]}, "channels[1]"),
    ({}, "reports[1].channels"),  # no batch-level list and none in the report
    ({"channels": ["ch0"]}, "reports[1].powers_dbm"),  # the batch's list is one short for the report's values
])
def test_invalid_batch_channel_lists_are_422(app, net, batch, path):
    net.register("kit-1")
    good = net.report("kit-1", {"ch0": -90.0})
    packed = compact(net, "kit-1", {"ch0": -90.0, "ch1": -91.0}, channels=False)
    r = net.post("kit-1", {**batch, "reports": [good, packed]})
    assert r.status_code == 422, r.json
    assert path in [e["path"] for e in r.json["errors"]], r.json["errors"]
    assert rows(app) == []


def test_a_form_error_in_a_batch_names_the_report_and_its_field(app, net):
    net.register("kit-1")
    good = net.report("kit-1", {"ch0": -90.0})
    both = {**compact(net, "kit-1", {"ch0": -90.0}), "measurements": [{"channel": "ch0", "power_dbm": -90.0}]}
    nulls = {**compact(net, "kit-1", {"ch0": None, "ch1": None}), "seq": good["seq"] + 1}
    r = net.post("kit-1", {"reports": [good, both, nulls]})
    assert r.status_code == 422, r.json
    assert [e["path"] for e in r.json["errors"]] == ["reports[1].powers_dbm", "reports[2].powers_dbm"]
    assert "not both" in r.json["errors"][0]["message"] and "only nulls" in r.json["errors"][1]["message"]
    assert rows(app) == []


def test_every_report_without_a_usable_channel_list_is_named(app, net):
    """Each offending report is listed with its own field, not only the first, and nothing is stored."""
    net.register("kit-1")
    short = compact(net, "kit-1", {"ch0": -90.0}, channels=False)  # 1 value for the batch's 2 channels
    fits = compact(net, "kit-1", {"ch0": -90.0, "ch1": -91.0}, channels=False)
    reports = [{**short, "seq": 11}, {**fits, "seq": 12}, {**short, "seq": 13}]
    r = net.post("kit-1", {"channels": ["ch0", "ch1"], "reports": reports})
    assert r.status_code == 422, r.json
    assert [e["path"] for e in r.json["errors"]] == ["reports[0].powers_dbm", "reports[2].powers_dbm"]
    assert "1 values for the batch's 2 `channels`" in r.json["errors"][0]["message"]
    assert rows(app) == []


def test_a_reports_own_channel_list_errors_name_the_report(app, net):
    net.register("kit-1")
    packed = compact(net, "kit-1", {"ch0": -90.0, "zz": -91.0})
    r = net.post("kit-1", {"reports": [net.report("kit-1", {"ch0": -90.0}), packed]})
    assert r.status_code == 422 and r.json["errors"][0]["path"] == "reports[1].channels[1]"


def test_a_batch_over_the_measurement_limit_is_refused(app, net):
    app.config["MAX_MEASUREMENTS"] = 1
    net.register("kit-1")
    r = net.post("kit-1", compact(net, "kit-1", {"ch0": -90.0, "ch1": -91.0}))
    assert r.status_code == 422 and r.json["errors"][0]["path"] == "powers_dbm"


# --- the node check inside the write transaction ------------------------------------------------------------

def test_a_rotated_token_is_refused_at_once_although_it_was_cached(app, net):
    net.register("roof-a")
    old = net.headers("roof-a")
    assert net.post("roof-a", net.report("roof-a", {"ch0": -90.0})).status_code == 201  # token now cached
    new = net.client.post("/api/v1/nodes/roof-a/token", headers=net.admin)
    assert new.status_code == 200
    r = net.client.post("/api/v1/reports", json=net.report("roof-a", {"ch0": -90.0}), headers=old)
    assert r.status_code == 401
    r = net.client.post("/api/v1/reports", json=net.report("roof-a", {"ch0": -90.0}),
                        headers={"Authorization": f"Bearer {new.json['token']}"})
    assert r.status_code == 201
    assert len(rows(app)) == 2


def test_a_node_disabled_by_another_process_is_refused_at_once(make_app, net):
    """Two apps on one database stand for two workers: the first has the token cached; the second disables
    the node. The first must refuse the next report (the cache is confirmed inside the transaction)."""
    other = make_app().test_client()
    admin = {"Authorization": f"Bearer {ADMIN}"}
    net.register("roof-a")
    assert net.post("roof-a", net.report("roof-a", {"ch0": -90.0})).status_code == 201
    assert other.patch("/api/v1/nodes/roof-a", json={"disabled": True}, headers=admin).status_code == 200
    r = net.post("roof-a", net.report("roof-a", {"ch0": -90.0}))
    assert r.status_code == 403 and "disabled" in r.json["detail"]
    assert other.patch("/api/v1/nodes/roof-a", json={"disabled": False}, headers=admin).status_code == 200
    assert net.post("roof-a", net.report("roof-a", {"ch0": -90.0})).status_code == 201


def test_a_plan_stored_by_another_process_is_picked_up_inside_the_transaction(make_app, net, app):
    """The first app validated against plan 1 (its last seen); another stores plan 2 with the channels moved.
    The store finds the newer plan, and the report is packed again for it."""
    other = make_app().test_client()
    net.register("roof-a")
    assert net.post("roof-a", net.report("roof-a", {"ch0": -90.0})).status_code == 201  # plan 1 seen
    moved = {"channels": [{"id": c, "center_hz": 470e6 + 8e6 * j, "bandwidth_hz": 6e6}
                          for j, c in enumerate(["ch1", "ch0"])]}
    assert other.put("/api/v1/plan", json=moved, headers={"Authorization": f"Bearer {ADMIN}"}).status_code == 200
    assert net.post("roof-a", net.report("roof-a", {"ch0": -80.0})).status_code == 201
    last = rows(app)[-1]
    assert last.plan_revision == 2
    np.testing.assert_array_equal(unpack(last.powers), np.float32([np.nan, -80.0]))
