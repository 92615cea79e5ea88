"""APScheduler wiring: run an epoch every ``interval_s`` (coalesced, never overlapping), re-timed live, on the
one worker that holds the leader lease.

Every worker (gunicorn process, or the single ``occfuse serve`` process) runs a scheduler with three jobs: the
lease job (take or renew the lease every ``lease.renew_s``; see fusion/lease.py), the epoch, and, when
``RETENTION_S`` is set, the retention pass. Epoch and retention run only while this process leads, and an epoch
commits only after re-checking the lease inside its own transaction (fencing).

An epoch is read and computed in a read transaction (:func:`fusion.engine.prepare_epoch`) and written in a
write transaction of its own (:func:`fusion.engine.write_epoch`): on SQLite the write lock, which every report
upload needs, is held only while writing (~0.1 s instead of the whole epoch at 1,000 nodes x 256 channels).
If another epoch or a new plan landed in between (:func:`fusion.engine.epoch_basis` differs), the epoch is
computed again inside the write transaction, as it always was before.

The interval is read from the stored fusion settings after every epoch, so ``PUT /api/v1/fusion`` with a new
``interval_s`` takes effect from the next epoch without a restart.
"""

from __future__ import annotations

import logging
import os
import threading
import time
from datetime import datetime, timedelta, timezone

from apscheduler.schedulers.background import BackgroundScheduler
from sqlalchemy import func, select

from .engine import PreparedEpoch, epoch_basis, prepare_epoch, run_epoch, write_epoch
from .lease import make_lease
from .models import Decision, FusionSettings, utcnow
from .retention import prune_reports
from .settings import get_settings

__all__ = ["FusionScheduler"]

log = logging.getLogger("fusion.scheduler")
JOB_ID = "fusion-epoch"
LEASE_JOB_ID = "fusion-lease"
RETENTION_JOB_ID = "report-retention"


class _LostLease(Exception):
    """Raised inside the epoch transaction to roll it back when the lease is no longer ours."""


