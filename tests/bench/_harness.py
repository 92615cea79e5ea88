"""Shared pieces of the benchmarks: seed a database, start the real server on loopback, drive HTTP load.

Not collected by pytest (tests/bench is excluded). Every load loop is bounded in count and time, and every
connection goes to 127.0.0.1 only.
"""

from __future__ import annotations

import http.client
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

__all__ = ["ADMIN", "seed", "Server", "report_body", "post_loop", "percentile"]

ADMIN = "bench-admin-token"
ROOT = Path(__file__).resolve().parents[2]
# sync workers: each accepts one connection at a time, so the kernel spreads clients over both workers
# (with gthread, one worker took every keep-alive connection and the other idled: measured).
WORKER_CLASS = os.environ.get("BENCH_WORKER_CLASS", "sync")
THREADS = os.environ.get("BENCH_THREADS", "1")
ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


def seed(path: Path, *, n_nodes: int, n_channels: int) -> tuple[str, list[str], list[str]]:
    """A fresh upgraded SQLite database with a plan of `n_channels` and `n_nodes` nodes; (url, tokens, ids)."""
    from sqlalchemy.orm import Session

    from fusion.api.schemas import PlanIn
    from fusion.db import make_engine, upgrade
    from fusion.plan import store_plan
    from fusion.registry import register_node

    url = f"sqlite:///{path}"
    upgrade(url)
    ids = [f"c{j:04d}" for j in range(n_channels)]
    plan = PlanIn.model_validate({"channels": [{"id": c, "center_hz": 4.7e8 + 2e5 * j, "bandwidth_hz": 2e5}
                                               for j, c in enumerate(ids)]})
    engine = make_engine(url)
    tokens = []
    with Session(engine) as s, s.begin():
        store_plan(s, plan)
        for i in range(n_nodes):
            tokens.append(register_node(s, f"node-{i:04d}")[1])
    engine.dispose()
    return url, tokens, ids


def report_body(seq: int, ids: list[str], rng: np.random.Generator, *, at: datetime | None = None) -> dict:
    powers = -100.0 + 10 * np.log10(rng.gamma(4096, 1.0, len(ids)) / 4096)  # noise only, exact law
    return {"seq": seq, "measured_at": (at or datetime.now(timezone.utc)).isoformat(), "n_samples": 4096,
            "noise_dbm": -100.0,
            "measurements": [{"channel": c, "power_dbm": round(float(p), 3)} for c, p in zip(ids, powers)]}


def _serve_has_workers() -> bool:
    out = subprocess.run([sys.executable, "-m", "fusion.cli", "serve", "--help"], capture_output=True, text=True,
                         env={**os.environ, **ENV}, cwd=ROOT)
    return "--workers" in out.stdout


