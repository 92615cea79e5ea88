"""Tests for fusion.detection.energy against scipy.stats and published closed forms.

Literal values were recomputed with scipy from the primary source each check names.
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from scipy import integrate, special, stats

from fusion.detection import energy

# Closed forms against each other: rtol 1e-9, atol 1e-12 (round-off of the special functions).
EXACT = dict(rtol=1e-9, atol=1e-12)


class TestNormalise:
    def test_input_validation(self):
        with pytest.raises(ValueError, match="`n_samples` must be positive, was 0.0"):
            energy.normalise(-90.0, -100.0, 0)

    def test_against_reference(self):
        # Definition T = N P / sigma^2 (Urkowitz 1967): 10 dB above the floor, N = 10.
        assert_allclose(energy.normalise(-90.0, -100.0, 10), 100.0, **EXACT)

    def test_edge_cases(self):
        # NaN (no report) propagates; shapes broadcast (nodes x channels with per-node N).
        out = energy.normalise(np.array([[-100.0, np.nan], [-97.0, -100.0]]), -100.0, np.array([[5], [10]]))
        assert out.shape == (2, 2)
        assert np.isnan(out[0, 1])
        assert_allclose(out[1, 0], 10 * 10 ** 0.3, **EXACT)


class TestThreshold:
    def test_input_validation(self):
        with pytest.raises(ValueError, match=r"`pf` must lie in \(0, 1\), was 1.5"):
            energy.threshold(1.5, 5)
        with pytest.raises(ValueError, match="`n_samples` must be positive"):
            energy.threshold(0.1, -1)

    def test_against_reference(self):
        # Digham, Alouini & Simon (2007): lambda = chi2.isf(Pf, 2u) on Y = 2T; u = 5.
        assert_allclose(2 * energy.threshold(0.01, 5), 23.20925116, rtol=1e-9)
        assert_allclose(2 * energy.threshold(0.1, 5), 15.98717917, rtol=1e-9)
        pf = np.array([1e-4, 0.01, 0.1, 0.5])
        n = np.array([[1], [5], [1000]])
        assert_allclose(energy.threshold(pf, n), stats.chi2.isf(pf, 2 * n) / 2, **EXACT)
        # N = 1000, Pf = 0.1: tau = 1040.734308 (Liang et al. 2008 setup; scipy.stats.gamma.isf).
        assert_allclose(energy.threshold(0.1, 1000), 1040.734308, rtol=1e-9)

    def test_edge_cases(self):
        # Round trip with false_alarm, including non-integer N (Welch-equivalent dof).
        for n in (0.5, 3.7, 64.0):
            assert_allclose(energy.false_alarm(energy.threshold(0.05, n), n), 0.05, rtol=1e-10)
        assert np.isnan(energy.threshold(np.nan, 5))


class TestFalseAlarm:
    def test_input_validation(self):
        with pytest.raises(ValueError, match="`n_samples` must be positive"):
            energy.false_alarm(3.0, 0)

    def test_against_reference(self):
        tau = np.linspace(0.0, 40.0, 9)
        # scipy.stats: H0 law T ~ Gamma(N, 1), i.e. 2T ~ chi2(2N).
        assert_allclose(energy.false_alarm(tau, 7), stats.gamma.sf(tau, 7), **EXACT)
        assert_allclose(energy.false_alarm(tau, 7), stats.chi2.sf(2 * tau, 14), **EXACT)

    def test_edge_cases(self):
        assert energy.false_alarm(-3.0, 4) == 1.0
        assert energy.false_alarm(0.0, 4) == 1.0

    def test_monte_carlo(self):
        # Seeded MC of |CN(0,1)|^2 sums: within 4 binomial standard errors of the formula.
        rng = np.random.default_rng(11)
        n, trials = 8, 200_000
        w = (rng.standard_normal((trials, n)) + 1j * rng.standard_normal((trials, n))) / np.sqrt(2)
        t = np.sum(np.abs(w) ** 2, axis=1)
        tau = energy.threshold(0.1, n)
        se = np.sqrt(0.1 * 0.9 / trials)
        assert abs(np.mean(t > tau) - 0.1) < 4 * se
        # KS test of T against Gamma(N, 1) (scipy.stats.kstest); p > 1e-3 fails 1 in 1000 seeds.
        assert stats.kstest(t[:20_000], stats.gamma(n).cdf).pvalue > 1e-3


class TestDetectionAwgn:
    def test_input_validation(self):
        with pytest.raises(ValueError, match="`snr` must be non-negative, was -1.0"):
            energy.detection_awgn(10.0, 5, -1.0)

    def test_against_reference(self):
        # Digham et al. (2007) / Urkowitz (1967): Pd = Q_u(sqrt(2 gamma), sqrt(lambda)), u = 5,
        # gamma = 10 total (per-sample 2): values recomputed with scipy.stats.ncx2.
        assert_allclose(energy.detection_awgn(energy.threshold(0.01, 5), 5, 2.0), 0.7353119162, rtol=1e-9)
        assert_allclose(energy.detection_awgn(energy.threshold(0.1, 5), 5, 2.0), 0.9389252795, rtol=1e-9)
        # N = 1000, -10 dB per sample, Pf = 0.1: Pd = 0.9583528131.
        assert_allclose(energy.detection_awgn(energy.threshold(0.1, 1000), 1000, 0.1), 0.9583528131, rtol=1e-9)

    def test_against_marcum_series(self):
        # Independent check: Q_M(a, b) = sum_j Poisson(j; a^2/2) gammaincc(M + j, b^2/2).
        n, g, tau = 6, 0.8, 12.0
        j = np.arange(200)
        series = np.sum(stats.poisson.pmf(j, n * g) * special.gammaincc(n + j, tau))
        assert_allclose(energy.detection_awgn(tau, n, g), series, **EXACT)

    def test_edge_cases(self):
        # Zero SNR: Pd equals Pf.
        assert_allclose(energy.detection_awgn(9.0, 5, 0.0), energy.false_alarm(9.0, 5), **EXACT)
        assert np.isnan(energy.detection_awgn(np.nan, 5, 1.0))

    def test_monte_carlo(self):
        rng = np.random.default_rng(12)
        n, g, trials = 5, 2.0, 200_000
        s = np.sqrt(g)  # constant-modulus deterministic signal, |s|^2 = g sigma^2
        w = (rng.standard_normal((trials, n)) + 1j * rng.standard_normal((trials, n))) / np.sqrt(2)
        t = np.sum(np.abs(s + w) ** 2, axis=1)
        pd = energy.detection_awgn(energy.threshold(0.01, n), n, g)
        # 4 binomial standard errors.
        assert abs(np.mean(t > energy.threshold(0.01, n)) - pd) < 4 * np.sqrt(pd * (1 - pd) / trials)


class TestDetectionGaussian:
    def test_input_validation(self):
        with pytest.raises(ValueError, match="`snr` must be non-negative"):
            energy.detection_gaussian(10.0, 5, -0.5)

    def test_against_reference(self):
        # Gaussian signal: T ~ Gamma(N, 1 + snr) exactly (common practice).
        tau = energy.threshold(0.1, 1000)
        assert_allclose(energy.detection_gaussian(tau, 1000, 0.1), 0.9577161904, rtol=1e-9)
        assert_allclose(energy.detection_gaussian(tau, 1000, 0.1), stats.gamma.sf(tau, 1000, scale=1.1), **EXACT)

    def test_edge_cases(self):
        assert_allclose(energy.detection_gaussian(4.0, 3, 0.0), energy.false_alarm(4.0, 3), **EXACT)


# Digham et al. (2007) table values, u = 5, gamma_bar = 10 total (recomputed with scipy).
FADING = {
    0.01: {"rayleigh": 0.5093999556, 2: 0.5830748498, 3: 0.6184877277, 0.5: 0.4224061127},
    0.1: {"rayleigh": 0.7017129954, 2: 0.7907857119, 3: 0.8305262724, 0.5: 0.5909115717},
}


def _quad_average(tau, n, mean_total, m):
    """Pd averaged over Gamma(m, mean/m) total SNR by numerical integration."""
    f = lambda g: stats.ncx2.sf(2 * tau, 2 * n, 2 * g) * stats.gamma.pdf(g, m, scale=mean_total / m)
    return integrate.quad(f, 0, np.inf, limit=200)[0]


class TestDetectionRayleigh:
    def test_input_validation(self):
        with pytest.raises(ValueError, match="`n_samples` must be positive"):
            energy.detection_rayleigh(10.0, 0, 1.0)

    @pytest.mark.parametrize("pf", [0.01, 0.1])
    def test_against_reference(self, pf):
        # Digham, Alouini & Simon (2007) Rayleigh closed form, u = 5, mean total SNR 10.
        tau = energy.threshold(pf, 5)
        assert_allclose(energy.detection_rayleigh(tau, 5, 2.0), FADING[pf]["rayleigh"], rtol=1e-9)
        # And numerical integration of the AWGN Pd over the exponential SNR law.
        assert_allclose(energy.detection_rayleigh(tau, 5, 2.0), _quad_average(tau, 5, 10.0, 1.0), rtol=1e-8)

    def test_edge_cases(self):
        # u = 1: both sums are empty and Pd = exp(-lambda / (2 (1 + gamma))) (Digham et al. 2007).
        tau = energy.threshold(0.05, 1)
        assert_allclose(energy.detection_rayleigh(tau, 1, 3.0), np.exp(-tau / 4.0), **EXACT)
        # Large N and non-integer N agree with the series path.
        tau = energy.threshold(0.1, 1000)
        assert_allclose(energy.detection_rayleigh(tau, 1000, 0.1), energy.detection_nakagami(tau, 1000, 0.1, 1),
                        rtol=1e-9)
        assert_allclose(energy.detection_rayleigh(5.0, 4.5, 0.5), energy.detection_nakagami(5.0, 4.5, 0.5, 1), **EXACT)
        # Zero SNR: Pd = Pf.
        assert_allclose(energy.detection_rayleigh(7.0, 5, 0.0), energy.false_alarm(7.0, 5), **EXACT)

    @pytest.mark.parametrize("n", [7, 100, 1000, 4096, 100_000])
    @pytest.mark.parametrize("mean_total", [1e-300, 1e-12, 1e-3, 0.1, 1.0, 20.0, 400.0])
    def test_low_mean_snr_against_numerical_integration(self, n, mean_total):
        """The closed form cancels when the mean total SNR is small against N (it once gave Pd < Pf, and NaN
        for a subnormal SNR). Reference: the AWGN Pd (scipy.stats.ncx2) integrated over the exponential SNR
        law with scipy.integrate.quad; rtol 1e-7 is quad's accuracy here, and Pd never falls below Pf."""
        tau = energy.threshold(0.05, n)
        pd = energy.detection_rayleigh(tau, n, mean_total / n)
        assert pd >= energy.false_alarm(tau, n) - 1e-15
        if mean_total >= 1e-3:  # below that quad sees a delta at zero; Pd = Pf to double precision
            assert_allclose(pd, _quad_average(tau, n, mean_total, 1.0), rtol=1e-7)
        else:
            assert_allclose(pd, energy.false_alarm(tau, n), rtol=1e-9)


