"""/healthz: liveness and readiness (database reachable, age of the last epoch)."""

from __future__ import annotations

from flask import Blueprint
from sqlalchemy import text

from ..db import get_session
from ..decisions import last_epoch
from ..models import utcnow
from .auth import role
from .problems import respond
from .schemas import Health

__all__ = ["bp"]

bp = Blueprint("health", __name__)


@bp.get("/healthz")
@role("public")
def healthz():
    session = get_session()
    try:
        session.execute(text("SELECT 1"))
        epoch = last_epoch(session)
    except Exception:  # the database is the thing being checked
        return respond(Health, {"status": "degraded", "database": False, "last_epoch_at": None,
                                "last_epoch_age_s": None}, 503)
    at = epoch.started_at if epoch else None
    return respond(Health, {"status": "ok", "database": True, "last_epoch_at": at,
                            "last_epoch_age_s": (utcnow() - at).total_seconds() if at else None})
