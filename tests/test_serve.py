"""`occfuse serve` as a user runs it: upgrades a fresh database, serves, and shuts down cleanly on SIGTERM."""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import time

import httpx
import pytest

pytestmark = pytest.mark.http


def test_serve_upgrades_a_fresh_database_and_stops_cleanly_on_sigterm(tmp_path):
    env = {**os.environ, "OCCFUSE_DATABASE_URL": f"sqlite:///{tmp_path / 'fresh.db'}", "OCCFUSE_ADMIN_TOKEN": "t",
           "OCCFUSE_INTERVAL_S": "1", "OCCFUSE_CONFIG": ""}
    with subprocess.Popen([sys.executable, "-m", "fusion.cli", "serve", "--host", "127.0.0.1", "--port", "0"],
                          env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True) as proc:
        _check_serve(proc)


def _check_serve(proc):
    try:
        url = None
        deadline = time.monotonic() + 60
        lines = []
        while url is None and time.monotonic() < deadline:
            line = proc.stdout.readline()
            if not line:
                break
            lines.append(line)
            m = re.search(r"serving on (http://127\.0\.0\.1:\d+)", line)
            url = m.group(1) if m else None
        assert url, "".join(lines)
        health = httpx.get(f"{url}/healthz", timeout=10).json()
        assert health["database"] is True  # the schema exists: serve ran the migrations first
        assert httpx.get(f"{url}/api/v1/fusion", timeout=10).status_code == 200
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
