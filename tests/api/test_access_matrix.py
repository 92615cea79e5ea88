"""Access control, table-driven: every route x every kind of caller, the expected status asserted.

Callers: no token, a bad token, node roof-a's own token, another node's (roof-b's) token acting on roof-a's
behalf, the read token, the admin token. The rule (README "Access control"): no token or a token that matches
nobody is 401 with ``WWW-Authenticate: Bearer``; a valid token of the wrong role is 403; reads are open when no
read token is configured. The matrix runs on SQLite only: authorisation does not touch backend-specific SQL
(the PostgreSQL variants of the other API tests cover the token lookup itself).
"""

from __future__ import annotations

import hashlib
import re
from itertools import count
from pathlib import Path

import pytest
from sqlalchemy import inspect, select, text

from fusion import create_app
from fusion.db import upgrade
from fusion.engine import run_epoch
from fusion.models import Node
from tests.conftest import ADMIN, PLAN, READER, now_utc

KINDS = ("none", "bad", "node", "other_node", "reader", "admin")

# (method, path, body-maker name, role). Every route of the app appears here (asserted below).
ROUTES = [
    ("POST", "/api/v1/nodes", "new_node", "admin"),
    ("GET", "/api/v1/nodes", None, "reader"),
    ("GET", "/api/v1/nodes/roof-a", None, "reader"),
    ("PATCH", "/api/v1/nodes/roof-a", "patch_node", "admin"),
    ("POST", "/api/v1/nodes/victim/token", None, "admin"),
    ("GET", "/api/v1/plan", None, "reader"),
    ("PUT", "/api/v1/plan", "plan", "admin"),
    ("POST", "/api/v1/reports", "report", "node"),
    ("GET", "/api/v1/channels", None, "reader"),
    ("GET", "/api/v1/channels/free", None, "reader"),
    ("GET", "/api/v1/channels/ch0/history", None, "reader"),
    ("GET", "/api/v1/fusion", None, "reader"),
    ("PUT", "/api/v1/fusion", "fusion", "admin"),
    ("GET", "/metrics", None, "reader"),
    ("GET", "/healthz", None, "public"),
    ("GET", "/healthz/live", None, "public"),
    ("GET", "/api/v1/openapi.json", None, "public"),
    ("GET", "/", None, "public"),
    ("GET", "/dashboard/dashboard.js", None, "public"),
]

OK = {"POST /api/v1/nodes": 201, "POST /api/v1/reports": 201}

# Expected status per role and caller, reads closed (READ_TOKEN set). "ok" = the route's success status.
CLOSED = {
    "admin":  {"none": 401, "bad": 401, "node": 403, "other_node": 403, "reader": 403, "admin": "ok"},
    "reader": {"none": 401, "bad": 401, "node": 403, "other_node": 403, "reader": "ok", "admin": "ok"},
    "node":   {"none": 401, "bad": 401, "node": "ok", "other_node": 403, "reader": 403, "admin": 403},
    "public": {k: "ok" for k in KINDS},
}
# Reads open (no READ_TOKEN): a "reader" token is then just a token that matches nobody.
OPEN = {
    "admin":  {**CLOSED["admin"], "reader": 401},
    "reader": {k: "ok" for k in KINDS},
    "node":   {**CLOSED["node"], "reader": 401},
    "public": CLOSED["public"],
}

_seq = count(1)
_names = count(1)


def _bodies():
    return {
        "new_node": lambda: {"name": f"new-{next(_names)}"},
        "patch_node": lambda: {"pinned": "trusted"},
        "plan": lambda: PLAN,
        # The body names roof-a: sent with roof-b's token it is an attempt to report as someone else.
        "report": lambda: {"seq": next(_seq), "measured_at": now_utc().isoformat(), "n_samples": 1000,
                           "node": "roof-a", "measurements": [{"channel": "ch0", "power_dbm": -95.0}]},
        "fusion": lambda: {"confidence": 0.95},
    }


