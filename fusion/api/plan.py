"""/api/v1/plan: the band plan (admin replaces it, anyone with read access reads it)."""

from __future__ import annotations

from flask import Blueprint

from ..db import get_session
from ..plan import current_plan, store_plan
from .auth import role
from .problems import read_body, respond
from .schemas import PlanIn, PlanOut

__all__ = ["bp", "plan_view"]

bp = Blueprint("plan", __name__, url_prefix="/api/v1/plan")


def plan_view(revision) -> dict:
    if revision is None:
        return {"revision": None, "channels": []}
    return {"revision": revision.revision,
            "channels": [{"id": c.channel_id, "center_hz": c.center_hz, "bandwidth_hz": c.bandwidth_hz}
                         for c in revision.channels]}


@bp.get("")
@role("reader")
def show():
    return respond(PlanOut, plan_view(current_plan(get_session())))


@bp.put("")
@role("admin")
def replace():
    body = read_body(PlanIn)
    session = get_session()
    revision = store_plan(session, body)
    session.commit()
    return respond(PlanOut, plan_view(revision))
