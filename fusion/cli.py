"""The ``occfuse`` command: thin wrappers over plain functions (registry, plan, decisions, server, demo,
evaluate, replay)."""

from __future__ import annotations

import json
import os
import signal
import sys
import threading

import click

from .errors import OccfuseError

__all__ = ["main", "cli"]


def _app(**overrides):
    from . import create_app

    return create_app(overrides or None)


def _sessions(app):
    return app.extensions["occfuse.sessions"]


def _ensure_schema(app) -> None:
    """Upgrade the database to the newest migration if it is behind (serve, demo, and the data commands)."""
    from .db import current_revision, head_revision, upgrade

    url = app.config["DATABASE_URL"]
    if current_revision(app.extensions["occfuse.engine"]) != head_revision(url):
        upgrade(url)


class _Group(click.Group):
    """Turns occfuse errors into one clear line and exit code 2 instead of a traceback."""

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except OccfuseError as exc:
            click.echo(f"error: {exc}", err=True)
            for item in getattr(exc, "errors", []) or []:
                click.echo(f"  {item['path']}: {item['message']}", err=True)
            ctx.exit(2)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.option("--config", "config_file", type=click.Path(dir_okay=False), envvar="OCCFUSE_CONFIG",
              help="TOML settings file (lower-case keys); OCCFUSE_* environment variables override it.")
def cli(config_file):
    """occfuse: fuse many sensor nodes' channel energy into free / occupied / unknown, with a probability."""
    if config_file:
        os.environ["OCCFUSE_CONFIG"] = config_file
    from .config import load_settings
    from .logs import setup_logging

    try:
        settings = load_settings()
    except OccfuseError:  # the command itself reports the bad setting
        settings = {"LOG_FORMAT": "text", "LOG_LEVEL": "INFO"}
    setup_logging(settings["LOG_FORMAT"], settings["LOG_LEVEL"])


# --- database ---------------------------------------------------------------------------------------------

@cli.group()
def db():
    """Database schema."""


@db.command("upgrade")
@click.option("--revision", default="head", show_default=True)
def db_upgrade(revision):
    """Apply migrations up to REVISION (creates the database if needed)."""
    from .config import load_settings
    from .db import upgrade

    url = load_settings()["DATABASE_URL"]
    upgrade(url, revision)
    click.echo(f"database {_redact(url)} is at {revision}")


@db.command("backup")
@click.argument("target", type=click.Path(dir_okay=False))
def db_backup(target):
    """Copy the SQLite database to TARGET with SQLite's online backup API (safe while serving)."""
    from .config import load_settings
    from .db import backup_sqlite

    url = load_settings()["DATABASE_URL"]
    pages = backup_sqlite(url, target)
    click.echo(f"database {_redact(url)} copied to {target} ({pages} pages)")


def _redact(url: str) -> str:
    from sqlalchemy.engine import make_url

    return make_url(url).render_as_string(hide_password=True)


def _warn_settings(app):
    """Print the settings warnings (e.g. a design SNR below the SNR wall) to standard error."""
    from .settings import get_settings, settings_dict, settings_warnings

    with _sessions(app)() as session:
        values = settings_dict(get_settings(session, app.config))
        session.commit()
    for text in settings_warnings(values, app.config):
        click.echo(f"warning: {text}", err=True)


# --- serving ----------------------------------------------------------------------------------------------

@cli.command()
@click.option("--host", default="127.0.0.1", show_default=True)
@click.option("--port", default=8080, show_default=True, type=click.IntRange(0, 65535))
@click.option("--workers", default=1, show_default=True, type=click.IntRange(1, 64), envvar="OCCFUSE_WORKERS",
              help="Processes; more than 1 runs gunicorn, and one worker at a time (the lease holder) runs the "
                   "epochs.")
@click.option("--threads", default=4, show_default=True, type=click.IntRange(1, 64),
              help="Threads per gunicorn worker (with --workers > 1 and the gthread worker class).")
@click.option("--worker-class", "worker_class", default="gthread", show_default=True,
              type=click.Choice(["gthread", "sync"]), envvar="OCCFUSE_WORKER_CLASS",
              help="gunicorn worker class (with --workers > 1): gthread keeps client connections alive and "
                   "copes with slow clients; sync answers one request at a time per process, each on its own "
                   "connection, which costs less CPU per request but needs a buffering reverse proxy in front "
                   "(README, Operations).")
