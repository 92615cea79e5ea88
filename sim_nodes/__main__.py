"""``python -m sim_nodes``: run a scenario against a live service, or show a scenario.

    python -m sim_nodes run SCENARIO --server URL --duration S [--speedup X] [--seed N]
                          [--admin-token T | $OCCFUSE_ADMIN_TOKEN] [--truth truth.jsonl] [--quiet]
    python -m sim_nodes show SCENARIO [--seed N]

SCENARIO is a TOML path or the name of a shipped one (``demo``, ``ridge10``).
"""

from __future__ import annotations

import argparse
import os
import sys
import threading

import numpy as np

from sim_nodes.client import SetupError, run_scenario
from sim_nodes.network import SimNetwork
from sim_nodes.scenario import load_scenario


def _progress_display(console):
    from rich.live import Live
    from rich.table import Table

    live = Live(console=console, refresh_per_second=4, transient=False)

    def show(p):
        table = Table(title=f"simulated {p.t_sim:6.1f} / {p.duration_s:.0f} s", title_justify="left")
        for k in ("delivered", "duplicates", "rejected", "retries", "pending"):
            table.add_column(k, justify="right")
        table.add_column("truth (# occupied)")
        truth = " ".join(f"{c}:{'#' if o else '.'}" for c, o in p.occupied.items())
        table.add_row(str(p.delivered), str(p.duplicates), str(p.rejected), str(p.retries), str(p.pending), truth)
        live.update(table)

    return live, show


def cmd_run(args):
    scenario = load_scenario(args.scenario)
    token = args.admin_token or os.environ.get("OCCFUSE_ADMIN_TOKEN")
    if not token:
        print("error: give --admin-token or set OCCFUSE_ADMIN_TOKEN", file=sys.stderr)
        return 2
    stop = threading.Event()
    live = show = None
    if not args.quiet:
        from rich.console import Console

        live, show = _progress_display(Console(stderr=True))
        live.start()
    try:
        summary = run_scenario(scenario, args.server, token, duration_s=args.duration, speedup=args.speedup,
                               seed=args.seed, truth_path=args.truth, progress=show, stop=stop)
    except KeyboardInterrupt:
        stop.set()
        return 130
    except SetupError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    finally:
        if live:
            live.stop()
    print(f"{summary.scenario}: {summary.nodes} nodes, {summary.sim_duration_s:.0f} simulated s in "
          f"{summary.wall_duration_s:.1f} s; {summary.delivered} reports delivered, {summary.duplicates} duplicates, "
          f"{summary.rejected} rejected, {summary.retries} retries, {summary.undelivered} undelivered; "
          f"SNR {summary.snr_db_range[0]:.1f} to {summary.snr_db_range[1]:.1f} dB"
          + (f"; truth in {summary.truth_path}" if summary.truth_path else ""))
    return 0 if summary.undelivered == 0 and summary.rejected == 0 else 1


def cmd_show(args):
    sc = load_scenario(args.scenario)
    net = SimNetwork(sc, 60.0, seed=args.seed)
    snr = net.snr_db()
    print(f"{sc.name}: {len(sc.nodes)} nodes, {len(sc.channels)} channels, {len(sc.transmitters)} transmitters")
    print("per-sample SNR before fading (dB), nodes x channels:")
    print("          " + " ".join(f"{c:>7}" for c in sc.channel_ids))
    for name, row, n in zip(net.node_names, snr, sc.nodes):
        cells = " ".join("      -" if not np.isfinite(v) else f"{v:7.1f}" for v in row)
        print(f"{name:>10} {cells}   {n.behaviour.get('kind', 'honest')}")
    finite = snr[np.isfinite(snr)]
    if finite.size:
        print(f"range {finite.min():.1f} to {finite.max():.1f} dB")
    return 0


def main(argv=None):
    ap = argparse.ArgumentParser(prog="python -m sim_nodes", description=__doc__.splitlines()[0])
    sub = ap.add_subparsers(dest="cmd", required=True)
    r = sub.add_parser("run", help="drive a live service with the scenario")
    r.add_argument("scenario")
    r.add_argument("--server", required=True, help="base URL, e.g. http://127.0.0.1:8080")
    r.add_argument("--duration", type=float, required=True, help="simulated seconds")
    r.add_argument("--speedup", type=float, default=1.0, help="simulated seconds per wall second")
    r.add_argument("--seed", type=int, default=0)
    r.add_argument("--admin-token")
    r.add_argument("--truth", help="write the ground-truth JSONL log here")
    r.add_argument("--quiet", action="store_true", help="no progress display")
    r.set_defaults(func=cmd_run)
    s = sub.add_parser("show", help="print a scenario's link SNRs")
    s.add_argument("scenario")
    s.add_argument("--seed", type=int, default=0)
    s.set_defaults(func=cmd_show)
    args = ap.parse_args(argv)
    return args.func(args)


if __name__ == "__main__":
    sys.exit(main())
