"""Report ingest: validate against the current plan, deduplicate by (node, seq), store atomically.

A request's reports are all-or-nothing: if any report is invalid or conflicts with a stored one, nothing of
the request is stored and the error lists every offending field path. A report whose (node, seq) is already
stored with the same content is acknowledged again as a duplicate (safe retries).

A report comes in one of two forms (fusion/api/schemas.py): `measurements`, one object per channel, or
`powers_dbm`, one value per channel in the order of a `channels` list (given in the report, or once for a
whole batch). Both are packed into the same row: float32 per plan position, NaN where not measured. The
compact form is validated and packed for a whole batch at once with numpy, which is what makes batched ingest
cheap; the object form walks its measurements one by one.

Storing goes through :mod:`fusion.store` (plain DBAPI statements on SQLite and PostgreSQL).
"""

from __future__ import annotations

import hashlib
import math
from datetime import datetime, timedelta, timezone
from typing import NamedTuple

import numpy as np

from .api.schemas import ReportIn
from .errors import Conflict, Forbidden, Unprocessable
from .models import pack
from .plan import PlanIndex

__all__ = ["fingerprint", "prepare_reports", "NodeRef", "same_content", "utc_text"]


class NodeRef(NamedTuple):
    """The reporting node, as the auth check found it."""

    id: int
    name: str


def fingerprint(seq: int, measured_at: datetime, n_samples: int, powers: bytes, noise: bytes | None) -> str:
    """sha256 of what is stored for a report: seq, measurement time (UTC), n_samples and the packed arrays.

    Kept in ``report.content_hash``. It says what was *stored*: values equal after rounding to float32 (the
    stored precision) give the same fingerprint, whichever form the report came in. Rows written before the
    stored-content fingerprint (an earlier hash of the JSON) are compared column by column instead
    (:func:`same_content`), so a retry is recognised either way.
    """
    return _digest(seq, utc_text(measured_at), n_samples, powers, noise)


def utc_text(at: datetime) -> str:
    """`at` in UTC as ``datetime.isoformat`` writes it (``...+00:00``; microseconds only when non-zero)."""
    return at.astimezone(timezone.utc).isoformat()


def _digest(seq: int, utc: str, n_samples: int, powers: bytes, noise: bytes | None) -> str:
    h = hashlib.sha256(b"%d|%s|%d|" % (seq, utc.encode(), n_samples))
    h.update(powers)
    h.update(b"|" + noise if noise is not None else b"|-")
    return h.hexdigest()


def same_content(stored: dict, row: dict, stored_ids: tuple[str, ...] | None, ids: tuple[str, ...]) -> bool:
    """Whether a stored report row says what a newly prepared `row` says (same seq assumed).

    `stored_ids` and `ids` are the channel ids of the plan positions each row was packed against; when the
    plan changed between the two, the values are compared channel by channel, not position by position.
    """
    if stored["measured_at"] != row["measured_at"] or stored["n_samples"] != row["n_samples"]:
        return False
    if stored["plan_revision"] == row["plan_revision"]:
        return stored["powers"] == row["powers"] and stored["noise"] == row["noise"]
    if stored_ids is None:
        return False  # the stored row's plan is gone (cannot happen while reports reference it)

    def by_channel(r, channel_ids):
        p = np.frombuffer(r["powers"], "<f4")
        q = np.frombuffer(r["noise"], "<f4") if r["noise"] is not None else np.full(len(p), np.nan, "<f4")
        return {c: (p[k].tobytes(), q[k].tobytes()) for k, c in enumerate(channel_ids) if not np.isnan(p[k])}

    return by_channel(stored, stored_ids) == by_channel(row, ids)


