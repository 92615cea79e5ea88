"""Reliability curve and expected calibration error of stated probabilities."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["CalibrationResult", "calibration"]


@dataclass(frozen=True)
class CalibrationResult:
    """Reliability curve of :func:`calibration`.

    Attributes
    ----------
    edges : ndarray (n_bins + 1,)
        Bin edges on the stated probability, 0 to 1.
    mean_p : ndarray (n_bins,)
        Mean stated probability in each bin (NaN for an empty bin).
    frac_true : ndarray (n_bins,)
        Fraction of events that happened in each bin (NaN for an empty bin).
    count : ndarray of int (n_bins,)
        Forecasts per bin.
    ece : float
        Expected calibration error, ``sum_b count_b / n * |frac_true_b - mean_p_b|``.
    """

    edges: np.ndarray
    mean_p: np.ndarray
    frac_true: np.ndarray
    count: np.ndarray
    ece: float


def calibration(p, truth, n_bins=10):
    """Reliability curve and expected calibration error (ECE).

    Parameters
    ----------
    p : array_like
        Stated probabilities of the event (e.g. ``FusionResult.p_occupied``); NaN
        entries (no forecast) are ignored.
    truth : array_like of bool
        Whether the event happened (channel actually occupied), same shape as ``p``.
    n_bins : int
        Equal-width bins on [0, 1].

    Returns
    -------
    CalibrationResult

    Notes
    -----
    A forecaster is calibrated when, among the cases given probability ``c``, the event
    happens with frequency ``c`` (DeGroot and Fienberg [1]_).  Binning into equal-width
    bins and weighting each bin's gap by its share of forecasts gives the ECE of Naeini,
    Cooper and Hauskrecht [2]_.  Since ``|frac - mean|`` is the same for the event and its
    complement, this also measures "among decisions stated with confidence c, the
    fraction correct is c".

    References
    ----------
    .. [1] M. H. DeGroot, S. E. Fienberg, "The comparison and evaluation of forecasters,"
       J. R. Stat. Soc. D 32(1/2):12-22, 1983.
    .. [2] M. P. Naeini, G. F. Cooper, M. Hauskrecht, "Obtaining well calibrated
       probabilities using Bayesian binning," AAAI 2015.

    Examples
    --------
    >>> calibration([0.1, 0.1, 0.9, 0.9], [0, 0, 1, 1], n_bins=2).ece
    0.1
    """
    # Input validation
    p = np.asarray(p, dtype=float).ravel()
    truth = np.asarray(truth).ravel()
    if p.shape != truth.shape:
        raise ValueError(f"`p` and `truth` must have the same size, were {p.size} and {truth.size}")
    if int(n_bins) != n_bins or n_bins < 1:
        raise ValueError(f"`n_bins` must be a positive integer, was {n_bins!r}")
    seen = ~np.isnan(p)
    if np.any(seen & ~((p >= 0) & (p <= 1))):
        raise ValueError(f"`p` must lie in [0, 1] or be NaN, was {p[seen & ~((p >= 0) & (p <= 1))][0].item()!r}")
    if not np.all(np.isin(truth, (0, 1))):
        raise ValueError("`truth` must hold only 0/1 or booleans")

    p, y = p[seen], truth[seen].astype(float)
    edges = np.linspace(0.0, 1.0, int(n_bins) + 1)
    # Bin b holds edges[b] <= p < edges[b+1]; p = 1 goes into the last bin.
    idx = np.minimum(np.searchsorted(edges, p, side="right") - 1, int(n_bins) - 1)
    count = np.bincount(idx, minlength=int(n_bins))
    sum_p = np.bincount(idx, weights=p, minlength=int(n_bins))
    sum_y = np.bincount(idx, weights=y, minlength=int(n_bins))
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_p = np.where(count > 0, sum_p / count, np.nan)
        frac = np.where(count > 0, sum_y / count, np.nan)
    total = max(int(count.sum()), 1)
    ece = float(np.sum(np.abs(sum_y - sum_p)) / total)  # count * |frac - mean| = |sum_y - sum_p|
    return CalibrationResult(edges, mean_p, frac, count, round(ece, 15))
