"""Retention: delete raw reports received longer ago than ``RETENTION_S``, in small batches.

Each batch is its own short transaction (at most ``batch`` rows, oldest ids first), so on SQLite the write lock
is held for one batch at a time and ingest gets it between batches; a pass stops after ``max_batches`` so one
run is bounded too (the next run carries on). Epochs only read reports younger than ``MAX_AGE_S``, and learned
state lives elsewhere, so pruning old reports changes no decision.
"""

from __future__ import annotations

import time
from datetime import datetime, timedelta

from sqlalchemy import delete, select
from sqlalchemy.engine import Engine

from .models import Report, utcnow

__all__ = ["prune_reports"]


def prune_reports(engine: Engine, older_than_s: float, *, batch: int = 1000, max_batches: int = 100,
                  now: datetime | None = None, pause_s: float = 0.01) -> int:
    """Delete reports with ``received_at`` before ``now - older_than_s``; return how many were deleted.

    Parameters
    ----------
    engine : Engine
        The app's engine (each batch opens its own transaction on it).
    older_than_s : float
        Age in seconds; 0 or less deletes nothing (retention off).
    batch : int
        Rows per transaction.
    max_batches : int
        Transactions per call, bounding one pass.
    pause_s : float
        Sleep between batches, so waiting writers (ingest) take the lock first.
    """
    if older_than_s <= 0:
        return 0
    if batch < 1 or max_batches < 1:
        raise ValueError(f"batch and max_batches must be at least 1, were {batch} and {max_batches}")
    cutoff = (now or utcnow()) - timedelta(seconds=older_than_s)
    total = 0
    for i in range(max_batches):
        if i:
            time.sleep(pause_s)
        with engine.begin() as conn:
            ids = conn.scalars(select(Report.id).where(Report.received_at < cutoff)
                               .order_by(Report.id).limit(batch)).all()
            if ids:
                conn.execute(delete(Report).where(Report.id.in_(ids)))
        total += len(ids)
        if len(ids) < batch:
            break
    return total
