"""The node agent on IQ files synthesised here: raw cf32 and SigMF, tone and band-limited signals."""

import json
from datetime import datetime

import httpx
import numpy as np
import pytest
from click.testing import CliRunner

from fusion.agent import (PlanChannel, Recording, agent_command, post_reports, read_recording,
                          recording_reports)
from fusion.detection.energy import normalise, threshold

FS, FC = 1.0e6, 100.0e6
PLAN = [PlanChannel(f"c{i}", FC + (i - 1.5) * 200e3, 200e3) for i in range(4)]
SIGMA2 = 1e-4  # wideband noise power per complex sample
N_WIN, N = 4, 16384


def plan_file(tmp_path):
    p = tmp_path / "plan.toml"
    p.write_text("".join(f'[[channel]]\nid = "{c.id}"\ncenter_hz = {c.center_hz}\nbandwidth_hz = {c.bandwidth_hz}\n'
                         for c in PLAN))
    return p


def noise(rng, n):
    return np.sqrt(SIGMA2 / 2) * (rng.standard_normal(n) + 1j * rng.standard_normal(n))


def band_limited(rng, n, lo_hz, hi_hz, power):
    """Complex Gaussian noise flat over [lo, hi) (baseband Hz), mean power `power` (FFT-domain synthesis)."""
    f = np.fft.fftfreq(n, 1 / FS)
    sel = (f >= lo_hz) & (f < hi_hz)
    spec = np.zeros(n, complex)
    spec[sel] = rng.standard_normal(sel.sum()) + 1j * rng.standard_normal(sel.sum())
    x = np.fft.ifft(spec)
    return x * np.sqrt(power / np.mean(np.abs(x) ** 2))


def noise_floor_db(cal_db=0.0):
    # White noise of power sigma^2 over fs puts sigma^2 B / fs in a channel of width B (flat PSD).
    return 10 * np.log10(SIGMA2 * 200e3 / FS) + cal_db


def by_channel(reports):
    out = {}
    for r in reports:
        for m in r["measurements"]:
            out.setdefault(m["channel"], []).append((r["n_samples"], m["power_dbm"], m["noise_dbm"]))
    return out


def test_tone_in_a_raw_file_is_reported_with_its_power(tmp_path):
    rng = np.random.default_rng(10)
    a, f_tone = 0.02, 123_456.7  # baseband, inside c2 = [0, 200 kHz)
    t = np.arange(N_WIN * N)
    x = (noise(rng, t.size) + a * np.exp(2j * np.pi * f_tone / FS * t)).astype(np.complex64)
    raw = tmp_path / "tone.cf32"
    x.tofile(raw)
    res = CliRunner().invoke(agent_command, [str(raw), "--plan", str(plan_file(tmp_path)), "--n-samples", str(N),
                                             "--cal-db", "-30", "--sample-rate", str(FS), "--center-hz", str(FC),
                                             "--start", "2026-05-01T10:00:00Z", "--jsonl"])
    assert res.exit_code == 0, res.output
    reports = [json.loads(line) for line in res.output.splitlines()]
    assert len(reports) == N_WIN  # one report per window: equal-width channels share one n_samples
    assert [r["seq"] for r in reports] == list(range(N_WIN))
    assert datetime.fromisoformat(reports[0]["measured_at"]).utcoffset() is not None
    ch = by_channel(reports)
    # Analytic: a tone of amplitude a has power a^2; plus the channel's noise; plus --cal-db.
    expect = 10 * np.log10(a**2 + SIGMA2 * 200e3 / FS) - 30
    for n, p, nz in ch["c2"]:
        assert abs(p - expect) < 0.5
        # occupied by energy detection at Pf = 0.01 (Urkowitz 1967)
        assert normalise(p, nz, n) > threshold(0.01, n)
    for cid in ("c0", "c1", "c3"):
        for n, p, nz in ch[cid]:
            # Near the floor: a Welch estimate with ~1.3e3 dof has sd 10log10(1 + 1/sqrt(dof)) = 0.12 dB
            # per window; the floor estimate adds < 0.1 dB; 0.4 dB is ~3 combined sd. The Hann window's
            # leakage from the tone 23 kHz inside c2 is below -60 dB here.
            assert abs(p - noise_floor_db(-30)) < 0.4
            assert abs(nz - noise_floor_db(-30)) < 0.2


