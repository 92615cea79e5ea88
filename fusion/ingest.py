"""Report ingest: validate against the current plan, deduplicate by (node, seq), store atomically.

A request's reports are all-or-nothing: if any report is invalid or conflicts with a stored one, nothing of
the request is stored and the error lists every offending field path. A report whose (node, seq) is already
stored with the same content is acknowledged again as a duplicate (safe retries).
"""

from __future__ import annotations

import hashlib
import json
import math
from datetime import datetime, timedelta, timezone
from typing import NamedTuple

from sqlalchemy import insert, select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from .api.schemas import ReportIn
from .errors import Conflict, Forbidden, Unprocessable
from .models import Node, Report, pack
from .plan import PlanIndex, plan_index

__all__ = ["content_hash", "ingest_reports", "NodeRef"]


def content_hash(report: ReportIn) -> str:
    """Hash of what a report says (measurement order and the optional `node` field do not matter)."""
    canonical = {
        "seq": report.seq,
        "measured_at": report.measured_at.astimezone(timezone.utc).isoformat(),
        "n_samples": report.n_samples,
        "noise_dbm": report.noise_dbm,
        "measurements": sorted((m.channel, m.power_dbm, m.noise_dbm) for m in report.measurements),
    }
    return hashlib.sha256(json.dumps(canonical, separators=(",", ":")).encode()).hexdigest()


class NodeRef(NamedTuple):
    """The reporting node, as the auth check found it."""

    id: int
    name: str


def ingest_reports(session: Session, node: NodeRef | Node, reports: list[ReportIn], *, prefix: str, now: datetime,
                   max_skew_s: float, max_measurements: int, plan: PlanIndex | None = None) -> list[tuple[int, str]]:
    """Validate and store `reports` from `node`; return ``[(seq, "created" | "duplicate"), ...]``.

    `prefix` is the field path of the first report (``""`` for a single report, ``"reports"`` for a batch),
    used to say where each error is. `plan` is the plan to check against (read beforehand, so the write
    transaction stays short); by default the newest one, read in `session`. The caller commits.
    """
    if plan is None:
        plan = plan_index(session)
    if plan is None:
        raise Conflict("no band plan is loaded yet; an admin must PUT /api/v1/plan before nodes can report")
    positions = plan.positions
    n_channels = len(positions)
    errors: list[dict] = []
    rows: dict[int, tuple[str, dict]] = {}
    latest_allowed = now + timedelta(seconds=max_skew_s)

    for i, rep in enumerate(reports):
        at = f"{prefix}[{i}]." if prefix else ""
        if rep.node is not None and rep.node != node.name:
            raise Forbidden(f"{at}node: this token belongs to node {node.name!r}; a node can only report as "
                            f"itself", errors=[{"path": f"{at}node", "message": "not the token's node"}])
        if rep.measured_at > latest_allowed:
            errors.append({"path": f"{at}measured_at", "message": f"{rep.measured_at.isoformat()} is more than "
                           f"{max_skew_s:g} s in the future (server time {now.isoformat()}); check the node's clock"})
        if len(rep.measurements) > max_measurements:
            errors.append({"path": f"{at}measurements", "message": f"at most {max_measurements} measurements "
                           f"per report, got {len(rep.measurements)}"})
        # Plain lists, not numpy scalars, in this per-measurement loop (it runs 64 to 4096 times per report).
        powers = [math.nan] * n_channels
        noise = [math.nan] * n_channels
        any_noise = False
        for j, m in enumerate(rep.measurements):
            pos = positions.get(m.channel)
            if pos is None:
                known = ", ".join(list(positions)[:20]) + (", ..." if n_channels > 20 else "")
                errors.append({"path": f"{at}measurements[{j}].channel", "message": f"unknown channel "
                               f"{m.channel!r}; plan revision {plan.revision} has: {known}"})
                continue
            if not math.isnan(powers[pos]):
                errors.append({"path": f"{at}measurements[{j}].channel",
                               "message": f"channel {m.channel!r} is measured twice in one report"})
                continue
            powers[pos] = m.power_dbm
            given = m.noise_dbm if m.noise_dbm is not None else rep.noise_dbm
            if given is not None:
                noise[pos] = given
                any_noise = True
        digest = content_hash(rep)
        if rep.seq in rows:
            if rows[rep.seq][0] != digest:
                raise Conflict(f"{at}seq: seq {rep.seq} appears twice in this request with different content",
                               errors=[{"path": f"{at}seq", "message": "repeated with other content"}])
            continue
        rows[rep.seq] = (digest, {
            "node_id": node.id, "seq": rep.seq, "measured_at": rep.measured_at, "received_at": now,
            "n_samples": rep.n_samples, "plan_revision": plan.revision, "powers": pack(powers),
            "noise": pack(noise) if any_noise else None, "content_hash": digest})
    if errors:
        detail = "; ".join(f"{e['path']}: {e['message']}" for e in errors[:5])
        raise Unprocessable(f"nothing was stored: {detail}" + (" ..." if len(errors) > 5 else ""), errors=errors)

    # The write part: Core statements (no ORM unit of work), so the write lock is held only for these.
    table = Report.__table__
    # On SQLite the dedupe SELECT below opens the transaction with BEGIN IMMEDIATE, so no other writer can
    # insert between our check and our insert; elsewhere (PostgreSQL) a SAVEPOINT catches that race.
    guard = session.get_bind().dialect.name != "sqlite"
    for attempt in (1, 2):  # a concurrent insert of the same seq lands between our check and our insert
        stored = dict(session.execute(select(table.c.seq, table.c.content_hash)
                                      .where(table.c.node_id == node.id, table.c.seq.in_(list(rows)))).all())
        clashes = sorted(seq for seq, h in stored.items() if h != rows[seq][0])
        if clashes:
            raise Conflict(f"seq {clashes[0]} was already stored with other content; a retry must re-send "
                           f"exactly the same report, a new report needs a new seq",
                           errors=[{"path": "seq", "message": f"seq {s} conflicts"} for s in clashes])
        new = [row for seq, (_, row) in rows.items() if seq not in stored]
        if not new:
            break
        if not guard:
            session.execute(insert(table), new)
            break
        try:
            with session.begin_nested():
                session.execute(insert(table), new)
            break
        except IntegrityError:
            if attempt == 2:
                raise
    session.execute(update(Node.__table__).where(Node.__table__.c.id == node.id).values(last_seen=now))
    return [(seq, "duplicate" if seq in stored else "created") for seq in rows]
