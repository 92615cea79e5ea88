"""System (fused) Pf and Pd, and the null laws that set fusion thresholds.

Hard rules: Poisson-binomial counts (binomial for identical nodes), the optimal k of
Zhang, Mallik and Letaief, and Chair-Varshney weights with exact enumeration.  Soft
rules: the weighted gamma sum (Moschopoulos series, exact) and a three-cumulant shifted
gamma law (Pearson's approximation) for statistics whose law has no closed form.

Shapes: node axis first, ``(n_nodes, ...)``; ``snr`` is linear per-sample SNR and
thresholds are on the normalised energy ``T`` (see :mod:`fusion.detection.energy`).
"""

from __future__ import annotations

import itertools
from typing import NamedTuple

import numpy as np
from scipy import special, stats


__all__ = [
    "SystemPerformance",
    "CvWeights",
    "poisson_binomial_pmf",
    "k_of_n_probability",
    "optimal_k",
    "local_false_alarm",
    "chair_varshney_weights",
    "chair_varshney_performance",
    "weighted_gamma_sf",
    "shifted_gamma_sf",
    "shifted_gamma_isf",
    "clipped_llr_cumulants",
]

# Probabilities are kept this far from 0 and 1 before taking logs (common practice).
EPS = 1e-6
# From this many samples on, clipped-LLR cumulants use the Wilson-Hilferty form of the gamma law.
WH_MIN_SAMPLES = 50


class SystemPerformance(NamedTuple):
    """Fused detection and false-alarm probabilities ``(qd, qf)``."""

    qd: np.ndarray
    qf: np.ndarray


class CvWeights(NamedTuple):
    """Chair-Varshney weights: ``plus`` for a vote of 1, ``minus`` for a vote of 0."""

    plus: np.ndarray
    minus: np.ndarray


def _unit(name, value, open_=False):
    arr = np.asarray(value, dtype=float)
    ok = (arr > 0) & (arr < 1) if open_ else (arr >= 0) & (arr <= 1)
    if np.any(~ok):
        interval = "(0, 1)" if open_ else "[0, 1]"
        raise ValueError(f"`{name}` must lie in {interval}, was {arr[~ok].flat[0].item()!r}")
    return arr


def poisson_binomial_pmf(p):
    """Distribution of the number of ones among independent Bernoulli(p_i) votes.

    Parameters
    ----------
    p : array_like, shape (n_nodes, ...)
        Probability that each node votes 1; trailing axes are independent problems.

    Returns
    -------
    ndarray, shape (n_nodes + 1, ...)
        ``pmf[l] = P(count = l)``, built by convolving ``[1 - p_i, p_i]`` node by node
        (the standard recursion, e.g. Varshney [1]_).

    References
    ----------
    .. [1] P. K. Varshney, "Distributed Detection and Data Fusion," Springer, 1997.
    """
    # Input validation
    p = _unit("p", p)
    if p.ndim == 0:
        raise ValueError("`p` must have a node axis, was a scalar")

    pmf = np.zeros((p.shape[0] + 1,) + p.shape[1:])
    pmf[0] = 1.0
    for i, pi in enumerate(p):
        # Adding node i shifts the mass of the count up by one with probability p_i.
        head = pmf[: i + 2].copy()
        pmf[1 : i + 2] = head[1:] * (1 - pi) + head[:-1] * pi
        pmf[0] = head[0] * (1 - pi)
    return pmf


def k_of_n_probability(p, k):
    """``P(at least k of n votes are 1)`` for independent, possibly different nodes.

    Parameters
    ----------
    p : array_like, shape (n_nodes, ...)
        Per-node probability of a 1 vote (Pd under H1 gives Qd, Pf under H0 gives Qf).
    k : int or array_like
        Votes needed, ``1 <= k <= n_nodes``; an array broadcasts over trailing axes.

    Returns
    -------
    ndarray
        The fused probability; equals ``binom.sf(k - 1, n, p)`` for identical nodes [1]_.

    References
    ----------
    .. [1] P. K. Varshney, "Distributed Detection and Data Fusion," Springer, 1997.

    Examples
    --------
    >>> round(float(k_of_n_probability(np.full(10, 0.05), 3)), 10)
    0.0115035574
    """
    # Input validation
    p = _unit("p", p)
    k = np.asarray(k)
    n = p.shape[0] if p.ndim else 0
    if np.any((k < 1) | (k > n)):
        raise ValueError(f"`k` must lie in [1, {n}], was {k.flat[np.argmax((k < 1) | (k > n))].item()!r}")

    pmf = poisson_binomial_pmf(p)
    tail = np.cumsum(pmf[::-1], axis=0)[::-1]  # tail[l] = P(count >= l)
    k_b = np.broadcast_to(k, pmf.shape[1:])
    return np.clip(np.take_along_axis(tail, k_b[None].astype(int), axis=0)[0], 0.0, 1.0)


