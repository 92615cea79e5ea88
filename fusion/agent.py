"""Node agent: an IQ recording to per-channel reports, posted to the service or printed.

``occfuse agent RECORDING --plan PLAN.toml [--n-samples N] [--cal-db DB]
(--server URL --token T | --jsonl)`` reads complex samples from a SigMF recording
(``core:datatype`` cf32_le; sample rate, frequency and start time from the metadata) or a
raw interleaved float32 file (``--sample-rate`` and ``--center-hz`` then required), cuts
them into windows of ``N`` samples, and for each window reports every plan channel that
lies inside the recorded span:

- ``power_dbm``: mean power per complex sample inside the channel (Welch, Hann window,
  50 % overlap; :mod:`fusion.detection.channelizer`), in dB of the sample units plus
  ``--cal-db``;
- ``noise_dbm``: the agent's own noise-floor estimate for the channel (below);
- ``n_samples``: the channel's equivalent degrees of freedom, rounded; channels of
  different widths have different ones, so each distinct value gets its own report.

Noise floor: in each window the median bin power across the whole span, divided by the
median of the bin law, estimates the noise density (robust while under half the span is
occupied); the recording's floor is the median of those per-window estimates.

The HTTP side (:func:`post_reports`) is shared with the simulated network: it posts with
retries and exponential backoff on 5xx and connection errors and never renumbers a report.
"""

from __future__ import annotations

import json
import sys
import time
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path

import click
import httpx
import numpy as np
from scipy import stats

from fusion.detection.channelizer import channel_power, equivalent_dof

__all__ = [
    "PlanChannel",
    "Recording",
    "SendResult",
    "agent_command",
    "classify_response",
    "format_time",
    "load_plan",
    "make_report",
    "post_reports",
    "read_recording",
    "recording_reports",
]


@dataclass(frozen=True)
class PlanChannel:
    id: str
    center_hz: float
    bandwidth_hz: float


@dataclass(frozen=True)
class Recording:
    samples: np.ndarray  # complex64, possibly a memory map
    sample_rate: float
    center_hz: float
    start: datetime | None


@dataclass(frozen=True)
class SendResult:
    """Outcome of one POST: ``delivered``, ``duplicate``, ``retry`` or ``rejected``."""

    outcome: str
    status: int | None
    detail: str = ""


def format_time(t):
    """RFC 3339 with a timezone and microseconds, e.g. ``2026-01-02T03:04:05.000000+00:00``."""
    return t.astimezone(timezone.utc).isoformat(timespec="microseconds")


def make_report(seq, measured_at, n_samples, channel_ids, power_dbm, noise_dbm=None):
    """One report in the API's format; non-finite powers (no measurement) are left out."""
    meas = []
    for k, cid in enumerate(channel_ids):
        p = float(power_dbm[k])
        if not np.isfinite(p):
            continue
        m = {"channel": cid, "power_dbm": round(p, 4)}
        if noise_dbm is not None and np.isfinite(noise_dbm[k]):
            m["noise_dbm"] = round(float(noise_dbm[k]), 4)
        meas.append(m)
    return {"seq": int(seq), "measured_at": format_time(measured_at) if isinstance(measured_at, datetime)
            else str(measured_at), "n_samples": int(n_samples), "measurements": meas}


def load_plan(path):
    """Channels of a plan TOML file (``[[channel]]`` tables with id, center_hz, bandwidth_hz)."""
    from .errors import PlanError
    from .plan import read_plan_file  # the service's own parser and checks, so both sides read plans alike

    try:
        plan = read_plan_file(path)
    except PlanError as exc:
        raise click.BadParameter(str(exc)) from None
    return [PlanChannel(c.id, c.center_hz, c.bandwidth_hz) for c in plan.channels]


