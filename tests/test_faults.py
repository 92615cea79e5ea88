"""Faults, bounded in time: the server killed mid-ingest, the database locked by another writer, a node retrying
a batch after a timeout, node clocks that run ahead or behind.

What is promised (README "Failure behaviour"): an acknowledged (2xx) report has been committed and survives a
kill -9; a retry never stores a report twice; a request that cannot get the write lock within
SQLITE_BUSY_TIMEOUT_S is answered 503 with Retry-After and stores nothing, never a 500.
"""

from __future__ import annotations

import os
import re
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from datetime import timedelta

import httpx
import pytest

from fusion.scheduler import FusionScheduler
from fusion.server import LiveServer
from tests.conftest import ADMIN, PLAN, now_utc

CHANNELS = [c["id"] for c in PLAN["channels"]]


def _report(seq: int, *, at=None, power=-100.0) -> dict:
    return {"seq": seq, "measured_at": (at or now_utc()).isoformat(), "n_samples": 1000, "noise_dbm": -100.0,
            "measurements": [{"channel": c, "power_dbm": power} for c in CHANNELS]}


# --- kill -9 during sustained ingest ------------------------------------------------------------------------

def _start_serve(db_path, *extra):
    env = {**os.environ, "OCCFUSE_DATABASE_URL": f"sqlite:///{db_path}", "OCCFUSE_ADMIN_TOKEN": ADMIN,
           "OCCFUSE_INTERVAL_S": "0.5", "OCCFUSE_CONFIG": "", "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1",
           "OCCFUSE_LEASE_TTL_S": "2"}  # a killed leader's SQLite lease runs out soon after the restart
    env.pop("PROMETHEUS_MULTIPROC_DIR", None)  # serve --workers makes its own
    # Its own session: kill -9 then reaches every process of the server (gunicorn master and workers).
    proc = subprocess.Popen([sys.executable, "-m", "fusion.cli", "serve", "--host", "127.0.0.1", "--port", "0",
                             *extra], env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                            start_new_session=True)
    deadline = time.monotonic() + 60
    lines = []
    while time.monotonic() < deadline:
        line = proc.stdout.readline()
        if not line:
            break
        lines.append(line)
        m = re.search(r"serving on (http://127\.0\.0\.1:\d+)", line)
        if m:
            # Keep draining the output so the server never blocks on a full pipe.
            proc.drain = threading.Thread(target=lambda: [lines.append(x) for x in proc.stdout], daemon=True)
            proc.drain.start()
            return proc, m.group(1), lines
    proc.kill()
    proc.wait()
    raise AssertionError("serve did not start:\n" + "".join(lines))


def _stop(proc):
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
    drain = getattr(proc, "drain", None)
    if drain is not None:
        drain.join(timeout=10)  # ends at EOF, now that the process is gone
    proc.stdout.close()


def _epochs(db_path) -> int:
    with sqlite3.connect(db_path, timeout=10) as conn:
        return conn.execute("SELECT count(*) FROM epoch").fetchone()[0]


