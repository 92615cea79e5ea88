"""Ground-truth log of a simulated run (JSON lines), and scoring the service against it.

The log is written as the run goes, one JSON object per line:

- ``{"kind": "header", "scenario", "started_at", "speedup", "channels": [...]}``: the wall
  time of simulated ``t = 0`` and the speedup, so simulated time ``t`` is the wall instant
  ``started_at + t / speedup`` (the instant the reports measured at ``t`` are stamped with);
- ``{"kind": "state", "t_sim", "time", "channel", "occupied"}``: a channel's true state from
  that instant on (every channel at ``t = 0``, then each change);
- ``{"kind": "end", "t_sim", "time"}``.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import datetime, timedelta

import numpy as np

__all__ = ["TruthWriter", "GroundTruth", "Score", "load_truth", "score_decisions", "parse_time", "format_time_query"]


def parse_time(s):
    """An RFC 3339 string (``Z`` or an offset) as an aware datetime."""
    return datetime.fromisoformat(s.replace("Z", "+00:00"))


def format_time_query(t):
    """RFC 3339 in UTC with a ``Z``, safe in a query string (no ``+``)."""
    from datetime import timezone

    return t.astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


class TruthWriter:
    """Appends a run's true channel states to a JSONL file as simulated time passes."""

    def __init__(self, path, scenario_name, channel_ids, started_at, speedup):
        self.channel_ids = list(channel_ids)
        self.started_at, self.speedup = started_at, float(speedup)
        self._fh = open(path, "w", encoding="utf-8")
        self._last = None
        self._write({"kind": "header", "scenario": scenario_name, "started_at": started_at.isoformat(),
                     "speedup": self.speedup, "channels": self.channel_ids})

    def _write(self, obj):
        self._fh.write(json.dumps(obj) + "\n")
        self._fh.flush()

    def _wall(self, t_sim):
        return (self.started_at + timedelta(seconds=t_sim / self.speedup)).isoformat()

    def state(self, t_sim, occupied):
        """Record the states at ``t_sim``; only channels that changed are written."""
        occupied = np.asarray(occupied, bool)
        for k, cid in enumerate(self.channel_ids):
            if self._last is None or occupied[k] != self._last[k]:
                self._write({"kind": "state", "t_sim": round(float(t_sim), 6), "time": self._wall(t_sim),
                             "channel": cid, "occupied": bool(occupied[k])})
        self._last = occupied.copy()

    def close(self, t_sim):
        if not self._fh.closed:
            self._write({"kind": "end", "t_sim": round(float(t_sim), 6), "time": self._wall(t_sim)})
            self._fh.close()


@dataclass
class GroundTruth:
    """A loaded truth log; ask :meth:`occupied`."""

    scenario: str
    started_at: datetime
    speedup: float
    channels: list
    changes: dict  # channel -> (t_sim array, state array)
    end_t_sim: float | None

    def to_sim(self, t):
        """Simulated seconds for a wall datetime (or a float already in simulated seconds)."""
        if isinstance(t, datetime):
            return (t - self.started_at).total_seconds() * self.speedup
        return float(t)

    def occupied(self, channel_id, t):
        """Whether ``channel_id`` was really occupied at ``t`` (datetime or simulated seconds)."""
        times, states = self.changes[channel_id]
        i = int(np.searchsorted(times, self.to_sim(t), side="right")) - 1
        return bool(states[max(i, 0)])

    def occupied_during(self, channel_id, t0, t1):
        """The set of true states the channel took within ``[t0, t1]``."""
        times, states = self.changes[channel_id]
        a, b = self.to_sim(t0), self.to_sim(t1)
        i0 = max(int(np.searchsorted(times, a, side="right")) - 1, 0)
        i1 = max(int(np.searchsorted(times, b, side="right")) - 1, 0)
        return {bool(s) for s in states[i0:i1 + 1]}


def load_truth(path):
    """Read a ground-truth JSONL log written by :class:`TruthWriter`."""
    header, changes, end = None, {}, None
    with open(path, encoding="utf-8") as fh:
        for line in fh:
            if not line.strip():
                continue
            obj = json.loads(line)
            if obj["kind"] == "header":
                header = obj
            elif obj["kind"] == "state":
                changes.setdefault(obj["channel"], ([], []))
                changes[obj["channel"]][0].append(obj["t_sim"])
                changes[obj["channel"]][1].append(obj["occupied"])
            elif obj["kind"] == "end":
                end = obj["t_sim"]
    if header is None:
        raise ValueError(f"{path}: no header line; not a ground-truth log")
    changes = {c: (np.array(t, float), np.array(s, bool)) for c, (t, s) in changes.items()}
    return GroundTruth(header["scenario"], parse_time(header["started_at"]), float(header["speedup"]),
                       header["channels"], changes, end)


@dataclass(frozen=True)
class Score:
    """Agreement of decisions with the truth, over channel-epochs."""

    n: int
    matched: int
    unknown: int
    strict_matched: int

    @property
    def accuracy(self):
        return self.matched / self.n if self.n else float("nan")

    @property
    def strict_accuracy(self):
        return self.strict_matched / self.n if self.n else float("nan")


def score_decisions(decisions, truth, *, grace_s=0.0):
    """Score ``(channel_id, decided_at, state)`` triples against ``truth``.

    A decision matches strictly when its state equals the truth at ``decided_at``; with a
    ``grace_s`` (wall seconds) it also matches when it equals the truth at some instant in
    ``[decided_at - grace_s, decided_at]``: the service can only know what its freshest
    reports say, and they are up to a report interval plus an epoch interval old.
    ``unknown`` never matches.
    """
    n = matched = unknown = strict = 0
    for cid, at, state in decisions:
        if cid not in truth.changes:
            continue
        n += 1
        if state == "unknown":
            unknown += 1
            continue
        says = state == "occupied"
        if says == truth.occupied(cid, at):
            strict += 1
            matched += 1
        elif says in truth.occupied_during(cid, at - timedelta(seconds=grace_s), at):
            matched += 1
    return Score(n, matched, unknown, strict)
