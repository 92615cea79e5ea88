"""/api/v1/channels: the latest state per channel, the free ones, and a channel's history."""

from __future__ import annotations

from datetime import timedelta

from flask import Blueprint, Response, current_app

from ..db import get_session
from ..decisions import channel_history, free_channels, latest_states
from ..errors import Unprocessable
from ..models import utcnow
from .auth import role
from .problems import read_query, respond
from .schemas import ChannelsOut, FreeQuery, HistoryOut, HistoryQuery

__all__ = ["bp"]

bp = Blueprint("channels", __name__, url_prefix="/api/v1/channels")


# Rendered answers by (database, newest epoch, plan, question): an answer changes only when an epoch or a
# plan lands, and these two routes are what clients poll (tests/bench/bench_query.py).
_ANSWERS: dict[tuple, bytes] = {}


# One statement for the cache key, sent on the pooled DBAPI connection: through the ORM session the two
# lookups cost more than the rest of a cached answer (measured: ~2.1 ms -> ~0.4 ms per GET in-process here).
_KEY_SQL = ("SELECT (SELECT id FROM epoch ORDER BY id DESC LIMIT 1), "
            "(SELECT started_at FROM epoch ORDER BY id DESC LIMIT 1), "
            "(SELECT revision FROM plan_revision ORDER BY revision DESC LIMIT 1), "
            "(SELECT created_at FROM plan_revision ORDER BY revision DESC LIMIT 1)")


def _answer_key() -> tuple:
    """(database, newest epoch id and start, newest plan revision and creation) as stored. The times are in
    the key because a database recreated at one URL restarts both numberings."""
    engine = current_app.extensions["occfuse.engine"]
    pooled = engine.raw_connection()
    try:
        cur = pooled.cursor()
        cur.execute(_KEY_SQL)
        row = tuple(cur.fetchone())
        cur.close()
    finally:
        pooled.close()  # back to the pool, which ends the (read-only) transaction
    return (engine.url.render_as_string(hide_password=False), *row)


def _cached(question, build) -> Response:
    key = (*_answer_key(), question)
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
    return _cached("all", lambda: latest_states(get_session()))


@bp.get("/free")
@role("reader")
def free():
    query = read_query(FreeQuery)
    return _cached(("free", query.min_confidence), lambda: free_channels(get_session(), query.min_confidence))


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
