"""Shared fixtures: a fresh app on a temporary SQLite file, its client, and small helpers for nodes and reports."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import numpy as np
import pytest

from fusion import create_app
from fusion.db import upgrade

ADMIN = "admin-secret-for-tests"
PLAN = {"channels": [{"id": f"ch{j}", "center_hz": 470e6 + 8e6 * j, "bandwidth_hz": 6e6} for j in range(4)]}


@pytest.fixture
def db_url(tmp_path):
    url = f"sqlite:///{tmp_path / 'occfuse.db'}"
    upgrade(url)
    return url


@pytest.fixture
def app(db_url):
    app = create_app({"DATABASE_URL": db_url, "ADMIN_TOKEN": ADMIN, "TESTING": True})
    yield app
    app.extensions["occfuse.engine"].dispose()


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

    Exact law (METHODS.md section 1, common practice): N * P / sigma^2 ~ Gamma(N, 1 + snr).
    """
    t = rng.gamma(n_samples, 1.0 + snr)
    return noise_dbm + 10 * np.log10(t / n_samples)


def ago(seconds: float) -> datetime:
    return now_utc() - timedelta(seconds=seconds)
