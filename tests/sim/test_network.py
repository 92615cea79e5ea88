"""The simulated network: link budgets, exact measurement laws, and fast vs IQ agreement."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from sim_nodes.network import SimNetwork
from sim_nodes.scenario import parse_scenario


def scenario(*, fading="none", shadowing_db=0.0, model="free_space", signal="gaussian", n_samples=1000,
             eirp_dbm=0.0, distance_m=1000.0, mode="fast", channels=4, behaviour="honest", uncertainty=0.0):
    return parse_scenario({
        "name": "bench-site",
        "propagation": {"model": model, "shadowing_db": shadowing_db, "fading": fading, "signal": signal,
                        "noise_uncertainty_db": uncertainty},
        "measurement": {"mode": mode},
        "channel": [{"id": f"c{k}", "center_hz": 600e6 + (k - 1.5) * 200e3, "bandwidth_hz": 200e3}
                    for k in range(channels)],
        "node": [{"name": "probe", "x_m": distance_m, "y_m": 0.0, "n_samples": n_samples, "noise_figure_db": 7.0,
                  "behaviour": {"kind": behaviour} if isinstance(behaviour, str) else behaviour}],
        "transmitter": [{"name": "tx", "x_m": 0.0, "y_m": 0.0, "eirp_dbm": eirp_dbm, "channels": ["c1"],
                         "activity": {"kind": "schedule", "on": [[0.0, 1e9]]}}],
    })


class TestLinkBudget:
    def test_received_power_matches_friis_by_hand_within_a_tenth_of_a_db(self):
        # Friis (1946): P_r = P_t G_t G_r (lambda / (4 pi d))^2, computed here by hand for 1 km at the
        # channel's centre frequency 599.9 MHz, isotropic antennas, EIRP 0 dBm.
        net = SimNetwork(scenario(), 10.0)
        lam = 299_792_458.0 / 599.9e6
        by_hand_dbm = 10 * np.log10(1.0 * (lam / (4 * np.pi * 1000.0)) ** 2)
        assert abs(net.mean_rx_dbm[0, 1, 0] - by_hand_dbm) < 0.1
        # and the literal check value at exactly 600 MHz (recomputed by hand): FSPL 88.01080823 dB
        assert abs(-by_hand_dbm - 88.01080823) < 0.01  # 100 kHz off 600 MHz moves FSPL by 0.0014 dB

    def test_log_distance_budget_matches_rappaport_example(self):
        # Rappaport (2002) section 4.9, n = 3.5, d0 = 1 m: PL(1 km, 600 MHz) = 133.0108082 dB; our channel
        # sits at 599.9 MHz, 20 log10(600/599.9) = 0.0014 dB lower.
        sc = parse_scenario({**_raw(), "propagation": {"model": "log_distance", "exponent": 3.5,
                                                       "shadowing_db": 0.0, "fading": "none"}})
        net = SimNetwork(sc, 10.0)
        assert abs(-net.mean_rx_dbm[0, 1, 0] - 133.0108082) < 0.1

    def test_measured_power_before_fading_is_signal_plus_noise(self):
        # With N = 2e6 samples the measured power's relative sd is (1 + snr)/sqrt(N) < 0.003 dB, so the
        # measured power equals the budget (noise kTB NF plus the Friis signal) within 0.1 dB.
        net = SimNetwork(scenario(n_samples=2_000_000, eirp_dbm=-20.0), 10.0)
        sweep = net.measure(0, 1.0)
        noise = net.nominal_noise_dbm[0, 1]
        expect = 10 * np.log10(10 ** (noise / 10) + 10 ** (net.mean_rx_dbm[0, 1, 0] / 10))
        assert abs(sweep.power_dbm[1] - expect) < 0.1
        assert abs(sweep.power_dbm[0] - noise) < 0.1
        assert_allclose(sweep.noise_dbm, -174.0 + 10 * np.log10(200e3) + 7.0, atol=0.03)  # -174 dBm/Hz rounding


class TestFastLaws:
    @pytest.mark.parametrize("signal", ["gaussian", "ofdm"])
    def test_fast_statistic_follows_its_exact_law(self, signal):
        # Urkowitz (1967) and the Gaussian-signal law: Gaussian signal T ~ Gamma(N, 1 + snr);
        # deterministic energy 2T ~ ncx2(2N, 2N snr).
        n = 64
        net = SimNetwork(scenario(signal=signal, n_samples=n, eirp_dbm=-30.0), 10.0, seed=3)
        snr = 10 ** ((net.mean_rx_dbm[0, 1, 0] - net.nominal_noise_dbm[0, 1]) / 10)
        p = np.array([net.measure(0, 1.0).power_dbm[1] for _ in range(1500)])
        t = n * 10 ** ((p - net.nominal_noise_dbm[0, 1]) / 10)
        law = stats.gamma(n, scale=1 + snr) if signal == "gaussian" else stats.ncx2(2 * n, 2 * n * snr, scale=0.5)
        assert stats.kstest(t, law.cdf).pvalue > 1e-3  # seeded; 1e-3 level


class TestFastAgreesWithIQ:
    @pytest.mark.parametrize("signal", ["gaussian", "ofdm"])
    def test_mean_and_variance_of_channel_power_agree(self, signal):
        # Both paths draw n_mc independent per-channel powers (linear) for an occupied and a free channel.
        # Mean: the difference of two sample means has se sqrt(2 var / n_mc); tolerance 4 se.
        # Variance: the log of a sample variance has se sqrt((2 + kurt)/n_mc), kurt = excess kurtosis of
        # the law (6/N for a Gamma(N)); the difference of two has sqrt(2) times that; tolerance 4 se.
        n, n_mc = 64, 1000
        out = {}
        for mode in ("fast", "iq"):
            net = SimNetwork(scenario(signal=signal, n_samples=n, eirp_dbm=-35.0, mode=mode), 10.0, seed=11)
            p = np.array([10 ** (net.measure(0, 1.0).power_dbm[:2] / 10) for _ in range(n_mc)])
            out[mode] = p
        for c in (0, 1):
            a, b = out["fast"][:, c], out["iq"][:, c]
            assert abs(a.mean() - b.mean()) < 4 * np.sqrt((a.var() + b.var()) / n_mc)
            se = np.sqrt(2 * (2 + 6 / n) / n_mc)
            assert abs(np.log(a.var()) - np.log(b.var())) < 4 * se

    def test_iq_mode_needs_bin_aligned_channels(self):
        sc = parse_scenario({**_raw(), "measurement": {"mode": "iq"},
                             "channel": [{"id": "c0", "center_hz": 600e6, "bandwidth_hz": 200e3},
                                         {"id": "c1", "center_hz": 600.5e6, "bandwidth_hz": 100e3}],
                             "transmitter": []})
        with pytest.raises(ValueError, match="one bandwidth"):
            SimNetwork(sc, 10.0)


class TestTruthAndRepeatability:
    def test_same_seed_gives_same_sweeps_and_other_seed_does_not(self):
        sc = parse_scenario({**_raw(), "propagation": {"fading": "rayleigh", "shadowing_db": 6.0}})
        a = [SimNetwork(sc, 10.0, seed=4).measure(0, t).power_dbm for t in (1.0,)]
        b = [SimNetwork(sc, 10.0, seed=4).measure(0, t).power_dbm for t in (1.0,)]
        c = [SimNetwork(sc, 10.0, seed=5).measure(0, t).power_dbm for t in (1.0,)]
        assert_allclose(a, b, rtol=0)
        assert not np.allclose(a, c)

    def test_occupied_follows_the_transmitter_schedule(self):
        sc = parse_scenario({**_raw(), "transmitter": [{"name": "tx", "x_m": 0.0, "y_m": 0.0, "eirp_dbm": 0.0,
                                                        "channels": ["c1", "c3"],
                                                        "activity": {"kind": "schedule", "on": [[2.0, 5.0]]}}]})
        net = SimNetwork(sc, 10.0)
        assert net.occupied(1.0).tolist() == [False, False, False, False]
        assert net.occupied(3.0).tolist() == [False, True, False, True]
        assert net.change_times() == [2.0, 5.0]

    def test_noise_uncertainty_stays_within_its_bound(self):
        sc = parse_scenario({**_raw(), "node": [{"name": f"n{i}", "x_m": 10.0 * i, "y_m": 0.0} for i in range(50)],
                             "propagation": {"noise_uncertainty_db": 1.0}})
        err = SimNetwork(sc, 10.0, seed=2).noise_error_db
        assert np.all(np.abs(err) <= 1.0) and err.std() > 0.3  # U[-1, 1] has sd 0.577


def _raw():
    return {"name": "bench-site", "propagation": {"model": "free_space", "shadowing_db": 0.0, "fading": "none"},
            "channel": [{"id": f"c{k}", "center_hz": 600e6 + (k - 1.5) * 200e3, "bandwidth_hz": 200e3}
                        for k in range(4)],
            "node": [{"name": "probe", "x_m": 1000.0, "y_m": 0.0}],
            "transmitter": [{"name": "tx", "x_m": 0.0, "y_m": 0.0, "eirp_dbm": 0.0, "channels": ["c1"],
                             "activity": {"kind": "schedule", "on": [[0.0, 1e9]]}}]}
