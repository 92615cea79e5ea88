"""Unit tests of fusion.detection.reliability on synthetic votes, energies and decisions.

Sources of the checks:
- Beta-binomial conjugacy: a Beta(a, b) prior and k successes in n Bernoulli trials give a
  Beta(a + k, b + n - k) posterior (Gelman et al., "Bayesian Data Analysis", ch. 2; from
  memory).  Quantiles and moments are recomputed with scipy.stats.beta.
- Energy-detector laws (Urkowitz 1967; Digham, Alouini, Simon 2007):
  T ~ Gamma(N, 1) under H0, 2T ~ ncx2(2N, 2N snr) under H1, E[T] = N(1 + snr) and
  Var[T] = N(1 + 2 snr) for a deterministic signal (Liang et al. 2008).
- Agreement counting against fused decisions (a hard-label step of Dawid & Skene 1979), Chair & Varshney
  (1986) vote weights for the leave-one-out contribution.
"""

import json
import re

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import special, stats

from fusion.detection.reliability import FLAGS, PINS, ReliabilityModel

N = 50


def in_spec(epoch, n_nodes, n_channels=8):
    """Votes with one false alarm in 8 (Pf 0.125, inside the default band [0.05, 0.2])."""
    return np.tile((np.arange(n_channels) == epoch % n_channels).astype(float), (n_nodes, 1))


def feed(model, votes, p, *, epoch, power=None, noise=None, t=None, **kw):
    """One update with report time = epoch, now = epoch + 0.5, max age 2 s."""
    votes = np.asarray(votes, dtype=float)
    # Energies only matter for SNR and the stuck check here: make them new at every epoch.
    t = np.where(np.isfinite(votes), 1.0 + epoch, np.nan) if t is None else t
    return model.update(t=t, n_samples=N, report_time_s=np.full(votes.shape[0], float(epoch)),
                        now_s=epoch + 0.5, max_age_s=2.0, p_occupied=np.asarray(p, dtype=float),
                        votes=votes, power_dbm=power, noise_dbm_reported=noise, **kw)


class TestInputValidation:
    @pytest.mark.parametrize("params, message", [
        ({"prior_pd": (0.0, 1.0)}, "`prior_pd` must be two positive numbers"),
        ({"prior_pd": (1.0, 4.0), "prior_pf": (4.0, 1.0)}, "`prior_pd` must have a larger mean"),
        ({"confidence_bar": 1.2}, "`confidence_bar` must lie in (0.5, 1), was 1.2"),
        ({"local_pf": 1.0}, "`local_pf` must lie in (0, 1), was 1.0"),
        ({"suspect_trust": -0.1}, "`suspect_trust` must lie in [0, 1], was -0.1"),
        ({"memory": 0.0}, "`memory` must be positive, was 0.0"),
        ({"stuck_epochs": 2.5}, "`stuck_epochs` must be a positive integer, was 2.5"),
        ({"clear_prob": 0.995}, "`clear_prob` must not exceed `suspect_prob`"),
    ])
    def test_bad_parameters_are_refused_at_first_use(self, params, message):
        model = ReliabilityModel(**params)  # stored untouched, checked on use (scikit-learn style)
        assert all(getattr(model, k) is v for k, v in params.items())
        with pytest.raises(ValueError, match=re.escape(message)):
            model.resize(2, n_channels=3)

    def test_update_shapes_and_values(self):
        model = ReliabilityModel().resize(2, n_channels=3)
        good = dict(t=np.ones((2, 3)), n_samples=N, report_time_s=[0.0, 0.0], now_s=1.0,
                    max_age_s=2.0, p_occupied=[0.5, 0.5, 0.5])
        cases = [
            ({"t": np.ones(3)}, "`t` must have shape (n_nodes, n_channels)"),
            ({"t": np.ones((2, 4))}, "`t` must have 3 channels, was 4"),
            ({"t": np.ones((1, 3))}, "`t` must have at least 2 rows"),
            ({"n_samples": 0}, "`n_samples` must be positive, was 0.0"),
            ({"report_time_s": [0.0]}, "`report_time_s` must have shape (2,)"),
            ({"now_s": np.nan}, "`now_s` must be finite"),
            ({"max_age_s": 0.0}, "`max_age_s` must be positive, was 0.0"),
            ({"p_occupied": [0.5, 1.5, 0.5]}, "`p_occupied` must lie in [0, 1], was 1.5"),
            ({"p_occupied": [0.5, 0.5]}, "`p_occupied` must have shape (3,)"),
            ({"votes": np.full((2, 3), 2.0)}, "`votes` must be 0, 1 or NaN, was 2.0"),
            ({"local_pf": 0.0}, "`local_pf` must lie in (0, 1), was 0.0"),
            ({"power_dbm": np.ones((3, 2))}, "`power_dbm` must have shape (2, 3)"),
            ({"noise_dbm_reported": np.ones(3)}, "`noise_dbm_reported` must have shape (2,)"),
            ({"contribution": np.ones(2)}, "`contribution` must have shape (2, 3)"),
            ({"pinned": ["trusted"]}, "`pinned` must have 2 entries, was 1"),
            ({"pinned": ["trusted", "maybe"]}, "`pinned` entries must be one of"),
        ]
        for change, message in cases:
            with pytest.raises(ValueError, match=re.escape(message)):
                model.update(**{**good, **change})

    def test_resize_only_grows_and_keeps_channels(self):
        model = ReliabilityModel().resize(3, n_channels=2)
        with pytest.raises(ValueError, match="`n_nodes` must be an integer >= 3"):
            model.resize(2)
        with pytest.raises(ValueError, match="`n_channels` must stay 2, was 5"):
            model.resize(4, n_channels=5)
        with pytest.raises(ValueError, match="`n_channels` must be a positive integer"):
            ReliabilityModel().resize(3)

    def test_from_state_refuses_other_versions(self):
        with pytest.raises(ValueError, match="`state` must be a dict of version 1, was 99"):
            ReliabilityModel.from_state({"version": 99})
        with pytest.raises(ValueError, match="was 'list'"):
            ReliabilityModel.from_state([])


