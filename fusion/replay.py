"""Re-run the stored reports of a time range through other fusion rules, without touching the service's data.

For every stored epoch in ``[since, until]`` the replay gathers the reports exactly as that epoch did
(:func:`fusion.engine.gather` with the epoch's own settings), fuses them with each candidate rule through
:func:`fusion.engine.fuse_epoch`, and learns node reliability and channel tracking with
:func:`fusion.engine.learn_epoch`, one fresh learner and tracker per rule from the start of the range (so each
rule is judged on what it would itself have learned).  It compares every decision with the one the service
stored for that epoch and, when a sim_nodes ground-truth log is given, scores every rule and the service
against it.  Nothing is written: the caller's session is only read from.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any, Mapping

import json

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session, selectinload

from .detection import rules as rules_mod
from .detection.reliability import ReliabilityModel
from .detection.tracking import MarkovTracker
from .engine import fuse_epoch, gather, learn_epoch
from .models import Decision, Epoch, NodeReliability, PlanRevision

__all__ = ["STATES", "TruthLog", "read_truth_log", "RuleTally", "ReplayResult", "parse_rule_list", "replay",
           "summary_lines"]

STATES = ("free", "occupied", "unknown")


@dataclass
class TruthLog:
    """A ground-truth log as replay needs it: per channel, the wall times its true state changed.

    The log is the JSON-lines file ``python -m sim_nodes run --truth`` writes (format in ``sim_nodes/truth.py``;
    fusion does not import the simulator, so this reads the ``state`` lines' wall ``time`` itself).
    """

    changes: dict  # channel -> (POSIX seconds array, bool array)

    def occupied(self, channel_id: str, at: datetime) -> bool:
        times, states = self.changes[channel_id]
        i = int(np.searchsorted(times, at.timestamp(), side="right")) - 1
        return bool(states[max(i, 0)])

    def occupied_during(self, channel_id: str, t0: datetime, t1: datetime) -> set:
        times, states = self.changes[channel_id]
        i0 = max(int(np.searchsorted(times, t0.timestamp(), side="right")) - 1, 0)
        i1 = max(int(np.searchsorted(times, t1.timestamp(), side="right")) - 1, 0)
        return {bool(v) for v in states[i0:i1 + 1]}


def read_truth_log(path) -> TruthLog:
    """Read a sim_nodes ground-truth JSONL log; ValueError when it is not one."""
    changes: dict = {}
    header = False
    with open(path, encoding="utf-8") as fh:
        for n, line in enumerate(fh, start=1):
            if not line.strip():
                continue
            try:
                obj = json.loads(line)
                kind = obj["kind"]
                if kind == "header":
                    header = True
                elif kind == "state":
                    at = datetime.fromisoformat(obj["time"].replace("Z", "+00:00")).timestamp()
                    changes.setdefault(obj["channel"], ([], []))
                    changes[obj["channel"]][0].append(at)
                    changes[obj["channel"]][1].append(bool(obj["occupied"]))
            except (ValueError, KeyError, TypeError, AttributeError) as exc:
                raise ValueError(f"{path} line {n}: not a ground-truth record ({exc})") from None
    if not header:
        raise ValueError(f"{path}: no header line; not a sim_nodes ground-truth log")
    return TruthLog({c: (np.array(t, float), np.array(v, bool)) for c, (t, v) in changes.items()})


def parse_rule_list(text: str, default_k: int = 2) -> list[tuple[str, int | None]]:
    """``"egc,k_of_n:3"`` as ``[("egc", None), ("k_of_n", 3)]``; ValueError names the bad item."""
    out = []
    for item in [s.strip() for s in str(text).split(",") if s.strip()]:
        name, _, k = item.partition(":")
        if name not in rules_mod.RULES:
            raise ValueError(f"unknown rule {name!r}; choose from {sorted(rules_mod.RULES)}")
        if name == "k_of_n":
            try:
                kk = int(k) if k else int(default_k)
            except ValueError:
                raise ValueError(f"k in {item!r} must be an integer") from None
            if kk < 1:
                raise ValueError(f"k in {item!r} must be at least 1")
            out.append((name, kk))
        elif k:
            raise ValueError(f"only k_of_n takes a k, not {item!r}")
        else:
            out.append((name, None))
    if not out:
        raise ValueError("no rule given")
    return out


@dataclass
class RuleTally:
    """One rule's decisions over the replayed channel-epochs.

    ``versus_service[a][b]``: channel-epochs the service published as ``a`` and this rule as ``b``.  With a
    ground truth: ``per_channel[c]``: how often the rule published each state on channel ``c`` and how
    often that differed from the service; ``scored`` channel-epochs, ``correct`` (state equals the truth at
    the decision, or within the grace window before it), ``missed`` (said free while the channel was
    occupied throughout the grace window), ``false_alarms`` (said occupied while it was free throughout),
    ``unknown``.
    """

    label: str
    rule: str
    k: int | None
    decisions: int = 0
    agree: int = 0
    versus_service: dict = field(default_factory=lambda: {a: {b: 0 for b in STATES} for a in STATES})
    per_channel: dict = field(default_factory=dict)  # channel -> {"free": n, "occupied": n, "unknown": n, "differ": n}
    scored: int = 0
    correct: int = 0
    missed: int = 0
    false_alarms: int = 0
    unknown: int = 0

    def as_dict(self, with_truth: bool) -> dict:
        d = {"rule": self.rule, "k": self.k, "label": self.label, "decisions": self.decisions,
             "agree_with_service": self.agree, "differ_from_service": self.decisions - self.agree,
             "versus_service": self.versus_service, "per_channel": self.per_channel}
        if with_truth:
            d["truth"] = {"scored": self.scored, "accuracy": self.correct / self.scored if self.scored else None,
                          "missed_detections": self.missed, "false_alarms": self.false_alarms,
                          "unknown": self.unknown}
        return d


@dataclass
class ReplayResult:
    since: datetime | None
    until: datetime | None
    epochs: int
    rules: list[RuleTally]
    service: RuleTally  # the stored decisions, scored the same way
    with_truth: bool

    def as_dict(self) -> dict:
        return {"since": self.since.isoformat() if self.since else None,
                "until": self.until.isoformat() if self.until else None,
                "epochs": self.epochs, "service": self.service.as_dict(self.with_truth),
                "rules": [r.as_dict(self.with_truth) for r in self.rules]}


def _score(tally: RuleTally, truth, cid: str, at: datetime, state: str, grace_s: float) -> None:
    """Score one decision against the truth (the rule of sim_nodes.truth.score_decisions, plus error kinds)."""
    if truth is None or cid not in truth.changes:
        return
    tally.scored += 1
    if state == "unknown":
        tally.unknown += 1
        return
    says = state == "occupied"
    during = truth.occupied_during(cid, at - timedelta(seconds=grace_s), at)
    if says == truth.occupied(cid, at) or says in during:
        tally.correct += 1
    elif not says and during == {True}:
        tally.missed += 1
    elif says and during == {False}:
        tally.false_alarms += 1


def replay(session: Session, config: Mapping[str, Any], rule_specs, *, since: datetime | None = None,
           until: datetime | None = None, truth=None, grace_s: float = 0.0) -> ReplayResult:
    """Replay the stored epochs in ``[since, until]`` through each ``(rule, k)`` of `rule_specs`.

    Parameters
    ----------
    session : Session
        Read from only; the caller should roll it back (nothing is added, so there is nothing to commit).
    config : mapping
        The service configuration (``MAX_SKEW_S``).
    rule_specs : list of (str, int or None)
        Rules to replay, e.g. from :func:`parse_rule_list`.
    truth : TruthLog, optional
        Ground truth to score against.
    grace_s : float
        As in :func:`sim_nodes.truth.score_decisions`.
    """
    stmt = select(Epoch).order_by(Epoch.started_at, Epoch.id)
    if since is not None:
        stmt = stmt.where(Epoch.started_at >= since)
    if until is not None:
        stmt = stmt.where(Epoch.started_at <= until)
    epochs = [e for e in session.scalars(stmt) if e.plan_revision is not None]
    tallies = [RuleTally(f"{k}_of_n" if r == "k_of_n" else r, r, k) for r, k in rule_specs]
    service = RuleTally(epochs[-1].rule if epochs else "service", "service", None)
    plans: dict[int, list[str]] = {}
    learners: dict[int, tuple] = {}  # rule index -> (revision, model, tracker)
    pins_by_node = {r.node_id: r.pinned for r in session.scalars(select(NodeReliability))}
    for ep in epochs:
        if ep.plan_revision not in plans:
            plan = session.scalar(select(PlanRevision).options(selectinload(PlanRevision.channels))
                                  .where(PlanRevision.revision == ep.plan_revision))
            plans[ep.plan_revision] = [c.channel_id for c in plan.channels] if plan else []
        ids = plans[ep.plan_revision]
        if not ids:
            continue
        p = ep.params
        x = gather(session, ep.plan_revision, len(ids), ep.started_at, max_age_s=p["max_age_s"],
                   window_s=p["window_s"], max_skew_s=config["MAX_SKEW_S"])
        stored = {d.channel_id: d.state for d in session.scalars(select(Decision).where(Decision.epoch_id == ep.id))}
        pins = [pins_by_node.get(n.id) for n in x.nodes]
        for cid in ids:
            if cid in stored:
                _score(service, truth, cid, ep.started_at, stored[cid], grace_s)
                service.decisions += 1
                service.agree += 1
                pc = service.per_channel.setdefault(cid, {"free": 0, "occupied": 0, "unknown": 0, "differ": 0})
                pc[stored[cid]] += 1
                service.versus_service[stored[cid]][stored[cid]] += 1
        for i, (tally, (rule, k)) in enumerate(zip(tallies, rule_specs)):
            rev, model, tracker = learners.get(i, (None, None, None))
            if rev != ep.plan_revision:  # a new plan revision starts the learners afresh, as the service does
                model = ReliabilityModel().resize(len(x.nodes), n_channels=len(ids)) if x.nodes else None
                tracker = MarkovTracker(len(ids))
            elif model is not None and len(x.nodes) > model.trust_.shape[0]:
                model.resize(len(x.nodes))
            fused = fuse_epoch(x, model, pins, tracker, rule=rule, k=k, target_pf=p["target_pf"],
                               snr_db=p["snr_db"], prior=p["prior"], confidence=p["confidence"],
                               min_nodes=p["min_nodes"])
            if x.nodes:
                learn_epoch(model, x, fused, now_s=ep.started_at.timestamp(), max_age_s=p["max_age_s"])
            learners[i] = (ep.plan_revision, model, tracker)
            for j, cid in enumerate(ids):
                state = str(fused.states[j])
                tally.decisions += 1
                pc = tally.per_channel.setdefault(cid, {"free": 0, "occupied": 0, "unknown": 0, "differ": 0})
                pc[state] += 1
                if cid in stored:
                    tally.versus_service[stored[cid]][state] += 1
                    tally.agree += stored[cid] == state
                    pc["differ"] += stored[cid] != state
                _score(tally, truth, cid, ep.started_at, state, grace_s)
    return ReplayResult(since, until, len(epochs), tallies, service, truth is not None)


def summary_lines(result: ReplayResult) -> list[str]:
    """A text table of a replay."""
    lines = [f"replayed {result.epochs} epochs"
             + (f" from {result.since.isoformat()}" if result.since else "")
             + (f" to {result.until.isoformat()}" if result.until else "")]
    head = f"{'rule':<16} {'decisions':>9} {'differ':>7} {'svc free->occ':>13} {'svc occ->free':>13}"
    if result.with_truth:
        head += f" {'accuracy':>8} {'missed':>7} {'false alarms':>12} {'unknown':>7}"
    lines.append(head)
    rows = [(result.service, True)] + [(t, False) for t in result.rules]
    for t, is_service in rows:
        label = f"service ({t.label})" if is_service else t.label
        vs = t.versus_service
        differ = ("-", "-", "-") if is_service else (t.decisions - t.agree, vs["free"]["occupied"],
                                                      vs["occupied"]["free"])
        line = f"{label:<16} {t.decisions:>9} {differ[0]:>7} {differ[1]:>13} {differ[2]:>13}"
        if result.with_truth:
            acc = f"{t.correct / t.scored:.4f}" if t.scored else "-"
            line += f" {acc:>8} {t.missed:>7} {t.false_alarms:>12} {t.unknown:>7}"
        lines.append(line)
    return lines

