"""``occfuse demo``: the whole service on one machine for a short run, scored against the simulator's truth.

A temporary SQLite database, the API on a loopback port with its fusion scheduler, the sim_nodes demo site
posting real HTTP reports, a live table, and a summary against ground truth. Nothing is left behind.
"""

from __future__ import annotations

import logging
import secrets
import tempfile
import threading
import time
from datetime import datetime, timezone
from pathlib import Path

import httpx
from rich.console import Console
from rich.live import Live
from rich.table import Table

from . import create_app
from .db import upgrade
from .server import LiveServer

__all__ = ["run_demo", "channel_table"]

# Text marks as well as colours, so the state reads the same without colour vision.
STYLE = {"free": ("( ) free", "bold cyan"), "occupied": ("(#) occupied", "bold magenta"),
         "unknown": ("(?) unknown", "dim")}


def channel_table(channels: dict, title: str) -> Table:
    table = Table(title=title, title_justify="left")
    for column, justify in (("channel", "left"), ("MHz", "right"), ("state", "left"),
                            ("confidence", "right"), ("nodes", "right")):
        table.add_column(column, justify=justify)
    for c in channels["channels"]:
        text, style = STYLE[c["state"]]
        conf = "-" if c["confidence"] is None else f"{c['confidence']:.3f}"
        table.add_row(c["id"], f"{c['center_hz'] / 1e6:.3f}", f"[{style}]{text}[/]", conf, str(c["nodes"]))
    return table


def run_demo(*, duration_s: float = 20.0, seed: int = 7, scenario_path: str | None = None,
             interval_s: float = 2.0, console: Console | None = None) -> int:
    """Run the demo; return a process exit code."""
    from sim_nodes.client import run_scenario
    from sim_nodes.scenario import DEMO_SCENARIO, load_scenario
    from sim_nodes.truth import load_truth, score_decisions

    console = console or Console()
    logging.getLogger("werkzeug").setLevel(logging.WARNING)  # one line per request would bury the table
    scenario = load_scenario(scenario_path or DEMO_SCENARIO)
    with tempfile.TemporaryDirectory(prefix="occfuse-demo-") as tmp:
        url = f"sqlite:///{Path(tmp) / 'demo.db'}"
        upgrade(url)
        admin = secrets.token_urlsafe(24)
        report_interval = max(n.interval_s for n in scenario.nodes)
        app = create_app({"DATABASE_URL": url, "ADMIN_TOKEN": admin, "INTERVAL_S": interval_s,
                          "RULE": "weighted_llr", "MAX_AGE_S": 3 * report_interval + interval_s,
                          "MIN_NODES": 2, "LOG_LEVEL": "WARNING"})
        truth_path = Path(tmp) / "truth.jsonl"
        started = datetime.now(timezone.utc)
        with LiveServer(app, "127.0.0.1", 0) as server:
            console.print(f"occfuse demo: [bold]{scenario.name}[/], {len(scenario.nodes)} simulated nodes, "
                          f"{len(scenario.channels)} channels; service on {server.url}, "
                          f"fusion every {interval_s:g} s, {duration_s:g} s of traffic")
            outcome: dict = {}

            def simulate():
                try:
                    outcome["summary"] = run_scenario(scenario, server.url, admin, duration_s=duration_s,
                                                      seed=seed, truth_path=truth_path)
                except Exception as exc:  # shown to the user below; the demo still shuts down cleanly
                    outcome["error"] = exc

            sim = threading.Thread(target=simulate, name="sim-nodes", daemon=True)
            sim.start()
            with httpx.Client(base_url=server.url, timeout=10) as http:
                _watch(console, http, sim, started, duration_s)
                sim.join()
                if "error" in outcome:
                    console.print(f"[bold red]simulation failed:[/] {outcome['error']}")
                    return 1
                time.sleep(min(interval_s, 2.0) + 0.2)  # let one more epoch see the last reports
                final = http.get("/api/v1/channels").json()
                histories = {c["id"]: http.get(f"/api/v1/channels/{c['id']}/history",
                                               params={"since": started.isoformat()}).json()
                             for c in final["channels"]}
        summary = outcome["summary"]
        truth = load_truth(truth_path)
        # Score the epochs that had evidence; the first ones, before any node reported, are honest unknowns.
        decisions = [(cid, datetime.fromisoformat(d["decided_at"]), d["state"])
                     for cid, h in histories.items() for d in h["decisions"] if d["nodes"] > 0]
        score = score_decisions(decisions, truth, grace_s=report_interval + interval_s)
    console.print(channel_table(final, "final state"))
    free = [c["id"] for c in final["channels"] if c["state"] == "free"]
    console.print(f"free now: {', '.join(free) if free else 'none'}")
    console.print(f"reports delivered: {summary.delivered} (retries {summary.retries}, rejected {summary.rejected})")
    if score.n:
        console.print(f"decisions agreeing with the simulation's ground truth: {score.matched} of {score.n} "
                      f"channel-epochs ({100 * score.accuracy:.1f}%); {score.unknown} unknown; "
                      f"{score.strict_matched} agree at the exact decision instant")
    console.print("[dim]Advisory output: local spectrum regulations and licensed coordination take precedence; "
                  "unknown is not free.[/]")
    return 0


def _watch(console: Console, http: httpx.Client, sim: threading.Thread, started: datetime, duration_s: float):
    """Redraw the channel table about once a second while the simulation runs."""
    def snapshot():
        data = http.get("/api/v1/channels").json()
        elapsed = (datetime.now(timezone.utc) - started).total_seconds()
        return channel_table(data, f"t = {elapsed:4.0f} s of {duration_s:g} s   (as of {data['as_of'] or '-'})")

    if console.is_terminal:
        with Live(snapshot(), console=console, refresh_per_second=2, transient=False) as live:
            while sim.is_alive():
                sim.join(timeout=1.0)
                live.update(snapshot())
        return
    last = 0.0
    while sim.is_alive():  # not a terminal (CI, a pipe): a short line every 5 s instead of redraws
        sim.join(timeout=1.0)
        if time.monotonic() - last >= 5:
            last = time.monotonic()
            data = http.get("/api/v1/channels").json()
            states = " ".join(f"{c['id']}:{c['state'][0]}" for c in data["channels"])
            console.print(f"{(datetime.now(timezone.utc) - started).total_seconds():5.1f} s  {states}")