def prepare_reports(node, reports: list[ReportIn], plan: PlanIndex, *, channels: list[str] | None = None,
                    prefix: str, now: datetime, max_skew_s: float, max_measurements: int) -> dict[int, dict]:
    """Check `reports` against `plan`; return ``{seq: row}`` (the columns of a ``report`` row, in request
    order, one per distinct seq; and ``measured_utc``, the time as :func:`utc_text` gives it, computed once
    for the fingerprint and the store) or raise with every error.

    `channels` is a batch's shared channel list for reports in the compact form without their own. `prefix`
    is the field path of the first report (``""`` for a single report, ``"reports"`` for a batch), used to say
    where each error is.
    """
    errors: list[dict] = []
    latest_allowed = now + timedelta(seconds=max_skew_s)
    packed: list[tuple[bytes, bytes | None] | None] = [None] * len(reports)
    groups: dict[tuple[str, ...], list[int]] = {}  # compact reports by the channel list they follow

    for i, rep in enumerate(reports):
        at = f"{prefix}[{i}]." if prefix else ""
        if rep.node is not None and rep.node != node.name:
            raise Forbidden(f"{at}node: this token belongs to node {node.name!r}; a node can only report as "
                            f"itself", errors=[{"path": f"{at}node", "message": "not the token's node"}])
        if rep.measured_at > latest_allowed:
            errors.append({"path": f"{at}measured_at", "message": f"{rep.measured_at.isoformat()} is more than "
                           f"{max_skew_s:g} s in the future (server time {now.isoformat()}); check the node's clock"})
        problem = _form_problem(rep, channels, in_batch=bool(prefix))
        if problem is not None:
            errors.append({"path": f"{at}{problem[0]}", "message": problem[1]})
            continue
        if rep.measurements is not None:
            if len(rep.measurements) > max_measurements:
                errors.append({"path": f"{at}measurements", "message": f"at most {max_measurements} measurements "
                               f"per report, got {len(rep.measurements)}"})
            packed[i] = _pack_objects(rep, plan, at, errors)
        else:
            if len(rep.powers_dbm) > max_measurements:
                errors.append({"path": f"{at}powers_dbm", "message": f"at most {max_measurements} measurements "
                               f"per report, got {len(rep.powers_dbm)}"})
            # None stands for the batch's shared list (most reports): no per-report tuple of its ids
            groups.setdefault(tuple(rep.channels) if rep.channels is not None else None, []).append(i)

    for key, members in groups.items():
        ids = key if key is not None else tuple(channels)
        where = f"{prefix}[{members[0]}].channels" if key is not None and prefix else "channels"
        positions = _positions(ids, plan, where, errors)
        if positions is not None:
            for i, blobs in zip(members, _pack_compact([reports[i] for i in members], positions,
                                                       len(plan.positions))):
                packed[i] = blobs

    rows: dict[int, dict] = {}
    if errors:
        detail = "; ".join(f"{e['path']}: {e['message']}" for e in errors[:5])
        raise Unprocessable(f"nothing was stored: {detail}" + (" ..." if len(errors) > 5 else ""), errors=errors)
    for i, rep in enumerate(reports):
        powers, noise = packed[i]
        utc = utc_text(rep.measured_at)
        digest = _digest(rep.seq, utc, rep.n_samples, powers, noise)
        if rep.seq in rows:
            if rows[rep.seq]["content_hash"] != digest:
                at = f"{prefix}[{i}]." if prefix else ""
                raise Conflict(f"{at}seq: seq {rep.seq} appears twice in this request with different content",
                               errors=[{"path": f"{at}seq", "message": "repeated with other content"}])
            continue
        rows[rep.seq] = {"node_id": node.id, "seq": rep.seq, "measured_at": rep.measured_at, "received_at": now,
                         "n_samples": rep.n_samples, "plan_revision": plan.revision, "powers": powers,
                         "noise": noise, "content_hash": digest, "measured_utc": utc}
    return rows


