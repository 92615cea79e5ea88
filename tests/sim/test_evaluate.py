"""sim_nodes.evaluate: analytic curves against published closed forms and scipy, Monte Carlo against them.

Monte Carlo tolerances are 4 binomial standard errors, sqrt(p(1-p)/m) at the exact p (common
practice): a correct implementation fails such a check about once in 16,000 runs, and every run is
seeded.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, optimize, special, stats

from fusion.detection import rules
from sim_nodes import evaluate as ev
from sim_nodes.scenario import load_scenario


def four_se(p, m):
    return 4.0 * math.sqrt(max(p * (1 - p), 1e-12) / m)


def digham_rayleigh(lam, u, gbar):
    """Average Pd over Rayleigh fading, Digham, Alouini and Simon (IEEE Trans. Commun. 55(1), 2007), written
    out term by term: lambda is the threshold on Y = 2T, u the time-bandwidth product, gbar the mean total SNR."""
    s1 = sum((lam / 2) ** k / math.factorial(k) for k in range(u - 1))
    s2 = sum((lam * gbar / (2 * (1 + gbar))) ** k / math.factorial(k) for k in range(u - 1))
    return math.exp(-lam / 2) * s1 + ((1 + gbar) / gbar) ** (u - 1) * (
        math.exp(-lam / (2 * (1 + gbar))) - math.exp(-lam / 2) * s2)


def one_node(fading, total_snr=10.0, u=5):
    return ev.homogeneous_setup(1, 10 * math.log10(total_snr / u), u, fading)


class TestEnergyDetectorAgainstPublishedClosedForms:
    """One node, rule "or" with n = 1, is the bare energy detector."""

    @pytest.mark.parametrize("pf,expected", [(0.01, 0.5093999556), (0.1, 0.7017129954)])
    def test_rayleigh_pd_at_target_is_digham_closed_form(self, pf, expected):
        # u = 5, mean total SNR 10 (10 dB): Digham et al. (2007); the literal values were recomputed
        # with scipy (closed form, series and quadrature agreeing to 1e-13).
        rep = ev.evaluate(one_node("rayleigh"), ev.parse_rules("or", 1), trials=20_000, target_pf=pf, seed=3)
        lam = stats.chi2.isf(pf, 10)  # Digham's threshold on Y = 2T
        exact = digham_rayleigh(lam, 5, 10.0)
        assert exact == pytest.approx(expected, rel=1e-9)
        got = rep["rules"][0]["pd_at_target_pf"]
        assert got["analytic"] == pytest.approx(exact, rel=1e-9, abs=1e-12)
        assert abs(got["monte_carlo"] - exact) < four_se(exact, 20_000)
        lo, hi = got["ci"]
        assert lo < got["monte_carlo"] < hi

    def test_rayleigh_roc_curve_is_digham_at_every_threshold(self):
        rep = ev.evaluate(one_node("rayleigh"), ev.parse_rules("or", 1), trials=20_000, target_pf=0.1, seed=4)
        roc = rep["rules"][0]["roc"]
        assert len(roc["pf"]) == len(roc["pd"]) == len(roc["pd_analytic"]) > 20
        for pf_a, pd_a, pd_mc, pf_mc in zip(roc["pf_analytic"], roc["pd_analytic"], roc["pd"], roc["pf"]):
            lam = stats.chi2.isf(pf_a, 10)
            assert pd_a == pytest.approx(digham_rayleigh(lam, 5, 10.0), rel=1e-8, abs=1e-12)
            assert abs(pd_mc - pd_a) < four_se(pd_a, 20_000)
            assert abs(pf_mc - pf_a) < four_se(pf_a, 20_000) + 1 / 20_000  # thresholds at H0 sample quantiles

    @pytest.mark.parametrize("pf", [0.01, 0.1])
    def test_awgn_pd_is_the_noncentral_chi_square_of_urkowitz(self, pf):
        # Urkowitz (1967), Digham et al. (2007): Pd = Q_u(sqrt(2 gamma), sqrt(lambda)) = ncx2.sf(lambda, 2u, 2 gamma).
        rep = ev.evaluate(one_node("none"), ev.parse_rules("or", 1), trials=20_000, target_pf=pf, seed=5)
        exact = stats.ncx2.sf(stats.chi2.isf(pf, 10), 10, 20.0)
        got = rep["rules"][0]["pd_at_target_pf"]
        assert got["analytic"] == pytest.approx(exact, rel=1e-9)
        assert abs(got["monte_carlo"] - exact) < four_se(exact, 20_000)

    def test_nakagami_pd_is_the_fading_average_by_quadrature(self):
        # Nakagami-m (Nakagami 1960), m = 2: E over gamma ~ Gamma(m, gbar/m) of ncx2.sf, by scipy quad.
        setup = ev.homogeneous_setup(1, 10 * math.log10(2.0), 5, "nakagami", nakagami_m=2.0)
        rep = ev.evaluate(setup, ev.parse_rules("or", 1), trials=20_000, target_pf=0.1, seed=6)
        lam = stats.chi2.isf(0.1, 10)
        exact, _ = integrate.quad(lambda g: stats.ncx2.sf(lam, 10, 2 * g) * stats.gamma.pdf(g, 2, scale=5.0), 0, np.inf)
        got = rep["rules"][0]["pd_at_target_pf"]
        assert got["analytic"] == pytest.approx(exact, rel=1e-7)
        assert abs(got["monte_carlo"] - exact) < four_se(exact, 20_000)


@pytest.fixture(scope="module")
def report():
    """Ten identical AWGN nodes, -10 dB, N = 100, target Pf 0.05 (shared by the counting-rule checks)."""
    c = TestCountingRulesAgainstTheBinomialFormula
    setup = ev.homogeneous_setup(c.N_NODES, c.SNR_DB, c.N, "none")
    return ev.evaluate(setup, ev.parse_rules("or,and,k_of_n:3,majority", c.N_NODES), trials=c.M,
                       target_pf=0.05, seed=11)


class TestCountingRulesAgainstTheBinomialFormula:
    N_NODES, N, SNR_DB, M = 10, 100, -10.0, 20_000

    def binomial_qd(self, k, target_pf, snr=None, falsifiers=0):
        """Varshney (1997): Q = P(count >= k); local Pf solved here with brentq from binom.sf (not betaincinv)."""
        n = self.N_NODES
        p_loc = optimize.brentq(lambda p: stats.binom.sf(k - 1, n, p) - target_pf, 1e-15, 1 - 1e-15, xtol=1e-15)
        tau = stats.chi2.isf(p_loc, 2 * self.N) / 2
        g = 10 ** (self.SNR_DB / 10) if snr is None else snr
        pd = stats.ncx2.sf(2 * tau, 2 * self.N, 2 * self.N * g)
        # Honest count ~ Binom(n - f, pd), falsifiers ("free") vote like noise, Binom(f, p_loc): convolve.
        pmf = np.convolve(stats.binom.pmf(np.arange(n - falsifiers + 1), n - falsifiers, pd),
                          stats.binom.pmf(np.arange(falsifiers + 1), falsifiers, p_loc))
        return pmf[k:].sum()

    @pytest.mark.parametrize("label,k", [("or", 1), ("and", 10), ("3_of_n", 3), ("majority", 6)])
    def test_pd_and_pf_at_target_are_binomial_and_monte_carlo_agrees(self, report, label, k):
        r = next(r for r in report["rules"] if r["label"] == label)
        assert r["k"] == k  # majority states its k: strict majority floor(n/2) + 1 (common practice)
        exact = self.binomial_qd(k, 0.05)
        assert r["pd_at_target_pf"]["analytic"] == pytest.approx(exact, rel=1e-8, abs=1e-12)
        assert r["pf_at_target_pf"]["analytic"] == pytest.approx(0.05, rel=1e-9)
        assert abs(r["pd_at_target_pf"]["monte_carlo"] - exact) < four_se(exact, self.M)
        assert abs(r["pf_at_target_pf"]["monte_carlo"] - 0.05) < four_se(0.05, self.M)

    @pytest.mark.parametrize("label", ["or", "and", "3_of_n", "majority"])
    def test_monte_carlo_roc_lies_within_its_band_of_the_analytic_roc(self, report, label):
        roc = next(r for r in report["rules"] if r["label"] == label)["roc"]
        for pd_mc, pd_a, pf_mc, pf_a in zip(roc["pd"], roc["pd_analytic"], roc["pf"], roc["pf_analytic"]):
            assert abs(pd_mc - pd_a) < four_se(pd_a, self.M)
            assert abs(pf_mc - pf_a) < four_se(pf_a, self.M) + 1 / self.M

    @pytest.mark.parametrize("label,k", [("3_of_n", 3), ("or", 1)])
    def test_falsifiers_saying_free_lower_pd_as_the_binomial_mixture_says(self, report, label, k):
        fa = next(r for r in report["rules"] if r["label"] == label)["falsifiers"]
        assert fa["count"] == list(range(0, 7))  # up to half the honest nodes plus one
        for f, mc, an in zip(fa["count"], fa["pd_monte_carlo"], fa["pd_analytic"]):
            exact = self.binomial_qd(k, 0.05, falsifiers=f)
            assert an == pytest.approx(exact, rel=1e-8, abs=1e-12)
            assert abs(mc - exact) < four_se(exact, self.M)
        assert fa["pd_monte_carlo"][-1] < fa["pd_monte_carlo"][0]

    def test_optimal_k_is_the_k_with_the_highest_binomial_pd(self, report):
        ok = report["optimal_k"]
        exact = [self.binomial_qd(k, 0.05) for k in range(1, 11)]
        assert ok["pd_analytic"] == pytest.approx(exact, rel=1e-8, abs=1e-12)
        assert ok["best_k"] == int(np.argmax(exact)) + 1
        for mc, an in zip(ok["pd_monte_carlo"], exact):
            assert abs(mc - an) < four_se(an, self.M)


def test_egc_of_rayleigh_nodes_is_the_square_law_combining_average_by_quadrature():
    """Three i.i.d. Rayleigh nodes, u = 5, mean total SNR 10 each: the combined SNR is Gamma(3, 10) (Digham et
    al. 2007, square-law combining); Pd = E[ncx2.sf(lambda, 30, 2 S)] by quad, which gives
    0.9506161825 at system Pf 0.1."""
    setup = ev.homogeneous_setup(3, 10 * math.log10(2.0), 5, "rayleigh")
    rep = ev.evaluate(setup, ev.parse_rules("egc", 3), trials=20_000, target_pf=0.1, seed=12)
    lam = stats.chi2.isf(0.1, 30)
    exact, _ = integrate.quad(lambda s: stats.ncx2.sf(lam, 30, 2 * s) * stats.gamma.pdf(s, 3, scale=10.0), 0, np.inf)
    assert exact == pytest.approx(0.9506161825, rel=1e-8)
    got = rep["rules"][0]["pd_at_target_pf"]
    assert got["analytic"] == pytest.approx(exact, rel=1e-7)
    assert abs(got["monte_carlo"] - exact) < four_se(exact, 20_000)
    pf = rep["rules"][0]["pf_at_target_pf"]
    assert pf["analytic"] == pytest.approx(0.1, rel=1e-9)  # gammaincc(sum N, tau): exact for EGC


def test_every_rule_decides_trial_by_trial_as_the_services_fuse_does():
    """The vectorised statistics must reproduce rules.fuse exactly (channels = trials), also with unequal N,
    noise-floor errors and falsifiers."""
    hetero = ev.Setup([100, 200, 300, 150, 250], [0.1, 0.2, 0.05, 0.3, 0.15], "nakagami", 2.0, "gaussian",
                      [0.3, -0.2, 0.0, 0.1, 0.0], ("free", None, None, "occupied", None))
    specs = ev.parse_rules(",".join(ev.DEFAULT_RULES), 5)
    rng = np.random.default_rng(13)
    for setup in (ev.homogeneous_setup(5, -8.0, 200, "rayleigh"), hetero):
        for occupied in (False, True):
            t = ev._draw(setup, 3000, occupied, rng)
            draws = ev.Draws(t, setup.n_samples)
            for spec in specs:
                prep = ev._prepare(spec, setup, 0.1)
                mine = ev.rule_statistic(prep, draws, 0.1) > ev.target_threshold(spec, setup, 0.1)
                theirs = rules.fuse(t, setup.n_samples, rule=spec.rule, target_pf=0.1, k=spec.k, snr=setup.snr).decision
                assert np.array_equal(mine, theirs), (spec, occupied)


def test_the_exact_llr_posterior_is_calibrated():
    """A Gaussian signal at the design SNR makes node_llr the exact LLR (Ma, Zhao, Li 2008), so the posterior
    is calibrated: ECE within sampling noise.  Bound: sum_b w_b |gap_b| <= 4 sqrt(0.25 n_bins / n) = 0.1 for
    10 bins and 2000 forecasts (4 standard errors at the worst p)."""
    setup = ev.homogeneous_setup(4, -20.0, 200, "none", signal="gaussian")
    rep = ev.evaluate(setup, ev.parse_rules("llr", 4), trials=1000, target_pf=0.1, seed=14, calib_trials=1000)
    cal = rep["rules"][0]["calibration"]
    assert cal["trials"] == 2000 and sum(cal["count"]) == 2000
    assert cal["ece"] < 0.1
    assert sum(c > 0 for c in cal["count"]) >= 5  # a weak signal spreads the posteriors over the bins


def test_the_802_22_reference_verdicts():
    """IEEE 802.22 sensing targets Pd >= 0.9 at Pf <= 0.1 (Stevenson et al., IEEE Commun. Mag. 47(1), 2009)."""
    assert (ev.REFERENCE["pd"], ev.REFERENCE["pf"]) == (0.9, 0.1)
    strong = ev.evaluate(ev.homogeneous_setup(5, -10.0, 1000, "none"), ev.parse_rules("egc", 5), trials=4000, seed=1)
    weak = ev.evaluate(ev.homogeneous_setup(5, -25.0, 100, "none"), ev.parse_rules("egc", 5), trials=4000, seed=1)
    assert strong["rules"][0]["reference"]["meets"] == "yes"
    assert weak["rules"][0]["reference"]["meets"] == "no"


def test_an_interrupted_run_reports_the_trials_done_and_says_so():
    calls = []

    def progress(done, total):
        calls.append(done)
        if done >= 1000:
            raise KeyboardInterrupt

    rep = ev.evaluate(ev.homogeneous_setup(3, -10.0, 100), ev.parse_rules("or,egc", 3), trials=5000, seed=2,
                      progress=progress, chunk=1000)
    assert rep["complete"] is False and rep["trials"] == 1000 and rep["trials_requested"] == 5000
    assert rep["rules"][0]["pd_at_target_pf"]["monte_carlo"] is not None


def test_the_report_has_the_documented_structure():
    rep = ev.evaluate(ev.homogeneous_setup(4, -10.0, 100), ev.parse_rules("k_of_n:3,weighted_llr", 4), trials=500)
    assert rep["target_pf"] == 0.1 and rep["complete"] is True
    r = rep["rules"][0]
    assert (r["rule"], r["k"]) == ("k_of_n", 3)
    assert set(r["pd_at_target_pf"]) == {"monte_carlo", "ci", "analytic"}
    assert len(r["pd_at_target_pf"]["ci"]) == 2
    assert len(r["roc"]["pf"]) == len(r["roc"]["pd"]) == len(r["roc"]["pd_analytic"])
    w = rep["rules"][1]
    assert w["k"] is None and w["roc"]["pd_analytic"] is None and w["pd_at_target_pf"]["analytic"] is None


def test_a_scenario_channel_carries_its_falsifier_and_names_the_time_behaviours():
    sc = load_scenario("demo")
    setup = ev.scenario_setup(sc, seed=1)
    kinds = {n.name: n.behaviour.get("kind", "honest") for n in sc.nodes}
    assert setup.n_nodes == len(sc.nodes)
    for name, f in zip(setup.names, setup.falsify):
        assert (f is not None) == (kinds[name] == "falsify")
    evaluated_as_honest = {n for n, k in kinds.items() if k not in ("honest", "falsify")}
    assert set(setup.description["evaluated_as_honest"]) == evaluated_as_honest
    rep = ev.evaluate(setup, ev.parse_rules("or,egc", setup.n_nodes), trials=500, seed=1)
    assert rep["setup"]["channel"] == setup.description["channel"]


@pytest.mark.parametrize("text,needle", [("nonsense", "unknown rule"), ("k_of_n:11", r"\[1, 10\]"),
                                         ("egc:2", "only k_of_n"), (",", "no rule"), ("k_of_n:two", "integer")])
def test_bad_rule_lists_name_the_item(text, needle):
    with pytest.raises(ValueError, match=needle):
        ev.parse_rules(text, 10)


def test_clopper_pearson_matches_scipy_binomtest():
    """scipy.stats.binomtest(...).proportion_ci(method="exact") is the Clopper-Pearson interval."""
    for x, n in [(0, 20), (7, 20), (20, 20), (512, 1000)]:
        lo, hi = ev.clopper_pearson(x, n)
        ci = stats.binomtest(x, n).proportion_ci(0.95, method="exact")
        assert (float(lo), float(hi)) == pytest.approx((ci.low, ci.high), rel=1e-9, abs=1e-12)


def test_setup_validation_names_the_argument():
    with pytest.raises(ValueError, match="fading"):
        ev.Setup([10], [0.1], fading="fast")
    with pytest.raises(ValueError, match="n_samples"):
        ev.Setup([0], [0.1])
    with pytest.raises(ValueError, match="falsify"):
        ev.Setup([10, 10], [0.1, 0.1], falsify=("lie", None))
    with pytest.raises(ValueError, match="target_pf"):
        ev.evaluate(ev.homogeneous_setup(2, -10, 10), ev.parse_rules("or", 2), trials=10, target_pf=1.0)
    assert special.gammaincc(1, 0.0) == 1.0  # sanity of the p-value convention used above: p = 1 at T = 0