class TestBetaCounts:
    """Pd and Pf as Beta posteriors of votes against confident labels."""

    def test_new_node_starts_at_the_prior_and_neutral(self):
        model = ReliabilityModel().resize(2, n_channels=4)
        # Prior means of Beta(4, 1) and Beta(1, 9): 0.8 and 0.1 (Beta mean a / (a + b)).
        assert_allclose(model.pd_, 0.8, rtol=1e-12)
        assert_allclose(model.pf_, 0.1, rtol=1e-12)
        assert np.all(np.isnan(model.noise_dbm_)) and np.all(np.isnan(model.snr_))
        # Trust of a newcomer: P(0.05 <= Pf <= 0.2) P(Pd >= 0.05) under the prior.
        want = ((stats.beta.cdf(0.2, 1, 9) - stats.beta.cdf(0.05, 1, 9)) * stats.beta.sf(0.05, 4, 1))
        assert_allclose(model.trust_, want, rtol=1e-12)
        assert model.flags_ == [["silent"], ["silent"]]  # never reported yet

    def test_against_reference_conjugate_posterior(self):
        # No forgetting (memory huge) and no leave-one-out: plain agreement counting.
        model = ReliabilityModel(memory=1e15, leave_one_out=False)
        rng = np.random.default_rng(11)
        k_d = np.zeros(3)
        n_d = k_d.copy()
        k_f, n_f = k_d.copy(), k_d.copy()
        for epoch in range(40):
            p = rng.choice([0.02, 0.5, 0.98], size=6)  # free, ambiguous, occupied labels
            votes = (rng.random((3, 6)) < np.array([[0.7], [0.5], [0.2]])).astype(float)
            feed(model, votes, p, epoch=epoch)
            k_d += votes[:, p >= 0.9].sum(1)
            n_d += (p >= 0.9).sum()
            k_f += votes[:, p <= 0.1].sum(1)
            n_f += (p <= 0.1).sum()
        a, b = 4 + k_d, 1 + n_d - k_d
        # Tolerance: float round-off of the forgetting factor 1 - 1e-15 over ~100 steps.
        assert_allclose(model.pd_, stats.beta.mean(a, b), rtol=1e-9)
        assert_allclose(model.pd_std_, stats.beta.std(a, b), rtol=1e-9)
        assert_allclose(model.pd_ci_, np.stack([stats.beta.ppf(0.025, a, b),
                                                stats.beta.ppf(0.975, a, b)], 1), rtol=1e-8)
        a, b = 1 + k_f, 9 + n_f - k_f
        assert_allclose(model.pf_, stats.beta.mean(a, b), rtol=1e-9)
        assert_allclose(model.pf_ci_[:, 1], stats.beta.ppf(0.975, a, b), rtol=1e-8)

    def test_literal_posterior(self):
        # Beta(1, 9) prior, 10 false alarms in 40 free labels -> Beta(11, 39): mean 11/50 = 0.22.
        model = ReliabilityModel(memory=1e15, leave_one_out=False)
        votes = np.r_[np.ones(10), np.zeros(30)][None, :]
        feed(model, votes, np.full(40, 0.01), epoch=0)
        assert_allclose(model.pf_, [0.22], rtol=1e-12)
        assert_allclose(model.pd_, [0.8], rtol=1e-12)  # no occupied label: still the prior

    def test_forgetting_keeps_about_memory_observations(self):
        # One labelled vote per epoch: n_m = sum_{j<m} lam^j = (1 - lam^m) / (1 - lam), lam = 1 - 1/M.
        model = ReliabilityModel(memory=20.0, leave_one_out=False)
        for epoch in range(60):
            feed(model, [[1.0]], [0.99], epoch=epoch)
        lam = 1 - 1 / 20
        assert_allclose(model.nd_, (1 - lam**60) / (1 - lam), rtol=1e-12)
        assert model.nd_[0] < 20.0

    def test_default_votes_follow_the_local_threshold(self):
        # The model votes T > gammainccinv(N, local_pf) itself: under H0 its Pf is local_pf
        # (Digham et al. 2007).  1200 labels; tolerance 4 binomial standard errors.
        rng = np.random.default_rng(5)
        model = ReliabilityModel(memory=1e15, leave_one_out=False, local_pf=0.2)
        for epoch in range(100):
            t = rng.gamma(N, 1.0, size=(1, 12))
            model.update(t=t, n_samples=N, report_time_s=[float(epoch)], now_s=epoch + 0.5,
                         max_age_s=2.0, p_occupied=np.full(12, 0.01))
        se = np.sqrt(0.2 * 0.8 / 1200)
        assert abs(model.pf_[0] - 0.2) < 4 * se

    def test_per_channel_rates_shrink_to_the_node_value(self):
        model = ReliabilityModel(memory=1e15, leave_one_out=False, channel_shrinkage=10.0)
        # Channel 0: 30 detections out of 30; channel 1: never labelled.
        for epoch in range(30):
            feed(model, [[1.0, 0.0]], [0.99, 0.5], epoch=epoch)
        pd = model.pd_[0]
        assert_allclose(model.pd_channel_[0], [(30 + 10 * pd) / 40, pd], rtol=1e-12)


