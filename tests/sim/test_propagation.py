"""Propagation formulas against published check values (recomputed from each formula)."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from sim_nodes import propagation as prop


class TestFreeSpacePathLoss:
    def test_against_reference(self):
        # Friis (1946), FSPL = 20 log10(4 pi d f / c); values recomputed from the formula.
        assert_allclose(prop.free_space_path_loss_db([1000.0, 1.0, 100.0], [600e6, 600e6, 2437e6]),
                        [88.01080823, 28.01080823, 80.18489381], atol=1e-8)

    def test_matches_the_db_shortcut_with_32_45(self):
        # Common practice shortcut 20log d_km + 20log f_MHz + 32.45 (c = 299792458 m/s); it rounds
        # the constant (32.4478), so agreement is to 0.005 dB.
        d, f = np.array([0.5, 1.0, 7.0]), np.array([100.0, 600.0, 2400.0])
        assert_allclose(prop.free_space_path_loss_db(d * 1e3, f * 1e6), 20 * np.log10(d) + 20 * np.log10(f) + 32.45,
                        atol=5e-3)

    @pytest.mark.parametrize("d, f", [(0.0, 1e6), (1.0, -1.0)])
    def test_input_validation(self, d, f):
        with pytest.raises(ValueError, match="must be positive"):
            prop.free_space_path_loss_db(d, f)


class TestLogDistance:
    def test_against_reference(self):
        # Rappaport (2002) section 4.9: d0 = 1 m at free space, n = 3.5, 1 km, 600 MHz -> 133.0108082 dB.
        assert_allclose(prop.log_distance_path_loss_db(1000.0, 600e6, 3.5), 133.0108082, atol=1e-7)

    def test_exponent_two_is_free_space(self):
        d = np.array([1.0, 10.0, 3000.0])
        assert_allclose(prop.log_distance_path_loss_db(d, 470e6, 2.0), prop.free_space_path_loss_db(d, 470e6),
                        rtol=1e-12)

    def test_input_validation(self):
        with pytest.raises(ValueError, match="`exponent` must be positive"):
            prop.log_distance_path_loss_db(10.0, 1e9, 0.0)


class TestThermalNoise:
    def test_against_reference(self):
        # kT0 B + NF with exact k and T0 = 290 K; values recomputed from the formula.
        assert_allclose(prop.thermal_noise_dbm([6e6, 200e3, 20e6], [11.0, 11.0, 7.0]),
                        [-95.19367469, -109.9648872, -93.96488724], atol=1e-7)

    def test_density_is_minus_174_dbm_per_hz(self):
        # The textbook -174 dBm/Hz at 290 K (common practice) is kT0 rounded: -173.9751872.
        assert_allclose(prop.thermal_noise_dbm(1.0), -173.9751872, atol=1e-7)
        assert abs(prop.thermal_noise_dbm(1.0) + 174.0) < 0.03


class TestCorrelatedShadowing:
    def test_gudmundson_correlation_and_spread(self):
        # Gudmundson (1991): R(dx) = exp(-dx/d_c); d_c = 503.9 m gives 0.82 at 100 m.
        # 20000 pairs: the correlation's standard error is (1 - r^2)/sqrt(n) = 0.0023, tolerance 4 of them;
        # the sample std of 20000 normals has relative se 1/sqrt(2n) = 0.005, tolerance 4 of them.
        pos = np.array([[0.0, 0.0], [100.0, 0.0], [3000.0, 0.0]])
        x = prop.correlated_shadowing_db(pos, 8.0, 503.9028822, rng=np.random.default_rng(5), size=20000)
        r = np.corrcoef(x[:, 0], x[:, 1])[0, 1]
        assert abs(r - 0.82) < 4 * (1 - 0.82**2) / np.sqrt(20000)
        assert_allclose(x.std(axis=0), 8.0, rtol=4 / np.sqrt(40000))
        assert abs(np.corrcoef(x[:, 0], x[:, 2])[0, 1] - np.exp(-3000 / 503.9028822)) < 4 / np.sqrt(20000)

    def test_input_validation(self):
        with pytest.raises(ValueError, match="`positions_m` must have shape"):
            prop.correlated_shadowing_db(np.zeros(3), 1.0, 10.0)
        with pytest.raises(ValueError, match="`decorrelation_m` must be positive"):
            prop.correlated_shadowing_db(np.zeros((2, 2)), 1.0, 0.0)


class TestFading:
    @pytest.mark.parametrize("kind, m, var", [("rayleigh", 1.0, 1.0), ("nakagami", 2.0, 0.5), ("none", 1.0, 0.0)])
    def test_unit_mean_and_amount_of_fading(self, kind, m, var):
        # Nakagami (1960): |h|^2 ~ Gamma(m, 1/m), mean 1, variance 1/m; Rayleigh is m = 1.
        # 1e5 draws: se of the mean sqrt(var/n); of the variance ~ var*sqrt((2 + 6/m)/n); 4 se each.
        n = 100_000
        g = prop.fading_power_gain(n, kind, m, rng=np.random.default_rng(6))
        assert abs(g.mean() - 1.0) <= 4 * np.sqrt(var / n) + 1e-12
        assert abs(g.var() - var) <= 4 * var * np.sqrt((2 + 6 / m) / n) + 1e-12

    def test_input_validation(self):
        with pytest.raises(ValueError, match="`kind` must be one of"):
            prop.fading_power_gain(3, "rician")
        with pytest.raises(ValueError, match="`m` must be at least 0.5"):
            prop.fading_power_gain(3, "nakagami", 0.3)
