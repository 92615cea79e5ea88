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

from sqlalchemy import bindparam, insert, select, update
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session

from .api.schemas import ReportIn
from .errors import Conflict, Forbidden, Unprocessable
from .models import Node, Report, pack
from .plan import PlanIndex, newest_revision, plan_index

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
    used to say where each error is. `plan` is a guess at the newest plan (:func:`fusion.plan.last_seen_plan`):
    the reports are validated against it *before* the transaction starts, then the guess is confirmed with
    one query inside it (and the reports re-validated in the rare case a new plan arrived meanwhile), so the
    write lock is held only for the statements that store. Without a guess the plan is read first. The
    caller commits.
    """
    check = dict(prefix=prefix, now=now, max_skew_s=max_skew_s, max_measurements=max_measurements)
    if plan is not None:
        try:
            rows = _prepare(node, reports, plan, **check)
        except Unprocessable:
            rows = None  # maybe only because the guess is outdated (a channel the new plan added)
        if newest_revision(session) == (plan.revision, plan.created_at):  # opens the write transaction
            if rows is None:
                rows = _prepare(node, reports, plan, **check)  # the guess was right: raise its errors
            return _store(session, node, rows, now)
    plan = plan_index(session)
    if plan is None:
        raise Conflict("no band plan is loaded yet; an admin must PUT /api/v1/plan before nodes can report")
    rows = _prepare(node, reports, plan, **check)
    return _store(session, node, rows, now)


def _prepare(node, reports: list[ReportIn], plan: PlanIndex, *, prefix: str, now: datetime, max_skew_s: float,
             max_measurements: int) -> dict[int, tuple[str, dict]]:
    """Check `reports` against `plan`; return ``{seq: (content hash, row)}`` or raise with every error."""
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
    return rows


# Built once (constructing a statement costs more than running it on this per-request path).
_INSERT_NEW = {name: module.insert(Report.__table__).on_conflict_do_nothing(index_elements=["node_id", "seq"])
               .returning(Report.__table__.c.seq) for name, module in (("sqlite", sqlite), ("postgresql", postgresql))}
_SEEN = (update(Node.__table__).where(Node.__table__.c.id == bindparam("node"))
         .values(last_seen=bindparam("now")))


def _store(session: Session, node, rows: dict[int, tuple[str, dict]], now: datetime) -> list[tuple[int, str]]:
    """Store the new rows, acknowledge the identical ones, refuse a seq stored with other content.

    One ``INSERT ... ON CONFLICT (node_id, seq) DO NOTHING RETURNING seq`` (SQLite >= 3.35, PostgreSQL) stores
    what is new and is atomic against a concurrent copy of the same report; only the seqs it skipped are
    read back, to tell a retry (same content hash) from a conflict. On a conflict the caller's transaction is
    rolled back (the request never commits), so nothing of the request is stored.
    """
    table = Report.__table__
    conn = session.connection()  # Core from here on: these statements run on every report request
    dialect = conn.dialect.name
    if dialect in ("sqlite", "postgresql"):
        created = set(conn.execute(_INSERT_NEW[dialect], [row for _, row in rows.values()]).scalars())
    else:  # any other backend: check, then insert (a concurrent twin may then fail with IntegrityError)
        have = set(conn.execute(select(table.c.seq).where(table.c.node_id == node.id,
                                                          table.c.seq.in_(list(rows)))).scalars())
        new = [row for seq, (_, row) in rows.items() if seq not in have]
        if new:
            conn.execute(insert(table), new)
        created = {row["seq"] for row in new}
    skipped = [seq for seq in rows if seq not in created]
    if skipped:
        stored = dict(conn.execute(select(table.c.seq, table.c.content_hash)
                                   .where(table.c.node_id == node.id, table.c.seq.in_(skipped))).all())
        clashes = sorted(seq for seq in skipped if stored.get(seq) != rows[seq][0])
        if clashes:
            raise Conflict(f"seq {clashes[0]} was already stored with other content; a retry must re-send "
                           f"exactly the same report, a new report needs a new seq",
                           errors=[{"path": "seq", "message": f"seq {s} conflicts"} for s in clashes])
    conn.execute(_SEEN, {"node": node.id, "now": now})
    return [(seq, "created" if seq in created else "duplicate") for seq in rows]
