"""`occfuse serve --workers 2`: one leader runs the epochs; SIGKILL it and another worker takes over; /metrics
sums over the workers; every log line is a JSON object (LOG_FORMAT=json) and no token appears in the log.

Runs on SQLite (lease row) and, with OCCFUSE_TEST_POSTGRES_URL, on PostgreSQL (advisory lock). Waits are
bounded; the takeover bound itself (TTL + TTL/3) is proved with an injected clock in tests/test_lease.py.
"""

from __future__ import annotations

import contextlib
import json
import os
import queue
import re
import signal
import subprocess
import sys
import threading
import time
from http.client import HTTPConnection

import httpx
import pytest
from prometheus_client.parser import text_string_to_metric_families

from tests.conftest import PLAN

pytestmark = pytest.mark.http

ADMIN = "admin-token-for-worker-test"
TTL_S = 2.0


class _Output:
    """Reads the server's merged stdout/stderr on a thread, so waits can be bounded."""

    def __init__(self, proc):
        self.lines: list[str] = []
        self._q: queue.Queue = queue.Queue()
        self._stream = proc.stdout
        self._thread = threading.Thread(target=self._pump, args=(proc.stdout,), daemon=True)
        self._thread.start()

    def _pump(self, stream):
        for line in stream:
            self._q.put(line.rstrip("\n"))
        self._q.put(None)

    def wait_for(self, predicate, timeout_s: float, start: int = 0):
        """The first line from index `start` on for which `predicate(line)` is truthy; fails after timeout_s."""
        deadline = time.monotonic() + timeout_s
        i = start
        while True:
            while i < len(self.lines):
                got = predicate(self.lines[i])
                if got:
                    return i, got
                i += 1
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise AssertionError("timed out waiting; output so far:\n" + "\n".join(self.lines[-60:]))
            try:
                line = self._q.get(timeout=min(remaining, 0.5))
            except queue.Empty:
                continue
            if line is None:
                raise AssertionError("server exited; output:\n" + "\n".join(self.lines[-60:]))
            self.lines.append(line)

    def close(self):
        """Call after the process has exited: the pump sees EOF, then the pipe is closed."""
        self._thread.join(timeout=10)
        self._stream.close()

    def drain(self):
        while True:
            try:
                line = self._q.get_nowait()
            except queue.Empty:
                return
            if line is not None:
                self.lines.append(line)


def _record(line: str) -> dict | None:
    return json.loads(line) if line.startswith("{") else None


def _lease_taken(line: str):
    rec = _record(line)
    m = rec and re.search(r"fusion lease taken by worker pid (\d+)", rec["message"])
    return int(m.group(1)) if m else None


def _epoch_pid(line: str):
    rec = _record(line)
    m = rec and re.match(r"epoch (\d+) by pid (\d+)", rec["message"])
    return (int(m.group(1)), int(m.group(2))) if m else None


def _metric(text: str, name: str, labels: dict | None = None) -> float:
    """Sum of the samples called `name` whose labels include `labels` (prometheus_client's own parser)."""
    total = 0.0
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            if s.name == name and all(s.labels.get(k) == v for k, v in (labels or {}).items()):
                total += s.value
    return total