@pytest.mark.http
@pytest.mark.parametrize("workers", [[], ["--workers", "2"]], ids=["one process", "--workers 2"])
def test_kill_9_during_sustained_ingest_loses_no_acknowledged_report(tmp_path, workers):
    db = tmp_path / "kill.db"
    proc, url, _ = _start_serve(db, *workers)
    acked: dict[str, set[int]] = {}
    unsure: dict[str, set[int]] = {}  # sent, no answer: stored or not, either is allowed
    try:
        admin = {"Authorization": f"Bearer {ADMIN}"}
        assert httpx.put(f"{url}/api/v1/plan", json=PLAN, headers=admin, timeout=10).status_code == 200
        tokens = {name: httpx.post(f"{url}/api/v1/nodes", json={"name": name}, headers=admin,
                                   timeout=10).json()["token"] for name in ("k1", "k2")}
        killed = threading.Event()

        def ingest(name):
            acked[name], unsure[name] = set(), set()
            with httpx.Client(base_url=url, timeout=5,
                              headers={"Authorization": f"Bearer {tokens[name]}"}) as http:
                for seq in range(1, 5_000):  # bounded: the kill comes long before
                    try:
                        r = http.post("/api/v1/reports", json=_report(seq))
                    except httpx.TransportError:
                        unsure[name].add(seq)
                        if killed.is_set():
                            return
                        continue
                    assert r.status_code == 201, r.text
                    acked[name].add(seq)

        threads = [threading.Thread(target=ingest, args=(n,)) for n in tokens]
        for t in threads:
            t.start()
        deadline = time.monotonic() + 30
        while sum(len(a) for a in acked.values()) < 200 and time.monotonic() < deadline:
            time.sleep(0.05)
        assert _epochs(db) >= 1  # the scheduler was running epochs while ingest ran
        os.killpg(proc.pid, signal.SIGKILL)  # the whole server at once, workers included
        killed.set()
        _stop(proc)  # reaps it (already dead) and closes its pipe
        for t in threads:
            t.join(timeout=30)
        assert sum(len(a) for a in acked.values()) >= 200

        # The database file alone, before any restart: every ack is there, once, and the file is sound.
        with sqlite3.connect(db, timeout=10) as conn:
            assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
            rows = conn.execute("SELECT n.name, r.seq FROM report r JOIN node n ON n.id = r.node_id").fetchall()
        assert len(rows) == len(set(rows))  # none twice
        stored = {name: {seq for n, seq in rows if n == name} for name in tokens}
        for name in tokens:
            assert acked[name] <= stored[name], sorted(acked[name] - stored[name])[:10]
            assert stored[name] <= acked[name] | unsure[name]  # nothing appears that was never sent

        # Restart on the same file: epochs resume, and the nodes' retries of the unanswered reports are safe.
        before = _epochs(db)
        proc, url, _ = _start_serve(db, *workers)
        for name, token in tokens.items():
            for seq in sorted(unsure[name]):
                r = httpx.post(f"{url}/api/v1/reports", json=_report(seq), timeout=10,
                               headers={"Authorization": f"Bearer {token}"})
                # 201 if the killed server never committed it; else 409 since the resent copy has a newer
                # measured_at (a real node re-sends the stored bytes and gets 200, tested below).
                assert r.status_code in (201, 409), r.text
        deadline = time.monotonic() + 30
        while _epochs(db) <= before and time.monotonic() < deadline:
            time.sleep(0.1)
        assert _epochs(db) > before
        with sqlite3.connect(db, timeout=10) as conn:
            assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
            dup = conn.execute("SELECT count(*) FROM (SELECT node_id, seq FROM report GROUP BY node_id, seq "
                               "HAVING count(*) > 1)").fetchone()[0]
        assert dup == 0
    finally:
        _stop(proc)


# --- the database locked by another writer ------------------------------------------------------------------

class _Writer:
    """Another process-like writer: a plain sqlite3 connection holding the write lock until released."""

    def __init__(self, path):
        self.conn = sqlite3.connect(path, isolation_level=None, timeout=10)

    def __enter__(self):
        self.conn.execute("BEGIN IMMEDIATE")  # takes the RESERVED lock: no other writer until COMMIT
        return self

    def release(self):
        if self.conn.in_transaction:
            self.conn.execute("COMMIT")

    def __exit__(self, *exc):
        self.release()
        self.conn.close()


@pytest.fixture
def sqlite_app(make_app, db_url):
    if not db_url.startswith("sqlite"):
        pytest.skip("the lock is SQLite's file lock")
    return db_url.removeprefix("sqlite:///"), make_app


def _count_reports(path) -> int:
    with sqlite3.connect(path, timeout=10) as conn:
        return conn.execute("SELECT count(*) FROM report").fetchone()[0]


def _setup(client):
    admin = {"Authorization": f"Bearer {ADMIN}"}
    assert client.put("/api/v1/plan", json=PLAN, headers=admin).status_code == 200
    token = client.post("/api/v1/nodes", json={"name": "locked-out"}, headers=admin).json["token"]
    return {"Authorization": f"Bearer {token}"}


def test_a_short_lock_makes_writes_wait_and_succeed(sqlite_app):
    path, make_app = sqlite_app
    app = make_app(SQLITE_BUSY_TIMEOUT_S=20)
    client = app.test_client()
    node = _setup(client)
    answers = []
    with _Writer(path) as writer:
        t = threading.Thread(target=lambda: answers.append(client.post("/api/v1/reports", json=_report(1),
                                                                       headers=node)))
        t.start()
        t.join(timeout=1.0)  # the request is waiting for the lock (bounded: the busy timeout is 20 s)
        assert t.is_alive() and not answers
        assert client.get("/api/v1/channels").status_code == 200  # reads do not wait for writers (WAL)
        writer.release()
        t.join(timeout=30)
    assert answers[0].status_code == 201
    assert _count_reports(path) == 1


