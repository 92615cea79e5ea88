"""/healthz: liveness and readiness; /healthz/live: liveness alone.

Ready means the database answers and the newest epoch is younger than ``READY_MAX_EPOCH_AGE_S`` (default:
three epoch intervals plus the lease TTL, which covers a leader takeover). A fresh database with no epoch yet
counts as ready until this process has been up that long. Not ready answers 503, so a load balancer or
orchestrator takes the worker out of rotation; /healthz/live answers 200 whenever the process can answer.
"""

from __future__ import annotations

import time

from flask import Blueprint, current_app, jsonify
from sqlalchemy import text

from ..db import get_session
from ..decisions import last_epoch
from ..models import FusionSettings, utcnow
from .auth import role
from .problems import respond
from .schemas import Health

__all__ = ["bp", "max_epoch_age"]

bp = Blueprint("health", __name__)


def max_epoch_age(interval_s: float, config) -> float:
    """The epoch age beyond which the service is not ready (seconds)."""
    configured = float(config["READY_MAX_EPOCH_AGE_S"])
    return configured if configured > 0 else 3 * interval_s + float(config["LEASE_TTL_S"])


@bp.get("/healthz")
@role("public")
def healthz():
    session = get_session()
    config = current_app.config
    try:
        session.execute(text("SELECT 1"))
        epoch = last_epoch(session)
        stored = session.get(FusionSettings, 1)  # read only: a health check never seeds the settings row
        interval = float(stored.interval_s if stored is not None else config["INTERVAL_S"])
    except Exception:  # the database is the thing being checked
        session.rollback()
        return respond(Health, {"status": "degraded", "live": True, "ready": False, "database": False,
                                "last_epoch_at": None, "last_epoch_age_s": None,
                                "max_epoch_age_s": max_epoch_age(float(config["INTERVAL_S"]), config),
                                "problems": ["the database does not answer"]}, 503)
    limit = max_epoch_age(interval, config)
    at = epoch.started_at if epoch else None
    age = (utcnow() - at).total_seconds() if at else None
    problems = []
    if age is not None and age > limit:
        problems.append(f"the newest epoch is {age:.0f} s old (limit {limit:g} s): is any scheduler leading?")
    elif age is None and time.monotonic() - current_app.extensions["occfuse.started"] > limit:
        problems.append(f"no epoch has run in the {limit:g} s since start: is any scheduler leading?")
    ready = not problems
    return respond(Health, {"status": "ok" if ready else "degraded", "live": True, "ready": ready,
                            "database": True, "last_epoch_at": at, "last_epoch_age_s": age,
                            "max_epoch_age_s": limit, "problems": problems}, 200 if ready else 503)


@bp.get("/healthz/live")
@role("public")
def live():
    return jsonify({"live": True})