class TestNoiseFloor:
    def test_against_reference_median_of_gamma_law(self):
        # Powers under H0: P = sigma^2 Gamma(N, 1) / N, sigma = -97 dBm.  Per cell the dB value
        # has sd ~ (10 / ln 10) / sqrt(N) = 0.61 dB (delta method); the median of 8 cells and
        # then of 21 epochs shrinks it to ~0.08 dB (median efficiency 1.25): allow 0.35 dB.
        rng = np.random.default_rng(3)
        model = ReliabilityModel()
        for epoch in range(30):
            power = -97 + 10 * np.log10(rng.gamma(N, 1.0, size=(2, 8)) / N)
            # Channels 6-7 are occupied (10 dB above the floor): they must not bias the floor.
            power[:, 6:] += 10.0
            p = np.r_[np.full(6, 0.01), 0.99, 0.99]
            feed(model, in_spec(epoch, 2), p, epoch=epoch, power=power, noise=[-97.0, np.nan])
            if epoch == 3:  # noise_min_epochs = 5 estimates are needed
                assert np.all(np.isnan(model.noise_dbm_))
        assert_allclose(model.noise_dbm_, -97.0, atol=0.35)
        assert model.flags_ == [[], []]
        filled = model.noise_for(np.array([-97.0, np.nan]))
        assert filled[0] == -97.0 and abs(filled[1] + 97.0) < 0.35

    def test_drift_is_flagged_and_the_learned_floor_replaces_the_figure(self):
        rng = np.random.default_rng(4)
        model = ReliabilityModel(drift_margin_db=2.0, noise_window=9)
        for epoch in range(12):
            power = -97 + 10 * np.log10(rng.gamma(N, 1.0, size=(2, 8)) / N)
            feed(model, in_spec(epoch, 2), np.full(8, 0.01), epoch=epoch, power=power,
                 noise=[-100.0, -97.0])  # node 0 still claims -100 dBm: 3 dB off
        assert model.flags_ == [["drift"], []]
        assert_allclose(model.trust_[0] / model.trust_[1], 0.5, rtol=0.05)  # drift_trust = 0.5
        assert_allclose(model.noise_for(np.array([-100.0, -97.0])), [-97.0, -97.0], atol=0.35)
        keep = ReliabilityModel(learned_noise_on_drift=False, noise_window=9)
        keep.__dict__.update({k: v for k, v in model.__dict__.items() if k.endswith("_")})
        assert keep.noise_for(np.array([-100.0, -97.0]))[0] == -100.0

    def test_a_suspect_node_is_not_repaired_by_the_learned_floor(self):
        # Node 0 reports 3 dB too high everywhere and votes 1 on every free channel: it is
        # suspect first, so noise_for keeps its own figure (an offset liar stays visible).
        rng = np.random.default_rng(6)
        model = ReliabilityModel(noise_window=9)
        for epoch in range(12):
            power = -97 + 10 * np.log10(rng.gamma(N, 1.0, size=(2, 8)) / N)
            votes = np.vstack([np.ones(8), in_spec(epoch, 1)])
            feed(model, votes, np.full(8, 0.01), epoch=epoch, power=power, noise=[-100.0, -97.0])
        assert model.flags_ == [["suspect", "drift"], []]
        assert model.noise_for(np.array([-100.0, -97.0]))[0] == -100.0

    def test_no_learning_from_unlabelled_channels(self):
        model = ReliabilityModel()
        for epoch in range(10):
            feed(model, np.zeros((1, 3)), [0.5, 0.7, 0.3], epoch=epoch, power=np.full((1, 3), -90.0))
        assert np.isnan(model.noise_dbm_[0]) and model.nd_[0] == 0 and model.nf_[0] == 0


