"""Tests for fusion.detection.channelizer against Parseval, scipy.stats and Welch's analysis."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import signal, stats

from fusion.detection import channelizer
from fusion.detection.channelizer import channel_bins, channel_power, equivalent_dof


def cn(rng, shape, power=1.0):
    """Circular complex Gaussian samples with E|w|^2 = power (common practice)."""
    return np.sqrt(power / 2) * (rng.standard_normal(shape) + 1j * rng.standard_normal(shape))


def test_exported_names():
    assert set(channelizer.__all__) == {"ChannelPower", "channel_bins", "channel_power", "equivalent_dof"}


class TestChannelPower:
    @pytest.mark.parametrize(
        "kwargs, message",
        [
            ({"window": "kaiser"}, "`window` must be one of"),
            ({"overlap": 1.0}, "`overlap` must lie in"),
            ({"segment": 0}, "`segment` must be an integer"),
            ({"segment": 65}, "`segment` must be an integer"),
            ({"channel_bandwidth_hz": [0.0]}, "`channel_bandwidth_hz` must be positive"),
            ({"channel_bandwidth_hz": [1e3, 1e3]}, "must be 1-D of equal length"),
            ({"sample_rate": -1.0}, "`sample_rate` must be positive"),
        ],
    )
    def test_input_validation(self, kwargs, message):
        args = {"iq": np.zeros(64, complex), "sample_rate": 64e3, "center_hz": 0.0,
                "channel_center_hz": [0.0], "channel_bandwidth_hz": [8e3]}
        args.update(kwargs)
        with pytest.raises(ValueError, match=message):
            channel_power(**args)

    def test_full_span_channel_is_mean_sample_power_by_parseval(self):
        # Parseval's theorem: summing every bin returns the time-domain mean power, for any window
        # that is normalised by sum(w^2) and any signal; rtol at float64 round-off.
        rng = np.random.default_rng(1)
        x = cn(rng, 1024, power=3.0) + 2.0 * np.exp(2j * np.pi * 0.1234 * np.arange(1024))
        r = channel_power(x, 1e6, 100e6, [100e6], [1e6])
        assert_allclose(r.power[0], np.mean(np.abs(x) ** 2), rtol=1e-12)

    def test_bin_centred_tone_lands_in_its_channel_only(self):
        # A tone of amplitude A has power A^2 (definition); on a bin centre with the
        # rectangular window it occupies exactly one bin (DFT orthogonality).
        fs, m = 1.024e6, 1024
        t = np.arange(m)
        f_tone = 50 * fs / m  # 50 kHz: inside the channel at +50 kHz
        x = 0.3 * np.exp(2j * np.pi * f_tone / fs * t)
        r = channel_power(x, fs, 600e6, [600e6 - 200e3, 600e6 + 50e3, 600e6 + 300e3], [100e3] * 3)
        assert_allclose(r.power, [0.0, 0.09, 0.0], atol=1e-14)

    def test_off_bin_tone_with_hann_keeps_power_within_a_hundredth_of_a_db(self):
        # Hann sidelobes fall as 1/d^3 in amplitude (Harris 1978, from memory), so a channel
        # of ~100 bins holds all but a negligible share of an off-bin tone's power.
        fs, m = 1e6, 2048
        t = np.arange(8 * m)
        x = np.exp(2j * np.pi * 0.01337 * t)  # 13.37 kHz, between bins
        r = channel_power(x, fs, 0.0, [0.0, 150e3], [100e3, 100e3], segment=m, window="hann", overlap=0.5)
        assert abs(10 * np.log10(r.power[0])) < 0.01
        assert r.power[1] < 1e-6

    def test_noise_band_power_follows_gamma_law_exactly_with_boxcar(self):
        # With the rectangular window and non-overlapping segments the K*S bin powers are
        # i.i.d. exponential, so N*P/sigma^2 ~ Gamma(K*S, 1) (the H0 law, Urkowitz 1967).
        rng = np.random.default_rng(2)
        fs, m, s = 800e3, 256, 4
        x = cn(rng, (3000, m * s), power=2.0)
        r = channel_power(x, fs, 0.0, [-150e3, 100e3], [100e3, 50e3], segment=m)
        assert r.n_bins.tolist() == [32, 16]
        assert_allclose(r.dof, [32 * s, 16 * s], rtol=1e-12)
        # In-channel noise power = sigma^2 * B / fs for a flat spectrum.
        for c, (k, frac) in enumerate([(32 * s, 100 / 800), (16 * s, 50 / 800)]):
            t = k * r.power[:, c] / (2.0 * frac)
            assert stats.kstest(t, stats.gamma(k).cdf).pvalue > 1e-3  # seeded; 1e-3 level

    def test_hann_with_overlap_dof_matches_monte_carlo(self):
        # The exact EDOF must equal mean^2/var of the estimate; the MC ratio has relative
        # standard error ~sqrt(2/n) (variance of a sample variance), tolerance 4 of those.
        rng = np.random.default_rng(3)
        n_mc = 4000
        x = cn(rng, (n_mc, 1024))
        r = channel_power(x, 1e6, 0.0, [0.0], [250e3], segment=256, window="hann", overlap=0.5)
        p = r.power[:, 0]
        assert r.n_segments == 7
        assert_allclose(p.mean(), 0.25, rtol=4 / np.sqrt(n_mc * r.dof[0]))
        assert_allclose(p.mean() ** 2 / p.var(ddof=1), r.dof[0], rtol=4 * np.sqrt(2 / n_mc))

    def test_channel_outside_span_is_nan(self):
        r = channel_power(np.ones(64, complex), 64e3, 0.0, [0.0, 40e3], [8e3, 8e3])
        assert np.isnan(r.power[1]) and np.isnan(r.dof[1])
        assert r.in_span.tolist() == [True, False] and r.n_bins.tolist() == [8, 0]

    def test_axis_leading_dimensions_are_independent_windows(self):
        rng = np.random.default_rng(4)
        x = cn(rng, (2, 3, 128))
        r = channel_power(x, 128e3, 0.0, [0.0, 32e3], [16e3, 16e3])
        assert r.power.shape == (2, 3, 2)
        one = channel_power(x[1, 2], 128e3, 0.0, [0.0, 32e3], [16e3, 16e3])
        assert_allclose(r.power[1, 2], one.power, rtol=1e-12)


class TestEquivalentDof:
    def test_against_reference_boxcar_is_bins_times_segments(self):
        assert_allclose(equivalent_dof(np.ones(64), [1, 8, 64], 5, 64), [5, 40, 320], rtol=1e-12)

    def test_against_reference_hann_single_segment(self):
        # Hann w^2 has DFT coefficients 3/8, 1/4, 1/16 (times M) at 0, +-1, +-2 bins, so for K
        # bins far from the ends dof -> K (3/8)^2 / ((3/8)^2 + 2(1/4)^2 + 2(1/16)^2) = K*0.5143 (derived here).
        w = signal.get_window("hann", 512)
        k = 200
        d = np.array([0, 1, 2])
        c = np.array([3 / 8, 1 / 4, 1 / 16])
        var = k * c[0] ** 2 + 2 * np.sum((k - d[1:]) * c[1:] ** 2)
        assert_allclose(equivalent_dof(w, [k], 1, 512), (k * c[0]) ** 2 / var, rtol=1e-12)


class TestChannelBins:
    def test_contiguous_channels_tile_the_span_without_gaps(self):
        mask, in_span = channel_bins(512, 1.6e6, 500e6, 500e6 + (np.arange(8) - 3.5) * 200e3, [200e3] * 8)
        assert in_span.all()
        assert mask.sum(axis=1).tolist() == [64] * 8
        assert (mask.sum(axis=0) == 1).all()