@contextlib.contextmanager
def _serve(db_url: str, *extra: str):
    """`occfuse serve` on a free loopback port with 0.5 s epochs and JSON logs; yields (process, output). The
    process is killed at exit if the test has not stopped it."""
    env = {**os.environ, "OCCFUSE_DATABASE_URL": db_url, "OCCFUSE_ADMIN_TOKEN": ADMIN, "OCCFUSE_CONFIG": "",
           "OCCFUSE_INTERVAL_S": "0.5", "OCCFUSE_LEASE_TTL_S": str(TTL_S), "OCCFUSE_LOG_LEVEL": "DEBUG",
           "OCCFUSE_LOG_FORMAT": "json"}
    env.pop("PROMETHEUS_MULTIPROC_DIR", None)  # serve makes its own fresh one
    proc = subprocess.Popen([sys.executable, "-m", "fusion.cli", "serve", "--host", "127.0.0.1", "--port", "0",
                             "--workers", "2", *extra],
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    out = _Output(proc)
    try:
        yield proc, out
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        out.close()


def _serving_url(out) -> str:
    return out.wait_for(lambda l: (m := re.search(r"serving on (http://127\.0\.0\.1:\d+)", l)) and m.group(1), 60)[1]


def test_two_workers_one_leader_and_takeover_after_sigkill(db_url, tmp_path):
    with _serve(db_url, "--threads", "2") as (proc, out):
        url = _serving_url(out)
        _, first = out.wait_for(_lease_taken, 60)
        admin = {"Authorization": f"Bearer {ADMIN}"}
        with httpx.Client(base_url=url, timeout=20) as http:
            r = http.put("/api/v1/plan", json=PLAN, headers=admin)
            out.drain()
            assert r.status_code == 200, (r.text, "\n".join(out.lines[-40:]))
            token = http.post("/api/v1/nodes", json={"name": "n1"}, headers=admin).json()["token"]
            node = {"Authorization": f"Bearer {token}"}
            for seq in range(1, 7):
                body = {"seq": seq, "measured_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                        "n_samples": 1000, "measurements": [{"channel": "ch0", "power_dbm": -90.0}]}
                assert http.post("/api/v1/reports", json=body, headers=node).status_code == 201
            assert http.post("/api/v1/reports", json={"seq": 1}, headers={"Authorization": "Bearer wrong-tok"}
                             ).status_code == 401
        # Fresh connections, so the kernel may hand each to either worker; every scrape must show all six.
        for _ in range(6):
            text = httpx.get(f"{url}/metrics", timeout=20).text
            assert _metric(text, "occfuse_reports_accepted_total", {"outcome": "created"}) == 6
            assert _metric(text, "occfuse_reports_rejected_total", {"reason": "unauthenticated"}) == 1

        # One keep-alive connection is closed by the server after KEEPALIVE_REQUESTS requests or once it is
        # KEEPALIVE_MAX_S old, whichever comes first, so clients reconnect and the kernel can hand the new
        # connection to the idler worker.
        from fusion.workers import KEEPALIVE_MAX_S, KEEPALIVE_REQUESTS

        host, port = url.removeprefix("http://").rsplit(":", 1)
        conn = HTTPConnection(host, int(port), timeout=20)
        opened = time.monotonic()
        answers = []
        for _ in range(KEEPALIVE_REQUESTS):
            sent = time.monotonic()
            conn.request("GET", "/healthz")
            r = conn.getresponse()
            r.read()
            answers.append((r.status, r.getheader("Connection", "").lower(), sent - opened))
            if answers[-1][1] == "close":
                break
        conn.close()
        assert all(a[:2] == (200, "keep-alive") for a in answers[:-1])
        assert answers[-1][:2] == (200, "close")
        # Closed at the request cap, or earlier only once the connection had reached its age cap (50 ms slack:
        # the client's clock starts at connect, the server's at the first request).
        assert len(answers) == KEEPALIVE_REQUESTS or answers[-1][2] >= KEEPALIVE_MAX_S - 0.05, answers[-3:]

        # Three epochs from the leader, and none from anyone else before the kill.
        i, _ = out.wait_for(lambda l: (e := _epoch_pid(l)) and e[1] == first, 60)
        for _ in range(2):
            i, _ = out.wait_for(lambda l: (e := _epoch_pid(l)) and e[1] == first, 60, start=i + 1)
        before_kill = [e for e in map(_epoch_pid, out.lines) if e]
        assert {pid for _, pid in before_kill} == {first}
        assert [p for p in map(_lease_taken, out.lines) if p] == [first]

        os.kill(first, signal.SIGKILL)
        out.drain()
        killed_at = len(out.lines)
        t_kill = time.monotonic()
        j, second = out.wait_for(_lease_taken, 60, start=killed_at)
        takeover_s = time.monotonic() - t_kill
        assert second != first
        k, _ = out.wait_for(lambda l: (e := _epoch_pid(l)) and e[1] == second, 60, start=j)
        out.wait_for(lambda l: (e := _epoch_pid(l)) and e[1] == second, 60, start=k + 1)
        # Lines reach us through one pipe in the order they were written, and the first leader was dead before
        # the second took the lease, so: only `first` before the takeover line, only `second` after it.
        before = [e for e in map(_epoch_pid, out.lines[:j]) if e]
        after = [e for e in map(_epoch_pid, out.lines[j:]) if e]
        assert {pid for _, pid in before} == {first}
        assert {pid for _, pid in after} == {second}  # the dead leader ran nothing more, nobody ran alongside
        ids = [eid for eid, _ in before + after]
        assert ids == sorted(set(ids))  # each epoch logged once, in order
        health = httpx.get(f"{url}/healthz", timeout=20)
        assert health.status_code == 200 and health.json()["ready"] is True
        # Counters of the killed worker stay in the sum (prometheus_client keeps a dead pid's counter files).
        assert _metric(httpx.get(f"{url}/metrics", timeout=20).text, "occfuse_reports_accepted_total",
                       {"outcome": "created"}) == 6
        print(f"takeover after SIGKILL: {takeover_s:.2f} s (stated bound TTL + TTL/3 = {TTL_S * 4 / 3:.2f} s)")

        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=60) == 0
        out.drain()
        lines = [l for l in out.lines if l.strip()]
        # LOG_FORMAT=json: every line is one JSON object, gunicorn's included, except serve's two status lines.
        plain = [l for l in lines if not l.startswith("{")]
        assert all(re.match(r"occfuse (starting \d+ workers|serving on)", l) for l in plain), plain
        for l in lines:
            if l.startswith("{"):
                rec = json.loads(l)
                assert {"time", "level", "logger", "pid", "message"} <= set(rec)
        assert token not in "\n".join(lines) and ADMIN not in "\n".join(lines) and "wrong-tok" not in "\n".join(lines)
        # (_serve kills the master if an assertion failed first; its workers notice the master is gone and exit)


def test_keep_alive_connections_are_closed_by_request_count_or_age(monkeypatch):
    """fusion.workers._pre_request: "Connection: close" at the KEEPALIVE_REQUESTS-th request, or on the first
    request once the connection has been open KEEPALIVE_MAX_S (no server needed: gunicorn's request object is
    stood in for)."""
    import socket
    from types import SimpleNamespace

    from fusion import workers

    clock = [100.0]
    monkeypatch.setattr(workers.time, "monotonic", lambda: clock[0])
    a, b = socket.socketpair()
    try:
        def request(number):
            req = SimpleNamespace(req_number=number, must_close=False, unreader=SimpleNamespace(sock=a))
            workers._pre_request(None, req)
            return req.must_close

        assert request(1) is False  # first sight of the connection: its age starts here
        clock[0] += workers.KEEPALIVE_MAX_S / 2
        assert request(2) is False
        assert request(workers.KEEPALIVE_REQUESTS) is True  # the count cap, whatever the age
        clock[0] += workers.KEEPALIVE_MAX_S / 2
        assert request(3) is True  # the age cap, whatever the count
    finally:
        a.close()
        b.close()


def test_sync_worker_class_serves_reports_and_runs_epochs(tmp_path):
    """`serve --workers 2 --worker-class sync`: one request per connection (answered "Connection: close"),
    reports stored, and the lease holder runs epochs."""
    from fusion.db import upgrade

    url = f"sqlite:///{tmp_path / 'sync.db'}"
    upgrade(url)
    with _serve(url, "--worker-class", "sync") as (proc, out):
        base = _serving_url(out)
        _, leader = out.wait_for(_lease_taken, 60)
        admin = {"Authorization": f"Bearer {ADMIN}"}
        with httpx.Client(base_url=base, timeout=20) as http:
            assert http.put("/api/v1/plan", json=PLAN, headers=admin).status_code == 200
            token = http.post("/api/v1/nodes", json={"name": "n1"}, headers=admin).json()["token"]
            body = {"seq": 1, "measured_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), "n_samples": 1000,
                    "channels": ["ch0", "ch1"], "powers_dbm": [-90.0, -95.0]}
            r = http.post("/api/v1/reports", json=body, headers={"Authorization": f"Bearer {token}"})
            assert r.status_code == 201 and r.headers["Connection"].lower() == "close"
        out.wait_for(lambda l: (e := _epoch_pid(l)) and e[1] == leader, 60)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=60) == 0


