"""Hostile input to the report parser: property-based (hypothesis) and hand-made worst cases.

The property (README "HTTP API"): any JSON value posted as a report is either accepted, and then what is stored
says exactly what was sent (it round-trips), or refused with a 4xx problem document (RFC 9457) and nothing of
the request is stored. Oversized bodies, deep nesting, huge batches, very long strings and unicode get a 4xx
with bounded memory. SQLite only: parsing and validation happen before any backend-specific SQL.
"""

from __future__ import annotations

import io
import itertools
import json
import string
import tracemalloc
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sqlalchemy import func, select

from fusion import create_app
from fusion.api.schemas import ReportIn
from fusion.db import upgrade
from fusion.ingest import fingerprint
from fusion.models import Node, Report, unpack
from tests.conftest import ADMIN

CHANNELS = ["c0", "c1", "c2", "Ω-3"]  # "Ω-3" is not a valid id: the plan below uses ASCII ids only
PLAN = {"channels": [{"id": c, "center_hz": 470e6 + 8e6 * j, "bandwidth_hz": 6e6}
                     for j, c in enumerate(CHANNELS[:3])]}
TOKENS: dict[str, str] = {}
GUARD_SEQ = itertools.count(10**12)
LIMIT = 1_048_576  # MAX_CONTENT_LENGTH default, bytes


@pytest.fixture(scope="module")
def svc(tmp_path_factory):
    url = f"sqlite:///{tmp_path_factory.mktemp('hostile') / 'h.db'}"
    upgrade(url)
    app = create_app({"DATABASE_URL": url, "ADMIN_TOKEN": ADMIN, "TESTING": True})
    client = app.test_client()
    admin = {"Authorization": f"Bearer {ADMIN}"}
    assert client.put("/api/v1/plan", json=PLAN, headers=admin).status_code == 200
    token = client.post("/api/v1/nodes", json={"name": "n1"}, headers=admin).json["token"]
    yield app, client, {"Authorization": f"Bearer {token}"}
    app.extensions["occfuse.engine"].dispose()


def _count(app) -> int:
    with app.extensions["occfuse.sessions"]() as s:
        return s.scalar(select(func.count()).select_from(Report))


def _post_raw(client, headers, raw: bytes):
    return client.post("/api/v1/reports", data=raw, headers={**headers, "Content-Type": "application/json"})


def _assert_accepted_round_trips_or_refused(app, response, sent, node="n1"):
    """The property. `sent` is the decoded JSON value that was posted by `node`."""
    if 200 <= response.status_code < 300:
        reports = sent["reports"] if isinstance(sent, dict) and "reports" in sent else [sent]
        with app.extensions["occfuse.sessions"]() as s:
            node_id = s.scalar(select(Node.id).where(Node.name == node))
            for raw in reports:
                parsed = ReportIn.model_validate_json(json.dumps(raw))
                row = s.scalars(select(Report).where(Report.seq == parsed.seq, Report.node_id == node_id)).one()
                assert row.content_hash == fingerprint(row.seq, row.measured_at, row.n_samples, row.powers,
                                                       row.noise)
                assert row.n_samples == parsed.n_samples
                assert row.measured_at == parsed.measured_at.astimezone(timezone.utc)
                stored = unpack(row.powers)
                if parsed.measurements is not None:
                    given = {m.channel: m.power_dbm for m in parsed.measurements}
                else:  # the compact form: its own channel list or the batch's
                    given = dict(zip(parsed.channels or sent["channels"], parsed.powers_dbm))
                for channel in CHANNELS[:3]:
                    # float32 storage (DESIGN.md "reports"): equal to the value rounded to float32; NaN where
                    # the report did not measure the channel
                    value = given.get(channel)
                    expected = np.float32(np.nan if value is None else value)
                    np.testing.assert_array_equal(stored[CHANNELS.index(channel)], expected)
        return
    assert 400 <= response.status_code < 500, (response.status_code, response.get_data(as_text=True)[:300])
    assert response.mimetype == "application/problem+json"
    problem = response.json
    assert problem["status"] == response.status_code and problem["title"] and problem["detail"]


# --- property-based -------------------------------------------------------------------------------------