def serve(host, port, workers, threads, worker_class):
    """Upgrade the database if needed, then serve the API and run the fusion epochs."""
    metrics_dir, master_pid = None, os.getpid()
    if workers > 1 and not os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        # Before anything imports prometheus_client: the workers inherit it and share the counters' files.
        import tempfile

        metrics_dir = tempfile.mkdtemp(prefix="occfuse-metrics-")
        os.environ["PROMETHEUS_MULTIPROC_DIR"] = metrics_dir
    try:
        app = _app()
        _ensure_schema(app)
        if not app.config.get("ADMIN_TOKEN"):
            click.echo("warning: OCCFUSE_ADMIN_TOKEN is not set; admin routes (nodes, plan, fusion) are refused",
                       err=True)
        _warn_settings(app)
        database = _redact(app.config["DATABASE_URL"])
        if workers > 1:
            from .workers import GunicornServer, options

            app.extensions["occfuse.engine"].dispose()  # never carry pooled connections across fork
            click.echo(f"occfuse starting {workers} workers (database {database})")
            GunicornServer(options(host, port, workers, threads, worker_class)).run()
            return
        _serve_one(app, host, port, database)
    finally:
        # gunicorn workers are forked inside run() and unwind through here too: only the master cleans up.
        if metrics_dir is not None and os.getpid() == master_pid:
            import shutil

            shutil.rmtree(metrics_dir, ignore_errors=True)


def _serve_one(app, host, port, database) -> None:
    from .server import LiveServer

    server = LiveServer(app, host, port)

    def stop(signum, _frame):
        click.echo(f"received signal {signum}, shutting down", err=True)
        threading.Thread(target=server._server.shutdown, daemon=True).start()

    signal.signal(signal.SIGTERM, stop)
    signal.signal(signal.SIGINT, stop)
    click.echo(f"occfuse serving on {server.url} (database {database})")
    server.serve_forever()
    server._server.server_close()


# --- nodes and plan ---------------------------------------------------------------------------------------

@cli.group()
def node():
    """Sensor nodes."""


@node.command("add")
@click.argument("name")
@click.option("--x-m", type=float)
@click.option("--y-m", type=float)
@click.option("--lat", type=float)
@click.option("--lon", type=float)
def node_add(name, x_m, y_m, lat, lon):
    """Register node NAME and print its token (shown this once; only its hash is stored)."""
    from pydantic import ValidationError

    from .api.schemas import NodeIn
    from .registry import register_node

    try:
        NodeIn(name=name, x_m=x_m, y_m=y_m, lat=lat, lon=lon)
    except ValidationError as exc:
        raise click.BadParameter(exc.errors()[0]["msg"], param_hint="NAME") from None
    app = _app()
    _ensure_schema(app)
    with _sessions(app)() as session, session.begin():
        _, token = register_node(session, name, x_m=x_m, y_m=y_m, lat=lat, lon=lon)
    click.echo(token)
    click.echo(f"node {name!r} registered; store this token now, it is not shown again", err=True)


@node.command("list")
def node_list():
    """Nodes with last seen, trust and flags."""
    from sqlalchemy import select

    from .api.nodes import node_view
    from .models import Node, NodeReliability

    app = _app()
    _ensure_schema(app)
    with _sessions(app)() as session:
        rows = session.execute(select(Node, NodeReliability).outerjoin(NodeReliability).order_by(Node.name)).all()
        for n, r in rows:
            v = node_view(n, r)
            trust = "-" if v["trust"] is None else f"{v['trust']:.2f}"
            click.echo(f"{v['name']:<20} last seen {v['last_seen'] or 'never'}  trust {trust}  "
                       f"flags {','.join(v['flags']) or '-'}{'  DISABLED' if v['disabled'] else ''}")


@cli.group()
def plan():
    """The band plan."""


@plan.command("load")
@click.argument("file", type=click.Path(exists=True, dir_okay=False))
def plan_load(file):
    """Load a TOML band plan ([[channel]] tables with id, center_hz, bandwidth_hz) as a new revision."""
    from .plan import read_plan_file, store_plan

    parsed = read_plan_file(file)
    app = _app()
    _ensure_schema(app)
    with _sessions(app)() as session, session.begin():
        revision = store_plan(session, parsed)
        number = revision.revision
    click.echo(f"plan revision {number}: {len(parsed.channels)} channels loaded from {file}")


# --- answers ----------------------------------------------------------------------------------------------

