"""Drive a live occfuse service with a simulated network, over real HTTP.

:func:`run_scenario` puts the scenario's band plan (``PUT /api/v1/plan``), registers each node
(``POST /api/v1/nodes``; a name that exists is reused by issuing it a new token, and its
seqs then start at the run's start time in Unix milliseconds), then runs
simulated time: each node sweeps at its interval (staggered by a random phase) and posts
the report with its next ``seq``.  Simulated ``t`` is stamped as the wall instant
``started_at + t / speedup``, so with ``--speedup 6`` a minute of scenario runs in ten
seconds and the service sees fresh reports throughout.

Delivery: every node has an outbox.  A 5xx answer or a connection error leaves the reports
in it and backs that node off exponentially (0.1 s doubling to 2 s) without holding up the
others; the next attempt re-sends the *same* reports with the *same* seq numbers (in one
batch if several are waiting), so a report that had landed comes back as a duplicate,
never as a second copy.  A 4xx answer drops the reports and counts them rejected.

The clock, the sleep and the HTTP transport can be injected, so tests run without sockets
or waiting (``httpx.MockTransport``).
"""

from __future__ import annotations

import logging
import threading
import time
from collections import deque
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Callable

import httpx
import numpy as np

from fusion.agent import make_report, send_once
from sim_nodes.network import SimNetwork
from sim_nodes.truth import TruthWriter

__all__ = ["RunProgress", "RunSummary", "SetupError", "register_nodes", "run_scenario"]

log = logging.getLogger(__name__)

MAX_BATCH = 500  # the API's limit on reports per batch


class SetupError(RuntimeError):
    """The service refused the plan or a node registration (bad admin token, bad plan)."""


@dataclass(frozen=True)
class RunProgress:
    t_sim: float
    duration_s: float
    delivered: int
    duplicates: int
    rejected: int
    retries: int
    pending: int
    occupied: dict  # channel id -> bool, the truth now


@dataclass(frozen=True)
class RunSummary:
    scenario: str
    nodes: int
    started_at: datetime
    sim_duration_s: float
    wall_duration_s: float
    speedup: float
    seed: int
    reports_made: int
    delivered: int
    duplicates: int
    rejected: int
    retries: int
    undelivered: int
    truth_path: str | None
    snr_db_range: tuple = field(default=(float("nan"), float("nan")))


def _admin(token):
    return {"Authorization": f"Bearer {token}"}


def register_nodes(client, scenario, admin_token, *, put_plan=True):
    """Put the plan and register (or reuse) every node.

    Returns ``{name: (token, reused)}``; ``reused`` is True for a node that existed already.
    """
    if put_plan:
        r = client.put("/api/v1/plan", json=scenario.plan_json(), headers=_admin(admin_token))
        if r.status_code != 200:
            raise SetupError(f"PUT /api/v1/plan answered {r.status_code}: {r.text[:300]}")
    tokens = {}
    for n in scenario.nodes:
        r = client.post("/api/v1/nodes", json={"name": n.name, "x_m": n.x_m, "y_m": n.y_m},
                        headers=_admin(admin_token))
        if r.status_code == 409:  # exists: reuse it under a fresh token
            r = client.post(f"/api/v1/nodes/{n.name}/token", headers=_admin(admin_token))
            if r.status_code != 200:
                raise SetupError(f"new token for {n.name!r} answered {r.status_code}: {r.text[:300]}")
            tokens[n.name] = (r.json()["token"], True)
        elif r.status_code != 201:
            raise SetupError(f"registering {n.name!r} answered {r.status_code}: {r.text[:300]}")
        else:
            tokens[n.name] = (r.json()["token"], False)
    return tokens


@dataclass
class _Node:
    index: int
    name: str
    token: str
    interval: float
    next_due: float  # simulated s
    seq: int = 0
    outbox: deque = field(default_factory=deque)
    next_try: float = 0.0  # monotonic s
    backoff: float = 0.1