def optimal_k(n, pd, pf):
    """The k that minimises ``Qf + (1 - Qd)`` for n identical nodes.

    Parameters
    ----------
    n : int
        Number of nodes.
    pd, pf : float
        Local detection and false-alarm probabilities, ``pd > pf``.

    Returns
    -------
    int
        ``min(n, ceil(n / (1 + alpha)))`` with
        ``alpha = ln(pf / pd) / ln((1 - pd) / (1 - pf))`` (Zhang, Mallik, Letaief [1]_).
        When ``n / (1 + alpha)`` is an integer, k and k + 1 tie; the smaller is returned.

    References
    ----------
    .. [1] W. Zhang, R. K. Mallik, K. B. Letaief, "Optimization of cooperative spectrum
       sensing with energy detection in cognitive radio networks," IEEE Trans. Wireless
       Commun. 8(12):5761-5766, 2009.

    Examples
    --------
    >>> optimal_k(10, 0.6, 0.05)
    3
    """
    # Input validation
    if int(n) != n or n < 1:
        raise ValueError(f"`n` must be a positive integer, was {n!r}")
    pd = float(_unit("pd", pd, open_=True))
    pf = float(_unit("pf", pf, open_=True))
    if not pd > pf:
        raise ValueError(f"`pd` must exceed `pf`, was pd={pd!r}, pf={pf!r}")

    # Zhang et al. (2009): alpha = ln(Pf / (1 - Pm)) / ln(Pm / (1 - Pf)), Pm = 1 - Pd.
    alpha = np.log(pf / pd) / np.log((1 - pd) / (1 - pf))
    k_star = n / (1 + alpha)
    # Guard against k* landing a rounding error above an integer.
    k = int(np.ceil(k_star - 1e-9))
    return int(min(n, max(k, 1)))


def local_false_alarm(rule, n_reporting, target_pf, k=None):
    """Per-node Pf of the votes that makes a counting rule meet ``target_pf``.

    Parameters
    ----------
    rule : {"or", "and", "k_of_n", "majority", "chair_varshney"}
        Hard rule.
    n_reporting : array_like of int
        Nodes reporting each channel.
    target_pf : float
        System false-alarm probability, in (0, 1).
    k : int, optional
        Votes needed (``k_of_n`` only).

    Returns
    -------
    ndarray
        For counting rules with identical nodes, the ``p`` solving
        ``binom.sf(k - 1, n, p) = target_pf``; since
        ``P(Binom(n, p) >= k) = I_p(k, n - k + 1)`` this is
        ``betaincinv(k, n - k + 1, target_pf)`` exactly (OR gives
        ``1 - (1 - Pf)^(1/n)``, AND gives ``Pf^(1/n)``).  ``chair_varshney`` votes at
        ``target_pf`` itself, leaving the fusion threshold to set the system Pf.  NaN
        where fewer than the needed nodes report.
    """
    # Input validation
    target_pf = float(_unit("target_pf", target_pf, open_=True))
    n = np.asarray(n_reporting)

    if rule == "chair_varshney":
        return np.where(n > 0, target_pf, np.nan)
    kk = _votes_needed(rule, n, k)
    ok = (n >= kk) & (kk >= 1)
    with np.errstate(invalid="ignore"):
        p = special.betaincinv(np.maximum(kk, 1), np.maximum(n - kk + 1, 1), target_pf)
    return np.where(ok, p, np.nan)


def _votes_needed(rule, n, k=None):
    """Votes needed per channel: or 1, and n, majority floor(n/2) + 1 (strict), k_of_n k."""
    n = np.asarray(n)
    if rule == "or":
        return np.ones_like(n)
    if rule == "and":
        return n.copy()
    if rule == "majority":
        return n // 2 + 1
    if rule == "k_of_n":
        return np.full_like(n, int(k))
    raise ValueError(f"`rule` must be a counting rule, was {rule!r}")