def read_recording(path, sample_rate=None, center_hz=None, start=None):
    """A SigMF recording (``.sigmf-meta`` / ``.sigmf-data``, cf32_le) or a raw cf32 file."""
    p = Path(path)
    meta_path = p.with_suffix(".sigmf-meta")
    if meta_path.exists():
        meta = json.loads(meta_path.read_text())
        glob = meta.get("global", {})
        dtype = glob.get("core:datatype")
        if dtype != "cf32_le":
            raise ValueError(f"only SigMF core:datatype cf32_le is supported, was {dtype!r}")
        cap = (meta.get("captures") or [{}])[0]
        rate = float(sample_rate or glob["core:sample_rate"])
        fc = float(center_hz if center_hz is not None else cap.get("core:frequency", 0.0))
        when = start or cap.get("core:datetime")
        data = np.memmap(p.with_suffix(".sigmf-data"), dtype="<c8", mode="r")
        data = data[int(cap.get("core:sample_start", 0)):]
    else:
        if sample_rate is None or center_hz is None:
            raise ValueError("a raw recording needs --sample-rate and --center-hz")
        rate, fc, when = float(sample_rate), float(center_hz), start
        data = np.memmap(p, dtype="<c8", mode="r")
    if isinstance(when, str):
        when = datetime.fromisoformat(when.replace("Z", "+00:00"))
    return Recording(data, rate, fc, when)