@cli.command()
@click.option("--min-confidence", default=0.95, show_default=True, type=click.FloatRange(0, 1))
@click.option("--json", "as_json", is_flag=True, help="Print the API's JSON instead of a table.")
def free(min_confidence, as_json):
    """Channels free now with at least MIN_CONFIDENCE (advisory: see the README's cautions)."""
    from .api.schemas import ChannelsOut
    from .decisions import free_channels

    app = _app()
    _ensure_schema(app)
    _warn_settings(app)
    with _sessions(app)() as session:
        out = free_channels(session, min_confidence)
    if as_json:
        click.echo(ChannelsOut.model_validate(out).model_dump_json(indent=2))
        return
    if out["as_of"] is None:
        click.echo("no fusion epoch has run yet: nothing is known to be free")
        return
    click.echo(f"as of {out['as_of'].isoformat()} ({out['rule']}), free with confidence >= {min_confidence}:")
    if not out["channels"]:
        click.echo("  none")
    for c in out["channels"]:
        click.echo(f"  {c['id']:<12} {c['center_hz'] / 1e6:12.4f} MHz  {c['bandwidth_hz'] / 1e3:9.1f} kHz  "
                   f"confidence {c['confidence']:.4f}  nodes {c['nodes']}")


@cli.command()
@click.option("--duration", default=20.0, show_default=True, type=click.FloatRange(1, 3600),
              help="Seconds of simulated network traffic.")
@click.option("--seed", default=7, show_default=True, type=int)
@click.option("--scenario", type=click.Path(exists=True, dir_okay=False),
              help="A sim_nodes scenario file (default: the built-in demo site).")
@click.option("--interval", default=2.0, show_default=True, type=click.FloatRange(0.5, 60),
              help="Seconds between fusion epochs.")
def demo(duration, seed, scenario, interval):
    """All in one: temporary database, server on loopback, simulated nodes, live table, summary."""
    from .demo import run_demo

    code = run_demo(duration_s=duration, seed=seed, scenario_path=scenario, interval_s=interval)
    sys.exit(code)


# --- evaluating rules -------------------------------------------------------------------------------------

@cli.command()
@click.argument("scenario", required=False)
@click.option("--channel", help="Scenario channel to evaluate (default: the first one a transmitter uses).")
@click.option("--nodes", type=click.IntRange(1, 1000), help="Homogeneous shorthand: number of identical nodes.")
@click.option("--snr-db", type=float, help="Homogeneous: mean per-sample SNR in the channel, dB.")
@click.option("--samples", type=click.IntRange(1), help="Homogeneous: complex samples per measurement.")
@click.option("--fading", type=click.Choice(["none", "rayleigh", "nakagami"]), default="none", show_default=True,
              help="Homogeneous: block fading, independent per node and measurement.")
@click.option("--nakagami-m", type=click.FloatRange(0.5), default=2.0, show_default=True)
@click.option("--signal", type=click.Choice(["deterministic", "gaussian"]), default="deterministic",
              show_default=True, help="Homogeneous: signal law (Digham's closed forms are for deterministic).")
@click.option("--rules", "rule_list", default=",".join(("or", "and", "k_of_n", "majority", "chair_varshney",
                                                          "egc", "mrc", "llr", "weighted_llr")),
              show_default=True, help="Comma-separated rules; k_of_n:K sets k (bare k_of_n uses --k).")
@click.option("--k", "default_k", type=click.IntRange(1), default=2, show_default=True)
@click.option("--trials", type=click.IntRange(1, 100_000_000), default=100_000, show_default=True)
@click.option("--target-pf", type=click.FloatRange(0, 1, min_open=True, max_open=True), default=0.1,
              show_default=True)
@click.option("--seed", type=int, default=0, show_default=True)
@click.option("--falsify-mode", type=click.Choice(["free", "occupied"]), default="free", show_default=True,
              help="What the added falsifiers say in the sensitivity sweep.")
