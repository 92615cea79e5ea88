"""/healthz readiness (database reachable, newest epoch not stale) and /healthz/live."""

from __future__ import annotations

from datetime import timedelta

from sqlalchemy import update

from fusion.models import Epoch, utcnow
from fusion.scheduler import FusionScheduler


def test_fresh_database_is_ready_and_live(client):
    r = client.get("/healthz")
    assert r.status_code == 200
    body = r.json
    assert body["live"] is True and body["ready"] is True and body["database"] is True
    assert body["last_epoch_at"] is None and body["problems"] == []
    # default limit: 3 epoch intervals + the lease TTL (defaults 10 s and 15 s)
    assert body["max_epoch_age_s"] == 3 * 10.0 + 15.0
    assert client.get("/healthz/live").json == {"live": True}


def test_stale_epoch_is_not_ready(app, client, net):
    FusionScheduler(app).tick()
    assert client.get("/healthz").json["ready"] is True
    limit = client.get("/healthz").json["max_epoch_age_s"]
    with app.extensions["occfuse.sessions"]() as s, s.begin():
        s.execute(update(Epoch).values(started_at=utcnow() - timedelta(seconds=limit + 60)))
    r = client.get("/healthz")
    assert r.status_code == 503
    assert r.json["ready"] is False and r.json["live"] is True and r.json["database"] is True
    assert "newest epoch" in r.json["problems"][0]
    assert client.get("/healthz/live").status_code == 200  # liveness does not depend on the epochs


def test_no_epoch_long_after_start_is_not_ready(make_app):
    app = make_app(READY_MAX_EPOCH_AGE_S=5.0)
    app.extensions["occfuse.started"] -= 10.0  # as if the process had been up 10 s
    r = app.test_client().get("/healthz")
    assert r.status_code == 503 and "no epoch" in r.json["problems"][0]
    assert r.json["max_epoch_age_s"] == 5.0


def test_unreachable_database_is_not_ready(tmp_path):
    from fusion import create_app

    app = create_app({"DATABASE_URL": f"sqlite:///{tmp_path / 'missing-dir' / 'x.db'}", "TESTING": True})
    r = app.test_client().get("/healthz")
    assert r.status_code == 503 and r.json["database"] is False and r.json["ready"] is False
    assert app.test_client().get("/healthz/live").status_code == 200
    app.extensions["occfuse.engine"].dispose()