class TestDetectionNakagami:
    def test_input_validation(self):
        with pytest.raises(ValueError, match="`m` must be at least 0.5, was 0.3"):
            energy.detection_nakagami(10.0, 5, 1.0, 0.3)

    @pytest.mark.parametrize("pf", [0.01, 0.1])
    @pytest.mark.parametrize("m", [0.5, 2, 3])
    def test_against_reference(self, pf, m):
        # Digham et al. (2007) Nakagami-m values (recomputed with scipy), and quad integration.
        tau = energy.threshold(pf, 5)
        assert_allclose(energy.detection_nakagami(tau, 5, 2.0, m), FADING[pf][m], rtol=1e-9)
        assert_allclose(energy.detection_nakagami(tau, 5, 2.0, m), _quad_average(tau, 5, 10.0, m), rtol=1e-8)

    def test_against_digham_integer_m_form(self):
        # Digham et al. (2007) integer-m closed form with Laguerre polynomials, transcribed from
        # the paper (from memory of its notation) and checked numerically against quad below.
        m, u, gbar = 2, 5, 10.0
        lam = 2 * energy.threshold(0.01, u)
        beta = m / (m + gbar)
        x = -lam * (1 - beta) / 2
        a1 = np.exp(-lam * beta / 2) * (
            beta ** (m - 1) * special.eval_laguerre(m - 1, x)
            + (1 - beta) * sum(beta**i * special.eval_laguerre(i, x) for i in range(m - 1))
        )
        tail = sum((lam / 2) ** i / special.factorial(i) * special.hyp1f1(m, i + 1, lam * (1 - beta) / 2)
                   for i in range(1, u))
        closed = a1 + beta**m * np.exp(-lam / 2) * tail
        assert_allclose(energy.detection_nakagami(lam / 2, u, gbar / u, m), closed, **EXACT)

    def test_edge_cases(self):
        # m = 1 is Rayleigh; huge m tends to AWGN (amount of fading 1/m -> 0).
        tau = energy.threshold(0.1, 5)
        assert_allclose(energy.detection_nakagami(tau, 5, 2.0, 1), energy.detection_rayleigh(tau, 5, 2.0), **EXACT)
        # m = 2000: within 1e-3 of AWGN (fading variance 1/m of the mean SNR).
        assert_allclose(energy.detection_nakagami(tau, 5, 2.0, 2000), energy.detection_awgn(tau, 5, 2.0), atol=1e-3)

    def test_monte_carlo(self):
        # Block Nakagami-2 fading: |h|^2 ~ Gamma(2, 1/2); 4 binomial standard errors.
        rng = np.random.default_rng(13)
        n, trials = 5, 200_000
        gain = rng.gamma(2.0, 0.5, size=trials)
        t = rng.noncentral_chisquare(2 * n, 2 * n * 2.0 * gain) / 2
        pd = FADING[0.1][2]
        assert abs(np.mean(t > energy.threshold(0.1, n)) - pd) < 4 * np.sqrt(pd * (1 - pd) / trials)