def recording_reports(rec, plan, n_samples=65536, cal_db=0.0, *, first_seq=0, segment=1024, start=None):
    """Reports (API dicts) for each window of ``n_samples`` samples of ``rec``.

    ``start`` (default the recording's own start, else "now minus the recording's length")
    stamps window 0; window ``w`` is stamped at its end, ``start + (w + 1) N / fs``.
    """
    # Input validation
    if n_samples < 2 * segment:
        segment = max(16, n_samples // 2)
    n_win = len(rec.samples) // n_samples
    if n_win < 1:
        raise ValueError(f"the recording holds {len(rec.samples)} samples, fewer than one window of {n_samples}")

    fc = np.array([c.center_hz for c in plan])
    bw = np.array([c.bandwidth_hz for c in plan])
    ids = [c.id for c in plan]
    x = np.asarray(rec.samples[: n_win * n_samples]).reshape(n_win, n_samples)
    cp = channel_power(x, rec.sample_rate, rec.center_hz, fc, bw, segment=segment, window="hann", overlap=0.5)
    if not cp.in_span.any():
        raise ValueError("no plan channel lies inside the recorded span")
    # Noise density: each bin's Welch average is Gamma-like with ~dof_bin degrees of freedom,
    # whose median is below its mean; divide it out (median of Gamma(a, 1/a)).
    from scipy import signal

    hop = segment // 2
    dof_bin = float(equivalent_dof(signal.get_window("hann", segment), [1], cp.n_segments, hop)[0])
    per_bin = _bin_powers(x, segment)
    med = np.median(per_bin, axis=-1) / stats.gamma(dof_bin, scale=1 / dof_bin).median()
    noise_per_bin = float(np.median(med))
    # Channels outside the span have no bins: NaN, and make_report leaves them out.
    noise_dbm = np.full(len(plan), np.nan)
    noise_dbm[cp.in_span] = 10 * np.log10(noise_per_bin * cp.n_bins[cp.in_span]) + cal_db
    power_dbm = np.where(cp.in_span, 10 * np.log10(np.maximum(np.nan_to_num(cp.power), 1e-300)) + cal_db, np.nan)
    dof = np.where(cp.in_span, np.rint(np.nan_to_num(cp.dof, nan=-1.0)), -1).astype(int)

    if start is None:
        start = rec.start or datetime.now(timezone.utc) - timedelta(seconds=n_win * n_samples / rec.sample_rate)
    seq = first_seq
    out = []
    groups = _dof_groups(dof)
    for w in range(n_win):
        at = start + timedelta(seconds=(w + 1) * n_samples / rec.sample_rate)
        for d, sel in groups:
            out.append(make_report(seq, at, d, [i for i, s in zip(ids, sel) if s], power_dbm[w, sel], noise_dbm[sel]))
            seq += 1
    return out


def _dof_groups(dof, rtol=0.05):
    """Channels whose dof agree within ``rtol`` share a report, stamped with the smallest dof.

    Channel edges rarely fall on bin edges, so equal-width channels differ by a bin; one
    report per window is then kept, at the cost of under-stating ``n_samples`` by < 5 %.
    """
    groups = []
    for d in sorted(set(dof[dof > 0].tolist())):
        if groups and d <= groups[-1][0] * (1 + rtol):
            groups[-1][1] |= dof == d
        else:
            groups.append([d, dof == d])
    return [(d, sel) for d, sel in groups]


def _bin_powers(x, segment):
    """Per-bin Welch powers (Hann, 50 % overlap), shape (n_windows, segment)."""
    from scipy import signal

    w = signal.get_window("hann", segment)
    hop = segment // 2
    n_seg = 1 + (x.shape[-1] - segment) // hop
    idx = np.arange(n_seg)[:, None] * hop + np.arange(segment)
    spec = np.fft.fft(x[:, idx] * w, axis=-1)
    return np.mean(np.abs(spec) ** 2, axis=-2) / (segment * np.sum(w**2))


def classify_response(response):
    """Map an HTTP response of ``POST /api/v1/reports`` to a :class:`SendResult`."""
    s = response.status_code
    if s == 201:
        return SendResult("delivered", s)
    if s == 200:
        return SendResult("duplicate", s)
    if s >= 500 or s == 429:
        return SendResult("retry", s, response.text[:200])
    return SendResult("rejected", s, response.text[:500])


def send_once(client, token, body):
    """One POST of ``body`` (a report or ``{"reports": [...]}``); connection errors mean retry."""
    try:
        r = client.post("/api/v1/reports", json=body, headers={"Authorization": f"Bearer {token}"})
    except httpx.TransportError as exc:
        return SendResult("retry", None, f"{type(exc).__name__}: {exc}")
    return classify_response(r)


def post_reports(client, token, reports, *, batch=100, attempts=6, base_delay_s=0.2, max_delay_s=5.0,
                 sleep=time.sleep):
    """Post ``reports`` in batches, retrying each batch unchanged with exponential backoff.

    Returns the list of :class:`SendResult`, one per batch.  The same body (same seq numbers)
    is re-sent on every attempt, so a batch that did land before its response was lost
    comes back as ``duplicate``, never as a second copy.
    """
    results = []
    for i in range(0, len(reports), batch):
        body = {"reports": reports[i:i + batch]}
        delay = base_delay_s
        for attempt in range(attempts):
            res = send_once(client, token, body)
            if res.outcome != "retry" or attempt == attempts - 1:
                break
            sleep(delay)
            delay = min(max_delay_s, 2 * delay)
        results.append(res)
    return results


@click.command("agent")
@click.argument("recording", type=click.Path(exists=True, dir_okay=False))
@click.option("--plan", "plan_path", required=True, type=click.Path(exists=True, dir_okay=False),
              help="Band plan TOML ([[channel]] id, center_hz, bandwidth_hz).")
@click.option("--n-samples", default=65536, show_default=True, help="Samples per window (one report per window).")
@click.option("--cal-db", default=0.0, show_default=True, help="dB added to sample-unit powers to give dBm.")
@click.option("--sample-rate", type=float, help="Complex sample rate, Hz (raw files).")
@click.option("--center-hz", type=float, help="Tuner frequency, Hz (raw files).")
@click.option("--start", help="RFC 3339 time of the first sample (default from SigMF, else now minus the length).")
@click.option("--first-seq", default=0, show_default=True, help="seq of the first report.")
@click.option("--server", help="Service base URL, e.g. http://127.0.0.1:8000.")
@click.option("--token", envvar="OCCFUSE_NODE_TOKEN", help="The node's bearer token.")
@click.option("--jsonl", is_flag=True, help="Print the reports as JSON lines instead of posting them.")
def agent_command(recording, plan_path, n_samples, cal_db, sample_rate, center_hz, start, first_seq, server, token,
                  jsonl):
    """Turn an IQ RECORDING into per-channel reports; post them, or print them with --jsonl."""
    if not jsonl and not (server and token):
        raise click.UsageError("give --server and --token, or --jsonl")
    try:
        rec = read_recording(recording, sample_rate, center_hz,
                             datetime.fromisoformat(start.replace("Z", "+00:00")) if start else None)
        reports = recording_reports(rec, load_plan(plan_path), n_samples, cal_db, first_seq=first_seq)
    except (ValueError, KeyError) as exc:
        raise click.ClickException(str(exc)) from None
    if jsonl:
        for r in reports:
            sys.stdout.write(json.dumps(r) + "\n")
        return
    with httpx.Client(base_url=server, timeout=10.0) as client:
        results = post_reports(client, token, reports)
    bad = [r for r in results if r.outcome not in {"delivered", "duplicate"}]
    click.echo(f"{len(reports)} reports in {len(results)} batches; {len(bad)} batches failed", err=True)
    for r in bad:
        click.echo(f"  HTTP {r.status}: {r.detail}", err=True)
    if bad:
        raise SystemExit(1)