def chair_varshney_weights(pd, pf):
    """Chair-Varshney log-likelihood weights of binary votes.

    Parameters
    ----------
    pd, pf : array_like
        Local detection and false-alarm probabilities, in [0, 1]; clipped to
        ``[1e-6, 1 - 1e-6]`` so a perfect node gives a large, finite weight.

    Returns
    -------
    CvWeights
        ``plus = ln(pd / pf)`` and ``minus = ln((1 - pd) / (1 - pf))`` (Chair &
        Varshney [1]_, eq. for the optimal fusion rule).  A node with ``pd < pf`` gets
        its sign inverted automatically.

    References
    ----------
    .. [1] Z. Chair, P. K. Varshney, "Optimal data fusion in multiple sensor detection
       systems," IEEE Trans. Aerosp. Electron. Syst. AES-22(1):98-101, 1986.
    """
    # Input validation
    pd = np.clip(_unit("pd", pd), EPS, 1 - EPS)
    pf = np.clip(_unit("pf", pf), EPS, 1 - EPS)

    return CvWeights(np.log(pd) - np.log(pf), np.log1p(-pd) - np.log1p(-pf))


def chair_varshney_performance(pd, pf, threshold):
    """Exact ``(Qd, Qf)`` of the rule ``Lambda(u) > threshold`` by enumeration.

    Parameters
    ----------
    pd, pf : array_like, shape (n_nodes,)
        Local rates; ``n_nodes <= 20`` (``2**n`` patterns).
    threshold : float
        Threshold on ``Lambda``; the Bayes rule uses ``-ln(P1 / P0)``.

    Returns
    -------
    SystemPerformance

    References
    ----------
    .. [1] Z. Chair, P. K. Varshney, IEEE Trans. Aerosp. Electron. Syst. AES-22(1), 1986.
    """
    # Input validation
    pd = np.atleast_1d(_unit("pd", pd))
    pf = np.atleast_1d(_unit("pf", pf))
    if pd.ndim != 1 or pd.shape != pf.shape or pd.size > 20:
        raise ValueError(f"`pd` and `pf` must be 1-D of equal length <= 20, were {pd.shape}, {pf.shape}")

    bits = np.array(list(itertools.product((0, 1), repeat=pd.size)), dtype=float)
    w = chair_varshney_weights(pd, pf)
    lam = bits @ w.plus + (1 - bits) @ w.minus
    fires = lam > threshold
    prob1 = np.prod(np.where(bits == 1, pd, 1 - pd), axis=1)
    prob0 = np.prod(np.where(bits == 1, pf, 1 - pf), axis=1)
    return SystemPerformance(prob1[fires].sum(), prob0[fires].sum())