class Server:
    """The service on 127.0.0.1 with 2 worker processes: ``occfuse serve --workers 2`` when that exists,
    else gunicorn started here on the app factory (WORKER_CLASS). `how` says which ran."""

    def __init__(self, url: str, *, workers: int = 2, port: int = 18_473, scheduler: bool = False,
                 worker_class: str | None = None, interval_s: float = 5.0):
        self.base = f"127.0.0.1:{port}"
        env = {**os.environ, **ENV, "OCCFUSE_DATABASE_URL": url, "OCCFUSE_ADMIN_TOKEN": ADMIN,
               "OCCFUSE_CONFIG": "", "OCCFUSE_LOG_LEVEL": "WARNING", "OCCFUSE_INTERVAL_S": str(interval_s)}
        if _serve_has_workers():
            cmd = [sys.executable, "-m", "fusion.cli", "serve", "--host", "127.0.0.1", "--port", str(port),
                   "--workers", str(workers)]
            if "BENCH_THREADS" in os.environ:
                cmd += ["--threads", os.environ["BENCH_THREADS"]]
            worker_class = worker_class or os.environ.get("BENCH_WORKER_CLASS")  # scripts without the option
            if worker_class:
                cmd += ["--worker-class", worker_class]
            self.how = f"occfuse serve --workers {workers}" + (f" --worker-class {worker_class}" if worker_class
                                                                else "")
        else:
            gunicorn = shutil.which("gunicorn", path=str(Path(sys.executable).parent)) or "gunicorn"
            cmd = [gunicorn, "-w", str(workers), "-k", WORKER_CLASS, "--threads", THREADS, "-b", self.base,
                   "--log-level", "warning", "-c", str(Path(__file__).with_name("gunicorn_bench.py")),
                   "fusion:create_app()"]
            self.how = (f"gunicorn -w {workers} -k {WORKER_CLASS} --threads {THREADS} (started by the bench; "
                        f"no serve --workers)")
        self.proc = subprocess.Popen(cmd, env=env, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                                     start_new_session=True)
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            try:
                conn = http.client.HTTPConnection(self.base, timeout=2)
                conn.request("GET", "/healthz")
                if conn.getresponse().status in (200, 503):
                    conn.close()
                    return
            except OSError:
                time.sleep(0.2)
        self.stop()
        raise RuntimeError(f"server did not start: {self.proc.stderr.read().decode()[-2000:]}")

    def cpu_by_process(self) -> dict[int, float]:
        """pid -> CPU seconds (user + system) so far, for each of the server's processes, from /proc."""
        out = {}
        for stat in Path("/proc").glob("[0-9]*/stat"):
            try:
                fields = stat.read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[2]) == self.proc.pid:  # process group = the server's session leader
                out[int(stat.parent.name)] = (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
        return out  # utime, stime: proc(5)

    def stop(self) -> None:
        if self.proc.poll() is None:
            os.killpg(self.proc.pid, signal.SIGTERM)  # the whole group: master and workers
            try:
                self.proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                os.killpg(self.proc.pid, signal.SIGKILL)
                self.proc.wait()
        self.proc.stderr.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.stop()


def post_loop(args) -> tuple[int, int, float, dict]:
    """One client process: POST pre-encoded bodies until `seconds` pass or the bodies run out, over one
    keep-alive connection per token in turn (each token a node, as a site's nodes each hold their own
    connection). Returns (requests ok, reports ok, elapsed s, {status: count} of the others, and
    "no answer, re-sent": requests the server dropped without an answer, re-sent once).

    Requests are written as ready-made bytes on a plain socket and responses read by Content-Length (a
    minimal HTTP/1.1 client): http.client costs ~0.5 ms of CPU per request, which on two shared cores is
    taken from the server being measured.
    """
    base, tokens, bodies, per_body, seconds = args
    tokens = [tokens] if isinstance(tokens, str) else list(tokens)
    host, port = base.rsplit(":", 1)
    heads = [(f"POST /api/v1/reports HTTP/1.1\r\nHost: {base}\r\nAuthorization: Bearer {token}\r\n"
              f"Content-Type: application/json\r\n").encode() for token in tokens]
    # Each connection is opened right before its first request, as a client does; opened all at once ahead of
    # use, the idle ones held gthread worker threads (see fusion/workers.py, FIRST_BYTES_WAIT_S).
    conns: list[_Conn | None] = [None] * len(tokens)
    ok = reports = 0
    other: dict[int, int] = {}
    start = time.perf_counter()
    for b, body in enumerate(bodies):
        if time.perf_counter() - start > seconds:
            break
        k = b % len(conns)  # body b goes to connection (and node) b mod n: one request in flight at a time
        request = heads[k] + b"Content-Length: %d\r\n\r\n" % len(body) + body
        if conns[k] is None:
            conns[k] = _Conn(host, int(port))
        try:
            conns[k].sock.sendall(request)
            status, close = conns[k].read_response()
        except (ConnectionError, TimeoutError):
            # The server closed a keep-alive connection without an answer (seen once here, gthread workers with a
            # profiler attached; gunicorn issue #2676 reports the same): re-send on a new connection, as the
            # node agent does. The same seq is stored once (a re-sent stored report is a duplicate), so it is safe.
            other["no answer, re-sent"] = other.get("no answer, re-sent", 0) + 1
            conns[k].sock.close()
            conns[k] = _Conn(host, int(port))
            conns[k].sock.sendall(request)
            status, close = conns[k].read_response()
        if status in (200, 201):
            ok += 1
            reports += per_body
        else:
            other[status] = other.get(status, 0) + 1
        if close:
            conns[k].sock.close()
            conns[k] = None
    elapsed = time.perf_counter() - start
    for conn in conns:
        if conn is not None:
            conn.sock.close()
    return ok, reports, elapsed, other


class _Conn:
    """A keep-alive socket and a read buffer: just enough HTTP/1.1 for the service's own responses."""

    def __init__(self, host: str, port: int):
        self.sock = socket.create_connection((host, port), timeout=30)
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.buf = b""

    def read_response(self) -> tuple[int, bool]:
        """(status, server will close) of the next response; its body is read and dropped."""
        while b"\r\n\r\n" not in self.buf:
            self._more()
        head, self.buf = self.buf.split(b"\r\n\r\n", 1)
        lines = head.decode("latin-1").split("\r\n")
        status = int(lines[0].split()[1])
        fields = {k.strip().lower(): v.strip() for k, _, v in (line.partition(":") for line in lines[1:])}
        if "content-length" not in fields:
            raise RuntimeError(f"response without Content-Length: {lines[0]}")
        length = int(fields["content-length"])
        while len(self.buf) < length:
            self._more()
        self.buf = self.buf[length:]
        return status, fields.get("connection", "").lower() == "close"

    def _more(self) -> None:
        chunk = self.sock.recv(65536)
        if not chunk:
            raise ConnectionError("server closed the connection mid-response")
        self.buf += chunk


def encode(obj) -> bytes:
    return json.dumps(obj, separators=(",", ":")).encode()


def percentile(values, q: float) -> float:
    return float(np.percentile(np.asarray(values), q))
