"""Ingest over real HTTP on loopback against the service with 2 workers (SQLite WAL), beside a raw sqlite3
executemany of the same rows in the same run.

Prints reports/s and measurements/s for single and batched 64-channel reports, each in both report forms
(measurement objects; compact `channels` + `powers_dbm`), under each gunicorn worker class, the raw insert rate
of the same rows (one row per report: the packed layout the service stores), and the ratios; then how the
figures grow with channels and nodes. Targets (issue): >= 1,000 single 64-channel reports/s; batched >= 0.5 x raw.

Each HTTP run is followed at once by its raw run (same batch size), and the 64-channel runs are repeated
(--repeat): on a shared machine whose speed moves by 2x from minute to minute, a ratio is only meaningful
between two figures taken at the same moment. Medians are printed, with the range of the paired ratios.

    python tests/bench/bench_ingest.py [--seconds 4] [--clients 3] [--conns 4] [--repeat 3] [--quick]
                                       [--worker-class gthread,sync] [--batch 100] [--floor]
"""

from __future__ import annotations

import argparse
import hashlib
import socket
import sqlite3
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _harness import Server, encode, post_loop, report_body, seed  # noqa: E402

from fusion.config import DEFAULTS  # noqa: E402

BATCH = 100
MAX_BODY = DEFAULTS["MAX_CONTENT_LENGTH"]  # the service's default body limit, which the bench server keeps


