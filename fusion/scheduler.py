"""APScheduler wiring: run an epoch every ``interval_s`` (coalesced, never overlapping), re-timed live.

The interval is read from the stored fusion settings after every epoch, so ``PUT /api/v1/fusion`` with a new
``interval_s`` takes effect from the next epoch without a restart. One process runs the scheduler (``occfuse
serve``); several workers sharing one database need the lease of the scale-out design (not built yet).
"""

from __future__ import annotations

import logging
import threading
from datetime import datetime, timedelta, timezone

from apscheduler.schedulers.background import BackgroundScheduler

from .engine import run_epoch
from .models import utcnow
from .settings import get_settings

__all__ = ["FusionScheduler"]

log = logging.getLogger("fusion.scheduler")
JOB_ID = "fusion-epoch"


class FusionScheduler:
    """Runs :func:`fusion.engine.run_epoch` for `app` on a background thread."""

    def __init__(self, app):
        self.app = app
        self.interval_s: float | None = None
        self.epochs = 0
        self.last_error: str | None = None
        self._scheduler: BackgroundScheduler | None = None
        self._lock = threading.Lock()

    def _sessions(self):
        return self.app.extensions["occfuse.sessions"]

    def current_interval(self) -> float:
        with self._sessions()() as session, session.begin():
            return float(get_settings(session, self.app.config).interval_s)

    def start(self) -> "FusionScheduler":
        self.interval_s = self.current_interval()
        self._scheduler = BackgroundScheduler(timezone="UTC", job_defaults={
            "coalesce": True, "max_instances": 1, "misfire_grace_time": None})
        self._scheduler.add_job(self.tick, "interval", seconds=self.interval_s, id=JOB_ID,
                                next_run_time=datetime.now(timezone.utc) + timedelta(seconds=0.2))
        self._scheduler.start()
        log.info("fusion scheduler started, every %.3g s", self.interval_s)
        return self

    def tick(self, now: datetime | None = None) -> None:
        """One epoch in one transaction; errors are logged and the next epoch still runs."""
        with self._lock:
            try:
                with self._sessions()() as session, session.begin():
                    epoch = run_epoch(session, now or utcnow(), self.app.config)
                    interval = float(get_settings(session, self.app.config).interval_s)
                self.epochs += 1
                self.last_error = None
                if epoch is not None:
                    log.debug("epoch %s: %d reports, %.1f ms", epoch.id, epoch.n_reports, epoch.duration_s * 1e3)
            except Exception as exc:  # keep the schedule alive; the operator sees the log
                self.last_error = f"{type(exc).__name__}: {exc}"
                log.exception("fusion epoch failed")
                return
        if self._scheduler is not None and interval != self.interval_s:
            log.info("fusion interval changed from %.3g s to %.3g s", self.interval_s, interval)
            self.interval_s = interval
            self._scheduler.reschedule_job(JOB_ID, trigger="interval", seconds=interval)

    def shutdown(self, wait: bool = True) -> None:
        """Stop scheduling; with `wait`, let a running epoch finish (its transaction commits or rolls back)."""
        if self._scheduler is not None and self._scheduler.running:
            self._scheduler.shutdown(wait=wait)
            log.info("fusion scheduler stopped after %d epochs", self.epochs)
        self._scheduler = None
