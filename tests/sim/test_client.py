"""The HTTP driver against a fake service (httpx.MockTransport, a fake clock: no sockets, no waiting)."""

import json
from datetime import datetime, timezone

import httpx
import pytest

from sim_nodes.client import SetupError, run_scenario
from sim_nodes.scenario import parse_scenario
from sim_nodes.truth import load_truth, score_decisions

T0 = datetime(2026, 3, 1, 12, 0, tzinfo=timezone.utc)


def small_scenario(n_nodes=3, interval=1.0):
    return parse_scenario({
        "name": "fake-site",
        "propagation": {"model": "free_space", "shadowing_db": 0.0, "fading": "none"},
        "channel": [{"id": f"c{k}", "center_hz": 600e6 + k * 200e3, "bandwidth_hz": 200e3} for k in range(3)],
        "node": [{"name": f"n{i}", "x_m": 100.0 * i, "y_m": 0.0, "interval_s": interval, "n_samples": 100}
                 for i in range(n_nodes)],
        "transmitter": [{"name": "tx", "x_m": 0.0, "y_m": 0.0, "eirp_dbm": 0.0, "channels": ["c1"],
                         "activity": {"kind": "schedule", "on": [[3.0, 6.0]]}}],
    })


class FakeClock:
    def __init__(self):
        self.t = 100.0

    def __call__(self):
        return self.t

    def sleep(self, dt):
        self.t += max(dt, 1e-3)


class FakeService:
    """Just enough of the API contract; `faults` is consumed one per report POST."""

    def __init__(self, existing=(), faults=()):
        self.existing = set(existing)
        self.faults = list(faults)
        self.stored = {}  # (node, seq) -> report
        self.posts = []  # (node, [seq, ...]) per attempt
        self.calls = []

    def __call__(self, request):
        path, auth = request.url.path, request.headers.get("authorization", "")
        self.calls.append((request.method, path))
        if path == "/api/v1/plan":
            return httpx.Response(200, json={"revision": 1, **json.loads(request.content)})
        if path == "/api/v1/nodes":
            name = json.loads(request.content)["name"]
            if name in self.existing:
                return httpx.Response(409, json={"title": "exists"})
            return httpx.Response(201, json={"id": 1, "name": name, "token": f"tok-{name}"})
        if path.endswith("/token"):
            name = path.split("/")[-2]
            return httpx.Response(200, json={"name": name, "token": f"tok2-{name}"})
        if path == "/api/v1/reports":
            node = auth.removeprefix("Bearer tok2-").removeprefix("Bearer tok-")
            body = json.loads(request.content)
            reports = body["reports"] if "reports" in body else [body]
            self.posts.append((node, [r["seq"] for r in reports]))
            fault = self.faults.pop(0) if self.faults else None
            if fault == "connect":
                raise httpx.ConnectError("refused", request=request)
            if fault == 422:
                return httpx.Response(422, json={"title": "invalid"})
            dup = all((node, r["seq"]) in self.stored for r in reports)
            for r in reports:
                self.stored[(node, r["seq"])] = r
            if fault == 503:  # landed, but the answer is an error: the retry must come back duplicate
                return httpx.Response(503)
            return httpx.Response(200 if dup else 201, json={"status": "duplicate"} if dup else {})
        return httpx.Response(404)


def run(service, clock, scenario=None, **kw):
    return run_scenario(scenario or small_scenario(), "http://fake", "adm", duration_s=10.0, seed=1,
                        transport=httpx.MockTransport(service), clock=clock, sleep=clock.sleep, now=lambda: T0, **kw)


def test_every_node_reports_at_its_interval_with_consecutive_seq():
    svc, clock = FakeService(), FakeClock()
    s = run(svc, clock, speedup=5.0)
    assert s.reports_made == 30 and s.delivered == 30 and s.undelivered == 0
    for node in ("n0", "n1", "n2"):
        seqs = sorted(seq for (n, seq) in svc.stored if n == node)
        assert seqs == list(range(10))
    r = svc.stored[("n0", 0)]
    assert r["n_samples"] == 100 and [m["channel"] for m in r["measurements"]] == ["c0", "c1", "c2"]
    assert all("noise_dbm" in m for m in r["measurements"])
    at = datetime.fromisoformat(r["measured_at"])
    assert at.tzinfo is not None and 0 <= (at - T0).total_seconds() <= 1.0 / 5.0  # phase < interval / speedup