def test_a_long_lock_gives_503_with_retry_after_and_stores_nothing(sqlite_app, caplog):
    path, make_app = sqlite_app
    app = make_app(SQLITE_BUSY_TIMEOUT_S=0.3)
    client = app.test_client()
    node = _setup(client)
    admin = {"Authorization": f"Bearer {ADMIN}"}
    with _Writer(path):
        single = client.post("/api/v1/reports", json=_report(1), headers=node)
        batch = client.post("/api/v1/reports", json={"reports": [_report(2), _report(3)]}, headers=node)
        others = [client.put("/api/v1/fusion", json={"confidence": 0.9}, headers=admin),
                  client.post("/api/v1/nodes", json={"name": "late"}, headers=admin),
                  client.put("/api/v1/plan", json=PLAN, headers=admin)]
        reads = [client.get(p) for p in ("/api/v1/channels", "/api/v1/plan", "/api/v1/nodes", "/healthz")]
    for r in (single, batch, *others):
        assert r.status_code == 503, r.get_data(as_text=True)
        assert r.mimetype == "application/problem+json" and r.json["status"] == 503
        assert int(r.headers["Retry-After"]) >= 1  # RFC 9110 section 10.2.3: delay-seconds
    assert all(r.status_code == 200 for r in reads)
    assert _count_reports(path) == 0
    assert not [rec for rec in caplog.records if rec.levelname == "ERROR"]  # a busy database is not a crash
    # After the lock is gone the same requests succeed: the node's retry is all it takes.
    assert client.post("/api/v1/reports", json=_report(1), headers=node).status_code == 201
    assert _count_reports(path) == 1


def test_begin_immediate_polls_for_the_lock_and_keeps_the_busy_timeout_for_other_statements(tmp_path):
    # fusion.db retries BEGIN IMMEDIATE itself (short pauses instead of SQLite's 1 ms-and-up busy sleeps), with
    # the busy handler off for that one statement only: afterwards PRAGMA busy_timeout must read as configured.
    from sqlalchemy import text
    from sqlalchemy.exc import OperationalError

    from fusion.db import make_engine

    path = tmp_path / "lock.db"
    engine = make_engine(f"sqlite:///{path}", busy_timeout_s=0.3)
    with engine.begin() as conn:
        conn.execute(text("CREATE TABLE t (x INTEGER)"))
    try:
        with _Writer(path) as writer:
            t0 = time.monotonic()
            with pytest.raises(OperationalError, match="locked"):  # held past the timeout: gives up
                with engine.begin() as conn:
                    conn.execute(text("INSERT INTO t VALUES (1)"))
            assert time.monotonic() - t0 >= 0.3  # it did wait the timeout first (a lower bound only)
            got = []
            # The failed try left the handler on for its pooled connection (a read, so it does not wait).
            with engine.execution_options(sqlite_begin="DEFERRED").connect() as conn:
                assert conn.exec_driver_sql("PRAGMA busy_timeout").scalar() == 300
            engine2 = make_engine(f"sqlite:///{path}", busy_timeout_s=20)
            thread = threading.Thread(target=lambda: got.append(_insert_and_timeout(engine2)))
            thread.start()
            thread.join(timeout=0.5)
            assert thread.is_alive() and not got  # waiting for the lock (bounded by its 20 s timeout)
            writer.release()
            thread.join(timeout=30)
        assert got == [20_000]  # it got the lock once released, and its busy timeout is as configured
        with sqlite3.connect(path) as conn:
            assert conn.execute("SELECT count(*) FROM t").fetchone()[0] == 1
    finally:
        engine.dispose()


def _insert_and_timeout(engine) -> int:
    from sqlalchemy import text

    with engine.begin() as conn:
        conn.execute(text("INSERT INTO t VALUES (2)"))
        return conn.exec_driver_sql("PRAGMA busy_timeout").scalar()


def test_an_epoch_during_a_long_lock_fails_alone_and_the_next_one_runs(sqlite_app):
    path, make_app = sqlite_app
    app = make_app(SQLITE_BUSY_TIMEOUT_S=0.3)
    client = app.test_client()
    node = _setup(client)
    assert client.post("/api/v1/reports", json=_report(1), headers=node).status_code == 201
    scheduler = FusionScheduler(app)
    with _Writer(path):
        scheduler.tick()
    assert scheduler.last_error and "OperationalError" in scheduler.last_error
    scheduler.tick()
    assert scheduler.last_error is None and scheduler.epochs == 1


# --- a node retrying the same batch after a timeout ---------------------------------------------------------

