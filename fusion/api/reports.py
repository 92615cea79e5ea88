"""/api/v1/reports: nodes post one report or a batch; all-or-nothing per request."""

from __future__ import annotations

from flask import Blueprint, current_app, g

from ..db import get_session
from ..errors import Unprocessable
from ..ingest import NodeRef, ingest_reports
from ..metrics import REPORTS_ACCEPTED
from ..models import utcnow
from ..plan import last_seen_plan
from .auth import role
from .problems import read_body, respond
from .schemas import BatchAck, ReportAck, ReportBatchIn, ReportIn

__all__ = ["bp"]

bp = Blueprint("reports", __name__, url_prefix="/api/v1/reports")


@bp.post("")
@role("node")
def create():
    parsed = read_body()
    batch = isinstance(parsed, dict) and "reports" in parsed
    limit = current_app.config["MAX_BATCH"]
    # Count before validating the items: a huge batch is refused without validating (or listing) each one.
    if batch and isinstance(parsed["reports"], list) and len(parsed["reports"]) > limit:
        raise Unprocessable(f"reports: at most {limit} reports per batch, got {len(parsed['reports'])}; split "
                            f"the batch", errors=[{"path": "reports", "message": f"more than {limit} items"}])
    body = read_body(ReportBatchIn if batch else ReportIn)
    reports = body.reports if batch else [body]
    session = get_session()
    # Validate against the newest plan this process knows, before the write transaction (ingest confirms it).
    plan = last_seen_plan(session.get_bind().url.render_as_string(hide_password=False))
    results = ingest_reports(session, NodeRef(g.node_id, g.node_name), reports, prefix="reports" if batch else "",
                             now=utcnow(), max_skew_s=current_app.config["MAX_SKEW_S"],
                             max_measurements=current_app.config["MAX_MEASUREMENTS"], plan=plan)
    session.commit()  # durable before we acknowledge
    created = sum(status == "created" for _, status in results)
    REPORTS_ACCEPTED.labels("created").inc(created)
    REPORTS_ACCEPTED.labels("duplicate").inc(len(results) - created)
    status_code = 201 if created else 200
    if not batch:
        seq, status = results[0]
        return respond(ReportAck, {"seq": seq, "status": status}, status_code)
    return respond(BatchAck, {"created": created, "duplicates": len(results) - created,
                              "results": [{"seq": s, "status": st} for s, st in results]}, status_code)