def _form_problem(rep: ReportIn, channels: list[str] | None, *, in_batch: bool) -> tuple[str, str] | None:
    """(field, message) if `rep` does not give exactly one form, consistently (a `powers_dbm` report with one
    value per id of its channel list: its own, else the batch's `channels`); else None."""
    if rep.measurements is not None:
        if rep.powers_dbm is not None:
            return "powers_dbm", "give either `measurements` or `powers_dbm` (with `channels`), not both"
        if rep.channels is not None:
            return "channels", "`channels` goes with `powers_dbm`; with `measurements` each names its channel"
        return None
    if rep.powers_dbm is None:
        return "measurements", "give either `measurements` or `powers_dbm` (with `channels`)"
    listed = rep.channels if rep.channels is not None else channels
    if listed is None:
        where = ", in the report or once beside `reports`" if in_batch else ""
        return "channels", f"`powers_dbm` needs `channels`: the channel ids its values are for, in that order{where}"
    if len(listed) != len(rep.powers_dbm):
        whose = "" if rep.channels is not None else "the batch's "
        return "powers_dbm", (f"{len(rep.powers_dbm)} values for {whose}{len(listed)} `channels`; give one value "
                              f"(or null) per channel")
    if all(p is None for p in rep.powers_dbm):
        return "powers_dbm", "only nulls; a report must measure at least one channel"
    return None


def _pack_objects(rep: ReportIn, plan: PlanIndex, at: str, errors: list) -> tuple[bytes, bytes | None]:
    """The `measurements` form: one object per channel, walked one by one."""
    positions = plan.positions
    n_channels = len(positions)
    # Plain lists, not numpy scalars, in this per-measurement loop (it runs 64 to 4096 times per report).
    powers = [math.nan] * n_channels
    noise = [math.nan] * n_channels
    any_noise = False
    for j, m in enumerate(rep.measurements):
        pos = positions.get(m.channel)
        if pos is None:
            errors.append({"path": f"{at}measurements[{j}].channel", "message": _unknown(m.channel, plan)})
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
    return pack(powers), (pack(noise) if any_noise else None)


_POSITIONS: dict[tuple, np.ndarray] = {}  # (plan revision, created_at, channel ids) -> their plan positions
_POSITIONS_MAX = 256  # distinct channel lists remembered per process (a node sends the same list each time)


def _positions(ids: tuple[str, ...], plan: PlanIndex, where: str, errors: list) -> np.ndarray | None:
    """Plan positions of a compact report's channel list, or None (errors appended) if any is unknown or
    repeated. Valid lists are remembered per plan: resolving 64 ids one by one was ~9 % of a single report."""
    key = (plan.revision, plan.created_at, ids)
    known = _POSITIONS.get(key)
    if known is not None:
        return known
    out = []
    seen: set[str] = set()
    ok = True
    for j, channel in enumerate(ids):
        pos = plan.positions.get(channel)
        if pos is None:
            errors.append({"path": f"{where}[{j}]", "message": _unknown(channel, plan)})
            ok = False
        elif channel in seen:
            errors.append({"path": f"{where}[{j}]", "message": f"channel {channel!r} is listed twice"})
            ok = False
        seen.add(channel)
        out.append(pos)
    if not ok:
        return None
    positions = np.array(out, dtype=np.intp)
    positions.flags.writeable = False  # shared by later requests
    if len(_POSITIONS) >= _POSITIONS_MAX:
        _POSITIONS.clear()  # many distinct lists (or plans): start over rather than track use
    _POSITIONS[key] = positions
    return positions


def _pack_compact(reports: list[ReportIn], positions: np.ndarray, n_channels: int):
    """The `powers_dbm` form for reports that follow one channel list: packed all at once.

    Yields (powers, noise) blobs in the order of `reports`. Null powers (None) become NaN (numpy converts
    None to NaN in a float array), i.e. not measured; the report's `noise_dbm` applies to its measured
    channels, as it does to each of a `measurements` report's.
    """
    given = np.array([rep.powers_dbm for rep in reports], dtype=float)  # (n_reports, len(positions))
    powers = np.full((len(reports), n_channels), np.nan, dtype="<f4")
    powers[:, positions] = given
    floors = np.array([rep.noise_dbm for rep in reports], dtype=float)
    noise = np.where(np.isnan(powers), np.nan, floors[:, None]).astype("<f4")
    for k, rep in enumerate(reports):
        yield powers[k].tobytes(), (noise[k].tobytes() if rep.noise_dbm is not None else None)


def _unknown(channel: str, plan: PlanIndex) -> str:
    known = ", ".join(list(plan.positions)[:20]) + (", ..." if len(plan.positions) > 20 else "")
    return f"unknown channel {channel!r}; plan revision {plan.revision} has: {known}"