def test_band_limited_signal_in_a_sigmf_recording(tmp_path):
    rng = np.random.default_rng(11)
    p_sig = 4 * SIGMA2 * 200e3 / FS  # 6 dB above the channel's noise
    x = noise(rng, N_WIN * N) + band_limited(rng, N_WIN * N, -300e3 + 10e3, -200e3 - 10e3, p_sig)
    data = tmp_path / "rec.sigmf-data"
    x.astype("<c8").tofile(data)
    (tmp_path / "rec.sigmf-meta").write_text(json.dumps({
        "global": {"core:datatype": "cf32_le", "core:sample_rate": FS, "core:version": "1.0.0"},
        "captures": [{"core:sample_start": 0, "core:frequency": FC, "core:datetime": "2026-05-01T10:00:00Z"}],
        "annotations": []}))
    rec = read_recording(data)
    assert rec.sample_rate == FS and rec.center_hz == FC and rec.start.isoformat().startswith("2026-05-01T10:00:00")
    reports = recording_reports(rec, PLAN, N)
    ch = by_channel(reports)
    expect = 10 * np.log10(p_sig + SIGMA2 * 200e3 / FS)  # signal plus the channel's noise, no calibration
    for n, p, nz in ch["c0"]:
        # 0.5 dB is the brief's tolerance; the estimate's own sd here is ~0.05 dB (1.3e3 dof, 6 dB SNR).
        assert abs(p - expect) < 0.5 and normalise(p, nz, n) > threshold(0.01, n)
    for cid in ("c1", "c2", "c3"):
        assert all(abs(p - noise_floor_db()) < 0.4 for _, p, _ in ch[cid])
    # Window w is stamped at its end: start + (w + 1) N / fs.
    assert reports[1]["measured_at"].startswith("2026-05-01T10:00:00.032768")


def test_channels_outside_the_recorded_span_are_left_out():
    rng = np.random.default_rng(12)
    rec = Recording(noise(rng, 2 * N).astype(np.complex64), FS, FC, None)
    plan = PLAN + [PlanChannel("far", FC + 2e6, 200e3)]
    reports = recording_reports(rec, plan, N)
    assert all(m["channel"] != "far" for r in reports for m in r["measurements"])
    with pytest.raises(ValueError, match="no plan channel"):
        recording_reports(rec, [PlanChannel("far", FC + 2e6, 200e3)], N)


def test_raw_file_needs_rate_and_frequency(tmp_path):
    raw = tmp_path / "x.cf32"
    np.zeros(4096, np.complex64).tofile(raw)
    res = CliRunner().invoke(agent_command, [str(raw), "--plan", str(plan_file(tmp_path)), "--jsonl"])
    assert res.exit_code != 0 and "--sample-rate" in res.output


def test_post_retries_5xx_with_the_same_body_then_stops():
    bodies, answers = [], [503, 503, 201]

    def handler(request):
        bodies.append(request.content)
        assert request.headers["authorization"] == "Bearer node-token"
        return httpx.Response(answers.pop(0))

    slept = []
    reports = [{"seq": 0, "measured_at": "2026-05-01T10:00:00Z", "n_samples": 10,
                "measurements": [{"channel": "c0", "power_dbm": -90.0}]}]
    with httpx.Client(base_url="http://svc", transport=httpx.MockTransport(handler)) as client:
        res = post_reports(client, "node-token", reports, sleep=slept.append)
    assert [r.outcome for r in res] == ["delivered"]
    assert len(bodies) == 3 and len(set(bodies)) == 1  # never renumbered
    assert slept == [0.2, 0.4]  # exponential backoff