class TestSnr:
    def test_against_reference_ncx2_mean(self):
        # 2T ~ ncx2(2N, 2N snr): E[T/N - 1] = snr and Var = (1 + 2 snr) / N (Liang et al. 2008).
        # The exponentially weighted mean has variance Var * sum(w^2) / sum(w)^2.
        rng = np.random.default_rng(8)
        snr, m = 0.5, 50.0
        model = ReliabilityModel(snr_memory=m)
        for epoch in range(200):
            t = rng.noncentral_chisquare(2 * N, 2 * N * snr, size=(1, 16)) / 2
            model.update(t=t, n_samples=N, report_time_s=[float(epoch)], now_s=epoch + 0.5,
                         max_age_s=2.0, p_occupied=np.full(16, 0.999))
        w = (1 - 1 / m) ** np.arange(200)
        sd = np.sqrt((1 + 2 * snr) / N * np.sum(w**2)) / np.sum(w)
        assert np.all(np.abs(model.snr_[0] - snr) < 4 * sd)  # 4 sd per cell
        assert abs(model.snr_[0].mean() - snr) < 4 * sd / 4  # and 4 sd of the mean of 16
        assert_allclose(model.snr_filled(0.1), model.snr_)

    def test_snr_is_nan_until_learned_and_never_negative(self):
        model = ReliabilityModel()
        model.update(t=np.array([[0.5 * N, N]]), n_samples=N, report_time_s=[0.0], now_s=0.5,
                     max_age_s=2.0, p_occupied=[0.999, 0.2])
        assert model.snr_[0, 0] == 0.0 and np.isnan(model.snr_[0, 1])
        assert model.snr_filled(0.3)[0, 1] == 0.3


