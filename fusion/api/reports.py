"""/api/v1/reports: nodes post one report or a batch; all-or-nothing per request."""

from __future__ import annotations

from flask import Blueprint, Response, current_app, g
from pydantic import ValidationError

from ..db import read_session
from ..errors import Conflict, Unprocessable
from ..ingest import NodeRef, prepare_reports
from ..metrics import REPORTS_ACCEPTED
from ..models import utcnow
from ..plan import PlanIndex, last_seen_plan, plan_index
from ..store import StaleNode, StalePlan, store_reports
from .auth import check_node_again, role
from .problems import raw_body, read_body, respond
from .schemas import ReportAck, ReportBatchIn, ReportIn

__all__ = ["bp"]

bp = Blueprint("reports", __name__, url_prefix="/api/v1/reports")


@bp.post("")
@role("node")
def create():
    body, batch = _validated(current_app.config["MAX_BATCH"])
    reports, channels = (body.reports, body.channels) if batch else ([body], None)
    engine = current_app.extensions["occfuse.engine"]
    cfg = current_app.config
    check = dict(channels=channels, prefix="reports" if batch else "", max_skew_s=cfg["MAX_SKEW_S"],
                 max_measurements=cfg["MAX_MEASUREMENTS"])
    # Validate against the newest plan this process has seen, before the write transaction; the store
    # confirms it inside the transaction (fusion/store.py), and a stale guess is re-read and tried again.
    plan = last_seen_plan(engine.url.render_as_string(hide_password=False)) or _read_plan()
    for attempt in range(3):
        now = utcnow()
        try:
            rows = prepare_reports(NodeRef(g.node_id, g.node_name), reports, plan, now=now, **check)
        except Unprocessable:
            fresh = _read_plan()
            if (fresh.revision, fresh.created_at) == (plan.revision, plan.created_at):
                raise  # the guess was the newest plan: these are the report's own errors
            plan = fresh  # maybe only outdated (a channel the new plan added): validate again
            continue
        try:
            results = store_reports(engine, rows, plan=plan, token_hash=g.node_token_hash, now=now,
                                    busy_timeout_s=cfg["SQLITE_BUSY_TIMEOUT_S"])
            break
        except StalePlan:
            plan = _read_plan()
        except StaleNode:
            check_node_again()  # 401/403 if the token or the node changed; else the cache was only cold
    else:
        raise Conflict("the band plan or this node changed several times while the request was being stored; "
                       "nothing was stored; retry it")
    created = sum(status == "created" for _, status in results)
    REPORTS_ACCEPTED.labels("created").inc(created)
    REPORTS_ACCEPTED.labels("duplicate").inc(len(results) - created)
    status_code = 201 if created else 200
    if not batch:
        seq, status = results[0]
        return respond(ReportAck, {"seq": seq, "status": status}, status_code)
    # Written directly (the BatchAck shape; tests/api/test_reports_compact.py checks it against the schema):
    # validating 500 result objects through pydantic cost more than storing them.
    items = ",".join(f'{{"seq":{s},"status":"{st}"}}' for s, st in results)  # ints and two fixed words
    body = f'{{"created":{created},"duplicates":{len(results) - created},"results":[{items}]}}'
    return Response(body, status=status_code, mimetype="application/json")


def _validated(limit: int) -> tuple[ReportIn | ReportBatchIn, bool]:
    """The body as a report or a batch of at most `limit` reports; (body, is a batch).

    A valid body is validated once, as what it most likely is (a batch holds the key "reports"). Anything else
    (an invalid body, or a wrong guess) takes the exact path: parse, tell a batch by its top-level "reports",
    count, then validate as that, so the answer says what is wrong and where. Parsing first there also lets a
    huge batch be refused without validating (or listing) each item.
    """
    raw = raw_body()
    guess = b'"reports"' in raw
    try:
        body = (ReportBatchIn if guess else ReportIn).model_validate_json(raw)
    except ValidationError:
        parsed = read_body()
        batch = isinstance(parsed, dict) and "reports" in parsed
        if batch and isinstance(parsed["reports"], list):
            _check_count(len(parsed["reports"]), limit)
        return read_body(ReportBatchIn if batch else ReportIn), batch
    # Valid as the guess means it is that: each model forbids the other's top-level fields.
    if guess:
        _check_count(len(body.reports), limit)
    return body, guess


def _check_count(n: int, limit: int) -> None:
    if n > limit:
        raise Unprocessable(f"reports: at most {limit} reports per batch, got {n}; split the batch",
                            errors=[{"path": "reports", "message": f"more than {limit} items"}])


def _read_plan() -> PlanIndex:
    with read_session() as session:
        plan = plan_index(session)
    if plan is None:
        raise Conflict("no band plan is loaded yet; an admin must PUT /api/v1/plan before nodes can report")
    return plan