def http_rate(server, tokens, ids, *, batch: int, seconds: float, clients: int, conns: int, rng,
              seq0: int = 0, compact: bool = False) -> dict:
    """Each client process keeps `conns` keep-alive connections, each posting as its own node, bodies prepared
    beforehand (bounded: at most 40,000 reports). `compact`: the `channels` + `powers_dbm` form (the channel
    list once per request), else one measurement object per channel."""
    n_bodies = max(1, min(40_000 // batch // clients, 4_000))
    jobs = []
    now = datetime.now(timezone.utc)
    template = [report_body(0, ids, rng, at=now) for _ in range(8)]  # measurement values from the exact law
    if compact:
        template = [{**{k: v for k, v in t.items() if k != "measurements"},
                     "powers_dbm": [m["power_dbm"] for m in t["measurements"]]} for t in template]
    for c in range(clients):
        bodies = []
        for b in range(n_bodies):  # body b goes to this client's node b mod conns, so seqs are unique per node
            reps = [{**template[(b + k) % 8], "seq": seq0 + b * batch + k + 1} for k in range(batch)]
            if compact:
                bodies.append(encode({**reps[0], "channels": ids} if batch == 1 else {"channels": ids,
                                                                                     "reports": reps}))
            else:
                bodies.append(encode(reps[0] if batch == 1 else {"reports": reps}))
        jobs.append((server.base, tokens[c * conns:(c + 1) * conns], bodies, batch, seconds))
    largest = max(len(b) for job in jobs for b in job[2])
    if largest > MAX_BODY:  # the service answers 413 and closes: nothing to measure
        return {"skipped": f"bodies of {largest:,} bytes, over the service's {MAX_BODY:,}-byte limit"}
    cpu0 = server.cpu_by_process()
    start = time.perf_counter()
    with ProcessPoolExecutor(clients) as pool:
        results = list(pool.map(post_loop, jobs))
    wall = time.perf_counter() - start
    cpu1 = server.cpu_by_process()
    used = sorted((cpu1[pid] - cpu0.get(pid, 0.0) for pid in cpu1), reverse=True)
    cpu = sum(used)
    reports = sum(r[1] for r in results)
    busy = max(r[2] for r in results)
    others = {}
    for r in results:
        for k, v in r[3].items():
            others[k] = others.get(k, 0) + v
    return {"reports_s": reports / busy, "requests": sum(r[0] for r in results), "others": others, "wall": wall,
            "cpu_ms_per_report": 1e3 * cpu / max(reports, 1),
            "split": [round(100 * u / cpu) if cpu else 0 for u in used[:2]]}  # the two busiest processes, %


class BareServer(Server):
    """gunicorn, 2 workers of `worker_class` (4 threads for gthread, keep-alive 5 s as served), on bare_wsgi.py:
    what reading the same requests and answering them costs without the service."""

    def __init__(self, *, port: int, worker_class: str):
        self.base = f"127.0.0.1:{port}"
        self.how = f"gunicorn -w 2 -k {worker_class} on tests/bench/bare_wsgi.py (reads the body, answers)"
        cmd = [sys.executable, "-m", "gunicorn", "-w", "2", "-k", worker_class, "--threads", "4", "--keep-alive", "5",
               "-b", self.base, "--log-level", "warning", "--chdir", str(Path(__file__).resolve().parent),
               "bare_wsgi:app"]
        self.proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, start_new_session=True)
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            try:
                socket.create_connection(("127.0.0.1", port), timeout=1).close()
                return
            except OSError:
                time.sleep(0.1)
        self.stop()
        raise RuntimeError("the bare gunicorn server did not start")


def floor(*, worker_class: str, port: int, seconds: float, clients: int, conns: int, rng) -> str:
    """Single and batched compact 64-channel requests against BareServer: requests/s and CPU per request."""
    ids = [f"c{j:04d}" for j in range(64)]
    tokens = [f"floor-{i}" for i in range(clients * conns)]  # the bare app reads no header
    out = []
    with BareServer(port=port, worker_class=worker_class) as server:
        for batch in (1, BATCH):
            x = http_rate(server, tokens, ids, batch=batch, compact=True, seconds=seconds, clients=clients,
                          conns=conns, rng=rng)
            if "skipped" in x:
                continue
            out.append(f"  {'single' if batch == 1 else f'batches of {batch}'}, compact: "
                       f"{x['reports_s'] / batch:7.0f} requests/s, server CPU "
                       f"{x['cpu_ms_per_report'] * batch:.3f} ms/request, split {x['split']} %")
    return f"floor: {server.how}\n" + "\n".join(out)


def machine_speed() -> float:
    """Seconds for 10**7 additions in a pure-Python loop: this shared machine's speed moves by 2x between
    hours, so the figures say how fast it was when they were taken."""
    start = time.process_time()
    total = 0
    for i in range(10**7):
        total += i
    return time.process_time() - start


def raw_rate(path: Path, ids, *, batch: int, n_rows: int, rng, seq_base: int = 10**9) -> float:
    """The same rows (node, seq, times, n_samples, revision, packed float32 powers and noise, content hash)
    with plain sqlite3 executemany, one transaction per `batch` rows, WAL + synchronous=NORMAL as served.
    Seqs from `seq_base` (distinct from the HTTP runs' and from other raw runs')."""
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=NORMAL")
    node_id, revision = conn.execute("SELECT max(id) FROM node").fetchone()[0], 1
    now = datetime.now(timezone.utc).replace(tzinfo=None).isoformat(sep=" ")
    powers = [np.asarray([m["power_dbm"] for m in report_body(0, ids, rng)["measurements"]], "<f4").tobytes()
              for _ in range(8)]
    noise = np.full(len(ids), -100.0, "<f4").tobytes()
    rows = [(node_id, seq_base + i, now, now, 4096, revision, powers[i % 8], noise,
             hashlib.sha256(str(i).encode()).hexdigest()) for i in range(n_rows)]
    sql = ("INSERT INTO report (node_id, seq, measured_at, received_at, n_samples, plan_revision, powers, noise, "
           "content_hash) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)")
    start = time.perf_counter()
    for i in range(0, n_rows, batch):
        conn.execute("BEGIN IMMEDIATE")
        conn.executemany(sql, rows[i:i + batch])
        conn.execute("COMMIT")
    elapsed = time.perf_counter() - start
    conn.close()
    return n_rows / elapsed


def raw_measurement_rate(path: Path, ids, *, batch: int, n_reports: int, rng) -> float:
    """For context: the unpacked layout DESIGN.md rejected, one row per (report, channel), executemany with one
    transaction per `batch` reports. Returns measurements (rows) per second."""
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=NORMAL")
    conn.execute("CREATE TABLE IF NOT EXISTS raw_measurement (node_id INTEGER, seq INTEGER, channel INTEGER, "
                 "power_dbm REAL, PRIMARY KEY (node_id, seq, channel))")
    powers = [m["power_dbm"] for m in report_body(0, ids, rng)["measurements"]]
    rows = [(1, i, j, p) for i in range(n_reports) for j, p in enumerate(powers)]
    per_txn = batch * len(ids)
    start = time.perf_counter()
    for i in range(0, len(rows), per_txn):
        conn.execute("BEGIN IMMEDIATE")
        conn.executemany("INSERT INTO raw_measurement VALUES (?, ?, ?, ?)", rows[i:i + per_txn])
        conn.execute("COMMIT")
    elapsed = time.perf_counter() - start
    conn.close()
    return len(rows) / elapsed


def set_batch(n: int) -> None:
    """Reports per batched request (the service takes up to MAX_BATCH, 500 by default)."""
    global BATCH, FORMS, SHAPE
    BATCH = n
    FORMS = (("single", "single, measurement objects"), ("single_c", "single, compact (powers_dbm)"),
             ("batched", f"batches of {n}, measurement objects"),
             ("batched_c", f"batches of {n}, compact (powers_dbm)"))
    SHAPE = {"single": (1, False), "single_c": (1, True), "batched": (n, False), "batched_c": (n, True)}


set_batch(BATCH)


def run(n_nodes, n_channels, *, seconds, clients, conns, rng, port, worker_class=None, repeat=1) -> dict:
    """Each form `repeat` times, each HTTP run followed by the raw insert of as many rows per transaction."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.db"
        url, tokens, ids = seed(path, n_nodes=max(n_nodes, clients * conns), n_channels=n_channels)
        out: dict = {key: [] for key, _ in FORMS}
        # Epochs an hour apart: this measures the insert path. An epoch every few seconds would read the
        # bench's ~10^5 fresh reports and, while it reads, hold back the WAL checkpoint, which made the raw
        # inserts after it up to 2x faster than on a quiet database (measured). bench_query runs both at once.
        with Server(url, port=port, worker_class=worker_class, interval_s=3600) as server:
            load = dict(seconds=seconds, clients=clients, conns=conns, rng=rng)
            for i in range(repeat):
                for k, (key, _) in enumerate(FORMS):
                    batch, compact = SHAPE[key]
                    n = 4 * i + k  # a block of 10**6 seqs per HTTP run and per raw run
                    x = http_rate(server, tokens, ids, batch=batch, compact=compact, seq0=n * 10**6, **load)
                    if "skipped" in x:
                        out[key].append(x)
                        continue
                    x["raw"] = raw_rate(path, ids, batch=batch, n_rows=5_000 if batch == 1 else 50_000, rng=rng,
                                        seq_base=10**9 + n * 10**6)
                    x["ratio"] = x["reports_s"] / x["raw"]
                    out[key].append(x)
            how = server.how
        raw_m = raw_measurement_rate(path, ids, batch=BATCH, n_reports=max(200, 200_000 // n_channels), rng=rng)
    return {**{key: _median_run(runs) for key, runs in out.items()}, "raw_m": raw_m, "how": how, "ch": n_channels,
            "repeat": repeat}


def _median_run(runs: list[dict]) -> dict:
    if "skipped" in runs[0]:
        return runs[0]
    mid = lambda k: float(np.median([r[k] for r in runs]))  # noqa: E731
    others: dict = {}
    for r in runs:
        for k, v in r["others"].items():
            others[k] = others.get(k, 0) + v
    ratios = [r["ratio"] for r in runs]
    return {"reports_s": mid("reports_s"), "raw": mid("raw"), "ratio": mid("ratio"), "ratios": (min(ratios),
            max(ratios)), "cpu_ms_per_report": mid("cpu_ms_per_report"), "split": runs[-1]["split"],
            "others": others}


def line(label, r) -> str:
    out = [label + (f" (medians of {r['repeat']} paired runs)" if r["repeat"] > 1 else "")]
    for key, name in FORMS:
        x = r[key]
        if "skipped" in x:
            out.append(f"  {name:<36} skipped: {x['skipped']}")
            continue
        spread = (f" ({x['ratios'][0]:.2f}-{x['ratios'][1]:.2f})" if r["repeat"] > 1 else "")
        out.append(f"  {name:<36} {x['reports_s']:8.0f} reports/s {x['reports_s'] * r['ch']:10.0f} meas/s | "
                   f"raw {x['raw']:6.0f} rows/s, ratio {x['ratio']:5.2f}{spread} | server CPU "
                   f"{x['cpu_ms_per_report']:.3f} ms/report, split of the two busiest processes {x['split']} %")
    out.append(f"  raw = sqlite3 executemany of the same rows right after each HTTP run, as many per transaction "
               f"as the HTTP requests carry (1 or {BATCH})")
    return "\n".join(out)


def _batch_size(text: str) -> int:
    n, limit = int(text), DEFAULTS["MAX_BATCH"]
    if not 2 <= n <= limit:
        raise argparse.ArgumentTypeError(f"{n} reports per batch: give 2 to {limit} (the service's MAX_BATCH)")
    return n


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--seconds", type=float, default=4.0)
    ap.add_argument("--clients", type=int, default=3)
    ap.add_argument("--conns", type=int, default=4, help="keep-alive connections (nodes) per client process")
    ap.add_argument("--repeat", type=int, default=3, help="paired runs (HTTP, then raw) of each 64-channel form")
    ap.add_argument("--quick", action="store_true", help="only the 64-channel run")
    ap.add_argument("--batch", type=_batch_size, default=BATCH, metavar=f"2..{DEFAULTS['MAX_BATCH']}",
                    help="reports per batched request, up to the service's default MAX_BATCH")
    ap.add_argument("--floor", action="store_true",
                    help="also measure gunicorn alone (tests/bench/bare_wsgi.py) under the same load, per class")
    ap.add_argument("--worker-class", default="gthread,sync",
                    help="occfuse serve --worker-class values for the 64-channel run, comma-separated; the growth "
                         "runs use the first")
    args = ap.parse_args()
    set_batch(args.batch)
    rng = np.random.default_rng(8)
    load = dict(seconds=args.seconds, clients=args.clients, conns=args.conns, rng=rng)
    n_nodes = args.clients * args.conns
    classes = args.worker_class.split(",")
    print(f"SQLite WAL, synchronous=NORMAL; {args.clients} client processes on the same 2 cores, {args.conns} "
          f"keep-alive connections each (one node per connection, one request in flight per process), bodies "
          f"encoded beforehand; no epochs during the runs (interval 1 h); machine speed now: "
          f"{machine_speed():.2f} s for a fixed pure-Python loop (compare runs only at similar speeds)")
    for k, worker_class in enumerate(classes):
        main_run = run(n_nodes, 64, port=18_471 + k, worker_class=worker_class, repeat=args.repeat, **load)
        print(f"server: {main_run['how']}")
        print(line(f"{n_nodes} nodes x 64 channels", main_run))
        print(f"  context: raw one-row-per-measurement executemany {main_run['raw_m']:.0f} meas/s; compact batched "
              f"HTTP ingest stores {main_run['batched_c']['reports_s'] * 64 / main_run['raw_m']:.2f} x that many "
              f"measurements/s")
        for key, _ in FORMS:
            if main_run[key].get("others"):
                print(f"  other outcomes ({key}): {main_run[key]['others']}")
        for key, name in FORMS:
            x = main_run[key]
            if "skipped" in x:
                print(f"target, {name}: not measured ({x['skipped']})")
                continue
            target = (f">= 1000 reports/s: {'met' if x['reports_s'] >= 1000 else 'NOT met'} ({x['reports_s']:.0f})"
                      if key.startswith("single")
                      else f">= 0.5 x raw: {'met' if x['ratio'] >= 0.5 else 'NOT met'} ({x['ratio']:.2f})")
            print(f"target, {name}: {target}")
        if args.floor:
            print(floor(worker_class=worker_class, port=18_475 + k, **load))
    if args.quick:
        return 0
    print(f"growth with channels ({n_nodes} nodes; {classes[0]} workers):")
    for k, ch in enumerate((16, 256)):
        print(line(f"{n_nodes} nodes x {ch} channels",
                   run(n_nodes, ch, port=18_480 + k, worker_class=classes[0], **load)))
    print(f"growth with registered nodes (64 channels; the same clients post; {classes[0]} workers):")
    for k, n in enumerate((100, 1000)):
        print(line(f"{n} nodes x 64 channels", run(n, 64, port=18_490 + k, worker_class=classes[0], **load)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
