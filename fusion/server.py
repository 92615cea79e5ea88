"""Serve the app over HTTP on one process with the fusion scheduler beside it (``occfuse serve``, the demo)."""

from __future__ import annotations

import gc
import logging
import threading

from werkzeug.serving import make_server

from .scheduler import FusionScheduler

__all__ = ["LiveServer", "tune_gc"]

log = logging.getLogger("fusion.server")


def tune_gc() -> None:
    """Move every object alive now (the imported libraries and the built app) out of the collector's scans.

    A batch of reports allocates thousands of short-lived objects, which triggers collections that would
    otherwise re-scan the few hundred thousand long-lived objects of Flask, SQLAlchemy, numpy and scipy each
    time; measured in-process, freezing them nearly doubles batched ingest (DEVELOPERS.md, Benchmarks). Call it
    once per process after the app is built (gunicorn: ``post_worker_init``). ``gc.freeze`` (standard
    library, Python >= 3.7) moves all tracked objects to a permanent generation that collections ignore.
    """
    gc.collect()
    gc.freeze()


class LiveServer:
    """A threaded WSGI server plus scheduler; ``port=0`` picks a free port (see :attr:`url`)."""

    def __init__(self, app, host: str = "127.0.0.1", port: int = 8080, *, scheduler: bool = True):
        self.app = app
        self._server = make_server(host, port, app, threaded=True)
        self.host, self.port = host, self._server.server_port
        self.scheduler = FusionScheduler(app) if scheduler else None
        self._thread: threading.Thread | None = None

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}"

    def start(self) -> "LiveServer":
        """Serve on a background thread (tests, demo)."""
        if self.scheduler:
            self.scheduler.start()
        self._thread = threading.Thread(target=self._server.serve_forever, name="occfuse-http", daemon=True)
        self._thread.start()
        return self

    def serve_forever(self) -> None:
        """Serve on this thread until :meth:`stop` is called from elsewhere (a signal handler)."""
        tune_gc()
        if self.scheduler:
            self.scheduler.start()
        try:
            self._server.serve_forever()
        finally:
            self._shutdown_scheduler()

    def stop(self) -> None:
        self._server.shutdown()  # returns once serve_forever has left its loop
        if self._thread is not None:
            self._thread.join(timeout=10)
        self._server.server_close()
        self._shutdown_scheduler()

    def _shutdown_scheduler(self) -> None:
        if self.scheduler:
            self.scheduler.shutdown(wait=True)

    def __enter__(self):
        return self.start()

    def __exit__(self, *exc):
        self.stop()
