"""Complex baseband IQ samples to per-channel power (Welch / FFT bins summed per channel).

A wideband recording at ``sample_rate`` centred on ``center_hz`` is cut into segments of
``segment`` samples; each segment is windowed and transformed, and the power of the bins
whose centre frequency falls inside a channel ``[fc - B/2, fc + B/2)`` is summed and
averaged over segments (Welch's method [1]_).  The result is the mean power per complex
sample *inside the channel*, in the units of ``|x|^2``: what a node would measure after an
ideal channel filter of unit passband gain, and the quantity the reports call ``power``.

Besides the power, each channel gets its equivalent degrees of freedom ``dof``: the
``N`` for which ``N * P / sigma^2`` of white circular Gaussian noise has the mean and
variance of ``Gamma(N, 1)``.  With the rectangular window and non-overlapping segments the
bins are independent and the law is exactly ``Gamma(K * S, 1)`` (``K`` bins, ``S``
segments); a tapered window or overlap correlates bins and segments, and ``dof`` is then
computed exactly from the window's second-order statistics (Notes).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import signal

__all__ = ["ChannelPower", "channel_bins", "channel_power", "equivalent_dof"]

_WINDOWS = {"boxcar", "hann", "hamming", "blackman", "blackmanharris", "flattop"}


@dataclass(frozen=True)
class ChannelPower:
    """Per-channel band power of one or more IQ windows.

    Attributes
    ----------
    power : ndarray, shape (..., n_channels)
        Mean power per complex sample inside each channel, units of ``|x|^2``.
        NaN for a channel that does not lie wholly inside the recorded span.
    dof : ndarray, shape (n_channels,)
        Equivalent degrees of freedom (complex samples) of each channel's power under
        white Gaussian noise; NaN outside the span.
    n_bins : ndarray of int, shape (n_channels,)
        FFT bins summed for each channel (0 outside the span).
    in_span : ndarray of bool, shape (n_channels,)
        Whether the channel lies wholly inside ``center_hz +- sample_rate / 2``.
    n_segments : int
        Segments averaged per window.
    """

    power: np.ndarray
    dof: np.ndarray
    n_bins: np.ndarray
    in_span: np.ndarray
    n_segments: int


def _as_channels(channel_center_hz, channel_bandwidth_hz):
    fc = np.atleast_1d(np.asarray(channel_center_hz, dtype=float))
    bw = np.atleast_1d(np.asarray(channel_bandwidth_hz, dtype=float))
    if fc.ndim != 1 or bw.shape != fc.shape:
        raise ValueError(
            "`channel_center_hz` and `channel_bandwidth_hz` must be 1-D of equal length, "
            f"were shapes {fc.shape} and {bw.shape}"
        )
    if not np.all(np.isfinite(fc)):
        raise ValueError("`channel_center_hz` must be finite")
    if not np.all(np.isfinite(bw) & (bw > 0)):
        raise ValueError(f"`channel_bandwidth_hz` must be positive, was {bw[~(bw > 0)][:1]!r}")
    return fc, bw


def channel_bins(n_fft, sample_rate, center_hz, channel_center_hz, channel_bandwidth_hz):
    """Which FFT bins (in ``fftshift`` order) belong to which channel.

    Parameters
    ----------
    n_fft : int
        FFT length (segment length), samples.
    sample_rate : float
        Complex sample rate, Hz.
    center_hz : float
        Frequency of the recording's 0 Hz (the tuner frequency), Hz.
    channel_center_hz, channel_bandwidth_hz : array_like, shape (n_channels,)
        Channel centres and bandwidths, Hz.

    Returns
    -------
    mask : ndarray of bool, shape (n_channels, n_fft)
        ``mask[c, k]`` is True when shifted bin ``k`` has its centre frequency in
        ``[fc - B/2, fc + B/2)``; all False for a channel outside the span.
    in_span : ndarray of bool, shape (n_channels,)
    """
    # Input validation
    if int(n_fft) != n_fft or n_fft < 1:
        raise ValueError(f"`n_fft` must be a positive integer, was {n_fft!r}")
    if not sample_rate > 0:
        raise ValueError(f"`sample_rate` must be positive, was {sample_rate!r}")
    fc, bw = _as_channels(channel_center_hz, channel_bandwidth_hz)

    n_fft = int(n_fft)
    df = sample_rate / n_fft
    freqs = center_hz + (np.arange(n_fft) - n_fft // 2) * df  # fftshift order
    lo, hi = fc - bw / 2, fc + bw / 2
    # A tolerance of a millionth of a bin keeps bins that sit exactly on an edge
    # deterministic despite float round-off in the frequencies.
    eps = 1e-6 * df
    span_lo, span_hi = center_hz - sample_rate / 2, center_hz + sample_rate / 2
    in_span = (lo >= span_lo - eps) & (hi <= span_hi + eps)
    mask = (freqs[None, :] >= lo[:, None] - eps) & (freqs[None, :] < hi[:, None] - eps)
    mask &= in_span[:, None]
    return mask, in_span


def equivalent_dof(window, n_bins, n_segments, hop):
    """Equivalent complex degrees of freedom of a Welch band-power estimate.

    Parameters
    ----------
    window : array_like, shape (n_fft,)
        The taper applied to each segment.
    n_bins : array_like of int, shape (n_channels,)
        Adjacent bins summed per channel.
    n_segments : int
        Segments averaged.
    hop : int
        Samples between segment starts (``n_fft`` for no overlap).

    Returns
    -------
    ndarray, shape (n_channels,)
        ``dof = mean^2 / variance`` of the band power under white circular Gaussian
        noise; equals ``n_bins * n_segments`` for the rectangular window without overlap.

    Notes
    -----
    For noise ``w ~ CN(0, s2 I)`` the bins of two segments ``D`` samples apart have
    covariance of modulus ``s2 |c^D_d|`` with ``c^D_d = sum_n w_n w_{n-D} exp(-2j pi d n / M)``
    for bins ``d`` apart, and ``Cov(|a|^2, |b|^2) = |E a b*|^2`` for circular Gaussians
    (Isserlis).  Summing over ``K`` adjacent bins gives
    ``v(D) = sum_{|d|<K} (K - |d|) |c^D_d|^2``, and over segments
    ``Var = sum_{s,s'} v(|s - s'| hop)``, the exact form of Welch's variance analysis [1]_.
    """
    w = np.asarray(window, dtype=float)
    m = w.size
    k = np.atleast_1d(np.asarray(n_bins, dtype=int))
    dof = np.full(k.shape, np.nan)
    mean_per_bin = np.sum(w**2)  # c^0_0 / s2: every bin's mean power (unnormalised)
    lags = [j * hop for j in range(n_segments) if j * hop < m]
    # v[j, d] for segment lag j and bin offset |d|.
    cd = []
    for lag in lags:
        prod = w[lag:] * w[: m - lag]  # w_n w_{n-D} over the overlap
        cd.append(np.abs(np.fft.fft(prod, n=m)) ** 2)
    cd = np.array(cd)
    for i, kk in enumerate(k):
        if kk < 1:
            continue
        d = np.arange(-kk + 1, kk)
        weights = kk - np.abs(d)
        v = cd[:, d % m] @ weights  # v(D) for each lag in `lags`
        # Segment pairs at lag j occur (S - j) times, twice for j > 0.
        mult = np.array([n_segments if j == 0 else 2 * (n_segments - j) for j in range(len(lags))])
        var = np.sum(mult * v)
        mean = n_segments * kk * mean_per_bin
        dof[i] = mean**2 / var
    return dof


def channel_power(
    iq,
    sample_rate,
    center_hz,
    channel_center_hz,
    channel_bandwidth_hz,
    *,
    segment=None,
    window="boxcar",
    overlap=0.0,
):
    """Mean power per complex sample in each channel, by Welch's averaged periodogram.

    Parameters
    ----------
    iq : array_like of complex, shape (..., n)
        Baseband samples, ``n`` per window; leading axes are independent windows.
    sample_rate : float
        Complex sample rate, Hz.
    center_hz : float
        RF frequency of baseband 0 Hz, Hz.
    channel_center_hz, channel_bandwidth_hz : array_like, shape (n_channels,)
        The band plan, Hz.
    segment : int, optional
        FFT length; default ``n`` (one periodogram per window). Samples past the last
        whole segment are ignored.
    window : str, default "boxcar"
        Segment taper, one of boxcar, hann, hamming, blackman, blackmanharris, flattop
        (periodic forms from ``scipy.signal.get_window``).  Boxcar keeps bins independent
        (exact Gamma law); a taper trades that for less leakage from strong signals.
    overlap : float, default 0
        Fraction of a segment shared with the next, in [0, 1).

    Returns
    -------
    ChannelPower

    Notes
    -----
    With segment spectra ``X_k = sum_n w_n x_n exp(-2j pi k n / M)``, Parseval gives
    ``sum_k |X_k|^2 = M sum_n |w_n x_n|^2``, so ``P_c = sum_{k in c} |X_k|^2 / (M sum w^2)``
    averaged over segments is the in-channel power for a flat noise spectrum and for a
    tone alike [1]_.

    References
    ----------
    .. [1] P. D. Welch, "The use of fast Fourier transform for the estimation of power
       spectra: a method based on time averaging over short, modified periodograms,"
       IEEE Trans. Audio Electroacoust. 15(2):70-73, 1967.

    Examples
    --------
    >>> x = np.ones(64, complex)          # a unit tone at 0 Hz
    >>> r = channel_power(x, 64e3, 0.0, [0.0, 16e3], [8e3, 8e3])
    >>> r.power.round(12).tolist(), r.dof.tolist()
    ([1.0, 0.0], [8.0, 8.0])
    """
    # Input validation
    x = np.asarray(iq)
    if x.ndim < 1 or x.shape[-1] < 1:
        raise ValueError(f"`iq` must have at least one sample on its last axis, was shape {x.shape}")
    if window not in _WINDOWS:
        raise ValueError(f"`window` must be one of {sorted(_WINDOWS)}, was {window!r}")
    if not 0 <= overlap < 1:
        raise ValueError(f"`overlap` must lie in [0, 1), was {overlap!r}")
    n = x.shape[-1]
    m = n if segment is None else segment
    if int(m) != m or not 1 <= m <= n:
        raise ValueError(f"`segment` must be an integer in [1, {n}], was {segment!r}")
    m = int(m)
    mask, in_span = channel_bins(m, sample_rate, center_hz, channel_center_hz, channel_bandwidth_hz)

    hop = max(1, int(round(m * (1 - overlap))))
    n_seg = 1 + (n - m) // hop
    w = np.ones(m) if window == "boxcar" else signal.get_window(window, m, fftbins=True)
    starts = np.arange(n_seg) * hop
    segs = x[..., starts[:, None] + np.arange(m)]  # (..., S, M)
    spec = np.fft.fftshift(np.fft.fft(segs * w, axis=-1), axes=-1)
    bin_power = np.mean(spec.real**2 + spec.imag**2, axis=-2) / (m * np.sum(w**2))
    power = bin_power @ mask.T.astype(float)
    power = np.where(in_span, power, np.nan)
    n_bins = mask.sum(axis=1)
    dof = equivalent_dof(w, n_bins, n_seg, hop)
    dof = np.where(in_span, dof, np.nan)
    return ChannelPower(power=power, dof=dof, n_bins=n_bins, in_span=in_span, n_segments=n_seg)