def weighted_gamma_sf(x, shapes, scales, *, tol=1e-13, max_terms=20_000):
    """Survival function of ``sum_i X_i``, ``X_i ~ Gamma(shapes[i], scales[i])``.

    Parameters
    ----------
    x : array_like
        Points at which to evaluate ``P(sum > x)``.
    shapes, scales : array_like, shape (n,)
        Positive gamma shapes and scales (scale = weight for a normalised energy).

    Returns
    -------
    ndarray
        Exact to ``tol`` by the series of Moschopoulos [1]_::

            P(S > x) = C sum_k delta_k gammaincc(rho + k, x / b1),
            b1 = min scales, rho = sum shapes, C = prod (b1 / b_i)^a_i,
            g_k = sum_i a_i (1 - b1/b_i)^k / k,
            delta_{k+1} = 1/(k+1) sum_{j=1}^{k+1} j g_j delta_{k+1-j}.

        ``C delta_k`` is a pmf, so ``1 - C sum delta_k`` bounds the truncation error.

    References
    ----------
    .. [1] P. G. Moschopoulos, "The distribution of the sum of independent gamma random
       variables," Ann. Inst. Statist. Math. 37:541-544, 1985.
    """
    # Input validation
    a = np.atleast_1d(np.asarray(shapes, dtype=float))
    b = np.atleast_1d(np.asarray(scales, dtype=float))
    if np.any(~(a > 0)) or np.any(~(b > 0)) or a.shape != b.shape:
        raise ValueError("`shapes` and `scales` must be positive arrays of equal shape")
    x = np.asarray(x, dtype=float)

    b1 = b.min()
    rho = a.sum()
    r = 1.0 - b1 / b
    log_c = np.sum(a * np.log(b1 / b))
    if log_c < -700.0:
        raise ValueError(
            "the Moschopoulos series needs too many terms for these `shapes` and `scales` "
            f"(log C = {log_c:.0f}); use `shifted_gamma_sf` for large, unequal sums"
        )
    xs = np.maximum(x, 0.0) / b1
    g = np.zeros(64)  # g[j] = sum_i a_i r_i^j / j, grown on demand
    pk = np.zeros(64)  # pk[k] = C delta_k, a pmf over k; same linear recursion as delta
    pk[0] = np.exp(log_c)
    total = pk[0] * special.gammaincc(rho, xs)
    mass = pk[0]
    k = 0
    while 1.0 - mass > tol:
        k += 1
        if k > max_terms:
            raise ValueError(f"the Moschopoulos series did not reach `tol` in {max_terms} terms")
        if k >= g.size:
            g, pk = np.resize(g, 2 * g.size), np.resize(pk, 2 * g.size)
        g[k] = np.sum(a * r**k) / k
        # Moschopoulos (1985): delta_{k+1} = 1/(k+1) sum_j j g_j delta_{k+1-j}, one dot per term.
        pk[k] = np.dot(np.arange(1, k + 1) * g[1 : k + 1], pk[k - 1 :: -1][:k]) / k
        total = total + pk[k] * special.gammaincc(rho + k, xs)
        mass += pk[k]
    return np.clip(total, 0.0, 1.0)


def shifted_gamma_sf(x, k1, k2, k3):
    """``P(X > x)`` for a shifted gamma law fitted to the cumulants ``k1, k2, k3``.

    Parameters
    ----------
    x : array_like
        Points.
    k1, k2, k3 : array_like
        Mean, variance (> 0) and third cumulant of ``X``.

    Returns
    -------
    ndarray
        Pearson's three-moment approximation [1]_: shape ``4 k2^3 / k3^2``, scale
        ``k3 / (2 k2)`` (negative for left skew, i.e. a mirrored gamma), location chosen
        to match the mean; a normal law when the skewness is below 1e-6.  Exact for a
        gamma sum with equal scales (EGC) and for any single gamma term.

    References
    ----------
    .. [1] E. S. Pearson, "Note on an approximation to the distribution of non-central
       chi-square," Biometrika 46:364, 1959.
    """
    # Input validation
    k1, k2, k3, x = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (k1, k2, k3, x)))

    with np.errstate(divide="ignore", invalid="ignore"):
        skew = k3 / k2**1.5
        normal = np.abs(skew) < 1e-6
        shape = np.where(normal, 1.0, 4.0 / skew**2)
        theta = np.where(normal, 1.0, k3 / (2.0 * k2))
        z = np.maximum((x - k1) / theta + shape, 0.0)
        gam = np.where(theta > 0, special.gammaincc(shape, z), special.gammainc(shape, z))
        out = np.where(normal, special.ndtr(-(x - k1) / np.sqrt(k2)), gam)
    # A degenerate (constant) statistic exceeds x only if its value does.
    return np.where(k2 > 0, out, (k1 > x).astype(float))


def shifted_gamma_isf(q, k1, k2, k3):
    """Inverse of :func:`shifted_gamma_sf` in ``x``: ``P(X > x) = q``.

    Parameters
    ----------
    q : array_like
        Exceedance probability, in (0, 1).
    k1, k2, k3 : array_like
        Cumulants as in :func:`shifted_gamma_sf`.

    Returns
    -------
    ndarray
        The threshold; ``k1`` where ``k2 == 0`` (a constant statistic never exceeds it).

    References
    ----------
    .. [1] E. S. Pearson, Biometrika 46:364, 1959.
    """
    # Input validation
    q = _unit("q", q, open_=True)
    q, k1, k2, k3 = np.broadcast_arrays(q, *(np.asarray(v, dtype=float) for v in (k1, k2, k3)))

    with np.errstate(divide="ignore", invalid="ignore"):
        skew = k3 / k2**1.5
        # Beyond shape ~1e8 the gamma is normal to double precision and its inverse is slow.
        normal = np.abs(skew) < 2e-4
        shape = np.where(normal, 1.0, 4.0 / skew**2)
        theta = np.where(normal, 1.0, k3 / (2.0 * k2))
        quant = np.where(theta > 0, special.gammainccinv(shape, q), special.gammaincinv(shape, q))
        gam = k1 + theta * (quant - shape)
        out = np.where(normal, k1 + np.sqrt(k2) * special.ndtri(1 - q), gam)
    return np.where(k2 > 0, out, k1)


