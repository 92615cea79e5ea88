"""Prometheus metrics: ``GET /metrics`` in the text exposition format.

Counters and histograms live in each process. Under several gunicorn workers ``occfuse serve`` sets
``PROMETHEUS_MULTIPROC_DIR`` before any worker imports prometheus_client, so every process writes its values
to files there and a scrape, whichever worker answers it, sums them (prometheus_client multiprocess mode; the
gunicorn ``child_exit`` hook marks dead workers). With one process the default registry is used.

What the database knows (channels by published state, nodes by flag) is read at scrape time by
:class:`DatabaseCollector`, so it is the same whichever worker answers and needs no cross-process state.
"""

from __future__ import annotations

import os
import time

from flask import Blueprint, Response, current_app, g, request
from prometheus_client import REGISTRY, CollectorRegistry, Counter, Histogram, multiprocess
from prometheus_client.exposition import choose_encoder
from prometheus_client.core import GaugeMetricFamily
from sqlalchemy import func, select

from .api.auth import role
from .models import Decision, Epoch, Node, NodeReliability

__all__ = ["REPORTS_ACCEPTED", "REPORTS_REJECTED", "EPOCH_DURATION", "DECISIONS", "REQUEST_LATENCY",
           "DatabaseCollector", "bp", "init_app", "rejection_reason"]

REPORTS_ACCEPTED = Counter("occfuse_reports_accepted", "Reports stored or acknowledged again, by outcome",
                           ["outcome"])
REPORTS_REJECTED = Counter("occfuse_reports_rejected", "Report requests refused, by reason", ["reason"])
EPOCH_DURATION = Histogram("occfuse_epoch_duration_seconds", "Time to compute one fusion epoch",
                           buckets=(0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30))
DECISIONS = Counter("occfuse_decisions", "Channel decisions published, by state", ["state"])
REQUEST_LATENCY = Histogram("occfuse_http_request_duration_seconds", "HTTP request latency",
                            ["method", "endpoint", "status"])

bp = Blueprint("metrics", __name__)

_REASONS = {400: "malformed", 401: "unauthenticated", 403: "forbidden", 409: "conflict", 413: "too_large",
            415: "media_type", 422: "invalid"}


def rejection_reason(status: int) -> str:
    """The ``reason`` label for a refused report request with HTTP `status`."""
    return _REASONS.get(status, "server_error" if status >= 500 else f"http_{status}")


class DatabaseCollector:
    """Gauges read from the database at scrape time: channels by state (newest epoch), nodes by flag."""

    def __init__(self, sessions):
        self.sessions = sessions

    def collect(self):
        channels = GaugeMetricFamily("occfuse_channels", "Channels by state in the newest epoch", labels=["state"])
        nodes = GaugeMetricFamily("occfuse_nodes", "Enabled nodes by reliability flag ('none': no flag)",
                                  labels=["flag"])
        total = GaugeMetricFamily("occfuse_nodes_registered", "Registered nodes", labels=["disabled"])
        age = GaugeMetricFamily("occfuse_last_epoch_age_seconds", "Seconds since the newest epoch started")
        with self.sessions() as session:
            newest = session.scalars(select(Epoch).order_by(Epoch.started_at.desc()).limit(1)).first()
            counts = dict.fromkeys(("free", "occupied", "unknown"), 0)
            if newest is not None:
                counts.update(session.execute(select(Decision.state, func.count()).where(
                    Decision.epoch_id == newest.id).group_by(Decision.state)).all())
                age.add_metric([], max(0.0, time.time() - newest.started_at.timestamp()))
            for state, n in counts.items():
                channels.add_metric([state], n)
            flags: dict[str, int] = {"none": 0}
            for (node_flags,) in session.execute(select(NodeReliability.flags).select_from(Node).outerjoin(
                    NodeReliability).where(Node.disabled.is_(False))):
                for flag in (node_flags or ["none"]):
                    flags[flag] = flags.get(flag, 0) + 1
            for flag, n in sorted(flags.items()):
                nodes.add_metric([flag], n)
            for disabled, n in session.execute(select(Node.disabled, func.count()).group_by(Node.disabled)):
                total.add_metric([str(bool(disabled)).lower()], n)
        yield from (channels, nodes, total, age)


def _registry():
    if os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        reg = CollectorRegistry()  # fresh per scrape; app metrics must never be registered into it
        multiprocess.MultiProcessCollector(reg)
        return reg
    return REGISTRY


@bp.get("/metrics")
@role("reader")
def metrics():
    encoder, content_type = choose_encoder(request.headers.get("Accept"))  # text 0.0.4 unless asked otherwise
    registry = _registry()
    collector = DatabaseCollector(current_app.extensions["occfuse.sessions"])
    if registry is REGISTRY:
        out = encoder(_Combined(registry, collector))  # the DB gauges never enter the global registry
    else:
        registry.register(collector)
        out = encoder(registry)
    return Response(out, content_type=content_type)


class _Combined:
    """Collectors read together, as one registry-like object for an encoder (one ``# EOF`` in OpenMetrics)."""

    def __init__(self, *collectors):
        self._collectors = collectors

    def collect(self):
        for collector in self._collectors:
            yield from collector.collect()


def init_app(app) -> None:
    """Time every request; count report requests that were refused."""

    @app.before_request
    def _start_timer():
        g.metrics_t0 = time.perf_counter()

    @app.after_request
    def _observe(response):
        t0 = g.pop("metrics_t0", None)
        if t0 is not None:
            endpoint = request.url_rule.rule if request.url_rule is not None else "(unmatched)"
            REQUEST_LATENCY.labels(request.method, endpoint, str(response.status_code)).observe(
                time.perf_counter() - t0)
        if request.endpoint == "reports.create" and response.status_code >= 400:
            REPORTS_REJECTED.labels(rejection_reason(response.status_code)).inc()
        return response

    app.register_blueprint(bp)
