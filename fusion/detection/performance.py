"""Analytic system Pd and Pf of every rule exactly as :func:`rules.fuse` applies it.

For one channel and its reporting nodes, :func:`system_performance` takes the threshold
that ``fuse`` would use and evaluates the fused detector's Qd and Qf under a stated
signal model, saying which of the two numbers is exact.
"""

from __future__ import annotations

import itertools
from typing import NamedTuple

import numpy as np
from scipy import special, stats

from . import energy, rules, system

__all__ = ["RulePerformance", "system_performance"]


class RulePerformance(NamedTuple):
    """Analytic performance of one rule on one channel.

    ``qd``, ``qf``: fused detection / false-alarm probabilities; ``threshold``: as in
    ``FusionResult``; ``exact_qd``, ``exact_qf``: whether each is exact (True) or the
    three-cumulant shifted-gamma approximation (False).
    """

    qd: float
    qf: float
    threshold: float
    exact_qd: bool
    exact_qf: bool


def system_performance(rule, n_samples, snr, target_pf, *, k=None, trust=None,
                       clip=rules.DEFAULT_CLIP, signal="deterministic", design_snr=None):
    """Analytic ``(Qd, Qf)`` of ``fuse(rule=...)`` on one channel.

    Parameters
    ----------
    rule : str
        One of :data:`rules.RULES`.
    n_samples, snr : array_like (n_nodes,)
        Complex samples and true linear per-sample SNR of each reporting node.
    target_pf : float
        The system Pf that ``fuse`` is asked for.
    k, trust, clip
        As in :func:`rules.fuse`.
    signal : {"deterministic", "gaussian"}
        H1 model: ``2T ~ ncx2(2N, 2N snr)`` or ``T ~ Gamma(N, 1 + snr)``.
    design_snr : array_like (n_nodes,), optional
        The SNR given to ``fuse`` (its weights and node models); default ``snr``.

    Returns
    -------
    RulePerformance

    Notes
    -----
    Exact: counting rules (Poisson-binomial of local Pd/Pf), Chair-Varshney (enumeration,
    up to 20 nodes), EGC (gamma / ncx2 or Moschopoulos), and the null law and
    Gaussian-signal H1 law of MRC and LLR (Moschopoulos weighted gamma sum [1]_).
    Approximate (shifted gamma on three cumulants, Pearson [2]_): MRC/LLR under a
    deterministic signal and ``weighted_llr``.

    References
    ----------
    .. [1] P. G. Moschopoulos, Ann. Inst. Statist. Math. 37:541-544, 1985.
    .. [2] E. S. Pearson, Biometrika 46:364, 1959.
    """
    # Input validation
    if signal not in ("deterministic", "gaussian"):
        raise ValueError(f"`signal` must be one of 'deterministic', 'gaussian', was {signal!r}")
    n = np.atleast_1d(np.asarray(n_samples, dtype=float))
    g = np.broadcast_to(np.atleast_1d(np.asarray(snr, dtype=float)), n.shape)
    gd = g if design_snr is None else np.broadcast_to(np.asarray(design_snr, dtype=float), n.shape)
    if n.ndim != 1:
        raise ValueError(f"`n_samples` must be 1-D over nodes, was shape {n.shape}")
    s = np.broadcast_to(1.0 if trust is None else np.asarray(trust, dtype=float), n.shape)
    # fuse() validates the rest and gives the threshold (it does not depend on the data).
    res = rules.fuse(np.ones((n.size, 1)), n, rule=rule, target_pf=target_pf, k=k, snr=gd,
                     trust=s, clip=clip)
    thr = float(res.threshold[0])

    if rule in rules.HARD_RULES:
        p_loc = float(system.local_false_alarm(rule, np.array(n.size), target_pf, k))
        tau = energy.threshold(p_loc, n)
        detect = energy.detection_awgn if signal == "deterministic" else energy.detection_gaussian
        pd_true = detect(tau, n, g)
        pf_true = np.full(n.shape, p_loc)
        if rule == "chair_varshney":
            w = system.chair_varshney_weights(energy.detection_awgn(tau, n, gd), pf_true)
            qd, qf = _enumerate(w, pd_true, pf_true, thr)
        else:
            k_c = int(system._votes_needed(rule, np.array(n.size), k))
            qd = float(system.k_of_n_probability(pd_true, k_c))
            qf = float(system.k_of_n_probability(pf_true, k_c))
        return RulePerformance(qd, qf, thr, True, True)

    a = gd / (1 + gd)
    if rule == "weighted_llr":
        h0 = system.clipped_llr_cumulants(n, gd, s, clip)
        h1 = _h1_clipped(n, g, gd, s, clip, signal)
        qf = float(system.shifted_gamma_sf(thr, *(np.sum(c) for c in h0)))
        qd = float(system.shifted_gamma_sf(thr, *(np.sum(c) for c in h1)))
        return RulePerformance(qd, qf, thr, False, False)
    w = {"egc": np.ones(n.shape), "mrc": gd, "llr": a}[rule]
    x = thr + (np.sum(n * np.log1p(gd)) if rule == "llr" else 0.0)  # threshold on sum w T
    if rule == "egc":
        qf = float(special.gammaincc(n.sum(), x))
        if signal == "deterministic":
            qd = float(stats.ncx2.sf(2 * x, 2 * n.sum(), 2 * np.sum(n * g)))
        else:
            qd = float(system.weighted_gamma_sf(x, n, 1 + g))
        return RulePerformance(qd, qf, thr, True, True)
    qf = float(system.weighted_gamma_sf(x, n, w))
    if signal == "gaussian":
        return RulePerformance(float(system.weighted_gamma_sf(x, n, w * (1 + g))), qf, thr, True, True)
    # Cumulants of T when 2T ~ ncx2(2N, 2Ng): (r-1)! N (1 + r g) for r = 1, 2, 3.
    k1, k2, k3 = (np.sum(w**r * f * n * (1 + r * g)) for r, f in ((1, 1), (2, 1), (3, 2)))
    return RulePerformance(float(system.shifted_gamma_sf(x, k1, k2, k3)), qf, thr, False, True)


def _h1_clipped(n, g, gd, s, clip, signal):
    """Clipped-term cumulants with weights from ``gd`` and ``T`` drawn at true SNR ``g``."""
    if np.allclose(g, gd):
        return system.clipped_llr_cumulants(n, gd, s, clip, hypothesis=1, signal=signal)
    raise ValueError("`design_snr` different from `snr` is not supported for 'weighted_llr'")


def _enumerate(w, pd, pf, thr):
    """Exact (Qd, Qf) of ``Lambda(u) > thr`` with weights ``w`` and true vote rates."""
    if pd.size > 20:
        raise ValueError(f"chair_varshney enumeration supports at most 20 nodes, was {pd.size}")
    bits = np.array(list(itertools.product((0.0, 1.0), repeat=pd.size)))
    lam = bits @ w.plus + (1 - bits) @ w.minus
    fires = lam > thr + 1e-9 * (1.0 + abs(thr))  # the same tie rule as fuse()
    qd = np.prod(np.where(bits == 1, pd, 1 - pd), axis=1)[fires].sum()
    qf = np.prod(np.where(bits == 1, pf, 1 - pf), axis=1)[fires].sum()
    return float(qd), float(qf)
