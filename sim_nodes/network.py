"""The simulated sensing network: what each node measures, and what was really on the air.

:class:`SimNetwork` fixes everything that does not change during a run when it is built
(geometry, path loss, shadowing, each node's noise-floor error, every transmitter's on/off
timeline, node behaviours), then produces one node's sweep at a time with
:meth:`SimNetwork.measure`.  Two ways to produce a sweep, which agree in law
(``tests/sim/test_network.py``):

``fast``
    Draw the energy statistic straight from its exact distribution (Urkowitz 1967; Gaussian signal: gamma law):
    ``T ~ Gamma(N, 1 + snr)`` for a noise-like (Gaussian) signal, ``2T ~ ncx2(2N, 2N snr)``
    for a constant-envelope OFDM-like one; ``power = sigma^2 T / N``.
``iq``
    Synthesise the node's complex baseband samples over the whole plan (white noise of
    density ``k T NF`` plus each active transmitter's signal, flat over its channel), and
    measure them with :func:`fusion.detection.channelizer.channel_power`.  One window of
    ``N * fs / B`` samples gives each channel exactly ``N`` bins.

All randomness descends from one seed through ``numpy.random.SeedSequence`` children, one
per purpose and per node, so a node's draws do not depend on the order nodes are asked in.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from fusion.detection.channelizer import channel_bins, channel_power
from sim_nodes import propagation as prop
from sim_nodes.activity import markov_timeline, schedule_timeline
from sim_nodes.behaviour import make_behaviour

__all__ = ["NodeSweep", "SimNetwork"]


@dataclass(frozen=True)
class NodeSweep:
    """One node's measurement of every channel at one instant.

    Attributes
    ----------
    node : str
    t : float
        Simulated time, s.
    n_samples : int
        Complex samples per channel.
    power_dbm : ndarray, shape (n_channels,)
        Reported mean power per sample in each channel, dBm.
    noise_dbm : ndarray, shape (n_channels,)
        The node's own (calibrated) noise-floor estimate, dBm.
    """

    node: str
    t: float
    n_samples: int
    power_dbm: np.ndarray
    noise_dbm: np.ndarray


class SimNetwork:
    """Nodes, transmitters and propagation of one scenario, ready to measure.

    Parameters
    ----------
    scenario : Scenario
    horizon_s : float
        Simulated duration; activity timelines are drawn up to it.
    seed : int, default 0
    mode : {"fast", "iq"}, optional
        Overrides the scenario's measurement mode.
    """

    def __init__(self, scenario, horizon_s, seed=0, mode=None):
        self.scenario = scenario
        self.horizon_s = float(horizon_s)
        self.mode = mode or scenario.measurement.mode
        if self.mode not in {"fast", "iq"}:
            raise ValueError(f"`mode` must be 'fast' or 'iq', was {self.mode!r}")
        p = scenario.propagation
        ss = np.random.SeedSequence(seed)
        s_shadow, s_unc, s_act, s_beh, s_meas = ss.spawn(5)

        self.channel_ids = scenario.channel_ids
        self.center_hz = np.array([c.center_hz for c in scenario.channels])
        self.bandwidth_hz = np.array([c.bandwidth_hz for c in scenario.channels])
        nodes, txs = scenario.nodes, scenario.transmitters
        self.node_names = [n.name for n in nodes]
        self.node_pos = np.array([[n.x_m, n.y_m] for n in nodes], float).reshape(-1, 2)
        self.tx_pos = np.array([[t.x_m, t.y_m] for t in txs], float).reshape(-1, 2)
        n_tx, n_ch, n_nodes = len(txs), len(self.channel_ids), len(nodes)

        # Path loss per (transmitter, channel, node) at the channel's centre frequency;
        # a transmitter radiates its EIRP in each of its channels.
        d = np.hypot(*(self.tx_pos[:, None, :] - self.node_pos[None, :, :]).transpose(2, 0, 1))
        d = np.maximum(d, 1e-3)[:, None, :]  # co-located: 1 mm keeps the log finite
        f = self.center_hz[None, :, None]
        if p.model == "free_space":
            pl = prop.free_space_path_loss_db(d, f)
        else:
            pl = prop.log_distance_path_loss_db(d, f, p.exponent, p.reference_m)
        self.path_loss_db = np.broadcast_to(pl, (n_tx, n_ch, n_nodes)).copy()
        # One shadowing field per transmitter over the node positions (Gudmundson 1991).
        self.shadowing_db = prop.correlated_shadowing_db(
            self.node_pos, p.shadowing_db, p.decorrelation_m, s_shadow, size=n_tx
        ).reshape(n_tx, n_nodes)
        on_channel = np.array([[c in t.channels for c in self.channel_ids] for t in txs], bool).reshape(n_tx, n_ch)
        eirp = np.array([t.eirp_dbm for t in txs], float)
        gain = np.array([n.gain_dbi for n in nodes], float)
        rx = eirp[:, None, None] + gain[None, None, :] - self.path_loss_db - self.shadowing_db[:, None, :]
        #: Mean received signal power (before fading) per (transmitter, channel, node), dBm; -inf off-channel.
        self.mean_rx_dbm = np.where(on_channel[:, :, None], rx, -np.inf)

        nf = np.array([n.noise_figure_db for n in nodes], float)
        #: The noise floor each node believes in (kTB + NF), per (node, channel), dBm.
        self.nominal_noise_dbm = prop.thermal_noise_dbm(self.bandwidth_hz[None, :], nf[:, None])
        x = p.noise_uncertainty_db
        #: Each node's true floor minus its calibrated one, dB: U[-x, x] (Tandra & Sahai 2008).
        self.noise_error_db = np.random.default_rng(s_unc).uniform(-x, x, n_nodes) if x > 0 else np.zeros(n_nodes)

        act_rngs = [np.random.default_rng(s) for s in s_act.spawn(max(n_tx, 1))]
        self.timelines = [self._timeline(t, self.horizon_s, r) for t, r in zip(txs, act_rngs)]
        beh_rngs = [np.random.default_rng(s) for s in s_beh.spawn(max(n_nodes, 1))]
        self.behaviours = [make_behaviour(n.behaviour, self.horizon_s, r) for n, r in zip(nodes, beh_rngs)]
        self._rngs = [np.random.default_rng(s) for s in s_meas.spawn(max(n_nodes, 1))]
        self._on_channel = on_channel
        self._n_samples = np.array([n.n_samples for n in nodes], int)
        if self.mode == "iq":
            self._setup_iq()

    @staticmethod
    def _timeline(tx, horizon, rng):
        a = dict(tx.activity)
        if a.get("kind") == "schedule":
            return schedule_timeline(a.get("on", []), horizon)
        return markov_timeline(float(a["mean_on_s"]), float(a["mean_off_s"]), horizon, rng,
                               start_on=a.get("start_on"))

    # ------------------------------------------------------------------ truth

    def transmitters_on(self, t):
        """Which transmitters are on at simulated time ``t``, shape (n_transmitters,)."""
        return np.array([bool(tl.state_at(t)) for tl in self.timelines], bool)

    def occupied(self, t):
        """Ground truth: which channels carry at least one active transmitter at ``t``."""
        on = self.transmitters_on(t)
        return np.any(self._on_channel & on[:, None], axis=0) if on.size else np.zeros(len(self.channel_ids), bool)

    def change_times(self):
        """Sorted instants in ``(0, horizon)`` at which any channel's truth may change."""
        ts = sorted({float(x) for tl in self.timelines for x in tl.times[1:]})
        return ts

    def snr_db(self):
        """Mean per-sample SNR (before fading, all transmitters on) per (node, channel), dB."""
        with np.errstate(divide="ignore"):
            sig = 10 * np.log10(np.sum(10 ** (self.mean_rx_dbm / 10), axis=0)).T
        return sig - self.nominal_noise_dbm

    # ------------------------------------------------------------ measurement

    def measure(self, node, t):
        """Node ``node`` (index or name) sweeps every channel at simulated time ``t``.

        Returns None while the node is silent.
        """
        i = self.node_names.index(node) if isinstance(node, str) else int(node)
        beh, rng = self.behaviours[i], self._rngs[i]
        if not beh.reporting(t):
            return None
        n = int(self._n_samples[i])
        p = self.scenario.propagation
        on = self.transmitters_on(t)
        # Block fading per (transmitter, channel) link and sweep (common practice in link simulation).
        h2 = prop.fading_power_gain(self.mean_rx_dbm.shape[:2], p.fading, p.nakagami_m, rng)
        sig_mw = np.sum(np.where(on[:, None], 10 ** (self.mean_rx_dbm[:, :, i] / 10) * h2, 0.0), axis=0)
        noise_mw = 10 ** ((self.nominal_noise_dbm[i] + self.noise_error_db[i] + beh.noise_offset_db(t)) / 10)
        if self.mode == "fast":
            power_mw = self._fast(n, sig_mw / noise_mw, rng) * noise_mw
        else:
            power_mw = self._iq(i, n, sig_mw, noise_mw, rng)
        reported_noise_mw = 10 ** (self.nominal_noise_dbm[i] / 10)
        power_mw = beh.transform(t, power_mw, reported_noise_mw, n, rng)
        return NodeSweep(self.node_names[i], float(t), n, 10 * np.log10(power_mw), self.nominal_noise_dbm[i].copy())

    def _fast(self, n, snr, rng):
        """``T / N`` drawn from its exact law."""
        if self.scenario.propagation.signal == "gaussian":
            return rng.gamma(n, 1.0 + snr) / n  # T ~ Gamma(N, 1 + snr), exact
        return rng.noncentral_chisquare(2 * n, 2 * n * snr) / (2 * n)  # 2T ~ ncx2(2N, 2N snr)

    # ---------------------------------------------------------------- IQ path

    def _setup_iq(self):
        bw = self.bandwidth_hz
        if not np.allclose(bw, bw[0], rtol=1e-12):
            raise ValueError("IQ mode needs channels of one bandwidth (one n_samples per report)")
        lo, hi = np.min(self.center_hz - bw / 2), np.max(self.center_hz + bw / 2)
        self._iq_m = 2 * math.ceil(self.scenario.measurement.oversample * (hi - lo) / bw[0] / 2)
        self.iq_sample_rate = bw[0] * self._iq_m
        self.iq_center_hz = (lo + hi) / 2
        for n in set(self._n_samples.tolist()):
            mask, in_span = channel_bins(n * self._iq_m, self.iq_sample_rate, self.iq_center_hz, self.center_hz, bw)
            if not in_span.all() or not (mask.sum(axis=1) == n).all():
                raise ValueError(
                    f"IQ mode: channel edges do not fall on FFT bin edges for n_samples={n}; "
                    "use contiguous channels of one bandwidth and an even n_samples"
                )

    def synthesise_iq(self, n, sig_mw, noise_mw, rng):
        """Complex baseband window (mW^0.5 units) of ``n * fs / B`` samples.

        Noise is white ``CN(0, N0 fs)`` with the channel noise ``noise_mw = N0 B``; each channel
        with signal power ``sig_mw`` gets independent spectral lines over its bins: circular
        Gaussian ("gaussian", band-limited noise) or unit-modulus QPSK ("ofdm": one OFDM
        symbol spanning the window, so its energy is deterministic).
        """
        m = self._iq_m
        length = n * m
        mask, _ = channel_bins(length, self.iq_sample_rate, self.iq_center_hz, self.center_hz, self.bandwidth_hz)
        spec = np.zeros(length, complex)
        for c in np.flatnonzero(sig_mw > 0):
            k = np.flatnonzero(mask[c])
            # Per-line variance P L^2 / K makes the in-channel power P (boxcar Parseval).
            amp = math.sqrt(sig_mw[c] * length**2 / k.size)
            if self.scenario.propagation.signal == "gaussian":
                lines = (rng.standard_normal(k.size) + 1j * rng.standard_normal(k.size)) / math.sqrt(2)
            else:
                lines = np.exp(1j * np.pi / 2 * rng.integers(0, 4, k.size) + 1j * np.pi / 4)
            spec[k] = amp * lines
        signal = np.fft.ifft(np.fft.ifftshift(spec))
        # Noise per channel noise_mw[c] = N0 B; white over fs means variance N0 fs = mean * m.
        sigma2 = float(np.mean(noise_mw)) * m
        noise = math.sqrt(sigma2 / 2) * (rng.standard_normal(length) + 1j * rng.standard_normal(length))
        return signal + noise

    def _iq(self, i, n, sig_mw, noise_mw, rng):
        x = self.synthesise_iq(n, sig_mw, noise_mw, rng)
        return channel_power(x, self.iq_sample_rate, self.iq_center_hz, self.center_hz, self.bandwidth_hz).power