def test_connections_that_send_nothing_do_not_hold_the_gthread_workers(tmp_path):
    """gunicorn's gthread worker waits for a new connection's first bytes in one of its threads, 5 s by default;
    with `--threads 4` and 2 workers, 8 silent connections stalled every request for 5 s per round (measured, 12
    silent connections: 10 s). fusion.workers.FIRST_BYTES_WAIT_S hands a silent connection back to the poller
    after 0.1 s. A request on a fresh connection is answered while 12 silent ones are open (a 3 s client timeout:
    the stall this guards against is at least 5 s; a healthy answer takes milliseconds), and a connection that
    stays silent past the wait is still served when it speaks."""
    import socket

    from fusion.db import upgrade

    url = f"sqlite:///{tmp_path / 'silent.db'}"
    upgrade(url)
    with _serve(url) as (proc, out):
        base = _serving_url(out)
        host, port = base.removeprefix("http://").split(":")
        silent = [socket.create_connection((host, int(port)), timeout=10) for _ in range(12)]
        try:
            time.sleep(0.5)  # every silent connection accepted and waiting
            for _ in range(3):
                assert httpx.get(f"{base}/healthz", timeout=3).status_code in (200, 503)
            late = silent.pop()  # silent past the wait: now in the poller, not in a thread
            late.sendall(f"GET /healthz HTTP/1.1\r\nHost: {host}\r\nConnection: close\r\n\r\n".encode())
            assert late.recv(64).startswith(b"HTTP/1.1 ")
            late.close()
        finally:
            for s in silent:
                s.close()