def run_scenario(scenario, server, admin_token, *, duration_s, speedup=1.0, seed=0, truth_path=None,
                 progress: Callable[[RunProgress], None] | None = None, stop: threading.Event | None = None,
                 transport=None, clock=time.monotonic, sleep=time.sleep, now=None, drain_s=5.0,
                 put_plan=True) -> RunSummary:
    """Run ``scenario`` against the service at ``server`` for ``duration_s`` simulated seconds.

    Parameters
    ----------
    scenario : Scenario
    server : str
        Base URL, e.g. ``http://127.0.0.1:8000``.
    admin_token : str
    duration_s : float
        Simulated seconds to run.
    speedup : float, default 1
        Simulated seconds per wall second.
    seed : int, default 0
        Seeds every random draw (network, phases): equal seeds give equal reports.
    truth_path : path, optional
        Where to write the ground-truth JSONL log (:mod:`sim_nodes.truth`).
    progress : callable, optional
        Called with a :class:`RunProgress` about once per simulated second.
    stop : threading.Event, optional
        Set it to end the run early (the outboxes are still drained).
    transport, clock, sleep, now
        Test seams: an ``httpx`` transport, a monotonic clock, a sleep, a ``now()`` giving the
        aware wall datetime of ``t = 0``.
    drain_s : float, default 5
        Wall seconds allowed after the end to empty the outboxes.
    """
    # Input validation
    if not duration_s > 0:
        raise ValueError(f"`duration_s` must be positive, was {duration_s!r}")
    if not speedup > 0:
        raise ValueError(f"`speedup` must be positive, was {speedup!r}")

    net = SimNetwork(scenario, duration_s, seed=seed)
    snr = net.snr_db()
    snr = snr[np.isfinite(snr)]
    snr_range = (float(snr.min()), float(snr.max())) if snr.size else (float("nan"), float("nan"))
    phase_rng = np.random.default_rng(np.random.SeedSequence(seed).spawn(6)[5])
    client = httpx.Client(base_url=server, timeout=10.0, transport=transport)
    counts = dict(made=0, delivered=0, duplicates=0, rejected=0, retries=0)
    try:
        tokens = register_nodes(client, scenario, admin_token, put_plan=put_plan)
        started_at = (now or (lambda: datetime.now(timezone.utc)))()
        # A reused node has seqs from earlier runs that the API does not tell us; its seqs start at
        # the run's start in Unix milliseconds, above any earlier run's (unless that one sent more
        # than 1000 reports per wall second), so no report collides with an old one.
        reuse_base = int(started_at.timestamp() * 1000)
        nodes = [_Node(i, n.name, tokens[n.name][0], n.interval_s, float(phase_rng.uniform(0, n.interval_s)),
                       seq=reuse_base if tokens[n.name][1] else 0)
                 for i, n in enumerate(scenario.nodes)]
        mono0 = clock()
        writer = TruthWriter(truth_path, scenario.name, net.channel_ids, started_at, speedup) if truth_path else None
        changes = deque(net.change_times())
        if writer:
            writer.state(0.0, net.occupied(0.0))
        next_progress = 0.0

        def sim_now():
            return (clock() - mono0) * speedup

        def flush(node, mono):
            if not node.outbox or node.next_try > mono:
                return
            batch = list(node.outbox)[:MAX_BATCH]
            res = send_once(client, node.token, batch[0] if len(batch) == 1 else {"reports": batch})
            if res.outcome == "retry":
                counts["retries"] += 1
                node.next_try = clock() + node.backoff
                node.backoff = min(2.0, 2 * node.backoff)
                log.info("node %s: retry in %.1f s (%s %s)", node.name, node.backoff, res.status, res.detail)
                return
            for _ in batch:
                node.outbox.popleft()
            node.backoff = 0.1
            key = {"delivered": "delivered", "duplicate": "duplicates"}.get(res.outcome, "rejected")
            counts[key] += len(batch)
            if res.outcome == "rejected":
                log.warning("node %s: %d reports rejected, HTTP %s: %s", node.name, len(batch), res.status,
                            res.detail)

        while True:
            t = min(sim_now(), duration_s)
            while changes and changes[0] <= t:
                tc = changes.popleft()
                if writer:
                    writer.state(tc, net.occupied(tc))
            for node in nodes:
                while node.next_due <= t:
                    sweep = net.measure(node.index, node.next_due)
                    if sweep is not None:
                        at = started_at + timedelta(seconds=node.next_due / speedup)
                        node.outbox.append(make_report(node.seq, at, sweep.n_samples, net.channel_ids,
                                                       sweep.power_dbm, sweep.noise_dbm))
                        node.seq += 1
                        counts["made"] += 1
                    node.next_due += node.interval
            mono = clock()
            for node in nodes:
                flush(node, mono)
            if progress and t >= next_progress:
                progress(_progress(t, duration_s, counts, nodes, net))
                next_progress = np.floor(t) + 1.0
            if t >= duration_s or (stop is not None and stop.is_set()):
                break
            # Sleep to the next thing due: a sweep, a retry, or the end.
            due = min([mono0 + n.next_due / speedup for n in nodes] + [mono0 + duration_s / speedup]
                      + [n.next_try for n in nodes if n.outbox])
            sleep(max(0.0, min(due - clock(), 0.25)))

        end_t = min(sim_now(), duration_s)
        deadline = clock() + drain_s
        while any(n.outbox for n in nodes) and clock() < deadline:
            mono = clock()
            for node in nodes:
                flush(node, mono)
            waits = [n.next_try for n in nodes if n.outbox]
            if waits:
                sleep(max(0.0, min(min(waits) - clock(), 0.25)))
        if writer:
            writer.close(end_t)
        if progress:
            progress(_progress(end_t, duration_s, counts, nodes, net))
        wall = clock() - mono0
    finally:
        client.close()
    return RunSummary(
        scenario=scenario.name, nodes=len(scenario.nodes), started_at=started_at, sim_duration_s=end_t,
        wall_duration_s=wall, speedup=speedup, seed=seed, reports_made=counts["made"],
        delivered=counts["delivered"], duplicates=counts["duplicates"], rejected=counts["rejected"],
        retries=counts["retries"], undelivered=sum(len(n.outbox) for n in nodes),
        truth_path=str(Path(truth_path)) if truth_path else None, snr_db_range=snr_range,
    )


def _progress(t, duration, counts, nodes, net):
    occ = net.occupied(t)
    return RunProgress(t_sim=float(t), duration_s=duration, delivered=counts["delivered"],
                       duplicates=counts["duplicates"], rejected=counts["rejected"], retries=counts["retries"],
                       pending=sum(len(n.outbox) for n in nodes),
                       occupied={c: bool(o) for c, o in zip(net.channel_ids, occ)})