class TestFlags:
    def test_silent_after_max_age_and_stale_reports_teach_nothing(self):
        model = ReliabilityModel(leave_one_out=False)
        kw = dict(n_samples=N, max_age_s=2.0, p_occupied=[0.99, 0.01], votes=[[1.0, 0.0]])
        model.update(t=np.ones((1, 2)), report_time_s=[0.0], now_s=0.5, **kw)
        counts = (model.nd_.copy(), model.nf_.copy())
        model.update(t=np.ones((1, 2)), report_time_s=[0.0], now_s=1.5, **kw)  # same report again
        assert (model.nd_, model.nf_) == counts and model.flags_ == [[]]
        model.update(t=np.ones((1, 2)), report_time_s=[0.0], now_s=2.5, **kw)  # 2.5 s > max age
        assert model.flags_ == [["silent"]] and (model.nd_, model.nf_) == counts
        assert model.last_seen_s_[0] == 0.0

    def test_stuck_after_repeated_values_trust_zero(self):
        model = ReliabilityModel(stuck_epochs=3)
        power = np.array([[-95.0, -99.0, np.nan]])
        for epoch in range(4):
            feed(model, [[0.0, 0.0, np.nan]], [0.5, 0.5, 0.5], epoch=epoch, power=power)
            assert ("stuck" in model.flags_[0]) == (epoch >= 3)  # 3 repeats after the first
        assert model.trust_[0] == 0.0
        feed(model, [[0.0, 0.0, np.nan]], [0.5, 0.5, 0.5], epoch=4, power=power + 0.01)
        assert model.flags_ == [[]]

    def test_suspect_at_the_first_epoch_the_posterior_says_so(self):
        # Node 0 votes 1 on 8 free labels per epoch.  Expected epoch: first m with
        # 1 - P(0.05 <= Pf <= 0.2 | Beta(1 + 8m, 9)) P(Pd >= 0.05 | Beta(4, 1)) >= 0.99.
        model = ReliabilityModel(memory=1e15, leave_one_out=False)
        p_ok = [(stats.beta.cdf(0.2, 1 + 8 * m, 9) - stats.beta.cdf(0.05, 1 + 8 * m, 9))
                * stats.beta.sf(0.05, 4, 1) for m in range(1, 20)]
        expected = next(m for m, ok in zip(range(1, 20), p_ok) if 1 - ok >= 0.99)
        seen = None
        for epoch in range(1, 20):
            feed(model, np.vstack([np.ones(8), in_spec(epoch, 1)]), np.full(8, 0.01), epoch=epoch)
            if seen is None and "suspect" in model.flags_[0]:
                seen = epoch
        assert seen == expected
        assert model.trust_[0] == 0.0 and "suspect" not in model.flags_[1]

    def test_suspect_clears_with_hysteresis(self):
        model = ReliabilityModel(memory=40.0, leave_one_out=False)
        for epoch in range(5):
            feed(model, [np.ones(8)], np.full(8, 0.01), epoch=epoch)
        assert model.flags_ == [["suspect"]]
        history = []
        for epoch in range(5, 60):
            votes = (np.arange(8) == epoch % 8).astype(float)  # 1 in 8 = Pf 0.125: in spec
            feed(model, [votes], np.full(8, 0.01), epoch=epoch)
            history.append(("suspect" in model.flags_[0], model.p_violation_[0]))
        cleared = [i for i, (s, _) in enumerate(history) if not s]
        assert cleared and all(not s for s, _ in history[cleared[0]:])
        # Still flagged while the violation probability sat between clear_prob and suspect_prob.
        assert any(s and 0.5 <= v < 0.99 for s, v in history)

    def test_always_no_and_inverted_nodes_are_suspect(self):
        # An energy detector's Pd is never below its Pf; Pf far under local_pf is a broken floor.
        model = ReliabilityModel(memory=1e15, leave_one_out=False)
        p = np.r_[np.full(4, 0.99), np.full(4, 0.01)]
        for epoch in range(40):
            feed(model, [np.zeros(8), np.r_[np.zeros(4), np.ones(4)]], p, epoch=epoch)
        assert model.flags_ == [["suspect"], ["suspect"]]

    def test_pins_override_trust_and_keep_flags(self):
        model = ReliabilityModel(memory=1e15, leave_one_out=False)
        for epoch in range(10):
            in_spec = (np.arange(8) == epoch % 8).astype(float)  # Pf 1/8
            feed(model, [np.ones(8), np.zeros(8), in_spec], np.full(8, 0.01), epoch=epoch,
                 pinned=["trusted", "excluded", None])
        assert model.trust_[0] == 1.0 and model.trust_[1] == 0.0 and 0 < model.trust_[2] < 1
        assert "suspect" in model.flags_[0]  # pinned trusted, still shown
        assert model.pinned_ == ["trusted", "excluded", None]
        feed(model, [np.ones(8), np.zeros(8), in_spec], np.full(8, 0.01), epoch=11)
        assert model.trust_[0] == 1.0  # pins kept when not passed
        assert set(PINS) == {"trusted", "excluded"} and FLAGS == ("silent", "stuck", "suspect", "drift")


    def test_pins_and_restores_give_what_a_full_refresh_gives(self):
        # set_pins only re-applies the pins and the restores refresh once (speed): every estimate must
        # still be what recomputing everything from the counts gives.
        rng = np.random.default_rng(29)
        model = ReliabilityModel(leave_one_out=False)
        for epoch in range(12):
            votes = np.vstack([np.ones(8), np.zeros(8), in_spec(epoch, 1)[0], rng.integers(0, 2, 8)])
            feed(model, votes, np.where(np.arange(8) % 3 == 0, 0.99, 0.01), epoch=epoch,
                 noise=np.r_[-100.0, -90.0, np.nan, -100.0])
        restored = ReliabilityModel.from_arrays(model.get_state(include_nodes=False), model.node_arrays(),
                                                [0, 1, 2, 3]).set_pins(["excluded", "trusted", None, None])
        full = ReliabilityModel.from_arrays(model.get_state(include_nodes=False), model.node_arrays(),
                                            [0, 1, 2, 3])
        full.pinned_ = ["excluded", "trusted", None, None]
        full._refresh()
        for name in ("pd_", "pf_", "pd_ci_", "pf_ci_", "pd_channel_", "noise_dbm_", "snr_", "trust_",
                     "p_violation_", "suspect_"):
            assert_allclose(getattr(restored, name), getattr(full, name), rtol=0, atol=0, err_msg=name)
        assert restored.flags_ == full.flags_
        assert restored.trust_[:2].tolist() == [0.0, 1.0]
        flags = np.stack([full.silent_, full.stuck_, full.suspect_ > 0, full.drift_], axis=1)
        assert full.flags_ == [[f for f, on in zip(FLAGS, row) if on] for row in flags]
        assert any(full.flags_) and not all(full.flags_)  # the check saw some flags and some clean nodes