json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=20),
    lambda children: st.lists(children, max_size=5) | st.dictionaries(st.text(max_size=10), children, max_size=5),
    max_leaves=30)

# Valid reports, then the same with one field made wrong in type or range, so both outcomes are common.
_times = st.datetimes(min_value=datetime(2020, 1, 1), max_value=datetime(2026, 1, 1),
                      timezones=st.sampled_from([timezone.utc, timezone(timedelta(hours=5, minutes=30)),
                                                 timezone(timedelta(hours=-8))]))
_measurement = st.fixed_dictionaries(
    {"channel": st.sampled_from(CHANNELS[:3]), "power_dbm": st.floats(-300, 100) | st.integers(-200, 50)},
    optional={"noise_dbm": st.floats(-130, -50) | st.none()})
_valid_report = st.fixed_dictionaries(
    {"seq": st.integers(0, 2**63 - 1), "measured_at": _times.map(datetime.isoformat),
     "n_samples": st.integers(1, 10**12),
     "measurements": st.lists(_measurement, min_size=1, max_size=3, unique_by=lambda m: m["channel"])},
    optional={"noise_dbm": st.floats(-130, -50) | st.none(), "node": st.just("n1")})
_compact_report = st.lists(st.sampled_from(CHANNELS[:3]), min_size=1, max_size=3, unique=True).flatmap(
    lambda ids: st.fixed_dictionaries(
        {"seq": st.integers(0, 2**63 - 1), "measured_at": _times.map(datetime.isoformat),
         "n_samples": st.integers(1, 10**12), "channels": st.just(ids),
         "powers_dbm": st.lists(st.floats(-300, 100) | st.integers(-200, 50) | st.none(), min_size=len(ids),
                                max_size=len(ids)).filter(lambda p: any(v is not None for v in p))},
        optional={"noise_dbm": st.floats(-130, -50) | st.none()}))
_bad_values = {
    "seq": st.integers(-5, -1) | st.integers(2**63, 2**64) | st.text(max_size=3) | st.floats(0, 10),
    "measured_at": st.text(max_size=8) | st.integers() | _times.map(lambda t: t.replace(tzinfo=None).isoformat()),
    "n_samples": st.integers(-3, 0) | st.floats(1, 9) | st.booleans(),
    "noise_dbm": st.floats(-1e6, -301) | st.text(max_size=2) | st.booleans(),
    "node": st.just("someone-else") | st.integers(),
    "measurements": st.just([]) | json_values
    | st.lists(st.fixed_dictionaries({"channel": st.text(max_size=3) | st.sampled_from(["Ω-3", "c9"]),
                                      "power_dbm": st.floats(-320, 120) | json_values})),
    "extra": json_values,
}
_broken_report = st.tuples(_valid_report, st.sampled_from(sorted(_bad_values))).flatmap(
    lambda pair: _bad_values[pair[1]].map(lambda bad: {**pair[0], pair[1]: bad}))
_report = _valid_report | _broken_report
_bad_compact = {
    "channels": st.just([]) | st.lists(st.sampled_from(["c0", "c0", "c9", "Ω-3"]), min_size=1, max_size=3)
    | json_values,
    "powers_dbm": st.just([]) | st.lists(st.floats(-400, 200) | st.none() | st.text(max_size=2), max_size=4)
    | json_values,
    "measurements": st.just([{"channel": "c0", "power_dbm": -90.0}]),
}
_compact = (_compact_report | st.tuples(_compact_report, st.sampled_from(sorted(_bad_compact))).flatmap(
    lambda pair: _bad_compact[pair[1]].map(lambda bad: {**pair[0], pair[1]: bad}))
    | _compact_report.map(lambda r: {k: v for k, v in r.items() if k != "channels"}))  # no channel list
# A batch sharing one channel list: reports without their own follow the batch's `channels`.
_shared_batch = st.lists(_compact_report, min_size=1, max_size=3).map(
    lambda reps: {"channels": CHANNELS[:3], "reports": [
        {**{k: v for k, v in r.items() if k not in ("channels", "powers_dbm")},
         "powers_dbm": [dict(zip(r["channels"], r["powers_dbm"])).get(c) for c in CHANNELS[:3]]} for r in reps]})