class TestSnrWall:
    def test_input_validation(self):
        with pytest.raises(ValueError, match="`uncertainty_db` must be non-negative"):
            energy.snr_wall(-1.0)

    def test_against_reference(self):
        # Tandra & Sahai (2008): wall = rho - 1/rho, rho = 10^(x/10).
        x = np.array([0.1, 0.5, 1.0, 2.0])
        walls_db = np.array([-13.3671594, -6.368253244, -3.329234333, -0.2048083054])
        assert_allclose(10 * np.log10(energy.snr_wall(x)), walls_db, rtol=1e-9)

    def test_edge_cases(self):
        assert energy.snr_wall(0.0) == 0.0


class TestCheckSnrWall:
    def test_input_validation(self):
        with pytest.raises(ValueError, match="`snr_db` must be finite"):
            energy.check_snr_wall(np.nan, 1.0)

    def test_against_reference(self):
        # 1 dB uncertainty: wall -3.329 dB (Tandra & Sahai 2008); -10 dB target is below it.
        res = energy.check_snr_wall(-10.0, 1.0)
        assert res.below_wall and "below the SNR wall" in res.message
        assert_allclose(res.wall_db, -3.329234333, rtol=1e-9)
        assert_allclose(res.margin_db, -10.0 + 3.329234333, rtol=1e-9)
        ok = energy.check_snr_wall(-3.0, 1.0)
        assert not ok.below_wall and ok.message == ""

    def test_edge_cases(self):
        # No uncertainty: no wall.
        res = energy.check_snr_wall(-30.0, 0.0)
        assert not res.below_wall and res.wall_db == -np.inf