# 96-point Gauss-Legendre rule for the bounded middle part of a clipped statistic.
_GL_X, _GL_W = np.polynomial.legendre.leggauss(96)


def clipped_llr_cumulants(n_samples, snr, trust=1.0, clip=np.inf, *, hypothesis=0, signal="gaussian",
                          method="auto"):
    """First three cumulants of one node's term ``clip(trust * l(T), -clip, clip)``.

    ``l(T) = T snr/(1 + snr) - N ln(1 + snr)`` is the Gaussian-signal log-likelihood
    ratio of the normalised energy (exact for a circular Gaussian signal, Ma, Zhao and
    Li [1]_).

    Parameters
    ----------
    n_samples, snr, trust, clip : array_like
        Samples ``N``, design per-sample SNR (>= 0), trust in [0, 1] and clip level
        (> 0, nats); broadcast together.
    hypothesis : {0, 1}
        Law of ``T``: H0 ``Gamma(N, 1)``; H1 per ``signal``.
    signal : {"gaussian", "deterministic"}
        Under H1, ``T ~ Gamma(N, 1 + snr)`` or ``2T ~ ncx2(2N, 2 N snr)``.
    method : {"auto", "exact"}
        ``"exact"``: quadrature on the exact law.  ``"auto"``: for a gamma law with
        ``N >= 50`` and a finite clip, the Wilson-Hilferty cube-root normal form of the
        gamma law [2]_, whose moments over the clip window are closed-form (two orders of
        magnitude faster; agreement with the exact cumulants is checked in the tests).

    Returns
    -------
    tuple of ndarray
        ``(k1, k2, k3)``: mean, variance, third cumulant.

    Notes
    -----
    The term is ``-clip`` below ``lo``, ``+clip`` above ``hi`` and linear in ``T`` in
    between; the atoms use the exact CDF and the middle part a 96-point Gauss-Legendre
    rule over the part of ``[lo, hi]`` that holds all but 1e-15 of the mass.

    References
    ----------
    .. [1] J. Ma, G. Zhao, Y. Li, "Soft combination and detection for cooperative spectrum
       sensing in cognitive radio networks," IEEE Trans. Wireless Commun.
       7(11):4502-4507, 2008.
    .. [2] E. B. Wilson, M. M. Hilferty, "The distribution of chi-square," Proc. Natl.
       Acad. Sci. USA 17(12):684-688, 1931.
    """
    # Input validation
    if hypothesis not in (0, 1):
        raise ValueError(f"`hypothesis` must be 0 or 1, was {hypothesis!r}")
    if signal not in ("gaussian", "deterministic"):
        raise ValueError(f"`signal` must be one of 'gaussian', 'deterministic', was {signal!r}")
    if method not in ("auto", "exact"):
        raise ValueError(f"`method` must be one of 'auto', 'exact', was {method!r}")
    n, g, s, c = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (n_samples, snr, trust, clip)))

    if method == "auto" and (hypothesis == 0 or signal == "gaussian"):
        fast = (n >= WH_MIN_SAMPLES) & np.isfinite(c)
        scale = 1.0 if hypothesis == 0 else 1.0 + g
        if np.all(fast):
            return _row_shared_wh(n, g, s, c, np.broadcast_to(scale, n.shape))
        if np.any(fast):
            out = [np.empty(n.shape) for _ in range(3)]
            wh = _blocked_wh(n[fast], g[fast], s[fast], c[fast], np.broadcast_to(scale, n.shape)[fast])
            ex = clipped_llr_cumulants(n[~fast], g[~fast], s[~fast], c[~fast], hypothesis=hypothesis,
                                       signal=signal, method="exact")
            for o, a, b in zip(out, wh, ex):
                o[fast], o[~fast] = a, b
            return tuple(out)
    alpha = s * g / (1.0 + g)
    beta = s * n * np.log1p(g)
    if hypothesis == 0:
        law = stats.gamma(n, scale=1.0)
    elif signal == "gaussian":
        law = stats.gamma(n, scale=1.0 + g)
    else:
        law = _half_ncx2(n, g)
    with np.errstate(divide="ignore", invalid="ignore"):
        lo = np.where(alpha > 0, np.maximum((beta - c) / alpha, 0.0), np.inf)
        hi = np.where(alpha > 0, (beta + c) / alpha, np.inf)
    f_lo = np.where(np.isfinite(lo), law.cdf(np.where(np.isfinite(lo), lo, 0.0)), 1.0)
    s_hi = np.where(np.isfinite(hi), law.sf(np.where(np.isfinite(hi), hi, 0.0)), 0.0)
    # A zero-slope term is the constant clip(-beta) (all mass in the "below lo" bucket).
    low_value = np.where(alpha > 0, -c, np.clip(-beta, -c, c))
    a = np.maximum(lo, law.ppf(1e-15))
    b = np.minimum(hi, law.isf(1e-15))
    a = np.where(np.isfinite(a), a, 0.0)
    b = np.where(np.isfinite(b) & (b > a), b, a)
    half = (b - a) / 2.0
    x = (a + b)[..., None] / 2.0 + half[..., None] * _GL_X
    wts = half[..., None] * _GL_W * _law_pdf(law, x)
    y = np.clip(alpha[..., None] * x - beta[..., None], -c[..., None], c[..., None])
    m = []
    for r in (1, 2, 3):
        # An infinite clip has no atoms: skip them rather than form inf * 0.
        with np.errstate(invalid="ignore"):
            atoms = np.where(f_lo > 0, low_value**r * f_lo, 0.0) + np.where(s_hi > 0, c**r * s_hi, 0.0)
        m.append(atoms + np.sum(wts * y**r, axis=-1))
    m1, m2, m3 = m
    k2 = np.maximum(m2 - m1**2, 0.0)
    k3 = m3 - 3 * m1 * m2 + 2 * m1**3
    return m1, k2, k3


