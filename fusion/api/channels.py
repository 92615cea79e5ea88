"""/api/v1/channels: the latest state per channel, the free ones, and a channel's history."""

from __future__ import annotations

from datetime import timedelta

from flask import Blueprint, Response
from sqlalchemy import select

from ..db import get_session
from ..decisions import channel_history, free_channels, latest_states
from ..errors import Unprocessable
from ..models import Epoch, utcnow
from ..plan import newest_revision
from .auth import role
from .problems import read_query, respond
from .schemas import ChannelsOut, FreeQuery, HistoryOut, HistoryQuery

__all__ = ["bp"]

bp = Blueprint("channels", __name__, url_prefix="/api/v1/channels")


# Rendered answers by (database, newest epoch, plan, question): an answer changes only when an epoch or a
# plan lands, and these two routes are what clients poll (tests/bench/bench_query.py).
_ANSWERS: dict[tuple, bytes] = {}


def _cached(session, question, build) -> Response:
    epoch = session.execute(select(Epoch.id, Epoch.started_at).order_by(Epoch.id.desc()).limit(1)).first()
    key = (session.get_bind().url.render_as_string(hide_password=False), tuple(epoch or ()),
           newest_revision(session), question)  # started_at too: a database recreated at one URL restarts ids
    body = _ANSWERS.get(key)
    if body is None:
        body = ChannelsOut.model_validate(build()).model_dump_json().encode()
        if len(_ANSWERS) >= 256:  # bounded
            _ANSWERS.clear()
        _ANSWERS[key] = body
    return Response(body, mimetype="application/json")


@bp.get("")
@role("reader")
def index():
    session = get_session()
    return _cached(session, "all", lambda: latest_states(session))


@bp.get("/free")
@role("reader")
def free():
    query = read_query(FreeQuery)
    session = get_session()
    return _cached(session, ("free", query.min_confidence), lambda: free_channels(session, query.min_confidence))


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
