"""``occfuse serve --workers N`` (N > 1): the app under gunicorn, one fusion scheduler per worker, one leader.

The master only binds the socket and supervises; each worker builds its own app (engine and pool after fork,
no ``--preload``) and, in ``post_worker_init``, starts a :class:`~fusion.scheduler.FusionScheduler`, whose lease
lets exactly one worker run the epochs (fusion/lease.py). ``worker_exit`` stops the scheduler and gives the
lease up; ``child_exit`` (master) marks the worker dead for prometheus_client's multiprocess mode.
"""

from __future__ import annotations

import logging
import os
import threading
import time
import weakref

from gunicorn import glogging
from gunicorn.app.base import BaseApplication

__all__ = ["GunicornServer", "options"]

log = logging.getLogger("fusion.workers")
_SCHEDULER = {}  # per worker process: its FusionScheduler
# A keep-alive connection is closed after this many requests (the client reconnects at once). A gthread worker
# keeps every connection it accepted, so without a cap the kernel's first hand-out decides the load for good:
# measured, 3 busy connections all on one worker and the other idle, half the throughput. A reconnect is taken
# by whichever worker is free. Common practice (web servers cap requests per keep-alive connection at 100-1,000).
KEEPALIVE_REQUESTS = 100
# ... or once it has been open this long. Batches cost tens of milliseconds each, so a busy connection may send
# few requests; without an age cap, 12 batch connections split 8/4 at accept time kept one worker at ~75 % of
# the work for good (measured: tests/bench/bench_ingest.py). A reconnect a second costs nothing in comparison.
KEEPALIVE_MAX_S = 1.0
_BORN: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()  # connection socket -> monotonic time opened
_BORN_LOCK = threading.Lock()
# How long a gthread worker thread waits for a new connection's first bytes before handing the connection back to
# the worker's poller. gunicorn (24 and later) waits 5 s, holding the thread meanwhile: with 4 threads per worker,
# 8 connections that open and send nothing stalled `serve --workers 2` for 5 s per round (measured; a test in
# tests/test_workers.py). A client that connects sends at once, so a short wait costs nothing; a silent
# connection then waits in the poller without a thread, like a kept-alive one. (gunicorn also bounds by it the
# drain of a body the app did not read, e.g. after a 401: a body still arriving then closes the connection.)
FIRST_BYTES_WAIT_S = 0.1


def options(host: str, port: int, workers: int, threads: int, worker_class: str = "gthread") -> dict:
    """gunicorn settings for `workers` processes: `worker_class` "gthread" with `threads` threads each (threads
    cover DB waits and slow clients), or "sync" (one request at a time per process, no keep-alive)."""
    if worker_class not in ("gthread", "sync"):
        raise ValueError(f"worker_class must be 'gthread' or 'sync', was {worker_class!r}")
    # No control socket: its default path is per user, so two servers on one host would fight over it.
    return {"bind": f"[{host}]:{port}" if ":" in host else f"{host}:{port}", "workers": workers,
            "worker_class": worker_class, "threads": threads if worker_class == "gthread" else 1,
            "timeout": 60, "graceful_timeout": 20,
            "keepalive": 5, "preload_app": False, "control_socket_disable": True, "post_worker_init": _post_worker_init,
            "worker_exit": _worker_exit, "child_exit": _child_exit, "when_ready": _when_ready,
            "pre_request": _pre_request}


def _pre_request(worker, req) -> None:
    # Answered with "Connection: close" (see KEEPALIVE_REQUESTS and KEEPALIVE_MAX_S); the client reconnects
    # and whichever worker is free takes the new connection.
    if req.req_number >= KEEPALIVE_REQUESTS:
        req.must_close = True
        return
    sock = getattr(getattr(req, "unreader", None), "sock", None)
    if sock is None:
        return
    now = time.monotonic()
    with _BORN_LOCK:
        born = _BORN.setdefault(sock, now)
    if now - born >= KEEPALIVE_MAX_S:
        req.must_close = True


def _when_ready(server) -> None:
    host, port = server.LISTENERS[0].getsockname()[:2]
    shown = f"[{host}]" if ":" in host else host
    print(f"occfuse serving on http://{shown}:{port} with {server.cfg.workers} workers", flush=True)


def _post_worker_init(worker) -> None:
    from .scheduler import FusionScheduler
    from .server import tune_gc

    _shorten_first_bytes_wait(worker)

    tune_gc()  # the app is built: keep its objects out of the collector's scans (fusion.server.tune_gc)
    _SCHEDULER["s"] = FusionScheduler(worker.wsgi).start()


def _shorten_first_bytes_wait(worker) -> None:
    """Set gunicorn's gthread wait for a new connection's first bytes to FIRST_BYTES_WAIT_S (in this worker
    process; the module constant is read on every new connection)."""
    if worker.cfg.worker_class_str != "gthread":
        return
    import gunicorn
    from gunicorn.workers import gthread

    if not hasattr(gthread, "DEFAULT_WORKER_DATA_TIMEOUT"):
        # gunicorn before 24 waited in the poller, not in a thread; a later one may have renamed it
        log.warning("gunicorn %s has no gthread DEFAULT_WORKER_DATA_TIMEOUT; connections that send nothing may "
                    "hold worker threads", gunicorn.__version__)
        return
    gthread.DEFAULT_WORKER_DATA_TIMEOUT = FIRST_BYTES_WAIT_S


def _worker_exit(server, worker) -> None:
    sched = _SCHEDULER.pop("s", None)
    if sched is not None:
        sched.shutdown(wait=True)
    app = getattr(worker, "wsgi", None)
    if app is not None and "occfuse.engine" in getattr(app, "extensions", {}):
        app.extensions["occfuse.engine"].dispose()


def _child_exit(server, worker) -> None:
    if os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        from prometheus_client import multiprocess

        multiprocess.mark_process_dead(worker.pid)


class _Logger(glogging.Logger):
    """gunicorn's own log lines in occfuse's format (JSON lines when LOG_FORMAT is json), tokens masked."""

    def setup(self, cfg):
        super().setup(cfg)
        from .config import load_settings
        from .logs import RedactTokens, formatter

        try:
            fmt = load_settings()["LOG_FORMAT"]
        except Exception:  # the app reports bad settings itself
            fmt = "text"
        for logger in (self.error_log, self.access_log):
            for handler in logger.handlers:
                handler.setFormatter(formatter(fmt))
                handler.addFilter(RedactTokens())


class GunicornServer(BaseApplication):
    """gunicorn in-process: :meth:`run` blocks until the master stops (SIGTERM: graceful, exit 0)."""

    def __init__(self, options: dict, app_config: dict | None = None):
        self._options = {**options, "logger_class": _Logger}
        self._app_config = app_config
        super().__init__()

    def load_config(self):
        for key, value in self._options.items():
            self.cfg.set(key, value)

    def load(self):
        from . import create_app

        return create_app(self._app_config)
