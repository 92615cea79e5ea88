"""Tests for fusion.detection.tracking.MarkovTracker.

References: the forward (alpha) recursion of a two-state hidden Markov chain (Rabiner,
Proc. IEEE 77(2), 1989, eqs. 19-21), written out here as a plain loop; and the maximum-
likelihood transition rates of a fully observed chain (transition counts over visits,
same paper, eq. 40b with known states).  Evidence is a Gaussian observation
``y ~ N(mu x, 1)`` with likelihood ratio ``exp(mu y - mu^2 / 2)`` (textbook Neyman-Pearson).
"""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import special

from fusion.detection.tracking import MarkovTracker


def chain(rng, n_epochs, n_channels, p_on, p_off):
    """True occupancy (n_epochs, n_channels) of a two-state chain started at its stationary law."""
    x = np.zeros((n_epochs, n_channels), bool)
    x[0] = rng.random(n_channels) < p_on / (p_on + p_off)
    for e in range(1, n_epochs):
        u = rng.random(n_channels)
        x[e] = np.where(x[e - 1], u >= p_off, u < p_on)
    return x


def gaussian_log_lr(rng, x, mu):
    y = rng.normal(mu * x, 1.0)
    return mu * y - mu**2 / 2


class TestMarkovTracker:
    def test_input_validation(self):
        with pytest.raises(ValueError, match=r"`p_on` must lie in \(0, 1\), was 0"):
            MarkovTracker(3, p_on=0).prior_
        with pytest.raises(ValueError, match="`n_channels` must be a positive integer"):
            MarkovTracker(0).prior_
        with pytest.raises(ValueError, match="`lag` must be a positive integer, was 0"):
            MarkovTracker(2, lag=0).prior_
        tr = MarkovTracker(3)
        with pytest.raises(ValueError, match=r"`p_obs` must have shape \(3,\), was \(2,\)"):
            tr.update(np.array([0.5, 0.5]))
        with pytest.raises(ValueError, match="`p_obs` must lie in \\[0, 1\\] or be NaN, was 1.5"):
            tr.update(np.array([0.5, 1.5, np.nan]))
        with pytest.raises(ValueError, match="`state` lacks"):
            tr.set_state({"p_on": np.full(3, 0.1)})
        bad = tr.get_state()
        bad["p_off"] = np.full(3, 2.0)
        with pytest.raises(ValueError, match=r"`state\['p_off'\]` must lie in \[0, 1\]"):
            tr.set_state(bad)

    def test_against_reference(self):
        # With fixed rates the filter is exactly the normalised forward recursion.
        rng = np.random.default_rng(3)
        p_on, p_off, mu = 0.08, 0.2, 1.0
        x = chain(rng, 60, 5, p_on, p_off)
        log_lr = gaussian_log_lr(rng, x, mu)
        tr = MarkovTracker(5, p_on=p_on, p_off=p_off, learn=False)
        a = np.array([[1 - p_on, p_on], [p_off, 1 - p_off]])
        alpha = np.tile([p_off, p_on], (5, 1)) / (p_on + p_off)  # stationary start
        for e in range(60):
            prior = tr.prior_
            tr.update(special.expit(special.logit(prior) + log_lr[e]))
            b = np.stack([np.ones(5), np.exp(log_lr[e])], axis=1)  # b_j(y) up to a common factor
            alpha = (alpha @ a) * b  # Rabiner (1989) eq. 20
            alpha /= alpha.sum(axis=1, keepdims=True)
            assert_allclose(tr.p_occupied_, alpha[:, 1], rtol=1e-10)

    def test_learned_rates_match_the_fully_observed_estimate(self):
        # Learned from noisy evidence, the rates approach the counts a fully observed chain
        # gives. Tolerance 0.012 absolute: 10% of p_off. Counting each transition at its own
        # epoch (no lag) learns p_off about 0.023 too low here, and fails this test.
        rng = np.random.default_rng(17)
        p_on, p_off, mu = 0.05, 0.12, 2.0
        x = chain(rng, 1500, 32, p_on, p_off)
        log_lr = gaussian_log_lr(rng, x, mu)
        tr = MarkovTracker(32)  # starts at 0.05 / 0.05: p_off must be learned
        for e in range(x.shape[0]):
            prior = tr.prior_
            tr.update(special.expit(special.logit(prior) + log_lr[e]))
        prev, nxt = x[:-1], x[1:]
        mle_on = np.sum(~prev & nxt) / np.sum(~prev)
        mle_off = np.sum(prev & ~nxt) / np.sum(prev)
        assert abs(tr.p_on_.mean() - mle_on) < 0.012
        assert abs(tr.p_off_.mean() - mle_off) < 0.012

    def test_edge_cases(self):
        tr = MarkovTracker(2, p_on=0.1, p_off=0.3)
        assert_allclose(tr.prior_, 0.25)  # stationary law p_on / (p_on + p_off)
        before = tr.get_state()
        tr.update(np.array([np.nan, np.nan]))  # no evidence: prediction only, no counts
        assert_allclose(tr.counts_, 0.0)
        assert_allclose(tr.p_occupied_, before["p_occupied"] * 0.7 + (1 - before["p_occupied"]) * 0.1)
        # Certain evidence (0 or 1) does not overflow and pins the posterior.
        tr.update(np.array([0.0, 1.0]))
        assert np.all(np.isfinite(tr.p_occupied_))
        assert tr.p_occupied_[0] < 1e-9 and tr.p_occupied_[1] > 1 - 1e-9
        # A saved state round-trips; a state saved before the lag-1 count existed still loads.
        other = MarkovTracker(2, p_on=0.1, p_off=0.3).set_state(tr.get_state())
        assert_allclose(other.prior_, tr.prior_)
        old = {k: v for k, v in tr.get_state().items() if not k.startswith("lag_")}
        assert_allclose(MarkovTracker(2).set_state(old).p_on_, tr.p_on_)
        # Learned rates stay inside [min_rate, max_rate] however extreme the evidence.
        tr = MarkovTracker(1, min_rate=0.01, max_rate=0.4)
        for e in range(200):
            tr.update(np.array([float(e % 2)]))
        assert 0.01 <= tr.p_on_[0] <= 0.4 and 0.01 <= tr.p_off_[0] <= 0.4
