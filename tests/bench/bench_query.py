"""Query latency: p50/p99 of GET /api/v1/channels/free (256 channels) while ingest runs, over real HTTP
against the service with 2 workers, beside the same query idle and the bare SELECT behind it.

    python tests/bench/bench_query.py [--seconds 5] [--quick]

Target (issue): p99 under 15 ms with 256 channels while ingest runs.
"""

from __future__ import annotations

import argparse
import http.client
import sqlite3
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _harness import Server, encode, percentile, post_loop, report_body, seed  # noqa: E402

QUERY = "/api/v1/channels/free?min_confidence=0.95"


def first_epoch(url: str, tokens, ids, rng) -> None:
    """Two reports per node and one epoch, in-process, so there are decisions to read."""
    from fusion import create_app
    from fusion.engine import run_epoch

    app = create_app({"DATABASE_URL": url, "MIN_NODES": 1})
    client = app.test_client()
    for token in tokens:
        r = client.post("/api/v1/reports", json=report_body(1, ids, rng),
                        headers={"Authorization": f"Bearer {token}"})
        assert r.status_code == 201, r.json
    with app.extensions["occfuse.sessions"]() as s, s.begin():
        run_epoch(s, datetime.now(timezone.utc), app.config)
    app.extensions["occfuse.engine"].dispose()


def latencies(base: str, seconds: float, limit: int = 20_000) -> np.ndarray:
    """Sequential GETs over one keep-alive connection; bounded in count and time. Milliseconds."""
    conn = http.client.HTTPConnection(base, timeout=30)
    out = []
    end = time.perf_counter() + seconds
    while time.perf_counter() < end and len(out) < limit:
        t = time.perf_counter()
        conn.request("GET", QUERY)
        r = conn.getresponse()
        r.read()
        out.append((time.perf_counter() - t) * 1e3)
        assert r.status == 200, r.status
        if r.getheader("Connection", "").lower() == "close":
            conn.close()
            conn = http.client.HTTPConnection(base, timeout=30)
    conn.close()
    return np.asarray(out)


def bare(path: Path, n: int = 2_000) -> np.ndarray:
    """The SELECTs behind the route with plain sqlite3: newest plan's channels and the newest epoch's
    decisions. Milliseconds."""
    conn = sqlite3.connect(path)
    out = []
    for _ in range(n):
        t = time.perf_counter()
        rev = conn.execute("SELECT max(revision) FROM plan_revision").fetchone()[0]
        conn.execute("SELECT channel_id, center_hz, bandwidth_hz FROM channel WHERE revision = ? "
                     "ORDER BY position", (rev,)).fetchall()
        epoch = conn.execute("SELECT id FROM epoch ORDER BY id DESC LIMIT 1").fetchone()[0]
        conn.execute("SELECT channel_id, state, p_occupied, nodes, decided_at FROM decision WHERE epoch_id = ?",
                     (epoch,)).fetchall()
        out.append((time.perf_counter() - t) * 1e3)
    conn.close()
    return np.asarray(out)


def run(n_channels: int, *, seconds: float, rng, port: int, n_nodes: int = 8, ingest_clients: int = 2) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "q.db"
        url, tokens, ids = seed(path, n_nodes=n_nodes, n_channels=n_channels)
        first_epoch(url, tokens, ids, rng)
        with Server(url, port=port) as server:
            idle = latencies(server.base, seconds / 2)
            now = datetime.now(timezone.utc)
            template = report_body(0, ids, rng, at=now)
            jobs = []
            for c in range(ingest_clients):  # batches of 10 reports, as a busy site posts them
                bodies = [encode({"reports": [{**template, "seq": 1000 + 10 * b + k} for k in range(10)]})
                          for b in range(3_000)]
                jobs.append((server.base, tokens[c], bodies, 10, seconds + 1))
            with ProcessPoolExecutor(ingest_clients) as pool:
                futures = [pool.submit(post_loop, job) for job in jobs]
                time.sleep(0.5)  # let ingest get going
                busy = latencies(server.base, seconds)
                ingested = [f.result() for f in futures]
            how = server.how
        raw = bare(path)
    rate = sum(r[1] for r in ingested) / max(r[2] for r in ingested)
    return {"idle": idle, "busy": busy, "bare": raw, "rate": rate, "how": how, "n": n_channels}


def line(r) -> str:
    b, i, z = r["busy"], r["idle"], r["bare"]
    return (f"{r['n']:5d} channels | under ingest ({r['rate']:6.0f} reports/s): p50 {percentile(b, 50):6.2f} ms "
            f"p99 {percentile(b, 99):6.2f} ms (n={len(b)}) | idle: p50 {percentile(i, 50):6.2f} p99 "
            f"{percentile(i, 99):6.2f} | bare SELECTs: p50 {percentile(z, 50):5.2f} ms | ratio p50 busy/bare "
            f"{percentile(b, 50) / percentile(z, 50):5.1f}")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--seconds", type=float, default=5.0)
    ap.add_argument("--quick", action="store_true", help="only the 256-channel run")
    args = ap.parse_args()
    rng = np.random.default_rng(9)
    main_run = run(256, seconds=args.seconds, rng=rng, port=18_501)
    print(f"server: {main_run['how']}; ingest: 2 client processes posting batches of 10 reports; "
          f"queries: one client, sequential, keep-alive")
    print(line(main_run))
    p99 = percentile(main_run["busy"], 99)
    print(f"target p99 < 15 ms with 256 channels under ingest: {'met' if p99 < 15 else 'NOT met'} ({p99:.2f} ms)")
    if args.quick:
        return 0
    print("growth with channels:")
    for k, n in enumerate((64, 1024)):
        print(line(run(n, seconds=args.seconds, rng=rng, port=18_510 + k)))
    print("growth with nodes (256 channels): the answer is one row per channel, whatever the number of nodes;")
    print(line(run(256, seconds=args.seconds, rng=rng, port=18_520, n_nodes=200)).replace("channels |",
                                                                                            "channels, 200 nodes |"))
    return 0


if __name__ == "__main__":
    sys.exit(main())
