"""Fusion rules: combine every node's energy report into one decision per channel.

One entry point, :func:`fuse`, vectorised over channels.  Hard rules vote each node
first (``or``, ``and``, ``k_of_n``, ``majority``, ``chair_varshney``); soft rules combine
the normalised energies (``egc``, ``mrc``, ``llr``, ``weighted_llr``).  Every rule
returns a Neyman-Pearson decision at ``target_pf`` and a posterior P(occupied) from the
node models.  System Pf/Pd and null laws live in :mod:`fusion.detection.system`.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from scipy import special

from . import energy, system

__all__ = ["RULES", "HARD_RULES", "SOFT_RULES", "DEFAULT_CLIP", "FusionResult", "fuse", "node_llr"]

HARD_RULES = frozenset({"or", "and", "k_of_n", "majority", "chair_varshney"})
SOFT_RULES = frozenset({"egc", "mrc", "llr", "weighted_llr"})
RULES = HARD_RULES | SOFT_RULES

# ln 9: one node alone moves the posterior odds at most 9-fold (0.5 -> 0.9), short of the
# 0.95 confidence the service publishes at, so no single node decides on its own.
DEFAULT_CLIP = float(np.log(9.0))

# Chair-Varshney null laws are enumerated exactly up to this many reporting nodes.
_CV_EXACT_MAX = 12
# Enumeration works on blocks of channels so memory stays near 2**12 x 512 floats.
_CV_BLOCK = 512


@dataclass(frozen=True)
class FusionResult:
    """Outcome of :func:`fuse` for one epoch.

    Attributes
    ----------
    decision : ndarray of bool, shape (n_channels,)
        Neyman-Pearson decision "occupied" at ``target_pf``; False where nobody reported.
    p_occupied : ndarray of float, shape (n_channels,)
        Posterior P(occupied) in [0, 1] from the node models and ``prior``; NaN where no
        node reported.
    statistic : ndarray, shape (n_channels,)
        The rule's statistic: vote count (counting rules), Chair-Varshney LLR, sum of
        energies (egc), SNR-weighted sum (mrc), LLR (llr, weighted_llr).  NaN where empty.
    threshold : ndarray, shape (n_channels,)
        Decide occupied when ``statistic > threshold`` (counting rules: ``>=``).
    n_reporting : ndarray of int, shape (n_channels,)
        Nodes with a report for the channel.
    log_lr : ndarray, shape (n_channels,)
        Evidence in nats: ``logit(p_occupied) - logit(prior)``.
    votes : ndarray of bool, shape (n_nodes, n_channels), or None
        Local decisions of the hard rules (None for soft rules).
    rule : str
        The rule used.
    """

    decision: np.ndarray
    p_occupied: np.ndarray
    statistic: np.ndarray
    threshold: np.ndarray
    n_reporting: np.ndarray
    log_lr: np.ndarray
    votes: np.ndarray | None
    rule: str


def _node_param(name, value, shape, low=None, high=None):
    """A scalar, (n_nodes,) or (n_nodes, n_channels)-broadcastable array, kept compact."""
    arr = np.asarray(value, dtype=float)
    if arr.ndim == 1 and arr.shape[0] == shape[0]:
        arr = arr[:, None]  # (n_nodes,) means one value per node
    try:
        np.broadcast_shapes(arr.shape, shape)
    except ValueError:
        raise ValueError(
            f"`{name}` must be a scalar, (n_nodes,) or broadcastable to {shape}, was shape {arr.shape}"
        ) from None
    bad = ~np.isfinite(arr)
    if low is not None:
        bad |= ~(arr >= low)
    if high is not None:
        bad |= ~(arr <= high)
    if np.any(bad):
        rng = f"[{low}, {high}]" if high is not None else f">= {low}"
        raise ValueError(f"`{name}` must be finite and {rng}, was {arr[bad].flat[0].item()!r}")
    return arr


def node_llr(t, n_samples, snr):
    """Per-node log-likelihood ratio of a normalised energy, Gaussian-signal model.

    Parameters
    ----------
    t : array_like
        Normalised energy ``T`` (NaN propagates).
    n_samples : array_like
        Complex samples ``N``.
    snr : array_like
        Linear per-sample SNR when occupied (>= 0).

    Returns
    -------
    ndarray
        ``l = T snr/(1+snr) - N ln(1+snr)``, nats.

    Notes
    -----
    With ``T ~ Gamma(N, 1)`` under H0 and ``Gamma(N, 1+snr)`` under H1 the LLR is linear
    in ``T`` with weight ``snr/(1+snr)``: MRC-like at low SNR, EGC-like at high SNR (Ma,
    Zhao and Li [1]_).  For a deterministic signal at the low SNRs of spectrum sensing it
    is within 1e-3 in Pd of the exact non-linear LLR (checked in the tests).

    References
    ----------
    .. [1] J. Ma, G. Zhao, Y. Li, "Soft combination and detection for cooperative spectrum
       sensing in cognitive radio networks," IEEE Trans. Wireless Commun.
       7(11):4502-4507, 2008.

    Examples
    --------
    >>> round(float(node_llr(15.0, 10, 1.0)), 10)   # 15/2 - 10 ln 2
    0.5685281944
    """
    # Input validation
    n = energy._check_positive("n_samples", n_samples)
    g = energy._check_nonnegative("snr", snr)
    t = np.asarray(t, dtype=float)

    return t * (g / (1.0 + g)) - n * np.log1p(g)


def _masked_node_sum(kappa, mask_f):
    """Sum a per-node quantity over the reporting nodes of each channel."""
    kappa = np.asarray(kappa, dtype=float)
    if kappa.ndim == 2 and kappa.shape[1] == 1:
        return kappa[:, 0] @ mask_f  # one value per node: a matrix-vector product
    return np.sum(np.broadcast_to(kappa, mask_f.shape) * mask_f, axis=0)


def fuse(t, n_samples, *, rule, target_pf, k=None, snr=None, pd=None, pf=None, trust=None,
         prior=0.5, clip=DEFAULT_CLIP):
    """Fuse one epoch of normalised energies into a decision per channel.

    Parameters
    ----------
    t : array_like, shape (n_nodes, n_channels)
        Normalised energies ``T = N P / noise`` (:func:`energy.normalise`); NaN = the
        node did not report the channel.
    n_samples : array_like, (n_nodes,) or (n_nodes, n_channels)
        Complex samples per statistic.
    rule : str
        One of :data:`RULES`.
    target_pf : float
        System false-alarm probability of the decision, in (0, 1).
    k : int, optional
        Votes needed for ``k_of_n`` (``1 <= k <= n_nodes``); a channel with fewer than
        ``k`` reports is never decided occupied.
    snr : array_like, optional
        Linear per-sample SNR each node sees when the channel is occupied: scalar,
        (n_nodes,) or broadcastable to (n_nodes, n_channels).  Needed by ``mrc``,
        ``llr``, ``weighted_llr``, by every posterior of the soft rules, and by the
        hard rules when ``pd`` is None.  A design SNR until learned values exist.
    pd, pf : array_like, optional
        Learned local detection / false-alarm rates of each node's vote, shaped like
        ``snr``.  When None, ``pf`` is the nominal local Pf the rule uses for its votes
        (see Notes) and ``pd = detection_awgn`` at that threshold and ``snr``.
    trust : array_like, optional
        Trust in [0, 1] per node (``weighted_llr``); default 1.
    prior : float or array_like (n_channels,)
        P(occupied) before this epoch's evidence, in (0, 1).
    clip : float
        ``weighted_llr`` only: bound in nats on any one node's contribution.

    Returns
    -------
    FusionResult

    Notes
    -----
    Votes (hard rules): node i votes 1 when ``T_i`` exceeds its threshold for a local
    Pf ``p``; counting rules take ``p = betaincinv(k, n - k + 1, target_pf)`` for the
    ``n`` reporting nodes, which meets ``target_pf`` exactly for identical honest nodes
    (OR: ``1 - (1 - Pf)^(1/n)``, AND: ``Pf^(1/n)``; majority is the strict
    ``floor(n/2) + 1``).  ``chair_varshney`` votes at ``p = target_pf`` and sets its
    threshold on the weighted vote LLR [1]_ from the exact null law (enumeration up to
    12 reporting nodes; above that the three-cumulant shifted-gamma approximation of
    :func:`system.shifted_gamma_isf`, without randomisation, so Pf <= target only
    approximately).  Hard-rule posteriors are Chair-Varshney posteriors of the votes.

    Soft rules: ``egc`` sums ``T`` (null law Gamma(sum N), exact); ``mrc`` weights by
    ``snr``; ``llr`` sums :func:`node_llr`; ``weighted_llr`` sums
    ``clip(trust * node_llr, -clip, clip)``.  Their thresholds come from the first three
    null cumulants through Pearson's shifted gamma, which is exact for ``egc`` and for
    equal weights and an approximation otherwise (checked against the Moschopoulos series
    and Monte Carlo in the tests).  Posteriors: ``expit(logit(prior) + L)`` with ``L``
    the (clipped, trust-weighted for ``weighted_llr``) LLR sum.

    References
    ----------
    .. [1] Z. Chair, P. K. Varshney, "Optimal data fusion in multiple sensor detection
       systems," IEEE Trans. Aerosp. Electron. Syst. AES-22(1):98-101, 1986.
    .. [2] W. Zhang, R. K. Mallik, K. B. Letaief, IEEE Trans. Wireless Commun.
       8(12):5761-5766, 2009.
    .. [3] J. Ma, G. Zhao, Y. Li, IEEE Trans. Wireless Commun. 7(11):4502-4507, 2008.

    Examples
    --------
    >>> t = np.array([[30.0, 8.0], [25.0, np.nan]])
    >>> res = fuse(t, 10, rule="egc", target_pf=0.01, snr=0.5)
    >>> res.decision.tolist(), res.n_reporting.tolist()
    ([True, False], [2, 1])
    """
    # Input validation
    if rule not in RULES:
        raise ValueError(f"`rule` must be one of {sorted(RULES)}, was {rule!r}")
    t = np.asarray(t, dtype=float)
    if t.ndim != 2:
        raise ValueError(f"`t` must have shape (n_nodes, n_channels), was shape {t.shape}")
    mask = ~np.isnan(t)
    bad = mask & ~((t >= 0) & np.isfinite(t))
    if np.any(bad):
        raise ValueError(f"`t` must be finite and >= 0 or NaN, was {t[bad].flat[0].item()!r}")
    shape = t.shape
    target_pf = float(target_pf)
    if not 0.0 < target_pf < 1.0:
        raise ValueError(f"`target_pf` must lie in (0, 1), was {target_pf!r}")
    n = _node_param("n_samples", n_samples, shape)
    if np.any(~(n > 0)):
        raise ValueError(f"`n_samples` must be positive, was {n[~(n > 0)].flat[0].item()!r}")
    if rule == "k_of_n":
        if k is None or int(k) != k or not 1 <= k <= shape[0]:
            raise ValueError(f"`k` must be an integer in [1, {shape[0]}] for rule 'k_of_n', was {k!r}")
        k = int(k)
    needs_snr = rule in {"mrc", "llr", "weighted_llr", "egc"} or pd is None
    if snr is None and needs_snr:
        raise ValueError(f"`snr` is required for rule {rule!r}" + (" when `pd` is None" if rule in HARD_RULES else ""))
    snr = None if snr is None else _node_param("snr", snr, shape, low=0.0)
    pd = None if pd is None else _node_param("pd", pd, shape, 0.0, 1.0)
    pf = None if pf is None else _node_param("pf", pf, shape, 0.0, 1.0)
    trust = _node_param("trust", 1.0 if trust is None else trust, shape, 0.0, 1.0)
    prior = np.asarray(prior, dtype=float)
    if prior.ndim > 1 or (prior.ndim == 1 and prior.shape[0] != shape[1]):
        raise ValueError(f"`prior` must be a scalar or shape ({shape[1]},), was shape {prior.shape}")
    if np.any(~((prior > 0) & (prior < 1))):
        raise ValueError(f"`prior` must lie in (0, 1), was {prior[~((prior > 0) & (prior < 1))].flat[0].item()!r}")
    clip = float(clip)
    if not clip > 0:
        raise ValueError(f"`clip` must be positive, was {clip!r}")

    n_rep = mask.sum(axis=0)
    has = n_rep > 0
    logit_prior = np.log(prior) - np.log1p(-prior)
    if rule in HARD_RULES:
        stat, thr, log_lr, decision, votes = _fuse_hard(t, mask, n, rule, target_pf, k, snr, pd, pf)
    else:
        stat, thr, log_lr, decision = _fuse_soft(t, mask, n, rule, target_pf, snr, trust, clip)
        votes = None
    nan = np.full(shape[1], np.nan)
    return FusionResult(
        decision=decision & has,
        p_occupied=np.where(has, special.expit(logit_prior + log_lr), nan),
        statistic=np.where(has, stat, nan),
        threshold=np.where(has, thr, nan),
        n_reporting=n_rep,
        log_lr=np.where(has, log_lr, nan),
        votes=votes,
        rule=rule,
    )


def _fuse_soft(t, mask, n, rule, target_pf, snr, trust, clip):
    mask_f = mask.astype(float)
    tz = np.where(mask, t, 0.0)
    pshape = np.broadcast_shapes((t.shape[0], 1), n.shape, snr.shape, trust.shape)
    nn, g, s = (np.broadcast_to(v, pshape) for v in (n, snr, trust))
    a = g / (1.0 + g)  # Gaussian-signal LLR slope, Ma, Zhao & Li (2008)
    b = nn * np.log1p(g)
    if rule == "weighted_llr":
        with np.errstate(invalid="ignore"):
            term = np.clip(s * (a * tz - b), -clip, clip)
        stat = np.sum(np.where(mask, term, 0.0), axis=0)
        k1, k2, k3 = system.clipped_llr_cumulants(nn, g, s, clip)
        log_lr = stat
    else:
        log_lr = np.sum(tz * a, axis=0) - _masked_node_sum(b, mask_f)
        if rule == "llr":
            w, shift = a, b
            stat = log_lr
        else:
            w = np.ones(pshape) if rule == "egc" else g
            shift = np.zeros(pshape)
            stat = np.sum(tz * w, axis=0) if rule == "mrc" else np.sum(tz, axis=0)
        # Cumulants of w T - shift with T ~ Gamma(N, 1): wN - shift, w^2 N, 2 w^3 N.
        k1, k2, k3 = w * nn - shift, w**2 * nn, 2.0 * w**3 * nn
    K1, K2, K3 = (_masked_node_sum(kk, mask_f) for kk in (k1, k2, k3))
    thr = system.shifted_gamma_isf(target_pf, K1, K2, K3)
    # A statistic with no spread (every snr zero) carries no evidence: never occupied.
    decision = (stat > thr) & (K2 > 0)
    return stat, thr, log_lr, decision


def _fuse_hard(t, mask, n, rule, target_pf, k, snr, pd, pf):
    n_rep = mask.sum(axis=0)
    p_loc = system.local_false_alarm(rule, n_rep, target_pf, k)  # (n_channels,), NaN if infeasible
    # T > gammainccinv(N, p) exactly when gammaincc(N, T) < p: no inverse needed per node.
    with np.errstate(invalid="ignore"):
        votes = mask & (special.gammaincc(n, np.where(mask, t, 0.0)) < p_loc)
    p_nom = np.where(np.isnan(p_loc), target_pf, p_loc)
    pf_m = np.broadcast_to(p_nom if pf is None else pf, t.shape)
    if pd is None and (n.ndim < 2 or n.shape[-1] == 1) and (snr.ndim < 2 or snr.shape[-1] == 1):
        # The nominal Pf depends only on the count of reporters: one ncx2 call per count.
        counts, first, inv = np.unique(n_rep, return_index=True, return_inverse=True)
        p_u = p_nom[first]
        pd_u = energy.detection_awgn(energy.threshold(p_u, n), n, snr)
        pd_m = np.broadcast_to(pd_u, (t.shape[0], counts.size))[:, inv.ravel()]
    elif pd is None:
        tau = energy.threshold(p_nom, n)
        pd_m = np.broadcast_to(energy.detection_awgn(tau, n, snr), t.shape)
    else:
        pd_m = np.broadcast_to(pd, t.shape)
    w = system.chair_varshney_weights(pd_m, pf_m)
    node = np.where(votes, w.plus, w.minus)
    log_lr = np.sum(np.where(mask, node, 0.0), axis=0)  # Chair & Varshney (1986), eq. for Lambda(u)
    if rule == "chair_varshney":
        base = np.sum(np.where(mask, w.minus, 0.0), axis=0)
        d = np.where(mask, w.plus - w.minus, 0.0)
        thr = base + _cv_null_isf(d, np.where(mask, pf_m, 0.0), mask, target_pf)
        # Atoms of the discrete null law: a tie with the threshold does not fire.
        decision = log_lr > thr + 1e-9 * (1.0 + np.abs(thr))
        return log_lr, thr, log_lr, decision, votes
    k_c = system._votes_needed(rule, n_rep, k)
    count = votes.sum(axis=0)
    decision = (n_rep >= k_c) & (count >= k_c)
    return count.astype(float), k_c.astype(float), log_lr, decision, votes


def _cv_null_isf(d, p0, mask, target_pf):
    """Smallest atom ``eta`` with ``P0(sum_i u_i d_i > eta) <= target_pf`` per channel."""
    m = int(mask.sum(axis=0).max(initial=0))
    if m > _CV_EXACT_MAX:
        # Bernoulli(p) times d: cumulants p d, p(1-p) d^2, p(1-p)(1-2p) d^3.
        q = p0 * (1 - p0)
        k1, k2, k3 = (np.sum(v, axis=0) for v in (p0 * d, q * d**2, q * (1 - 2 * p0) * d**3))
        return system.shifted_gamma_isf(target_pf, k1, k2, k3)
    out = np.zeros(d.shape[1])
    if m == 0:
        return out
    # Channels with the same weights, null rates and reporters share one null law: enumerate each once
    # (many channels alike, e.g. before anything is learned, or trials laid out as channels).
    key = np.vstack([d, p0, mask])
    uniq, inverse = np.unique(key, axis=1, return_inverse=True)
    if uniq.shape[1] < d.shape[1]:
        k = d.shape[0]
        return _cv_null_isf(uniq[:k], uniq[k:2 * k], uniq[2 * k:].astype(bool), target_pf)[inverse.ravel()]
    bits = np.array(list(itertools.product((0.0, 1.0), repeat=m)))
    order = np.argsort(~mask, axis=0, kind="stable")[:m]  # reporting nodes first
    for start in range(0, d.shape[1], _CV_BLOCK):  # blocks of channels bound the memory
        sl = slice(start, start + _CV_BLOCK)
        dd = np.take_along_axis(d[:, sl], order[:, sl], axis=0)
        pp = np.take_along_axis(p0[:, sl], order[:, sl], axis=0)  # padding has p = 0, d = 0
        # -1e300 stands for log 0 so that 0 * log 0 = 0 inside the products.
        with np.errstate(divide="ignore"):
            lp = np.where(pp > 0, np.log(pp), -1e300)
            lq = np.where(pp < 1, np.log1p(-pp), -1e300)
        vals = bits @ dd
        prob = np.exp(bits @ lp + (1.0 - bits) @ lq)
        idx = np.argsort(-vals, axis=0, kind="stable")
        v = np.take_along_axis(vals, idx, axis=0)
        q = np.take_along_axis(prob, idx, axis=0)
        new = np.ones(v.shape, dtype=bool)
        new[1:] = v[1:] < v[:-1] - 1e-9 * (1.0 + np.abs(v[:-1]))
        rows = np.arange(v.shape[0])[:, None]
        first = np.maximum.accumulate(np.where(new, rows, 0), axis=0)
        cum = np.cumsum(q, axis=0)
        above = np.where(first > 0, np.take_along_axis(cum, np.maximum(first - 1, 0), axis=0), 0.0)
        # P(Lambda > v_j) grows with j; the last feasible atom is the threshold.
        last = np.sum(above <= target_pf * (1 + 1e-12), axis=0) - 1
        out[sl] = np.take_along_axis(v, last[None], axis=0)[0]
    return out
