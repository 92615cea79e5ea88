"""The band plan: load a TOML plan file, store a new revision, read the current one."""

from __future__ import annotations

import tomllib
from datetime import datetime
from pathlib import Path
from typing import NamedTuple

from pydantic import ValidationError
from sqlalchemy import func, select
from sqlalchemy.orm import Session, selectinload

from .api.schemas import PlanIn
from .errors import PlanError
from .models import Channel, PlanRevision

__all__ = ["read_plan_file", "store_plan", "current_plan", "plan_index", "newest_revision", "last_seen_plan",
           "PlanIndex", "error_path"]


def error_path(loc) -> str:
    """('measurements', 2, 'channel') -> 'measurements[2].channel'."""
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out or "(body)"


def read_plan_file(path: str | Path) -> PlanIn:
    """Parse a TOML plan: ``[[channel]]`` tables with ``id``, ``center_hz``, ``bandwidth_hz``.

    Integer ids (``id = 21``) are taken as the string ``"21"``; numbers may be TOML ints or floats.
    """
    try:
        data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise PlanError(f"plan file {path} does not exist") from None
    except tomllib.TOMLDecodeError as exc:
        raise PlanError(f"plan file {path} is not valid TOML: {exc}") from None
    tables = data.get("channel")
    if not isinstance(tables, list) or not tables:
        raise PlanError(f"plan file {path} has no [[channel]] tables")
    channels = []
    for i, table in enumerate(tables):
        item = dict(table)
        if isinstance(item.get("id"), int) and not isinstance(item.get("id"), bool):
            item["id"] = str(item["id"])
        for key in ("center_hz", "bandwidth_hz"):
            if isinstance(item.get(key), int) and not isinstance(item.get(key), bool):
                item[key] = float(item[key])
        channels.append(item)
    try:
        return PlanIn.model_validate({"channels": channels})
    except ValidationError as exc:
        errors = [{"path": error_path(("channel",) + tuple(e["loc"])[1:]), "message": e["msg"]}
                  for e in exc.errors(include_url=False)]
        detail = "; ".join(f"{e['path']}: {e['message']}" for e in errors)
        raise PlanError(f"plan file {path} is invalid: {detail}", errors) from None


def current_plan(session: Session) -> PlanRevision | None:
    """The newest plan revision with its channels in position order, or None before any plan is loaded."""
    stmt = (select(PlanRevision).options(selectinload(PlanRevision.channels))
            .order_by(PlanRevision.revision.desc()).limit(1))
    return session.scalars(stmt).first()


class PlanIndex(NamedTuple):
    """The newest plan revision, read-only: channel id -> position, and (id, center_hz, bandwidth_hz) rows."""

    revision: int
    created_at: datetime
    positions: dict[str, int]
    channels: tuple[tuple[str, float, float], ...]


_INDEX_CACHE: dict[tuple, PlanIndex] = {}
_LAST: dict[str, PlanIndex] = {}  # database URL -> the newest plan this process has seen there


def _url(session: Session) -> str:
    return session.get_bind().url.render_as_string(hide_password=False)


# Built once: constructing a statement costs more than running it on this per-request path.
_NEWEST = select(PlanRevision.revision, PlanRevision.created_at).order_by(PlanRevision.revision.desc()).limit(1)


def newest_revision(session: Session) -> tuple[int, datetime] | None:
    """(revision, created_at) of the newest plan, or None; one indexed one-row query."""
    row = session.execute(_NEWEST).first()
    return None if row is None else (row.revision, row.created_at)


def plan_index(session: Session) -> PlanIndex | None:
    """The newest plan as a :class:`PlanIndex`, or None before any plan is loaded.

    A revision never changes once stored, so its channels are cached per process, keyed by database URL,
    revision number and creation time (a database recreated at the same URL does not hit a stale entry).
    Each call costs one indexed one-row query; ingest and reads call it on every request.
    """
    newest = newest_revision(session)
    if newest is None:
        return None
    url = _url(session)
    key = (url, *newest)
    hit = _INDEX_CACHE.get(key)
    if hit is None:
        rows = session.execute(select(Channel.position, Channel.channel_id, Channel.center_hz, Channel.bandwidth_hz)
                               .where(Channel.revision == newest[0]).order_by(Channel.position)).all()
        hit = PlanIndex(newest[0], newest[1], {r.channel_id: r.position for r in rows},
                        tuple((r.channel_id, r.center_hz, r.bandwidth_hz) for r in rows))
        if len(_INDEX_CACHE) >= 64:  # bounded: one entry per database and revision seen by this process
            _INDEX_CACHE.clear()
        _INDEX_CACHE[key] = hit
    _LAST[url] = hit
    return hit


def last_seen_plan(url: str) -> PlanIndex | None:
    """The newest plan this process has read from database `url`, without a query; it may be outdated, so a
    caller must confirm it (:func:`newest_revision`) inside its own transaction."""
    return _LAST.get(url)


def store_plan(session: Session, plan: PlanIn) -> PlanRevision:
    """Store `plan` as a new revision (reports are validated against the newest one)."""
    newest = session.scalar(select(func.max(PlanRevision.revision)))
    revision = PlanRevision(revision=(newest or 0) + 1)
    session.add(revision)
    for position, ch in enumerate(plan.channels):
        revision.channels.append(Channel(position=position, channel_id=ch.id, center_hz=ch.center_hz,
                                         bandwidth_hz=ch.bandwidth_hz))
    session.flush()
    return revision