class TestLeaveOneOut:
    def test_a_node_cannot_confirm_itself(self):
        # Node 0 alone moves the log-odds by +3 nats: with its term removed the posterior is 0.5.
        p = special.expit(3.0)  # 0.953, above the 0.9 bar
        contribution = np.array([[3.0], [0.0]])
        for loo, want in ((True, [0.0, 1.0]), (False, [1.0, 1.0])):
            model = ReliabilityModel(leave_one_out=loo, memory=1e15)
            feed(model, [[1.0], [1.0]], [p], epoch=0, contribution=contribution)
            assert_allclose(model.nd_, want)

    def test_default_contribution_is_the_chair_varshney_weight(self):
        # Prior Pd 0.8, Pf 0.1, newcomer trust tau: a 1-vote adds tau ln 8 (Chair & Varshney 1986).
        model = ReliabilityModel(memory=1e15).resize(2, n_channels=1)
        w = model.trust_[0] * np.log(0.8 / 0.1)
        cut = special.logit(0.9)
        p = special.expit(cut + w - 0.01)  # confident, but not once node 0's vote is removed
        feed(model, [[1.0], [np.nan]], [p], epoch=0)
        assert model.nd_[0] == 0.0
        model2 = ReliabilityModel(memory=1e15).resize(2, n_channels=1)
        feed(model2, [[1.0], [np.nan]], [special.expit(cut + w + 0.01)], epoch=0)
        assert model2.nd_[0] == 1.0

    def test_decision_must_agree_when_given(self):
        model = ReliabilityModel(memory=1e15, leave_one_out=False)
        feed(model, [[1.0, 1.0, 1.0]], [0.99, 0.99, 0.99], epoch=0, decision=[1.0, 0.0, np.nan])
        assert model.nd_[0] == 1.0


