"""Nodes, tokens and roles: random tokens, stored only as hashes, admin routes need the admin token."""

from __future__ import annotations

import logging

import pytest
from sqlalchemy import select

from fusion.models import Node
from fusion.registry import hash_token
from tests.conftest import ADMIN


def test_register_returns_a_token_once_and_stores_only_its_hash(app, client, admin):
    r = client.post("/api/v1/nodes", json={"name": "mast-3", "x_m": 10.0, "y_m": -4.5}, headers=admin)
    assert r.status_code == 201
    token = r.json["token"]
    assert len(token) >= 43  # 32 random bytes, URL-safe base64 (secrets.token_urlsafe)
    with app.extensions["occfuse.sessions"]() as s:
        node = s.scalars(select(Node)).one()
        assert node.token_hash == hash_token(token) and token not in node.token_hash
    listed = client.get("/api/v1/nodes").json["nodes"][0]
    assert "token" not in listed and listed["name"] == "mast-3"


def test_tokens_differ_between_nodes(client, admin):
    a = client.post("/api/v1/nodes", json={"name": "a"}, headers=admin).json["token"]
    b = client.post("/api/v1/nodes", json={"name": "b"}, headers=admin).json["token"]
    assert a != b


def test_duplicate_name_is_409(client, admin):
    client.post("/api/v1/nodes", json={"name": "a"}, headers=admin)
    r = client.post("/api/v1/nodes", json={"name": "a"}, headers=admin)
    assert r.status_code == 409 and r.json["errors"][0]["path"] == "name"


@pytest.mark.parametrize("body,path", [({"name": ""}, "name"), ({"name": "has space"}, "name"),
                                       ({"name": "ok", "lat": 91.0}, "lat"), ({}, "name")])
def test_bad_node_bodies_are_422(client, admin, body, path):
    r = client.post("/api/v1/nodes", json=body, headers=admin)
    assert r.status_code == 422 and r.json["errors"][0]["path"] == path


@pytest.mark.parametrize("headers,status", [({}, 401), ({"Authorization": "Bearer wrong"}, 401),
                                            ({"Authorization": "Basic abc"}, 401)])
def test_admin_routes_need_the_admin_token(client, headers, status):
    assert client.post("/api/v1/nodes", json={"name": "x"}, headers=headers).status_code == status
    assert client.put("/api/v1/fusion", json={"rule": "egc"}, headers=headers).status_code == status
    assert client.put("/api/v1/plan", json={"channels": []}, headers=headers).status_code == status


def test_a_node_token_cannot_do_admin_work(net):
    net.register("roof-a")
    r = net.client.put("/api/v1/fusion", json={"rule": "egc"}, headers=net.headers("roof-a"))
    assert r.status_code == 403


def test_scheme_is_case_insensitive(client):
    assert client.post("/api/v1/nodes", json={"name": "x"},
                       headers={"Authorization": f"bearer {ADMIN}"}).status_code == 201


def test_without_a_configured_admin_token_admin_routes_are_refused(make_app):
    app = make_app(ADMIN_TOKEN=None)
    r = app.test_client().post("/api/v1/nodes", json={"name": "x"}, headers={"Authorization": "Bearer anything"})
    assert r.status_code == 403 and "OCCFUSE_ADMIN_TOKEN" in r.json["detail"]


def test_rotating_a_token_revokes_the_old_one(net):
    old = net.register("roof-a")
    r = net.client.post("/api/v1/nodes/roof-a/token", headers=net.admin)
    assert r.status_code == 200 and r.json["token"] != old
    body = net.report("roof-a", {"ch0": -90.0})
    assert net.client.post("/api/v1/reports", json=body, headers={"Authorization": f"Bearer {old}"}).status_code == 401
    ok = net.client.post("/api/v1/reports", json=body, headers={"Authorization": f"Bearer {r.json['token']}"})
    assert ok.status_code == 201


def test_read_token_when_configured_guards_reads(make_app):
    app = make_app(READ_TOKEN="reader")
    c = app.test_client()
    assert c.get("/api/v1/channels").status_code == 401
    assert c.get("/api/v1/channels", headers={"Authorization": "Bearer reader"}).status_code == 200
    assert c.get("/api/v1/channels", headers={"Authorization": f"Bearer {ADMIN}"}).status_code == 200
    assert c.get("/healthz").status_code == 200  # liveness stays public


def test_node_detail_and_404(net):
    net.register("roof-a")
    r = net.client.get("/api/v1/nodes/roof-a")
    assert r.status_code == 200
    assert set(r.json) >= {"trust", "pd", "pf", "noise_dbm", "flags", "last_seen"}
    assert r.json["last_seq"] is None
    net.post("roof-a", net.report("roof-a", {"ch0": -90.0}, seq=17))
    assert net.client.get("/api/v1/nodes/roof-a").json["last_seq"] == 17
    assert net.client.get("/api/v1/nodes/nobody").status_code == 404


def test_pinning_a_node(net):
    net.register("roof-a")
    r = net.client.patch("/api/v1/nodes/roof-a", json={"pinned": "excluded"}, headers=net.admin)
    assert r.json["pinned"] == "excluded"
    r = net.client.patch("/api/v1/nodes/roof-a", json={"unpin": True}, headers=net.admin)
    assert r.json["pinned"] is None


def test_tokens_never_appear_in_logs(app, net, caplog):
    caplog.set_level(logging.DEBUG)
    token = net.register("roof-a")
    net.post("roof-a", net.report("roof-a", {"ch0": -90.0}))
    net.client.post("/api/v1/reports", json={"bad": 1}, headers={"Authorization": f"Bearer {token}"})
    net.client.get("/api/v1/nodes", headers={"Authorization": f"Bearer {token}"})
    text = "\n".join(r.getMessage() for r in caplog.records)
    assert token not in text and ADMIN not in text