class FusionScheduler:
    """Runs :func:`fusion.engine.run_epoch` for `app` on a background thread while this process leads."""

    def __init__(self, app, lease=None):
        self.app = app
        self.lease = lease
        self.leading = False
        self.interval_s: float | None = None
        self.epochs = 0
        self.recomputed = 0  # epochs computed again under the write lock (their basis changed meanwhile)
        self.last_write_s: float | None = None  # the last epoch's write transaction, waiting for the lock included
        self.last_error: str | None = None
        self._scheduler: BackgroundScheduler | None = None
        self._lock = threading.Lock()
        self._lease_lock = threading.Lock()

    def _sessions(self):
        return self.app.extensions["occfuse.sessions"]

    def current_interval(self) -> float:
        with self._sessions()() as session, session.begin():
            return float(get_settings(session, self.app.config).interval_s)

    def start(self) -> "FusionScheduler":
        if self.lease is None:
            self.lease = make_lease(self.app.extensions["occfuse.engine"], self.app.config["LEASE_TTL_S"])
        self.interval_s = self.current_interval()
        now = datetime.now(timezone.utc)
        self._scheduler = BackgroundScheduler(timezone="UTC", job_defaults={
            "coalesce": True, "max_instances": 1, "misfire_grace_time": None})
        self._scheduler.add_job(self.renew, "interval", seconds=self.lease.renew_s, id=LEASE_JOB_ID,
                                next_run_time=now)
        self._scheduler.add_job(self.tick, "interval", seconds=self.interval_s, id=JOB_ID,
                                next_run_time=now + timedelta(seconds=0.2))
        every = float(self.app.config["RETENTION_EVERY_S"])
        if self.app.config["RETENTION_S"] > 0 and every > 0:
            self._scheduler.add_job(self.prune, "interval", seconds=every, id=RETENTION_JOB_ID,
                                    next_run_time=now + timedelta(seconds=min(every, 5.0)))
        self._scheduler.start()
        log.info("fusion scheduler started, every %.3g s (%s lease, retry every %.3g s)", self.interval_s,
                 self.lease.kind, self.lease.renew_s)
        return self

    def renew(self) -> bool:
        """Take or renew the lease; log when leadership changes hands. Returns whether this process leads."""
        with self._lease_lock:
            try:
                leading = self.lease.acquire()
            except Exception as exc:  # database unreachable or locked: do not lead until it answers
                log.warning("fusion lease check failed: %s: %s", type(exc).__name__, exc)
                leading = False
            if leading != self.leading:
                if leading:
                    log.info("fusion lease taken by worker pid %d (%s lease)", os.getpid(), self.lease.kind)
                else:
                    log.warning("fusion lease lost by worker pid %d", os.getpid())
            self.leading = leading
            return leading

    def tick(self, now: datetime | None = None) -> None:
        """One epoch in one transaction, if this process leads; errors are logged and the next epoch still runs."""
        from .metrics import DECISIONS, EPOCH_DURATION

        if self.lease is not None and not self.renew():
            return
        with self._lock:
            try:
                now = now or utcnow()
                prep = self._prepare(now)
                write_started = time.perf_counter()
                with self._sessions()() as session, session.begin():
                    if prep is not None and epoch_basis(session) == prep.basis:
                        epoch = write_epoch(session, prep)
                    else:  # nothing prepared, or prepared from state that has changed since
                        self.recomputed += prep is not None
                        epoch = run_epoch(session, now, self.app.config)
                    interval = float(get_settings(session, self.app.config).interval_s)
                    counts = {}
                    if epoch is not None:
                        counts = dict(session.execute(select(Decision.state, func.count()).where(
                            Decision.epoch_id == epoch.id).group_by(Decision.state)).all())
                    if self.lease is not None and not self.lease.holds(session):
                        raise _LostLease
                self.last_write_s = time.perf_counter() - write_started
                self.epochs += 1
                self.last_error = None
                if epoch is not None:
                    EPOCH_DURATION.observe(epoch.duration_s)
                    for state, n in counts.items():
                        DECISIONS.labels(state).inc(n)
                    log.debug("epoch %s by pid %d: %d reports, %.1f ms", epoch.id, os.getpid(), epoch.n_reports,
                              epoch.duration_s * 1e3)
            except _LostLease:
                log.warning("fusion lease lost during an epoch; its results were rolled back")
                self.leading = False
                return
            except Exception as exc:  # keep the schedule alive; the operator sees the log
                self.last_error = f"{type(exc).__name__}: {exc}"
                log.exception("fusion epoch failed")
                return
        if self._scheduler is not None and interval != self.interval_s:
            log.info("fusion interval changed from %.3g s to %.3g s", self.interval_s, interval)
            self.interval_s = interval
            self._scheduler.reschedule_job(JOB_ID, trigger="interval", seconds=interval)

    def _prepare(self, now: datetime) -> PreparedEpoch | None:
        """The epoch computed in a read transaction (no write lock), or None to compute it while writing."""
        with self.app.extensions["occfuse.read_sessions"]() as session, session.begin():
            if session.get(FusionSettings, 1) is None:  # a new database: get_settings must write the row
                return None
            return prepare_epoch(session, now, self.app.config)

    def prune(self) -> int:
        """One bounded retention pass (leader only); returns the number of reports deleted."""
        if not self.leading:
            return 0
        cfg = self.app.config
        try:
            n = prune_reports(self.app.extensions["occfuse.engine"], float(cfg["RETENTION_S"]),
                              batch=int(cfg["RETENTION_BATCH"]))
        except Exception:  # the next pass retries; ingest is unaffected
            log.exception("report retention pass failed")
            return 0
        if n:
            log.info("retention: deleted %d reports older than %.3g s", n, cfg["RETENTION_S"])
        return n

    def shutdown(self, wait: bool = True) -> None:
        """Stop scheduling; with `wait`, let a running epoch finish. Then give the lease up for a quick handover."""
        if self._scheduler is not None and self._scheduler.running:
            self._scheduler.shutdown(wait=wait)
            log.info("fusion scheduler stopped after %d epochs", self.epochs)
        self._scheduler = None
        if self.lease is not None:  # also closes a non-leader's advisory-lock connection
            try:
                self.lease.release()
            except Exception as exc:  # it expires (row) or goes with the connection (advisory) anyway
                log.warning("could not release the fusion lease: %s: %s", type(exc).__name__, exc)
            self.leading = False