class TestState:
    def _trained(self, rng, n_nodes=3):
        model = ReliabilityModel()
        for epoch in range(15):
            occ = rng.random(6) < 0.5
            t = np.where(occ, rng.gamma(N, 1.6, size=(n_nodes, 6)), rng.gamma(N, 1.0, size=(n_nodes, 6)))
            t[0, 2] = np.nan
            power = -100 + 10 * np.log10(t / N)
            model.update(t=t, n_samples=N, report_time_s=np.full(n_nodes, float(epoch)),
                         now_s=epoch + 0.5, max_age_s=2.0, p_occupied=np.where(occ, 0.99, 0.01),
                         power_dbm=power, noise_dbm_reported=np.r_[-100.0, np.nan, -100.0][:n_nodes],
                         pinned=[None, "trusted", None][:n_nodes])
        return model

    def test_json_round_trip_and_restart_continues_identically(self):
        rng = np.random.default_rng(21)
        model = self._trained(rng)
        text = json.dumps(model.get_state(), allow_nan=False)  # strict JSON: NaN stored as null
        restored = ReliabilityModel.from_state(json.loads(text))
        for name in ("pd_", "pf_", "pd_ci_", "noise_dbm_", "snr_", "trust_", "p_violation_"):
            assert_allclose(getattr(restored, name), getattr(model, name), rtol=0, atol=0)
        assert restored.flags_ == model.flags_ and restored.pinned_ == model.pinned_
        t = rng.gamma(N, 1.0, size=(3, 6))
        kw = dict(t=t, n_samples=N, report_time_s=np.full(3, 20.0), now_s=20.5, max_age_s=2.0,
                  p_occupied=np.full(6, 0.01), power_dbm=-100 + 10 * np.log10(t / N))
        model.update(**kw)
        restored.update(**kw)
        assert_allclose(restored.pf_, model.pf_, rtol=0, atol=0)
        assert_allclose(restored.noise_dbm_, model.noise_dbm_, rtol=0, atol=0)

    def test_nodes_by_name_reorder_and_new_node_neutral(self):
        model = self._trained(np.random.default_rng(22))
        state = model.get_state()
        nodes = [state["nodes"][2], None, state["nodes"][0]]
        restored = ReliabilityModel.from_state(state, nodes=nodes)
        assert restored.pd_[0] == model.pd_[2] and restored.pd_[2] == model.pd_[0]
        fresh = ReliabilityModel().resize(1, n_channels=6)
        assert restored.pd_[1] == fresh.pd_[0] and restored.trust_[1] == fresh.trust_[0]
        grown = self._trained(np.random.default_rng(22)).resize(4)
        assert grown.pd_[3] == fresh.pd_[0] and grown.flags_[3] == ["silent"]

    def test_plan_change_restarts_per_channel_estimates_only(self):
        model = self._trained(np.random.default_rng(23))
        restored = ReliabilityModel.from_state(model.get_state(), n_channels=4)
        assert restored.snr_.shape == (3, 4) and np.all(np.isnan(restored.snr_))
        assert_allclose(restored.pd_, model.pd_, rtol=0, atol=0)
        assert_allclose(restored.noise_dbm_, model.noise_dbm_, rtol=0, atol=0)

    def test_arrays_round_trip_matches_the_json_one(self):
        # from_arrays is from_state's vectorised twin: the same model from the same learned numbers.
        model = self._trained(np.random.default_rng(25))
        state = model.get_state(include_nodes=False)
        restored = ReliabilityModel.from_arrays(state, model.node_arrays(), [2, -1, 0],
                                                nodes=[None, model.get_state()["nodes"][1], None])
        via_json = ReliabilityModel.from_state(model.get_state(), nodes=[
            model.get_state()["nodes"][k] for k in (2, 1, 0)])
        for name in ("pd_", "pf_", "pd_ci_", "noise_dbm_", "snr_", "trust_"):
            assert_allclose(getattr(restored, name), getattr(via_json, name), rtol=0, atol=0, err_msg=name)
        assert restored.pinned_ == [None, "trusted", None]  # a JSON node brings its pin; array rows carry none
        neutral = ReliabilityModel.from_arrays(state, model.node_arrays(), [0, -1])
        fresh = ReliabilityModel().resize(1, n_channels=6)
        assert neutral.pd_[1] == fresh.pd_[0] and neutral.pd_[0] == model.pd_[0]

    def test_arrays_with_every_row_present_match_the_json_restore(self):
        # With every node's row present from_arrays builds the arrays from the stored ones directly (speed);
        # it must give what the JSON restore gives, reordered or not, and relearn a changed noise window.
        model = self._trained(np.random.default_rng(30))
        state, arrays, nodes = model.get_state(include_nodes=False), model.node_arrays(), model.get_state()["nodes"]
        for rows in ([0, 1, 2], [2, 0, 1]):
            restored = ReliabilityModel.from_arrays(state, arrays, rows)
            via_json = ReliabilityModel.from_state(model.get_state(), nodes=[nodes[k] | {"pinned": None} for k in rows])
            for name in [f + "_" for f in arrays] + ["pd_", "pf_", "noise_dbm_", "snr_", "trust_"]:
                assert_allclose(getattr(restored, name), getattr(via_json, name), rtol=0, atol=0, err_msg=name)
            assert restored.flags_ == via_json.flags_
        restored.kd_ch_[0, 0] += 1.0
        assert arrays["kd_ch"][2, 0] == model.kd_ch_[2, 0]  # the restored model shares no array with the store
        wider = ReliabilityModel.from_arrays(state, arrays, [0, 1, 2], noise_window=5)
        assert wider.noise_history_.shape == (3, 5) and np.all(np.isnan(wider.noise_history_))
        assert_allclose(wider.local_pf_, model.local_pf_, rtol=0, atol=0)

    def test_compact_arrays_keep_the_learned_estimates(self):
        # float32 per-channel arrays: decayed counts and SNR sums round at ~6e-8 relative (float32 epsilon,
        # IEEE 754), so the estimates built from them agree to well within 1e-6.
        model = self._trained(np.random.default_rng(26))
        compact = model.node_arrays(compact=True)
        assert compact["kd_ch"].dtype == np.float32 and compact["last_seen_s"].dtype == np.float64
        restored = ReliabilityModel.from_arrays(model.get_state(include_nodes=False), compact, [0, 1, 2])
        assert_allclose(restored.snr_, model.snr_, rtol=1e-6)
        assert_allclose(restored.pd_channel_, model.pd_channel_, rtol=1e-6)
        assert_allclose(restored.pd_, model.pd_, rtol=0, atol=0)  # pooled counts stay float64

    def test_stuck_node_found_across_a_compact_round_trip(self):
        # A node repeating its last report is stuck whether or not its state went through float32 storage.
        rng = np.random.default_rng(27)
        model = ReliabilityModel()
        t = rng.gamma(N, 1.0, size=(2, 6))
        power = -100 + 10 * np.log10(t / N)
        for epoch in range(3):
            kw = dict(t=t, n_samples=N, report_time_s=np.full(2, float(epoch)), now_s=epoch + 0.5,
                      max_age_s=2.0, p_occupied=np.full(6, 0.01), power_dbm=power)
            model.update(**kw)
            model = ReliabilityModel.from_arrays(model.get_state(include_nodes=False),
                                                 model.node_arrays(compact=True), [0, 1])
        assert model.stuck_run_.tolist() == [2.0, 2.0]

    def test_from_arrays_refuses_bad_input(self):
        model = self._trained(np.random.default_rng(28))
        state, arrays = model.get_state(include_nodes=False), model.node_arrays()
        with pytest.raises(ValueError, match="version"):
            ReliabilityModel.from_arrays({"version": 99}, arrays, [0])
        with pytest.raises(ValueError, match="lacks kd"):
            ReliabilityModel.from_arrays(state, {k: v for k, v in arrays.items() if k != "kd"}, [0])
        with pytest.raises(ValueError, match=r"\[-1, 3\)"):
            ReliabilityModel.from_arrays(state, arrays, [0, 3])
        with pytest.raises(ValueError, match="one entry per row"):
            ReliabilityModel.from_arrays(state, arrays, [0, 1], nodes=[None])

    def test_update_grows_the_model_for_a_new_node(self):
        model = self._trained(np.random.default_rng(24), n_nodes=2)
        t = np.full((3, 6), float(N))
        model.update(t=t, n_samples=np.full(3, N), report_time_s=np.full(3, 30.0), now_s=30.5,
                     max_age_s=2.0, p_occupied=np.full(6, 0.5))
        assert model.n_nodes_ == 3 and len(model.flags_) == 3 and model.flags_[2] == []