@pytest.fixture(scope="module", params=["closed", "open"])
def world(request, tmp_path_factory):
    """One app per read mode, with a plan and nodes roof-a, roof-b and victim; tokens of every kind."""
    url = f"sqlite:///{tmp_path_factory.mktemp('acl') / 'acl.db'}"
    upgrade(url)
    app = create_app({"DATABASE_URL": url, "ADMIN_TOKEN": ADMIN, "TESTING": True, "LOG_LEVEL": "DEBUG",
                      "READ_TOKEN": READER if request.param == "closed" else None})
    client = app.test_client()
    admin = {"Authorization": f"Bearer {ADMIN}"}
    assert client.put("/api/v1/plan", json=PLAN, headers=admin).status_code == 200
    tokens = {name: client.post("/api/v1/nodes", json={"name": name}, headers=admin).json["token"]
              for name in ("roof-a", "roof-b", "victim")}
    with app.extensions["occfuse.sessions"]() as s, s.begin():  # an epoch, so /healthz is ready (200)
        run_epoch(s, now_utc(), app.config)
    yield {"mode": request.param, "app": app, "client": client, "url": url, "tokens": tokens,
           "auth": {"none": None, "bad": "not-a-token-anyone-has", "node": tokens["roof-a"],
                    "other_node": tokens["roof-b"], "reader": READER, "admin": ADMIN}}
    app.extensions["occfuse.engine"].dispose()


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("method,path,body,needed", ROUTES, ids=[f"{m} {p}" for m, p, _, _ in ROUTES])
def test_access_matrix(world, method, path, body, needed, kind):
    table = CLOSED if world["mode"] == "closed" else OPEN
    expected = table[needed][kind]
    if expected == "ok":
        expected = OK.get(f"{method} {path}", 200)
    token = world["auth"][kind]
    headers = {"Authorization": f"Bearer {token}"} if token else {}
    json_body = _bodies()[body]() if body else None
    with world["client"].open(path, method=method, json=json_body, headers=headers) as r:  # closes file bodies
        assert r.status_code == expected, (r.status_code, r.get_data(as_text=True)[:300])
        if r.status_code in (401, 403):
            assert r.mimetype == "application/problem+json" and r.json["status"] == r.status_code
            assert r.json["detail"]  # says what is wrong
        if r.status_code == 401:
            assert r.headers["WWW-Authenticate"].startswith("Bearer")  # RFC 6750 section 3


def test_the_matrix_lists_every_route(world):
    """A new route must be added to ROUTES (and so get an asserted row) before this passes."""
    listed = {(m, re.sub(r"/(roof-a|victim|ch0|dashboard\.js)(?=/|$)", "/<x>", p)) for m, p, _, _ in ROUTES}
    for rule in world["app"].url_map.iter_rules():
        if rule.endpoint == "static":
            continue
        path = re.sub(r"<[^>]+>", "<x>", rule.rule)
        for method in rule.methods - {"HEAD", "OPTIONS"}:
            assert (method, path) in listed, f"{method} {rule.rule} is missing from the access matrix"


def test_every_role_of_the_matrix_is_the_role_the_view_declares(world):
    app = world["app"]
    adapter = app.url_map.bind("localhost")
    for method, path, _, needed in ROUTES:
        endpoint, _ = adapter.match(path, method=method)
        assert getattr(app.view_functions[endpoint], "required_role", "admin") == needed, (method, path)


def test_a_disabled_node_is_refused_with_403(world):
    client, admin = world["client"], {"Authorization": f"Bearer {ADMIN}"}
    assert client.patch("/api/v1/nodes/roof-b", json={"disabled": True}, headers=admin).status_code == 200
    try:
        body = {"seq": next(_seq), "measured_at": now_utc().isoformat(), "n_samples": 10,
                "measurements": [{"channel": "ch0", "power_dbm": -95.0}]}
        r = client.post("/api/v1/reports", json=body,
                        headers={"Authorization": f"Bearer {world['tokens']['roof-b']}"})
        assert r.status_code == 403 and "disabled" in r.json["detail"]
    finally:
        client.patch("/api/v1/nodes/roof-b", json={"disabled": False}, headers=admin)


def test_tokens_are_stored_only_as_sha256_hashes(world):
    """Read the database itself: each node row holds sha256(token) (FIPS 180-4), and no token appears in clear in
    any column of any table, nor anywhere in the database or WAL files."""
    app, tokens = world["app"], world["tokens"]
    engine = app.extensions["occfuse.engine"]
    with app.extensions["occfuse.sessions"]() as s:
        stored = dict(s.execute(select(Node.name, Node.token_hash)).all())
    for name, token in tokens.items():
        if name != "victim":  # the victim's token is rotated by the matrix; its new one is checked below
            assert stored[name] == hashlib.sha256(token.encode()).hexdigest()
    secrets = [*tokens.values(), ADMIN, READER]
    with engine.connect() as conn:
        for table in inspect(conn).get_table_names():
            for row in conn.execute(text(f'SELECT * FROM "{table}"')):
                cells = " ".join(str(v) for v in row)
                assert not any(t in cells for t in secrets), table
    path = Path(world["url"].removeprefix("sqlite:///"))
    raw = b"".join(p.read_bytes() for p in (path, path.with_name(path.name + "-wal")) if p.exists())
    assert raw
    assert not any(t.encode() in raw for t in secrets)