@settings(max_examples=300, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(value=_report | _compact | st.fixed_dictionaries({"reports": st.lists(_valid_report, min_size=0, max_size=3)})
       | st.fixed_dictionaries({"reports": st.lists(_report | _compact, min_size=1, max_size=3)})
       | _shared_batch)
def test_near_valid_reports_and_batches_round_trip_or_are_refused(svc, value):
    app, client, node = svc
    before = _count(app)
    r = _post_raw(client, node, json.dumps(value).encode())
    _assert_accepted_round_trips_or_refused(app, r, value)
    if r.status_code >= 400:
        assert _count(app) == before  # all-or-nothing, also for a batch with one bad report


@settings(max_examples=30, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(value=_valid_report | _compact_report)
def test_the_valid_strategy_is_accepted(svc, value):
    """Guard against a vacuous property: every valid report is accepted (by a node of its own, so no seq
    stored by the tests above collides, and a fresh seq each) and round-trips."""
    app, client, _ = svc
    token = TOKENS.get("guard") or TOKENS.setdefault("guard", client.post(
        "/api/v1/nodes", json={"name": "guard"}, headers={"Authorization": f"Bearer {ADMIN}"}).json["token"])
    value = {**{k: v for k, v in value.items() if k != "node"}, "seq": next(GUARD_SEQ)}  # fresh seq each time
    r = _post_raw(client, {"Authorization": f"Bearer {token}"}, json.dumps(value).encode())
    assert r.status_code in (200, 201), r.get_data(as_text=True)[:300]
    _assert_accepted_round_trips_or_refused(app, r, value, node="guard")


# --- worst cases by hand --------------------------------------------------------------------------------

def _report_body(seq=1, channel="c0", **extra):
    return {"seq": seq, "measured_at": "2025-06-01T00:00:00Z", "n_samples": 10,
            "measurements": [{"channel": channel, "power_dbm": -90.0}], **extra}


@pytest.mark.parametrize("name,raw,status", [
    ("deeply nested array", b"[" * 200_000 + b"]" * 200_000, 422),
    ("deeply nested batch", b'{"reports":' + b"[" * 100_000 + b"]" * 100_000 + b"}", 422),
    ("deeply nested extra field", json.dumps(_report_body()).encode()[:-1] + b',"x":' + b'{"a":' * 50_000
     + b"1" + b"}" * 50_001, 422),
    ("an integer of 10,000 digits", b'{"seq":' + b"9" * 10_000 + b"}", 422),
    ("very long channel name", json.dumps(_report_body(channel="c" * 500_000)).encode(), 422),
    ("very long string field", json.dumps(_report_body(node="n" * 500_000)).encode(), 403),
    ("unicode channel name", json.dumps(_report_body(channel="Ω-3")).encode(), 422),
    ("emoji everywhere", json.dumps(_report_body(channel="📡" * 30)).encode(), 422),
    ("lone surrogate", json.dumps(_report_body(channel="\ud800")).encode(), 422),
    ("not UTF-8", b'{"seq": "\xff\xfe"}', 400),
    ("NaN literal", b'{"seq": 1, "x": NaN}', 422),
    ("huge batch of empty objects", json.dumps({"reports": [{}] * 60_000}).encode(), 422),
    ("batch one over the limit", json.dumps({"reports": [_report_body(seq=i) for i in range(501)]}).encode(), 422),
    ("10,000 measurements", json.dumps({**_report_body(), "measurements": [
        {"channel": f"c{j}", "power_dbm": -90.0} for j in range(10_000)]}).encode(), 422),
])
def test_hostile_bodies_get_a_4xx_problem_and_bounded_memory(svc, name, raw, status):
    app, client, node = svc
    assert len(raw) <= LIMIT, "this case is about content, not size"
    before = _count(app)
    tracemalloc.start()
    try:
        r = _post_raw(client, node, raw)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert r.status_code == status, (name, r.status_code, r.get_data(as_text=True)[:300])
    assert r.mimetype == "application/problem+json" and r.json["status"] == status
    assert len(r.data) < 20_000  # the error list is capped (100 items), never echoes the input
    # Bound: the body (<= 1 MiB) is held a few times (request, decoded text, parsed values); 64 MiB is far
    # below what an unbounded error list or a parse of a 60,000-report batch would take (hundreds of MB).
    assert peak < 64 * 2**20, (name, peak)
    assert _count(app) == before


class _Endless(io.RawIOBase):
    """A request body that never ends: b'[' forever. Counts how much the server read."""

    def __init__(self):
        self.read_bytes = 0

    def readable(self):
        return True

    def readinto(self, buffer):
        n = len(buffer)
        buffer[:n] = b"[" * n
        self.read_bytes += n
        return n


@pytest.mark.parametrize("declared", [10 * 2**30, None], ids=["content-length 10 GiB", "chunked, no length"])
def test_an_endless_body_gets_413_after_reading_at_most_the_limit(svc, declared):
    """Werkzeug enforces MAX_CONTENT_LENGTH on the stream (pallets/werkzeug#2620): a declared length over the
    limit is refused unread, an undeclared (chunked) body is cut at the limit."""
    app, _, node = svc
    stream = _Endless()
    environ = {"REQUEST_METHOD": "POST", "PATH_INFO": "/api/v1/reports", "SERVER_NAME": "localhost",
               "SERVER_PORT": "80", "wsgi.url_scheme": "http", "wsgi.input": stream, "wsgi.errors": io.StringIO(),
               "CONTENT_TYPE": "application/json", "HTTP_AUTHORIZATION": node["Authorization"],
               "wsgi.input_terminated": declared is None}
    if declared is not None:
        environ["CONTENT_LENGTH"] = str(declared)
    statuses = []
    tracemalloc.start()
    try:
        body = b"".join(app.wsgi_app(environ, lambda status, headers: statuses.append(status)))
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert statuses[0].startswith("413"), statuses
    assert json.loads(body)["status"] == 413
    assert stream.read_bytes <= LIMIT + 2**16  # werkzeug reads in 64 KiB chunks at most past the limit
    assert peak < 16 * 2**20, peak


def test_a_body_over_the_limit_is_413_with_a_problem(svc):
    app, client, node = svc
    raw = json.dumps({"reports": [_report_body(seq=i) for i in range(12_000)]}).encode()
    assert len(raw) > LIMIT
    r = _post_raw(client, node, raw)
    assert r.status_code == 413 and r.mimetype == "application/problem+json"
    assert str(LIMIT) in r.json["detail"]


@pytest.mark.parametrize("name", ["Ωmega", "node 1", "a" * 65, "", "-lead", "名前", "x\u0000y"])
def test_unicode_and_overlong_node_names_are_422(svc, name):
    _, client, _ = svc
    r = client.post("/api/v1/nodes", json={"name": name}, headers={"Authorization": f"Bearer {ADMIN}"})
    assert r.status_code == 422 and r.json["errors"][0]["path"] == "name"


def test_unicode_in_plan_ids_is_422_and_the_plan_is_unchanged(svc):
    _, client, _ = svc
    admin = {"Authorization": f"Bearer {ADMIN}"}
    before = client.get("/api/v1/plan").json
    bad = {"channels": [{"id": "Kanal-ä", "center_hz": 1e8, "bandwidth_hz": 1e6}]}
    r = client.put("/api/v1/plan", json=bad, headers=admin)
    assert r.status_code == 422 and r.json["errors"][0]["path"].startswith("channels[0].id")
    assert client.get("/api/v1/plan").json == before


@pytest.mark.parametrize("query", ["min_confidence=" + "9" * 5000, "min_confidence=%F0%9F%93%A1",
                                   "min_confidence=nan", "min_confidence=1e999", "x=" + "y" * 100_000])
def test_hostile_query_strings_are_422(svc, query):
    _, client, _ = svc
    r = client.get(f"/api/v1/channels/free?{query}")
    assert r.status_code == 422 and r.mimetype == "application/problem+json"


def test_printable_junk_is_never_a_5xx(svc):
    """Every short printable string as a body: 4xx (or an accepted report, which none of these is)."""
    _, client, node = svc
    for ch in string.printable:
        r = _post_raw(client, node, ch.encode() * 3)
        assert 400 <= r.status_code < 500, (ch, r.status_code)