# Cells per block: ~150 temporaries of 128 KiB stay in the allocator's heap and in cache. Whole (1000 x 256)
# arrays instead make every call fault in ~80 MB of fresh pages, which costs more than the arithmetic.
_WH_BLOCK = 16_384


def _blocked_wh(n, g, s, c, scale):
    """:func:`_clipped_gamma_wh` over same-shaped arrays, one block of cells at a time."""
    shape = n.shape
    args = [np.ravel(v) for v in (n, g, s, c, scale)]
    out = [np.empty(args[0].size) for _ in range(3)]
    for lo in range(0, args[0].size, _WH_BLOCK):
        part = _clipped_gamma_wh(*(a[lo:lo + _WH_BLOCK] for a in args))
        for o, p in zip(out, part):
            o[lo:lo + _WH_BLOCK] = p
    return tuple(o.reshape(shape) for o in out)


def _row_shared_wh(n, g, s, c, scale):
    """:func:`_blocked_wh`, evaluated once per row for the cells that share their row's inputs.

    A node measures every channel with the same samples and trust, and its SNR stays the design value on
    every channel it has not learned one for (most of them), so most cells of a row repeat one set of
    inputs: the row's median of each (the value held by most cells when one value holds more than half).
    The same formula on the same numbers gives the same cumulants; only the other cells are computed one
    by one.  Falls back to every cell when the inputs are not 2-D or fewer than half the cells share.
    """
    args = (n, g, s, c, scale)
    if n.ndim != 2 or n.shape[1] < 2:
        return _blocked_wh(*args)
    refs = [None] * len(args)
    same = np.ones(n.shape, dtype=bool)
    for i in (1, 0, 2, 3, 4):  # the SNR first: where it differs most, stop before the other medians
        v = args[i]
        if v.strides[1] == 0:  # a row broadcast along the channels: its first column, no median needed
            refs[i] = v[:, 0]
            continue
        refs[i] = np.median(v, axis=1)
        same &= v == refs[i][:, None]
        if np.count_nonzero(same) < same.size // 2:
            return _blocked_wh(*args)
    other = ~same
    per_row = _blocked_wh(*refs)
    per_cell = _blocked_wh(*(v[other] for v in args))
    out = []
    for row, cell in zip(per_row, per_cell):
        o = np.repeat(row[:, None], n.shape[1], axis=1)
        o[other] = cell
        out.append(o)
    return tuple(out)