def test_existing_node_is_reused_with_a_new_token():
    svc, clock = FakeService(existing={"n1"}), FakeClock()
    run(svc, clock)
    assert ("POST", "/api/v1/nodes/n1/token") in svc.calls
    # A reused node's seqs continue above any earlier run's: they start at the start time in Unix ms.
    base = int(T0.timestamp() * 1000)
    assert sorted(seq for (n, seq) in svc.stored if n == "n1") == list(range(base, base + 10))
    assert sorted(seq for (n, seq) in svc.stored if n == "n0") == list(range(10))


def test_retry_after_5xx_and_connection_error_resends_the_same_seq():
    svc, clock = FakeService(faults=[503, "connect", None]), FakeClock()
    s = run(svc, clock, scenario=small_scenario(n_nodes=1))
    # The first POST landed despite its 503, the second did not reach the server; the third
    # attempt carries the same seq 0 (plus what queued meanwhile) and is answered 201.
    assert svc.posts[0] == ("n0", [0]) and svc.posts[1][1][0] == 0 and svc.posts[2][1][0] == 0
    assert s.retries == 2 and s.undelivered == 0
    assert sorted(seq for (_, seq) in svc.stored) == list(range(10))


def test_backoff_grows_between_retries():
    svc, clock = FakeService(faults=[503, 503, 503]), FakeClock()
    times = []
    real = svc.__call__

    def timed(request):
        if request.url.path == "/api/v1/reports":
            times.append(clock.t)
        return real(request)

    run_scenario(small_scenario(n_nodes=1), "http://fake", "adm", duration_s=10.0, transport=httpx.MockTransport(timed),
                 clock=clock, sleep=clock.sleep, now=lambda: T0)
    gaps = [b - a for a, b in zip(times, times[1:4])]
    assert [round(g, 6) >= d for g, d in zip(gaps, (0.1, 0.2, 0.4))] == [True] * 3  # 0.1 s doubling; 1e-6 round-off


def test_rejected_reports_are_counted_not_retried():
    svc, clock = FakeService(faults=[422]), FakeClock()
    s = run(svc, clock, scenario=small_scenario(n_nodes=1))
    assert s.rejected == 1 and s.retries == 0 and s.delivered == 9


def test_setup_failure_raises():
    with pytest.raises(SetupError, match="PUT /api/v1/plan answered 401"):
        run(lambda req: httpx.Response(401), FakeClock())


def test_truth_log_records_the_schedule(tmp_path):
    svc, clock = FakeService(), FakeClock()
    path = tmp_path / "truth.jsonl"
    run(svc, clock, speedup=2.0, truth_path=path)
    truth = load_truth(path)
    assert truth.speedup == 2.0 and truth.channels == ["c0", "c1", "c2"]
    assert [truth.occupied("c1", t) for t in (1.0, 3.5, 7.0)] == [False, True, False]
    # Wall time maps to simulated time by the speedup: 2 wall seconds after start is t_sim = 4.
    from datetime import timedelta

    assert truth.occupied("c1", T0 + timedelta(seconds=2.0)) is True
    # Scoring: decisions equal to the truth score 1; with a grace window a late switch counts.
    decisions = [("c1", T0 + timedelta(seconds=s), st) for s, st in [(1.0, "free"), (2.0, "occupied"),
                                                                    (3.1, "occupied"), (4.0, "unknown")]]
    strict = score_decisions(decisions, truth)
    graced = score_decisions(decisions, truth, grace_s=0.5)
    assert (strict.n, strict.strict_matched, strict.unknown) == (4, 2, 1)
    assert graced.matched == 3
