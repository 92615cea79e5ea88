"""/api/v1/channels: the latest state per channel, the free ones, and a channel's history."""

from __future__ import annotations

from datetime import timedelta

from flask import Blueprint

from ..db import get_session
from ..decisions import channel_history, free_channels, latest_states
from ..errors import Unprocessable
from ..models import utcnow
from .auth import role
from .problems import read_query, respond
from .schemas import ChannelsOut, FreeQuery, HistoryOut, HistoryQuery

__all__ = ["bp"]

bp = Blueprint("channels", __name__, url_prefix="/api/v1/channels")


@bp.get("")
@role("reader")
def index():
    return respond(ChannelsOut, latest_states(get_session()))


@bp.get("/free")
@role("reader")
def free():
    query = read_query(FreeQuery)
    return respond(ChannelsOut, free_channels(get_session(), query.min_confidence))


@bp.get("/<channel_id>/history")
@role("reader")
def history(channel_id: str):
    query = read_query(HistoryQuery)
    until = query.until or utcnow()
    since = query.since or until - timedelta(hours=1)
    if since > until:
        raise Unprocessable("query.since must not be after query.until",
                            errors=[{"path": "query.since", "message": "after until"}])
    return respond(HistoryOut, channel_history(get_session(), channel_id, since, until, query.limit))