def _clipped_gamma_wh(n, g, s, c, scale):
    """Cumulants of ``clip(s l(T), -c, c)`` for ``T ~ Gamma(n, scale)``, Wilson-Hilferty form.

    ``T = scale n U^3`` with ``U ~ N(m, sd^2)``, ``m = 1 - 1/(9n)``, ``sd = 1/(3 sqrt n)``.  On
    the clip window the term is ``k U^3 - beta``; its powers need the partial moments
    ``I_j = E[U^j; window]``, which integration by parts gives in closed form:
    ``I_j = m I_(j-1) + sd^2 (j-1) I_(j-2) + sd (u_a^(j-1) phi(z_a) - u_b^(j-1) phi(z_b))``.
    Written with products rather than ``**`` and ``np.where``: this runs once per node and
    channel every epoch, and those two cost ~10x a multiplication.
    """
    alpha = s * g / (1.0 + g)
    beta = s * n * np.log1p(g)
    m, sd = 1.0 - 1.0 / (9.0 * n), 1.0 / (3.0 * np.sqrt(n))
    dead = alpha == 0  # a zero-slope term is the constant clip(-beta); fixed up at the end
    k = alpha * scale * n
    per_u3 = 1.0 / (k + dead)  # U^3 = T / (scale n), and T = (y + beta) / alpha on the window
    u_a = np.cbrt(np.maximum(beta - c, 0.0) * per_u3)
    u_b = np.cbrt((beta + c) * per_u3)
    z_a, z_b = (u_a - m) / sd, (u_b - m) / sd
    f_lo, s_hi = special.ndtr(z_a), special.ndtr(-z_b)
    # sd phi(z); the exponent is capped so that nothing far out turns subnormal (slow in every later product).
    w = sd / np.sqrt(2 * np.pi)
    phi_a = np.exp(-np.minimum(0.5 * z_a * z_a, 600.0)) * w
    phi_b = np.exp(-np.minimum(0.5 * z_b * z_b, 600.0)) * w
    sd2 = sd * sd
    moments = [1.0 - f_lo - s_hi, m * (1.0 - f_lo - s_hi) + (phi_a - phi_b)]  # I_0, I_1
    pa, pb = u_a, u_b  # u^(j-1) at the window's ends
    for j in range(2, 10):
        moments.append(m * moments[j - 1] + sd2 * (j - 1) * moments[j - 2] + (pa * phi_a - pb * phi_b))
        pa, pb = pa * u_a, pb * u_b
    i0, i3, i6, i9 = moments[0], moments[3], moments[6], moments[9]
    kb, k2b = k * beta, k * k
    odd = s_hi - f_lo
    m1 = c * odd + k * i3 - beta * i0
    m2 = (c * c) * (f_lo + s_hi) + k2b * i6 - 2.0 * kb * i3 + beta * beta * i0
    m3 = (c * c * c) * odd + k2b * k * i9 - 3.0 * k2b * beta * i6 + 3.0 * kb * beta * i3 - beta * beta * beta * i0
    if np.any(dead):
        const = np.clip(-beta, -c, c)
        m1, m2, m3 = (np.where(dead, const**r, v) for r, v in zip((1, 2, 3), (m1, m2, m3)))
    k2 = np.maximum(m2 - m1 * m1, 0.0)
    k3 = m3 - 3.0 * m1 * m2 + 2.0 * m1 * m1 * m1
    return m1, k2, k3


def _law_pdf(law, x):
    """pdf of a frozen scipy law at ``x`` with trailing quadrature axis."""
    args = [np.asarray(v)[..., None] for v in law.args]
    kwds = {key: np.asarray(v)[..., None] for key, v in law.kwds.items()}
    return law.dist.pdf(x, *args, **kwds)


def _half_ncx2(n, g):
    """Law of ``T`` when ``2T ~ ncx2(2N, 2N g)``."""
    return stats.ncx2(2.0 * n, 2.0 * n * g, scale=0.5)
