"""Reading what the service decided: latest state per channel, free channels, a channel's history."""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import select
from sqlalchemy.orm import Session

from .errors import NotFound
from .models import Decision, Epoch
from .plan import current_plan, plan_index

__all__ = ["confidence_of", "latest_states", "free_channels", "channel_history", "last_epoch"]


def confidence_of(state: str, p_occupied: float | None) -> float | None:
    """Probability that the published state is right; None for unknown."""
    if p_occupied is None or state == "unknown":
        return None
    return p_occupied if state == "occupied" else 1.0 - p_occupied


def last_epoch(session: Session) -> Epoch | None:
    return session.scalars(select(Epoch).order_by(Epoch.id.desc()).limit(1)).first()


def latest_states(session: Session) -> dict:
    """``{as_of, rule, channels: [...]}`` for the current plan; channels never decided are unknown.

    Read with Core rows and the cached plan index (no ORM objects): this backs the most frequent query.
    """
    plan = plan_index(session)
    epoch = session.execute(select(Epoch.id, Epoch.started_at, Epoch.rule).order_by(Epoch.id.desc()).limit(1)).first()
    decided = {}
    if epoch is not None:
        d = Decision.__table__.c
        decided = {row.channel_id: row for row in session.execute(
            select(d.channel_id, d.state, d.p_occupied, d.nodes, d.decided_at).where(d.epoch_id == epoch.id))}
    channels = []
    for channel_id, center_hz, bandwidth_hz in plan.channels if plan else ():
        row = decided.get(channel_id)
        state = row.state if row else "unknown"
        p = row.p_occupied if row else None
        channels.append({"id": channel_id, "center_hz": center_hz, "bandwidth_hz": bandwidth_hz,
                         "state": state, "p_occupied": p, "confidence": confidence_of(state, p),
                         "nodes": row.nodes if row else 0,
                         "decided_at": row.decided_at if row else None})
    return {"as_of": epoch.started_at if epoch else None, "rule": epoch.rule if epoch else None,
            "channels": channels}


def free_channels(session: Session, min_confidence: float) -> dict:
    """Channels whose latest state is free with at least `min_confidence`.

    A channel is free only when the epoch's own rule called it free (enough fresh nodes and the configured
    confidence); `min_confidence` can tighten that bar, never loosen it.
    """
    out = latest_states(session)
    out["channels"] = [c for c in out["channels"]
                       if c["state"] == "free" and c["confidence"] is not None and c["confidence"] >= min_confidence]
    out["min_confidence"] = min_confidence
    return out


def channel_history(session: Session, channel_id: str, since: datetime, until: datetime, limit: int) -> dict:
    plan = current_plan(session)
    known = {ch.channel_id for ch in plan.channels} if plan else set()
    stmt = (select(Decision).where(Decision.channel_id == channel_id, Decision.decided_at >= since,
                                   Decision.decided_at <= until)
            .order_by(Decision.decided_at).limit(limit))
    rows = list(session.scalars(stmt))
    if channel_id not in known and not rows:
        raise NotFound(f"channel {channel_id!r} is not in the current plan and has no history")
    decided = [d for d in rows if d.state != "unknown"]
    occupancy = (sum(d.state == "occupied" for d in decided) / len(decided)) if decided else None
    return {"channel": channel_id, "since": since, "until": until, "occupancy": occupancy,
            "decisions": [{"decided_at": d.decided_at, "state": d.state, "p_occupied": d.p_occupied,
                           "nodes": d.nodes} for d in rows]}
