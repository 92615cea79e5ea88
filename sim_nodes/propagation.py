"""Radio propagation for the simulated network: path loss, shadowing, fading, thermal noise.

Received power of node i from transmitter j, in dB:

    P_ij = EIRP_j + G_rx - PL(d_ij, f) - X_ij          (mean over fading)
    P_ij * |h|^2                                      (one measurement: block fading)

``PL`` is free space (Friis 1946) or log-distance (Rappaport 2002, section 4.9) anchored to
free space at ``d0``; ``X`` is zero-mean Gaussian in dB, correlated between nodes by
Gudmundson's exponential model; ``|h|^2`` is Rayleigh (exponential) or Nakagami-m
(gamma) with unit mean, constant over one measurement's samples.

Shadowing is zero-mean *in dB*; its mean linear gain is therefore above one
(``exp((sigma ln10/10)^2/2)``, +7.4 dB at 8 dB); the simulator does not remove that bias.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "SPEED_OF_LIGHT",
    "BOLTZMANN",
    "T0_K",
    "free_space_path_loss_db",
    "log_distance_path_loss_db",
    "thermal_noise_dbm",
    "correlated_shadowing_db",
    "fading_power_gain",
]

SPEED_OF_LIGHT = 299_792_458.0  # m/s, exact (SI)
BOLTZMANN = 1.380649e-23  # J/K, exact (SI 2019)
T0_K = 290.0  # reference noise temperature (IEEE standard), K

_FADING = {"none", "rayleigh", "nakagami"}


def free_space_path_loss_db(distance_m, frequency_hz):
    """Free-space path loss ``20 log10(4 pi d f / c)``, dB (Friis 1946).

    Parameters
    ----------
    distance_m : array_like
        Distance, m (positive).
    frequency_hz : array_like
        Carrier frequency, Hz (positive).

    References
    ----------
    .. [1] H. T. Friis, "A note on a simple transmission formula," Proc. IRE
       34(5):254-256, 1946.

    Examples
    --------
    >>> round(float(free_space_path_loss_db(1000.0, 600e6)), 8)
    88.01080823
    """
    # Input validation
    d = np.asarray(distance_m, dtype=float)
    f = np.asarray(frequency_hz, dtype=float)
    if np.any(~(d > 0)):
        raise ValueError(f"`distance_m` must be positive, was {d[~(d > 0)].flat[0]!r}")
    if np.any(~(f > 0)):
        raise ValueError(f"`frequency_hz` must be positive, was {f[~(f > 0)].flat[0]!r}")

    return 20.0 * np.log10(4.0 * np.pi * d * f / SPEED_OF_LIGHT)


def log_distance_path_loss_db(distance_m, frequency_hz, exponent, reference_m=1.0):
    """Log-distance path loss ``PL(d0) + 10 n log10(d / d0)``, free space at ``d0``, dB.

    Distances below ``d0`` use free space (the model is not meant for the near field).

    References
    ----------
    .. [1] T. S. Rappaport, "Wireless Communications: Principles and Practice," 2nd ed.,
       Prentice Hall, 2002, section 4.9.

    Examples
    --------
    >>> round(float(log_distance_path_loss_db(1000.0, 600e6, 3.5)), 7)
    133.0108082
    """
    # Input validation
    if not exponent > 0:
        raise ValueError(f"`exponent` must be positive, was {exponent!r}")
    if not reference_m > 0:
        raise ValueError(f"`reference_m` must be positive, was {reference_m!r}")
    d = np.asarray(distance_m, dtype=float)

    pl0 = free_space_path_loss_db(reference_m, frequency_hz)
    far = pl0 + 10.0 * exponent * np.log10(np.maximum(d, reference_m) / reference_m)
    return np.where(d >= reference_m, far, free_space_path_loss_db(d, frequency_hz))


def thermal_noise_dbm(bandwidth_hz, noise_figure_db=0.0, temperature_k=T0_K):
    """Thermal noise power ``10 log10(k T B / 1 mW) + NF``, dBm.

    At 290 K the density is -173.975 dBm/Hz, the "-174 dBm/Hz" of common practice.

    Examples
    --------
    >>> round(float(thermal_noise_dbm(6e6, 11.0)), 8)
    -95.19367469
    """
    # Input validation
    b = np.asarray(bandwidth_hz, dtype=float)
    if np.any(~(b > 0)):
        raise ValueError(f"`bandwidth_hz` must be positive, was {b[~(b > 0)].flat[0]!r}")
    if not temperature_k > 0:
        raise ValueError(f"`temperature_k` must be positive, was {temperature_k!r}")

    return 10.0 * np.log10(BOLTZMANN * temperature_k * b / 1e-3) + noise_figure_db


def correlated_shadowing_db(positions_m, sigma_db, decorrelation_m, rng=None, *, size=None):
    """Log-normal shadowing at node positions, correlated by Gudmundson's model, dB.

    Parameters
    ----------
    positions_m : array_like, shape (n_nodes, 2)
        Node positions, m.
    sigma_db : float
        Standard deviation of the shadowing, dB (>= 0).
    decorrelation_m : float
        Distance ``d_c`` at which the correlation falls to 1/e, m (> 0).
    rng : seed or Generator, optional
    size : int, optional
        Number of independent fields (e.g. one per transmitter); default one.

    Returns
    -------
    ndarray, shape (n_nodes,) or (size, n_nodes)

    Notes
    -----
    ``C_ij = sigma^2 exp(-d_ij / d_c)`` [1]_; ``X = L z`` with ``L = chol(C)`` and
    ``z ~ N(0, I)``.  The exponential kernel is positive definite in any dimension; a tiny
    diagonal jitter only guards against nodes at the same spot.

    References
    ----------
    .. [1] M. Gudmundson, "Correlation model for shadow fading in mobile radio systems,"
       Electron. Lett. 27(23):2145-2146, 1991.
    """
    # Input validation
    pos = np.asarray(positions_m, dtype=float)
    if pos.ndim != 2 or pos.shape[1] != 2:
        raise ValueError(f"`positions_m` must have shape (n_nodes, 2), was {pos.shape}")
    if not sigma_db >= 0:
        raise ValueError(f"`sigma_db` must be non-negative, was {sigma_db!r}")
    if not decorrelation_m > 0:
        raise ValueError(f"`decorrelation_m` must be positive, was {decorrelation_m!r}")

    rng = np.random.default_rng(rng)
    n = pos.shape[0]
    shape = (n,) if size is None else (size, n)
    z = rng.standard_normal(shape)
    if sigma_db == 0 or n == 0:
        return np.zeros(shape)
    d = np.hypot(*(pos[:, None, :] - pos[None, :, :]).transpose(2, 0, 1))
    corr = np.exp(-d / decorrelation_m) + 1e-10 * np.eye(n)
    chol = np.linalg.cholesky(corr)
    return sigma_db * (z @ chol.T)


def fading_power_gain(size, kind="rayleigh", m=1.0, rng=None):
    """Unit-mean block-fading power gains ``|h|^2``.

    ``rayleigh``: ``|h|^2 ~ Exp(1)``; ``nakagami``: ``|h|^2 ~ Gamma(m, 1/m)`` (Nakagami 1960,
    m >= 1/2); ``none``: ones.
    """
    # Input validation
    if kind not in _FADING:
        raise ValueError(f"`kind` must be one of {sorted(_FADING)}, was {kind!r}")
    if kind == "nakagami" and not m >= 0.5:
        raise ValueError(f"`m` must be at least 0.5, was {m!r}")

    rng = np.random.default_rng(rng)
    if kind == "none":
        return np.ones(size)
    if kind == "rayleigh":
        return rng.exponential(1.0, size)
    return rng.gamma(m, 1.0 / m, size)
