"""Single-node energy detection: normalisation, thresholds, Pf and Pd.

Conventions: a node takes ``N`` complex baseband samples per
channel and measurement; ``T = sum |y|^2 / sigma^2`` is the *normalised* energy, so under
H0 ``T ~ Gamma(N, 1)``.  Every threshold here (``tau``) is on ``T``, not on ``Y = 2T``
(Digham's scale) nor on ``T/N``.  ``snr`` is always the linear *per-sample* SNR
``gamma_s``; the total (energy) SNR is ``N * gamma_s``.

Functions broadcast like ufuncs and propagate NaN (NaN = "no report").
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special, stats

__all__ = [
    "normalise",
    "threshold",
    "false_alarm",
    "detection_awgn",
    "detection_gaussian",
    "detection_rayleigh",
    "detection_nakagami",
    "snr_wall",
    "SnrWallCheck",
    "check_snr_wall",
]


def _check_positive(name, value):
    arr = np.asarray(value, dtype=float)
    with np.errstate(invalid="ignore"):
        bad = ~np.isnan(arr) & ~(arr > 0)
    if np.any(bad):
        raise ValueError(f"`{name}` must be positive, was {arr[bad].flat[0].item()!r}")
    return arr


def _check_open_unit(name, value):
    arr = np.asarray(value, dtype=float)
    with np.errstate(invalid="ignore"):
        bad = ~np.isnan(arr) & ~((arr > 0) & (arr < 1))
    if np.any(bad):
        raise ValueError(f"`{name}` must lie in (0, 1), was {arr[bad].flat[0].item()!r}")
    return arr


def _check_nonnegative(name, value):
    arr = np.asarray(value, dtype=float)
    with np.errstate(invalid="ignore"):
        bad = ~np.isnan(arr) & ~(arr >= 0)
    if np.any(bad):
        raise ValueError(f"`{name}` must be non-negative, was {arr[bad].flat[0].item()!r}")
    return arr


def normalise(power_dbm, noise_dbm, n_samples):
    """Normalised energy statistic ``T = N * P / sigma^2`` from powers in dBm.

    Parameters
    ----------
    power_dbm : array_like
        Mean power over ``n_samples`` complex samples, dBm.  NaN means no report.
    noise_dbm : array_like
        Noise power per sample of the same node and channel, dBm.
    n_samples : array_like
        Complex samples per measurement (positive).

    Returns
    -------
    ndarray
        ``T``, dimensionless; under H0 ``T ~ Gamma(n_samples, 1)``.  Shapes broadcast.

    Notes
    -----
    ``T = N * 10**((P_dBm - sigma_dBm) / 10)``; the normalisation by each node's own noise
    floor is what makes the H0 law parameter-free (after Urkowitz [1]_).

    References
    ----------
    .. [1] H. Urkowitz, "Energy detection of unknown deterministic signals,"
       Proc. IEEE 55(4):523-531, 1967.

    Examples
    --------
    >>> float(normalise(-90.0, -100.0, 10))
    100.0
    """
    # Input validation
    n = _check_positive("n_samples", n_samples)
    p = np.asarray(power_dbm, dtype=float)
    s = np.asarray(noise_dbm, dtype=float)

    return n * np.power(10.0, (p - s) / 10.0)


def threshold(pf, n_samples):
    """Threshold ``tau`` on ``T`` with ``P(T > tau | H0) = pf``.

    Parameters
    ----------
    pf : array_like
        Target false-alarm probability, in (0, 1).
    n_samples : array_like
        Complex samples ``N`` (positive; need not be an integer).

    Returns
    -------
    ndarray
        ``tau = gammainccinv(N, pf)``, equal to ``chi2.isf(pf, 2N) / 2`` (Digham's
        ``lambda`` is ``2 tau``) [1]_.

    References
    ----------
    .. [1] F. F. Digham, M.-S. Alouini, M. K. Simon, "On the energy detection of unknown
       signals over fading channels," IEEE Trans. Commun. 55(1):21-24, 2007.

    Examples
    --------
    >>> round(2 * float(threshold(0.01, 5)), 8)
    23.20925116
    """
    # Input validation
    pf = _check_open_unit("pf", pf)
    n = _check_positive("n_samples", n_samples)

    return special.gammainccinv(n, pf)


def false_alarm(tau, n_samples):
    """False-alarm probability ``P(T > tau | H0) = gammaincc(N, tau)``.

    Parameters
    ----------
    tau : array_like
        Threshold on ``T``; values <= 0 give 1.
    n_samples : array_like
        Complex samples ``N`` (positive).

    Returns
    -------
    ndarray
        Pf in [0, 1] [1]_.

    References
    ----------
    .. [1] F. F. Digham, M.-S. Alouini, M. K. Simon, IEEE Trans. Commun. 55(1), 2007.
    """
    # Input validation
    n = _check_positive("n_samples", n_samples)
    tau = np.asarray(tau, dtype=float)

    return special.gammaincc(n, np.maximum(tau, 0.0))


def detection_awgn(tau, n_samples, snr):
    """Detection probability of a deterministic signal in AWGN.

    Parameters
    ----------
    tau : array_like
        Threshold on ``T``.
    n_samples : array_like
        Complex samples ``N``.
    snr : array_like
        Linear per-sample SNR ``gamma_s >= 0``.

    Returns
    -------
    ndarray
        ``Pd = Q_N(sqrt(2 N gamma_s), sqrt(2 tau)) = ncx2.sf(2 tau, 2N, 2 N gamma_s)``.

    Notes
    -----
    Under H1 ``2T`` is noncentral chi-square with ``2N`` degrees of freedom and
    noncentrality ``2 N gamma_s`` (Urkowitz [1]_; Digham et al. [2]_ with their total
    SNR ``gamma = N gamma_s``).

    References
    ----------
    .. [1] H. Urkowitz, Proc. IEEE 55(4):523-531, 1967.
    .. [2] F. F. Digham, M.-S. Alouini, M. K. Simon, IEEE Trans. Commun. 55(1), 2007.

    Examples
    --------
    >>> round(float(detection_awgn(threshold(0.01, 5), 5, 2.0)), 10)
    0.7353119162
    """
    # Input validation
    n = _check_positive("n_samples", n_samples)
    snr = _check_nonnegative("snr", snr)
    tau = np.asarray(tau, dtype=float)

    tau, n, snr = np.broadcast_arrays(np.maximum(tau, 0.0), n, snr)
    # ncx2 is stochastically larger than chi2 with the same dof, so Pd >= Pf; where Pf is
    # 1 to double precision so is Pd.  (This also sidesteps a boost overflow at x ~ 0.)
    sure = special.gammainc(n, tau) < 1e-17
    out = np.ones(tau.shape)
    if np.any(~sure):
        out[~sure] = stats.ncx2.sf(2.0 * tau[~sure], 2.0 * n[~sure], 2.0 * n[~sure] * snr[~sure])
    return out[()] if out.ndim == 0 else out


def detection_gaussian(tau, n_samples, snr):
    """Detection probability of a circular Gaussian signal in AWGN.

    ``T ~ Gamma(N, 1 + gamma_s)`` under H1, so ``Pd = gammaincc(N, tau / (1 + gamma_s))``
    exactly (Urkowitz [1]_ treats the deterministic case).

    Parameters
    ----------
    tau, n_samples, snr : array_like
        As in :func:`detection_awgn`.

    Returns
    -------
    ndarray
        Pd in [0, 1].

    References
    ----------
    .. [1] H. Urkowitz, Proc. IEEE 55(4):523-531, 1967.
    """
    # Input validation
    n = _check_positive("n_samples", n_samples)
    snr = _check_nonnegative("snr", snr)
    tau = np.asarray(tau, dtype=float)

    return special.gammaincc(n, np.maximum(tau, 0.0) / (1.0 + snr))


def _nb_series(tau, n, mean_total_snr, m, tol=1e-14, block=256):
    """Pd averaged over Gamma(m, mean/m) total SNR: sum_j NB(j; m, p) gammaincc(N + j, tau).

    Derived from the Poisson mixture of ncx2 (Digham, Alouini and Simon); exact for any m > 0.
    Terms are summed in blocks of j.  Once ``N + j`` is far above ``tau``, every later
    ``gammaincc`` is 1 to double precision, so the rest of the sum is the negative-binomial
    tail mass ``nbinom.sf``, added in closed form.
    """
    tau, n, g, m = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (tau, n, mean_total_snr, m)))
    shape = tau.shape
    tau, n, g, m = (a.ravel() for a in (tau, n, g, m))
    p = m / (m + g)
    out = np.zeros(tau.shape)
    j0 = 0
    while True:
        j = np.arange(j0, j0 + block)[:, None]
        out += np.sum(stats.nbinom.pmf(j, m, p) * special.gammaincc(n + j, tau), axis=0)
        j0 += block
        # gammaincc(a, x) > 1 - 1e-16 once a > x + 10 sqrt(a) + 40 (a Gaussian tail of 10 sd).
        saturated = n + j0 > tau + 10.0 * np.sqrt(n + j0) + 40.0
        tail = stats.nbinom.sf(j0 - 1, m, p)
        if np.all(saturated | (tail < tol)):
            out += np.where(saturated, tail, 0.0)
            return np.clip(out, 0.0, 1.0).reshape(shape)


def detection_rayleigh(tau, n_samples, snr):
    """Average Pd over block Rayleigh fading (Digham et al. closed form).

    Parameters
    ----------
    tau : array_like
        Threshold on ``T``.
    n_samples : array_like
        Complex samples ``N`` (a positive integer for the closed form).
    snr : array_like
        Mean linear per-sample SNR; the mean total SNR is ``N * snr``.

    Returns
    -------
    ndarray
        Average Pd in [0, 1].

    Notes
    -----
    With ``lambda = 2 tau``, ``u = N`` and mean total SNR ``g`` (Digham et al. [1]_)::

        Pd = e^{-lambda/2} sum_{k=0}^{u-2} (lambda/2)^k / k!
             + ((1+g)/g)^{u-1} [e^{-lambda/(2(1+g))}
                                - e^{-lambda/2} sum_{k=0}^{u-2} (lambda g/(2(1+g)))^k / k!]

    The two finite sums are regularised upper incomplete gammas, which keeps the form
    stable for large ``u``.  Non-integer ``N`` or zero SNR fall back to the
    negative-binomial series of :func:`detection_nakagami` with ``m = 1``.

    References
    ----------
    .. [1] F. F. Digham, M.-S. Alouini, M. K. Simon, "On the energy detection of unknown
       signals over fading channels," IEEE Trans. Commun. 55(1):21-24, 2007.
    """
    # Input validation
    n = _check_positive("n_samples", n_samples)
    snr = _check_nonnegative("snr", snr)
    tau = np.maximum(np.asarray(tau, dtype=float), 0.0)

    tau, n, snr = np.broadcast_arrays(tau, n, snr)
    g = n * snr
    # The closed form cancels catastrophically when the mean total SNR is small against the sample count (it
    # gave Pd < Pf, e.g. by 3e-3 at N = 4096, g = 1, and NaN below the smallest normal float); measured
    # against the series and numerical integration (tests/detection/test_energy.py), it is exact to
    # round-off once g >= sqrt(N), so below that the series is used.
    closed = (n == np.round(n)) & (g >= np.maximum(1.0, np.sqrt(n)))
    out = np.empty(tau.shape)
    if np.any(~closed):
        out[~closed] = _nb_series(tau[~closed], n[~closed], g[~closed], 1.0)
    if np.any(closed):
        t, u, gg = tau[closed], n[closed], g[closed]
        x = t / (1.0 + gg)
        # sum_{k=0}^{u-2} z^k/k! e^{-z} = gammaincc(u-1, z); empty (0) when u = 1.
        a = np.maximum(u - 1, 1)
        s1 = np.where(u > 1, special.gammaincc(a, t), 0.0)
        # e^{-lambda/2} sum (lambda g/(2(1+g)))^k/k! = e^{-x} gammaincc(u-1, t g/(1+g)), so the
        # bracket is e^{-x} gammainc(u-1, .); the lower form avoids 1 - (1 - eps) for large u.
        s2 = np.where(u > 1, special.gammainc(a, t * gg / (1 + gg)), 1.0)
        with np.errstate(divide="ignore"):
            log_term = (u - 1) * np.log1p(1.0 / gg) - x + np.log(s2)
        out[closed] = s1 + np.exp(log_term)
    return np.clip(out, 0.0, 1.0)


def detection_nakagami(tau, n_samples, snr, m):
    """Average Pd over block Nakagami-m fading.

    Parameters
    ----------
    tau : array_like
        Threshold on ``T``.
    n_samples : array_like
        Complex samples ``N``.
    snr : array_like
        Mean linear per-sample SNR (mean total SNR ``N * snr``).
    m : array_like
        Nakagami fading parameter, ``m >= 0.5``; ``m = 1`` is Rayleigh.

    Returns
    -------
    ndarray
        Average Pd in [0, 1].

    Notes
    -----
    Averages the Poisson-mixture form of the noncentral chi-square survival function over
    a Gamma(m, g/m) total SNR, which gives negative-binomial weights::

        Pd = sum_j NB(j; m, m/(m+g)) gammaincc(N + j, tau)

    This is exact for any ``m > 0`` and agrees with the integer-``m`` closed form of
    Digham et al. [1]_ (checked in the tests).

    References
    ----------
    .. [1] F. F. Digham, M.-S. Alouini, M. K. Simon, IEEE Trans. Commun. 55(1):21-24, 2007.
    """
    # Input validation
    n = _check_positive("n_samples", n_samples)
    snr = _check_nonnegative("snr", snr)
    m_arr = np.asarray(m, dtype=float)
    if np.any(~(m_arr >= 0.5)):
        raise ValueError(f"`m` must be at least 0.5, was {m_arr[~(m_arr >= 0.5)].flat[0].item()!r}")
    tau = np.maximum(np.asarray(tau, dtype=float), 0.0)

    return _nb_series(tau, n, n * snr, m_arr)


def snr_wall(uncertainty_db):
    """SNR wall of the energy detector under noise uncertainty (Tandra & Sahai).

    Parameters
    ----------
    uncertainty_db : array_like
        Noise-uncertainty factor ``x`` in dB (>= 0): the true noise power lies in
        ``[sigma^2 / rho, rho sigma^2]`` with ``rho = 10**(x/10)``.

    Returns
    -------
    ndarray
        Linear per-sample SNR ``rho - 1/rho`` below which no number of samples reaches a
        given (Pf, Pd) [1]_.  This is the two-sided convention; some later papers use
        ``rho - 1``.

    References
    ----------
    .. [1] R. Tandra, A. Sahai, "SNR walls for signal detection," IEEE J. Sel. Topics
       Signal Process. 2(1):4-17, 2008.

    Examples
    --------
    >>> round(10 * float(np.log10(snr_wall(1.0))), 6)
    -3.329234
    """
    # Input validation
    x = _check_nonnegative("uncertainty_db", uncertainty_db)

    rho = np.power(10.0, x / 10.0)
    return rho - 1.0 / rho


@dataclass(frozen=True)
class SnrWallCheck:
    """Outcome of :func:`check_snr_wall`.

    ``below_wall`` is True when detection at ``snr_db`` is impossible for any sensing
    time; ``message`` is a ready-to-print sentence (empty when fine).
    """

    below_wall: bool
    snr_db: float
    wall_db: float
    margin_db: float
    message: str


def check_snr_wall(snr_db, uncertainty_db):
    """Compare a configured target SNR against the SNR wall.

    Parameters
    ----------
    snr_db : float
        Target per-sample SNR the deployment must detect, dB.
    uncertainty_db : float
        Noise-uncertainty factor, dB (>= 0).

    Returns
    -------
    SnrWallCheck
        ``below_wall``, the wall in dB, ``margin_db = snr_db - wall_db`` and a message the
        API or CLI can show as a warning.

    References
    ----------
    .. [1] R. Tandra, A. Sahai, IEEE J. Sel. Topics Signal Process. 2(1):4-17, 2008.

    Examples
    --------
    >>> check_snr_wall(-10.0, 1.0).below_wall
    True
    """
    # Input validation
    snr_db = float(snr_db)
    if not np.isfinite(snr_db):
        raise ValueError(f"`snr_db` must be finite, was {snr_db!r}")
    x = float(_check_nonnegative("uncertainty_db", uncertainty_db))

    if x == 0.0:
        return SnrWallCheck(False, snr_db, -np.inf, np.inf, "")
    wall_db = float(10.0 * np.log10(snr_wall(x)))
    margin = snr_db - wall_db
    below = margin <= 0.0
    message = (
        f"Target SNR {snr_db:.1f} dB is below the SNR wall of {wall_db:.1f} dB for "
        f"{x:g} dB noise uncertainty: an energy detector cannot reach it at any sensing "
        "time. Raise the target SNR or calibrate the noise floor more tightly."
        if below
        else ""
    )
    return SnrWallCheck(bool(below), snr_db, wall_db, float(margin), message)