@click.option("--out", "out_dir", type=click.Path(file_okay=False), help="Write JSON, CSV and PNG plots here.")
@click.option("--json", "as_json", is_flag=True, help="Print the JSON report to standard output, nothing else.")
def evaluate(scenario, channel, nodes, snr_db, samples, fading, nakagami_m, signal, rule_list, default_k, trials,
             target_pf, seed, falsify_mode, out_dir, as_json):
    """ROC, Pd at the target Pf, calibration and falsifier sensitivity of fusion rules (Monte Carlo + analytic).

    Give a sim_nodes SCENARIO file (or a shipped name: demo, ridge10), or the homogeneous shorthand
    --nodes N --snr-db DB --samples N [--fading rayleigh].
    """
    from rich.console import Console
    from rich.progress import Progress

    from sim_nodes import evaluate as ev
    from sim_nodes import evaluate_output as out
    from sim_nodes.scenario import load_scenario

    shorthand = [nodes, snr_db, samples]
    try:
        if scenario and any(v is not None for v in shorthand):
            raise click.UsageError("give a SCENARIO or --nodes/--snr-db/--samples, not both")
        if scenario:
            setup = ev.scenario_setup(load_scenario(scenario), channel=channel, seed=seed)
        elif all(v is not None for v in shorthand):
            setup = ev.homogeneous_setup(nodes, snr_db, samples, fading, nakagami_m=nakagami_m, signal=signal)
        else:
            raise click.UsageError("give a SCENARIO, or all of --nodes, --snr-db and --samples")
        specs = ev.parse_rules(rule_list, setup.n_nodes, default_k)
    except (ValueError, OSError) as exc:
        raise click.UsageError(str(exc)) from None
    err = Console(stderr=True)
    with Progress(console=err, transient=True) as bar:
        task = bar.add_task("evaluating", total=trials)
        report = ev.evaluate(setup, specs, trials=trials, target_pf=target_pf, seed=seed,
                             falsify_mode=falsify_mode, progress=lambda done, _total: bar.update(task, completed=done))
    if report["trials"] == 0:
        click.echo("interrupted before the first chunk of trials: nothing to report", err=True)
        sys.exit(130)
    if out_dir:
        written = out.write_report(report, out_dir)
        click.echo(f"wrote {', '.join(written)} to {out_dir}", err=True)
    if as_json:
        click.echo(json.dumps(report, indent=2))
    else:
        for line in out.summary_lines(report):
            click.echo(line)
    if not report["complete"]:
        click.echo(f"interrupted: results cover {report['trials']} of {report['trials_requested']} trials", err=True)
        sys.exit(130)


@cli.command()
@click.option("--rules", "rule_list", required=True, help="Comma-separated rules to replay; k_of_n:K sets k.")
@click.option("--k", "default_k", type=click.IntRange(1), default=2, show_default=True, help="k for a bare k_of_n.")
@click.option("--since", help="First epoch time to replay (RFC 3339); default: the oldest stored.")
@click.option("--until", help="Last epoch time to replay (RFC 3339); default: the newest stored.")
@click.option("--truth", "truth_path", type=click.Path(exists=True, dir_okay=False),
              help="A sim_nodes ground-truth log (JSONL) to score every rule and the service against.")
@click.option("--grace", "grace_s", type=click.FloatRange(0), default=0.0, show_default=True,
              help="Seconds before a decision within which a matching true state still counts.")
@click.option("--json", "as_json", is_flag=True, help="Print the result as JSON, nothing else.")
def replay(rule_list, default_k, since, until, truth_path, grace_s, as_json):
    """Re-run stored reports through other rules and compare with what the service decided (writes nothing)."""
    from datetime import datetime, timezone

    from .replay import parse_rule_list, read_truth_log, summary_lines
    from .replay import replay as run_replay

    def when(text, name):
        if text is None:
            return None
        try:
            t = datetime.fromisoformat(text.replace("Z", "+00:00"))
        except ValueError:
            raise click.BadParameter(f"must be an RFC 3339 time such as 2026-12-01T21:00:00Z, was {text!r}",
                                     param_hint=name) from None
        return t if t.tzinfo else t.replace(tzinfo=timezone.utc)

    try:
        specs = parse_rule_list(rule_list, default_k)
    except ValueError as exc:
        raise click.BadParameter(str(exc), param_hint="--rules") from None
    t0, t1 = when(since, "--since"), when(until, "--until")
    truth = None
    if truth_path:
        try:
            truth = read_truth_log(truth_path)
        except ValueError as exc:
            raise click.BadParameter(str(exc), param_hint="--truth") from None
    app = _app()
    _ensure_schema(app)
    with _sessions(app)() as session:
        result = run_replay(session, app.config, specs, since=t0, until=t1, truth=truth, grace_s=grace_s)
        session.rollback()  # replay only reads; make sure nothing could be flushed
    if as_json:
        click.echo(json.dumps(result.as_dict(), indent=2))
    else:
        for line in summary_lines(result):
            click.echo(line)


def _optional_commands() -> None:
    """Commands whose modules live beside the service (node agent, evaluation); absent ones are skipped."""
    try:
        from .agent import agent_command
    except ImportError:
        return
    cli.add_command(agent_command, "agent")


_optional_commands()


def main() -> None:
    cli(prog_name="occfuse")


if __name__ == "__main__":
    main()