PROPS = settings(derandomize=True, max_examples=60, deadline=None, database=None)


class TestProperties:
    @PROPS
    @given(tau=st.floats(0, 500), n=st.integers(1, 200), snr=st.floats(0, 10), m=st.sampled_from([0.5, 1.0, 2.5]))
    def test_probabilities_lie_in_unit_interval(self, tau, n, snr, m):
        for p in (energy.false_alarm(tau, n), energy.detection_awgn(tau, n, snr),
                  energy.detection_gaussian(tau, n, snr), energy.detection_rayleigh(tau, n, snr),
                  energy.detection_nakagami(tau, n, snr, m)):
            assert 0.0 <= float(p) <= 1.0

    @PROPS
    @given(n=st.integers(1, 100), pf=st.floats(1e-4, 0.5), snr=st.floats(0, 3), d=st.floats(1e-3, 2))
    def test_pd_is_monotone_in_snr_and_threshold(self, n, pf, snr, d):
        tau = energy.threshold(pf, n)
        # 1e-12 absorbs round-off in the special functions.
        for f in (energy.detection_awgn, energy.detection_gaussian, energy.detection_rayleigh):
            assert f(tau, n, snr + d) >= f(tau, n, snr) - 1e-12
            assert f(tau * 1.05, n, snr) <= f(tau, n, snr) + 1e-12
