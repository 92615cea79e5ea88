"""Tests for fusion.detection.calibration and for the calibration of every rule's posterior.

Reliability curve and expected calibration error as defined by DeGroot & Fienberg (1983)
and Naeini, Cooper & Hauskrecht (AAAI 2015).  The simulated epochs follow the exact energy
laws (Urkowitz 1967; Digham, Alouini & Simon 2007): ``T ~ Gamma(N, 1)`` when free and
``2T ~ ncx2(2N, 2N snr)`` when occupied, on channels that switch as a two-state Markov chain.
"""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from fusion.detection import calibration, rules
from fusion.detection.tracking import MarkovTracker


class TestCalibration:
    def test_input_validation(self):
        with pytest.raises(ValueError, match="`p` and `truth` must have the same size, were 2 and 3"):
            calibration.calibration([0.1, 0.2], [0, 1, 1])
        with pytest.raises(ValueError, match="`p` must lie in \\[0, 1\\] or be NaN, was 1.2"):
            calibration.calibration([0.1, 1.2], [0, 1])
        with pytest.raises(ValueError, match="`truth` must hold only 0/1"):
            calibration.calibration([0.1, 0.2], [0, 2])
        with pytest.raises(ValueError, match="`n_bins` must be a positive integer, was 0"):
            calibration.calibration([0.1], [0], n_bins=0)

    def test_against_reference(self):
        # Worked by hand: bins [0, .1) holds 0.05 (false), [.1, .2) holds 0.15 twice (one true),
        # [.9, 1] holds 0.95 (true). ECE = (1 * 0.05 + 2 * 0.35 + 1 * 0.05) / 4 = 0.2.
        res = calibration.calibration([0.05, 0.15, 0.15, 0.95], [0, 1, 0, 1], n_bins=10)
        assert res.count.tolist() == [1, 1 + 1, 0, 0, 0, 0, 0, 0, 0, 1]
        assert_allclose(res.mean_p[[0, 1, 9]], [0.05, 0.15, 0.95])
        assert_allclose(res.frac_true[[0, 1, 9]], [0.0, 0.5, 1.0])
        assert_allclose(res.ece, 0.2, rtol=1e-12)
        # A forecaster that states the true probability has ECE near 0; one that squares it does not.
        rng = np.random.default_rng(8)
        p = rng.random(100_000)
        y = rng.random(p.size) < p
        # 10 bins of ~10,000 forecasts: each gap has standard error <= 0.005, so 0.01 is ~2 SE.
        assert calibration.calibration(p, y).ece < 0.01
        assert calibration.calibration(p**2, y).ece > 0.1

    def test_edge_cases(self):
        res = calibration.calibration([np.nan, 1.0, 0.0], [1, 1, 0], n_bins=4)
        assert res.count.tolist() == [1, 0, 0, 1]  # NaN ignored; p = 1 falls in the last bin
        assert np.isnan(res.mean_p[1]) and res.ece == 0.0
        assert calibration.calibration([], [], n_bins=3).ece == 0.0


N = 100                                              # complex samples per measurement
SNR = np.array([0.1, 0.16, 0.06, 0.2, 0.12, 0.08])    # per-sample SNR of six nodes (-12..-7 dB)
P_ON, P_OFF = 0.05, 0.1                               # channel switching per epoch
N_EPOCHS, N_CHANNELS, BURN_IN = 300, 64, 50


@pytest.fixture(scope="module")
def epochs():
    rng = np.random.default_rng(11)
    x = np.zeros((N_EPOCHS, N_CHANNELS), bool)
    x[0] = rng.random(N_CHANNELS) < P_ON / (P_ON + P_OFF)
    for e in range(1, N_EPOCHS):
        u = rng.random(N_CHANNELS)
        x[e] = np.where(x[e - 1], u >= P_OFF, u < P_ON)
    shape = (N_EPOCHS, SNR.size, N_CHANNELS)
    t0 = rng.gamma(N, 1.0, size=shape)
    t1 = rng.noncentral_chisquare(2 * N, 2 * N * SNR[None, :, None], size=shape) / 2
    return x, np.where(x[:, None, :], t1, t0)


@pytest.mark.parametrize("rule", sorted(rules.RULES))
def test_every_rule_states_calibrated_confidence(rule, epochs):
    # The epoch loop as the service runs it: fuse with the tracker's prior, then update the
    # tracker, whose switching rates start wrong (0.05 / 0.05) and are learned. Among the
    # posteriors stated as c, the channel is occupied a fraction c of the time: ECE < 0.03
    # (the figure; 16,000 channel-epochs scored after a 50-epoch burn-in). With nodes
    # 3 dB weaker, `or` needs several hundred epochs to learn the rates and overstates its
    # confidence until then (README, "Choosing a rule").
    x, t = epochs
    tracker = MarkovTracker(N_CHANNELS)
    p = np.empty((N_EPOCHS, N_CHANNELS))
    for e in range(N_EPOCHS):
        prior = np.clip(tracker.prior_, 1e-6, 1 - 1e-6)
        res = rules.fuse(t[e], N, rule=rule, target_pf=0.05, snr=SNR, prior=prior,
                         k=3 if rule == "k_of_n" else None)
        p[e] = res.p_occupied
        tracker.update(res.p_occupied, prior_used=prior)
    cal = calibration.calibration(p[BURN_IN:], x[BURN_IN:], n_bins=10)
    assert cal.ece < 0.03
    # Confident statements are the ones users act on: the "free" bin (p < 0.1) must be free
    # at least 90% of the time, minus 4 binomial standard errors.
    n0 = cal.count[0]
    assert 1 - cal.frac_true[0] >= 0.9 - 4 * np.sqrt(0.09 / n0)
