"""Shared fixtures: a fresh app on a temporary SQLite file (and PostgreSQL when configured), its client, and
small helpers for nodes and reports.

``db_url`` is parametrized over backends. The PostgreSQL variant runs when ``OCCFUSE_TEST_POSTGRES_URL`` is set
(e.g. ``postgresql+psycopg://postgres@127.0.0.1:5432/test``); each test gets its own fresh schema, selected
through the connection's ``search_path``, and the schema is dropped afterwards.
"""

from __future__ import annotations

import logging
import os
import uuid
from datetime import datetime, timedelta, timezone
from urllib.parse import quote

import numpy as np
import pytest

from fusion import create_app
from fusion.db import upgrade

ADMIN = "admin-secret-for-tests"
PLAN = {"channels": [{"id": f"ch{j}", "center_hz": 470e6 + 8e6 * j, "bandwidth_hz": 6e6} for j in range(4)]}


PG_ENV = "OCCFUSE_TEST_POSTGRES_URL"

# Every secret the suite knows: the configured tokens plus every node token the registry hands out.
READER = "reader-secret-for-tests"
_SECRETS: set[str] = {ADMIN, READER}


class _Records(logging.Handler):
    def __init__(self):
        super().__init__(logging.DEBUG)
        self.formatter = logging.Formatter("%(name)s %(levelname)s %(message)s")
        self.lines: list[str] = []

    def emit(self, record):
        self.lines.append(self.format(record))  # message, arguments and any traceback


@pytest.fixture(scope="session", autouse=True)
def _record_issued_tokens():
    """Remember every node token the registry issues during the suite (session scope: before module fixtures)."""
    import fusion.registry as registry

    issue = registry.new_token

    def recorded():
        token = issue()
        _SECRETS.add(token)
        return token

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(registry, "new_token", recorded)
        yield


@pytest.fixture(autouse=True)
def _no_token_is_ever_logged():
    """Capture every log record of every test; fail the test if any token appears in one."""
    handler = _Records()
    root = logging.getLogger()
    root.addHandler(handler)
    try:
        yield
    finally:
        root.removeHandler(handler)
    leaked = [line for line in handler.lines if any(secret in line for secret in _SECRETS)]
    assert not leaked, f"a token was logged: {leaked[0][:200]}"


def _pg_schema_url(base: str):
    """A fresh schema on the server at `base`; returns (url whose search_path is that schema, drop function)."""
    from sqlalchemy import create_engine, text

    schema = f"t_{uuid.uuid4().hex[:12]}"
    admin = create_engine(base, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            conn.execute(text(f'CREATE SCHEMA "{schema}"'))
    except Exception as exc:
        admin.dispose()
        if os.environ.get("CI") == "true":
            raise
        pytest.skip(f"PostgreSQL at {PG_ENV} is unreachable: {type(exc).__name__}")
    sep = "&" if "?" in base else "?"
    url = f"{base}{sep}options={quote(f'-csearch_path={schema}')}"

    def drop():
        with admin.connect() as conn:
            conn.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()

    return url, drop


@pytest.fixture(params=["sqlite", "postgresql"])
def db_url(request, tmp_path):
    """A database upgraded to the newest migration: a temp SQLite file, or a fresh PostgreSQL schema."""
    if request.param == "sqlite":
        url = f"sqlite:///{tmp_path / 'occfuse.db'}"
        upgrade(url)
        yield url
        return
    base = os.environ.get(PG_ENV)
    if not base:
        pytest.skip(f"PostgreSQL variant: set {PG_ENV}=postgresql+psycopg://USER@HOST:PORT/DB to run it")
    url, drop = _pg_schema_url(base)
    try:
        upgrade(url)
        yield url
    finally:
        drop()


@pytest.fixture
def make_app(db_url):
    """Build apps on `db_url` with extra config; their engines are disposed at teardown (no leaked connections)."""
    made = []

    def make(**config):
        app = create_app({"DATABASE_URL": db_url, "ADMIN_TOKEN": ADMIN, "TESTING": True, **config})
        made.append(app)
        return app

    yield make
    for app in made:
        app.extensions["occfuse.engine"].dispose()


@pytest.fixture
def app(make_app):
    return make_app()


@pytest.fixture
def client(app):
    return app.test_client()


@pytest.fixture
def admin():
    return {"Authorization": f"Bearer {ADMIN}"}


def now_utc() -> datetime:
    return datetime.now(timezone.utc)


class Network:
    """Registers nodes through the API and builds reports for them."""

    def __init__(self, client, admin_headers):
        self.client = client
        self.admin = admin_headers
        self.tokens: dict[str, str] = {}
        self.seq: dict[str, int] = {}

    def plan(self, plan=PLAN):
        r = self.client.put("/api/v1/plan", json=plan, headers=self.admin)
        assert r.status_code == 200, r.json
        return r.json

    def register(self, name: str) -> str:
        r = self.client.post("/api/v1/nodes", json={"name": name}, headers=self.admin)
        assert r.status_code == 201, r.json
        self.tokens[name] = r.json["token"]
        self.seq[name] = 0
        return r.json["token"]

    def headers(self, name: str) -> dict:
        return {"Authorization": f"Bearer {self.tokens[name]}"}

    def report(self, name: str, powers: dict[str, float], *, noise_dbm=-100.0, n_samples=1000, at=None, seq=None):
        if seq is None:
            self.seq[name] += 1
            seq = self.seq[name]
        return {"seq": seq, "measured_at": (at or now_utc()).isoformat(), "n_samples": n_samples,
                "noise_dbm": noise_dbm,
                "measurements": [{"channel": c, "power_dbm": p} for c, p in powers.items()]}

    def post(self, name: str, body):
        return self.client.post("/api/v1/reports", json=body, headers=self.headers(name))


@pytest.fixture
def net(client, admin):
    network = Network(client, admin)
    network.plan()
    return network


def energy_dbm(rng, n_samples: int, snr: float, noise_dbm: float = -100.0) -> float:
    """Mean power (dBm) of n complex samples: noise CN(0, sigma^2) plus a Gaussian signal of per-sample SNR `snr`.

    Exact law (Gaussian signal, common practice): N * P / sigma^2 ~ Gamma(N, 1 + snr).
    """
    t = rng.gamma(n_samples, 1.0 + snr)
    return noise_dbm + 10 * np.log10(t / n_samples)


def ago(seconds: float) -> datetime:
    return now_utc() - timedelta(seconds=seconds)