@pytest.mark.http
def test_a_batch_retried_after_a_client_timeout_is_stored_once(sqlite_app):
    """The node gives up waiting (its timeout fires while the server waits for the lock), the server then
    commits anyway; the node's retry of the identical bytes is acknowledged as duplicates."""
    path, make_app = sqlite_app
    app = make_app(TESTING=False, SQLITE_BUSY_TIMEOUT_S=20)
    with LiveServer(app, "127.0.0.1", 0, scheduler=False) as server:
        admin = {"Authorization": f"Bearer {ADMIN}"}
        with httpx.Client(base_url=server.url, timeout=10) as http:
            assert http.put("/api/v1/plan", json=PLAN, headers=admin).status_code == 200
            token = http.post("/api/v1/nodes", json={"name": "retrier"}, headers=admin).json()["token"]
        batch = {"reports": [_report(seq) for seq in range(1, 21)]}
        node = {"Authorization": f"Bearer {token}"}
        with _Writer(path) as writer:
            with pytest.raises(httpx.ReadTimeout):
                httpx.post(f"{server.url}/api/v1/reports", json=batch, headers=node, timeout=0.5)
            writer.release()
        deadline = time.monotonic() + 20
        while _count_reports(path) < 20 and time.monotonic() < deadline:  # the abandoned request commits
            time.sleep(0.05)
        retry = httpx.post(f"{server.url}/api/v1/reports", json=batch, headers=node, timeout=10)
        assert retry.status_code == 200
        assert retry.json()["created"] == 0 and retry.json()["duplicates"] == 20
    assert _count_reports(path) == 20


@pytest.mark.http
def test_the_same_batch_sent_twice_at_once_is_stored_once(make_app):
    """Both copies race (two connections, on PostgreSQL truly concurrent): both are acknowledged, one stores."""
    app = make_app(TESTING=False)
    with LiveServer(app, "127.0.0.1", 0, scheduler=False) as server:
        admin = {"Authorization": f"Bearer {ADMIN}"}
        with httpx.Client(base_url=server.url, timeout=10) as http:
            assert http.put("/api/v1/plan", json=PLAN, headers=admin).status_code == 200
            token = http.post("/api/v1/nodes", json={"name": "twin"}, headers=admin).json()["token"]
        node = {"Authorization": f"Bearer {token}"}
        for round_ in range(5):
            batch = {"reports": [_report(100 * round_ + seq) for seq in range(1, 31)]}
            barrier = threading.Barrier(2)
            answers = []

            def send():
                barrier.wait(timeout=10)
                answers.append(httpx.post(f"{server.url}/api/v1/reports", json=batch, headers=node, timeout=20))

            threads = [threading.Thread(target=send) for _ in range(2)]
            for t in threads:
                t.start()
            for t in threads:
                t.join(timeout=30)
            assert sorted(r.status_code for r in answers) == [200, 201], [r.text for r in answers]
            assert sum(r.json()["created"] for r in answers) == 30
        with httpx.Client(base_url=server.url, timeout=10) as http:
            assert http.get("/api/v1/nodes/twin").json()["last_seq"] == 430
    with app.extensions["occfuse.sessions"]() as s:
        from sqlalchemy import func, select

        from fusion.models import Report
        assert s.scalar(select(func.count()).select_from(Report)) == 150


# --- clock skew ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("offset_s,status,fresh", [
    (+180, 422, False),   # minutes ahead: refused, the error says to check the clock
    (+20, 201, True),     # ahead but within MAX_SKEW_S (30 s): accepted and fused
    (-10, 201, True),     # a little behind: accepted and fused
    (-180, 201, False),   # minutes behind: stored (history, replay) but older than max_age_s: no evidence
])
def test_clock_skew_is_handled_as_the_readme_states(make_app, offset_s, status, fresh):
    from fusion.engine import run_epoch

    app = make_app(MIN_NODES=1, MAX_AGE_S=30.0, MAX_SKEW_S=30.0)
    client = app.test_client()
    node = _setup(client)
    now = now_utc()
    r = client.post("/api/v1/reports", json=_report(1, at=now + timedelta(seconds=offset_s)), headers=node)
    assert r.status_code == status, r.json
    if status == 422:
        assert r.json["errors"][0]["path"] == "measured_at" and "clock" in r.json["errors"][0]["message"]
    with app.extensions["occfuse.sessions"]() as s, s.begin():
        epoch = run_epoch(s, now_utc(), app.config)
        assert epoch.n_reports == (1 if fresh else 0)
    states = client.get("/api/v1/channels").json["channels"]
    assert all(c["nodes"] == (1 if fresh else 0) for c in states)
    if not fresh:
        assert all(c["state"] == "unknown" for c in states)  # no evidence is never "free"
