"""Evaluate fusion rules on one channel of a simulated network: ROC, Pd at a target Pf, calibration,
falsifier sensitivity, Monte Carlo beside the closed forms.

A *setup* (:class:`Setup`) fixes, per node, the complex samples ``N``, the mean per-sample SNR when the
channel is occupied, the block-fading law, the signal law and how far its true noise floor sits from the
calibrated one; some nodes may be falsifiers.  It comes from a homogeneous shorthand
(:func:`homogeneous_setup`) or from one channel of a scenario file (:func:`scenario_setup`).

:func:`evaluate` draws every node's normalised energy ``T`` for all trials at once (numpy, no Python loop
over trials; trials go in chunks only so that a progress bar moves and Ctrl-C keeps what is done), under
H0 and H1, and applies every rule to the *same* draws (common random numbers: differences between rules
are not sampling noise).  Each rule becomes one statistic per trial, larger meaning "more occupied", whose
decision at the service's threshold is exactly the decision of :func:`fusion.detection.rules.fuse`
(tests/sim/test_evaluate.py checks this trial by trial):

=================  ====================================================================================
or, and, k_of_n,   ``-ln p_(k)``, the k-th smallest per-node p-value ``gammaincc(N, T)``: k votes at
majority           local Pf ``c`` exactly when ``p_(k) < c``, so one sort gives the whole ROC
chair_varshney     the vote LLR of Chair and Varshney, votes at local Pf = target Pf
egc, mrc, llr,     the rule's weighted energy sum, weights from the design SNR (the true mean SNR)
weighted_llr
=================  ====================================================================================

The threshold for the target Pf is the one ``fuse`` uses (taken from ``fuse`` itself on a dummy column, or
from :func:`fusion.detection.system.local_false_alarm` for the counting rules).  The posteriors for the
calibration curve come from ``fuse`` run on a subsample of the trials, channels serving as trials.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import special, stats

from fusion.detection import calibration as calib
from fusion.detection import energy, rules, system

__all__ = [
    "DEFAULT_RULES",
    "REFERENCE",
    "Setup",
    "RuleSpec",
    "parse_rules",
    "homogeneous_setup",
    "scenario_setup",
    "clopper_pearson",
    "rule_statistic",
    "target_threshold",
    "analytic_rates",
    "evaluate",
]

DEFAULT_RULES = ("or", "and", "k_of_n", "majority", "chair_varshney", "egc", "mrc", "llr", "weighted_llr")

# The IEEE 802.22 sensing requirement, Pd >= 0.9 at Pf <= 0.1, as quoted by Stevenson et al., "IEEE 802.22: The
# first cognitive radio wireless regional area network standard", IEEE Commun. Mag. 47(1):130-138, 2009.  The
# Pd >= 0.9 figure is also the performance metric of the working group's sensing annex outline (IEEE
# 802.22-07/0261r1, 2007); the Pf figure was not re-read in the standard's own text (from memory).
REFERENCE = {"name": "IEEE 802.22 incumbent sensing requirement", "pd": 0.9, "pf": 0.1,
             "source": "Stevenson et al., IEEE Commun. Mag. 47(1):130-138, 2009; Pd 0.9 also in IEEE 802.22-07/0261r1"}

_COUNTING = ("or", "and", "k_of_n", "majority")
_CHUNK = 20_000  # trials per chunk: big enough to amortise numpy calls, small enough for a moving bar


@dataclass(frozen=True)
class RuleSpec:
    """A rule and, for ``k_of_n``, its k."""

    rule: str
    k: int | None = None

    @property
    def label(self):
        return f"{self.k}_of_n" if self.rule == "k_of_n" else self.rule


def parse_rules(text, n_nodes, default_k=2):
    """``"or,k_of_n:3,egc"`` as RuleSpecs; a bare ``k_of_n`` takes ``default_k``. ValueError names the bad item."""
    specs = []
    for item in [s.strip() for s in str(text).split(",") if s.strip()]:
        name, _, k = item.partition(":")
        if name not in rules.RULES:
            raise ValueError(f"unknown rule {name!r} in --rules; choose from {sorted(rules.RULES)}")
        if name == "k_of_n":
            try:
                kk = int(k) if k else int(default_k)
            except ValueError:
                raise ValueError(f"k in {item!r} must be an integer") from None
            if not 1 <= kk <= n_nodes:
                raise ValueError(f"k in {item!r} must lie in [1, {n_nodes}] for {n_nodes} nodes")
            specs.append(RuleSpec("k_of_n", kk))
        elif k:
            raise ValueError(f"only k_of_n takes a k, not {item!r}")
        else:
            specs.append(RuleSpec(name))
    if not specs:
        raise ValueError("--rules names no rule")
    return specs


@dataclass(frozen=True)
class Setup:
    """What each node of one channel sees.

    Attributes
    ----------
    n_samples : ndarray (n_nodes,)
        Complex samples per measurement.
    snr : ndarray (n_nodes,)
        Mean linear per-sample SNR when occupied (before fading), against the calibrated noise floor;
        also the design SNR the rules are given.
    fading : {"none", "rayleigh", "nakagami"}
        Block fading per node and measurement, independent across nodes.
    nakagami_m : float
    signal : {"deterministic", "gaussian"}
        ``2T ~ ncx2(2N, 2N snr |h|^2)`` or ``T ~ Gamma(N, 1 + snr |h|^2)`` when occupied.
    noise_error_db : ndarray (n_nodes,)
        True minus calibrated noise floor, dB; the reported ``T`` is scaled by ``10**(err/10)``.
    falsify : tuple of (str or None)
        Per node: None (honest), ``"free"`` or ``"occupied"`` (reports a noise-only or a
        noise-plus-``fake_snr_db`` draw whatever is on the air).
    fake_snr_db : float
    names : tuple of str
    description : dict
        Where the setup came from, for the report.
    """

    n_samples: np.ndarray
    snr: np.ndarray
    fading: str = "none"
    nakagami_m: float = 1.0
    signal: str = "deterministic"
    noise_error_db: np.ndarray = None
    falsify: tuple = ()
    fake_snr_db: float = 10.0
    names: tuple = ()
    description: dict = field(default_factory=dict)

    def __post_init__(self):
        n = np.atleast_1d(np.asarray(self.n_samples, dtype=float))
        object.__setattr__(self, "n_samples", n)
        object.__setattr__(self, "snr", np.broadcast_to(np.asarray(self.snr, dtype=float), n.shape).copy())
        err = np.zeros(n.shape) if self.noise_error_db is None else np.asarray(self.noise_error_db, float)
        object.__setattr__(self, "noise_error_db", np.broadcast_to(err, n.shape).copy())
        object.__setattr__(self, "falsify", tuple(self.falsify) if self.falsify else (None,) * n.size)
        object.__setattr__(self, "names", tuple(self.names) if self.names else tuple(f"n{i}" for i in range(n.size)))
        # Input validation
        if n.size < 1 or np.any(~(n >= 1)) or np.any(n != np.round(n)):
            raise ValueError(f"`n_samples` must be positive integers, was {n.tolist()}")
        if np.any(~(self.snr >= 0)):
            raise ValueError(f"`snr` must be non-negative, was {self.snr.tolist()}")
        if self.fading not in {"none", "rayleigh", "nakagami"}:
            raise ValueError(f"`fading` must be 'none', 'rayleigh' or 'nakagami', was {self.fading!r}")
        if not self.nakagami_m >= 0.5:
            raise ValueError(f"`nakagami_m` must be at least 0.5, was {self.nakagami_m!r}")
        if self.signal not in {"deterministic", "gaussian"}:
            raise ValueError(f"`signal` must be 'deterministic' or 'gaussian', was {self.signal!r}")
        if len(self.falsify) != n.size or any(f not in (None, "free", "occupied") for f in self.falsify):
            raise ValueError(f"`falsify` must give None, 'free' or 'occupied' per node, was {self.falsify!r}")

    @property
    def n_nodes(self):
        return self.n_samples.size

    @property
    def fading_m(self):
        """Nakagami m of the fading (Rayleigh is m = 1); None without fading."""
        return {"none": None, "rayleigh": 1.0, "nakagami": float(self.nakagami_m)}[self.fading]

    @property
    def honest(self):
        return all(f is None for f in self.falsify)

    def with_falsifiers(self, order, count, mode):
        """The same setup with the first ``count`` nodes of ``order`` turned falsifier ``mode``."""
        fals = list(self.falsify)
        for i in order[:count]:
            fals[i] = mode
        return Setup(self.n_samples, self.snr, self.fading, self.nakagami_m, self.signal, self.noise_error_db,
                     tuple(fals), self.fake_snr_db, self.names, self.description)


def homogeneous_setup(n_nodes, snr_db, n_samples, fading="none", *, nakagami_m=2.0, signal="deterministic"):
    """``n_nodes`` identical honest nodes: mean per-sample SNR ``snr_db`` in the channel, ``n_samples`` each."""
    # Input validation
    if int(n_nodes) != n_nodes or n_nodes < 1:
        raise ValueError(f"`n_nodes` must be a positive integer, was {n_nodes!r}")
    if not math.isfinite(snr_db):
        raise ValueError(f"`snr_db` must be finite, was {snr_db!r}")
    return Setup(np.full(int(n_nodes), float(n_samples)), np.full(int(n_nodes), 10 ** (snr_db / 10)), fading,
                 nakagami_m, signal,
                 description={"source": "homogeneous", "nodes": int(n_nodes), "snr_db": float(snr_db),
                              "n_samples": int(n_samples), "fading": fading, "signal": signal,
                              **({"nakagami_m": nakagami_m} if fading == "nakagami" else {})})


def scenario_setup(scenario, *, channel=None, seed=0):
    """One channel of a scenario: each node's SNR with every transmitter of the channel on.

    Geometry, shadowing and each node's noise-floor error are drawn by :class:`sim_nodes.network.SimNetwork`
    with ``seed``.  ``falsify`` behaviours carry over; silent, stuck and drift behaviours are time effects
    and are evaluated as honest nodes (the report says so).
    """
    from sim_nodes.network import SimNetwork

    net = SimNetwork(scenario, 1.0, seed=seed, mode="fast")
    ids = scenario.channel_ids
    if channel is None:
        carried = [c for c in ids if any(c in t.channels for t in scenario.transmitters)]
        if not carried:
            raise ValueError("the scenario has no transmitter; name a channel with --channel")
        channel = carried[0]
    if channel not in ids:
        raise ValueError(f"channel {channel!r} is not in the scenario; its channels are {ids}")
    j = ids.index(channel)
    with np.errstate(divide="ignore"):
        snr = 10 ** (net.snr_db()[:, j] / 10)
    snr = np.where(np.isfinite(snr), snr, 0.0)
    p = scenario.propagation
    falsify, as_honest = [], []
    fake = 10.0
    for n in scenario.nodes:
        kind = n.behaviour.get("kind", "honest")
        if kind == "falsify":
            mode = n.behaviour.get("mode", "free")
            fake = float(n.behaviour.get("fake_snr_db", fake))
            # A random liar says occupied or free evenly; evaluated as the worse of the two for Pd.
            falsify.append("free" if mode == "random" else mode)
        else:
            falsify.append(None)
            if kind != "honest":
                as_honest.append(n.name)
    return Setup([n.n_samples for n in scenario.nodes], snr, p.fading, p.nakagami_m,
                 "gaussian" if p.signal == "gaussian" else "deterministic", net.noise_error_db, tuple(falsify),
                 fake, tuple(net.node_names),
                 description={"source": "scenario", "scenario": scenario.name, "channel": channel, "seed": seed,
                              "fading": p.fading, "signal": p.signal,
                              "snr_db": [round(float(10 * np.log10(s)), 3) if s > 0 else None for s in snr],
                              "n_samples": [int(n.n_samples) for n in scenario.nodes],
                              "evaluated_as_honest": as_honest})


# --------------------------------------------------------------------------------------------- drawing

def _draw(setup, m, occupied, rng):
    """Reported normalised energies ``T``, shape (n_nodes, m)."""
    n = setup.n_samples[:, None]
    c = 10 ** (setup.noise_error_db[:, None] / 10)  # true / calibrated noise power
    shape = (setup.n_nodes, m)
    if occupied:
        g = setup.snr[:, None] / c  # SNR against the true floor
        if setup.fading != "none":
            mm = setup.fading_m
            g = g * rng.gamma(mm, 1.0 / mm, shape)  # |h|^2, unit mean (Nakagami 1960; Rayleigh m = 1)
        if setup.signal == "gaussian":
            t = rng.gamma(n, 1.0 + g, shape)  # T ~ Gamma(N, 1 + g): Gaussian signal, exact
        else:
            t = rng.noncentral_chisquare(2 * n, 2 * n * g, shape) / 2  # 2T ~ ncx2(2N, 2Ng)
    else:
        t = rng.gamma(n, 1.0, shape)
    t = t * c
    fals = np.array([f is not None for f in setup.falsify])
    if fals.any():
        scale = np.array([1.0 + 10 ** (setup.fake_snr_db / 10) if f == "occupied" else 1.0 for f in setup.falsify])
        # behaviour.py: a lie is a fresh Gamma(N, 1) draw against the *reported* floor, times the fake scale.
        t[fals] = rng.gamma(n[fals], scale[fals, None], (int(fals.sum()), m))
    return t


# ---------------------------------------------------------------------------------------- statistics

@dataclass(frozen=True)
class _Prepared:
    """Per-rule constants: design weights and the thresholds fuse() uses at the target Pf."""

    spec: RuleSpec
    k: int | None  # votes needed (counting rules)
    cv_plus: np.ndarray | None
    cv_minus: np.ndarray | None
    a: np.ndarray
    b: np.ndarray
    g: np.ndarray


def _prepare(spec, setup, target_pf):
    n, g = setup.n_samples, setup.snr
    k = None
    plus = minus = None
    if spec.rule in _COUNTING:
        k = int(system._votes_needed(spec.rule, np.array(setup.n_nodes), spec.k))
    if spec.rule == "chair_varshney":
        # fuse(): votes at local Pf = target, design Pd from detection_awgn at the design SNR.
        pd = energy.detection_awgn(energy.threshold(target_pf, n), n, g)
        w = system.chair_varshney_weights(pd, np.full(n.shape, target_pf))
        plus, minus = np.asarray(w.plus, float), np.asarray(w.minus, float)
    return _Prepared(spec, k, plus, minus, g / (1 + g), n * np.log1p(g), g)


class Draws:
    """One configuration's reported energies ``t`` (n_nodes, m), with the order statistics rules need.

    Votes at local Pf ``c`` are ``gammaincc(N, T) < c``, i.e. ``T > gammainccinv(N, c)``.  The counting
    rules' statistic is the k-th smallest p-value; when every node has the same ``N`` the k-th largest ``T``
    orders trials the same way, so it is used instead (no ``gammaincc`` per node and trial).
    """

    def __init__(self, t, n_samples):
        self.t = t
        self.n = np.asarray(n_samples, float)
        self.equal_n = bool(np.all(self.n == self.n[0]))
        self._sorted = None

    def kth(self, k):
        """k-th largest ``T`` (equal ``N``) or minus the log of the k-th smallest p-value, shape (m,)."""
        if self._sorted is None:
            if self.equal_n:
                self._sorted = -np.sort(-self.t, axis=0)  # descending T
            else:
                with np.errstate(divide="ignore"):
                    self._sorted = -np.log(np.sort(special.gammaincc(self.n[:, None], self.t), axis=0))
        return self._sorted[k - 1]

    def votes(self, local_pf):
        return self.t > energy.threshold(local_pf, self.n)[:, None]


def _count_threshold(setup, local_pf):
    """Threshold on :meth:`Draws.kth` equivalent to votes at local Pf ``local_pf``."""
    if np.all(setup.n_samples == setup.n_samples[0]):
        return energy.threshold(local_pf, setup.n_samples[0])
    return -np.log(local_pf)


def _count_local_pf(setup, thr):
    """Inverse of :func:`_count_threshold`."""
    thr = np.asarray(thr, float)
    if np.all(setup.n_samples == setup.n_samples[0]):
        return special.gammaincc(setup.n_samples[0], thr)
    with np.errstate(over="ignore"):
        return np.exp(-thr)


def rule_statistic(prep, draws, target_pf):
    """One statistic per trial (larger = more occupied), shape (m,); see the module docstring."""
    rule, t = prep.spec.rule, draws.t
    if rule in _COUNTING:
        return draws.kth(prep.k)
    if rule == "chair_varshney":
        votes = draws.votes(target_pf)
        return np.where(votes, prep.cv_plus[:, None], prep.cv_minus[:, None]).sum(axis=0)
    if rule == "egc":
        return t.sum(axis=0)
    if rule == "mrc":
        return prep.g @ t
    if rule == "llr":
        return prep.a @ t - prep.b.sum()
    term = t * prep.a[:, None] - prep.b[:, None]
    return np.clip(term, -rules.DEFAULT_CLIP, rules.DEFAULT_CLIP).sum(axis=0)  # weighted_llr, trust 1


def target_threshold(spec, setup, target_pf):
    """The threshold on :func:`rule_statistic` at which ``fuse`` decides occupied (``stat > thr``)."""
    n = setup.n_nodes
    if spec.rule in _COUNTING:
        return float(_count_threshold(setup, float(system.local_false_alarm(spec.rule, np.array(n), target_pf,
                                                                            spec.k))))
    res = rules.fuse(np.ones((n, 1)), setup.n_samples, rule=spec.rule, target_pf=target_pf, k=spec.k,
                     snr=setup.snr)
    thr = float(res.threshold[0])
    if spec.rule == "chair_varshney":
        thr += 1e-9 * (1.0 + abs(thr))  # fuse()'s tie rule: an atom equal to the threshold does not fire
    return thr


# ------------------------------------------------------------------------------------------ analytic

def _local_pd(setup, tau):
    """Per-node Pd of ``T_true > tau`` (shape (n, G)) or None when the law has no closed form here."""
    n, g = setup.n_samples[:, None], setup.snr[:, None] / 10 ** (setup.noise_error_db[:, None] / 10)
    if setup.signal == "gaussian":
        return energy.detection_gaussian(tau, n, g) if setup.fading == "none" else None
    if setup.fading == "none":
        return energy.detection_awgn(tau, n, g)
    if setup.fading == "rayleigh":
        return energy.detection_rayleigh(tau, n, g)  # Digham, Alouini, Simon (2007) closed form
    return energy.detection_nakagami(tau, n, g, setup.nakagami_m)


def _vote_rates(setup, local_pf):
    """Per-node P(vote | H1), P(vote | H0) at a grid of local Pf values; shape (n, G) each."""
    n = setup.n_samples[:, None]
    c = 10 ** (setup.noise_error_db[:, None] / 10)
    tau = energy.threshold(np.asarray(local_pf)[None, :], n)  # on the reported T
    pd = _local_pd(setup, tau / c)
    if pd is None:
        return None
    pf = special.gammaincc(n, tau / c) * np.ones_like(pd)
    for i, f in enumerate(setup.falsify):
        if f is not None:
            scale = 1.0 + 10 ** (setup.fake_snr_db / 10) if f == "occupied" else 1.0
            pd[i] = pf[i] = special.gammaincc(setup.n_samples[i], tau[i] / scale)
    return pd, pf


def analytic_rates(prep, setup, thresholds, target_pf):
    """Exact ``(Qd, Qf)`` at each threshold on the rule's statistic, or None where no closed form applies.

    Counting rules: Poisson-binomial of the per-node vote rates (Varshney 1997), Pd per node from Urkowitz
    (AWGN) or Digham, Alouini and Simon (2007) (Rayleigh, Nakagami-m).  Chair-Varshney: enumeration of the
    2**n vote patterns.  EGC: gamma / noncentral chi-square of the sum (AWGN), the Nakagami series with
    shape ``n m`` for identical faded nodes (Digham, Alouini and Simon 2007), the Moschopoulos sum for a Gaussian
    signal; MRC and LLR reduce to EGC for identical nodes.  Falsifiers and noise-floor errors enter the hard
    rules only; ``weighted_llr`` (clipped) has no closed form.
    """
    thr = np.atleast_1d(np.asarray(thresholds, dtype=float))
    rule = prep.spec.rule
    if rule in _COUNTING:
        c = np.clip(_count_local_pf(setup, thr), 1e-300, 1.0)
        rates = _vote_rates(setup, c)
        if rates is None:
            return None
        k = np.full(thr.shape, prep.k)
        return (system.k_of_n_probability(rates[0], k), system.k_of_n_probability(rates[1], k))
    if rule == "chair_varshney":
        rates = _vote_rates(setup, np.array([target_pf]))
        if rates is None or setup.n_nodes > 16:
            return None
        bits = np.array(list(itertools.product((0.0, 1.0), repeat=setup.n_nodes)))
        lam = bits @ prep.cv_plus + (1 - bits) @ prep.cv_minus
        pd, pf = rates[0][:, 0], rates[1][:, 0]
        p1 = np.prod(np.where(bits == 1, pd, 1 - pd), axis=1)
        p0 = np.prod(np.where(bits == 1, pf, 1 - pf), axis=1)
        fires = lam[:, None] > thr[None, :]
        return p1 @ fires, p0 @ fires
    if not setup.honest or np.any(setup.noise_error_db != 0) or rule == "weighted_llr":
        return None
    n, g = setup.n_samples, setup.snr
    w = {"egc": np.ones(n.shape), "mrc": g, "llr": prep.a}[rule]
    x = thr + (np.sum(prep.b) if rule == "llr" else 0.0)  # threshold on sum w T
    qf = system.weighted_gamma_sf(x, n, w) if np.all(w > 0) else None
    if qf is None:
        return None
    identical = np.allclose(w, w[0]) and np.allclose(g, g[0]) and np.allclose(n, n[0])
    if setup.signal == "gaussian":
        if setup.fading != "none":
            return None
        return system.weighted_gamma_sf(x, n, w * (1 + g)), qf
    if setup.fading == "none" and (rule == "egc" or identical):
        xe = x / w[0]  # sum T > x / w for equal weights
        return stats.ncx2.sf(2 * xe, 2 * n.sum(), 2 * np.sum(n * g)), qf
    if identical:
        # n i.i.d. Nakagami-m nodes: the total SNR is Gamma(n m, .) (Digham, Alouini and Simon 2007).
        xe = x / w[0]
        return energy.detection_nakagami(xe, n.sum(), g[0], setup.n_nodes * setup.fading_m), qf
    return None


# ------------------------------------------------------------------------------------------- helpers

def clopper_pearson(successes, trials, level=0.95):
    """Exact binomial confidence interval (Clopper and Pearson, Biometrika 26:404-413, 1934)."""
    x, n = np.asarray(successes, float), np.asarray(trials, float)
    a = (1 - level) / 2
    with np.errstate(invalid="ignore"):
        lo = np.where(x > 0, stats.beta.ppf(a, x, n - x + 1), 0.0)
        hi = np.where(x < n, stats.beta.isf(a, x + 1, n - x), 1.0)
    return lo, hi


def _pf_grid(m):
    """Pf values for the ROC: log-spaced from about 20 false alarms' worth up to 1."""
    lo = min(max(20.0 / max(m, 1), 1e-5), 0.05)
    return np.unique(np.concatenate([np.geomspace(lo, 1.0, 40), [0.01, 0.05, 0.1, 0.2, 0.5]]))


def _rate(s, thr):
    """Fraction of ``s`` above each threshold."""
    if not s.size:
        return np.full(np.size(thr), np.nan)
    return 1.0 - np.searchsorted(np.sort(s), np.atleast_1d(thr), side="right") / s.size


@dataclass
class _Chunks:
    """Statistics accumulated chunk by chunk (so an interrupted run still has results)."""

    s0: dict = field(default_factory=dict)  # label -> list of arrays under H0
    s1: dict = field(default_factory=dict)
    fals: dict = field(default_factory=dict)  # (label, count) -> (list H0, list H1)
    kcount: np.ndarray | None = None  # H1 trials decided occupied by each k-of-n at the target Pf
    calib_t: list = field(default_factory=list)
    calib_y: list = field(default_factory=list)
    done: int = 0


def evaluate(setup, specs, *, trials=20_000, target_pf=0.1, seed=0, falsify_mode="free", calib_trials=1000,
             progress=None, chunk=None):
    """Evaluate ``specs`` (RuleSpecs) on ``setup``; the JSON-ready report (README "Evaluating rules").

    ``progress(done, total)`` is called as chunks finish.  A KeyboardInterrupt stops the drawing; the
    report then covers the trials done so far and says ``"complete": false``.
    """
    # Input validation
    if int(trials) != trials or trials < 1:
        raise ValueError(f"`trials` must be a positive integer, was {trials!r}")
    if not 0.0 < target_pf < 1.0:
        raise ValueError(f"`target_pf` must lie in (0, 1), was {target_pf!r}")
    if falsify_mode not in ("free", "occupied"):
        raise ValueError(f"`falsify_mode` must be 'free' or 'occupied', was {falsify_mode!r}")
    chunk = int(chunk or _CHUNK)
    ref_pf = REFERENCE["pf"]
    preps = [_prepare(s, setup, target_pf) for s in specs]
    ref_preps = [_prepare(s, setup, ref_pf) for s in specs]
    # The best-placed honest nodes turn first: the worst case for detection.
    honest = [i for i in np.argsort(-setup.snr, kind="stable") if setup.falsify[i] is None]
    max_f = len(honest) // 2 + 1 if len(honest) > 1 else len(honest)
    fals_setups = [setup.with_falsifiers(honest, f, falsify_mode) for f in range(max_f + 1)]
    rng = np.random.default_rng(seed)
    acc = _Chunks()
    complete = True
    try:
        while acc.done < trials:
            m = min(chunk, trials - acc.done)
            _run_chunk(acc, setup, fals_setups, preps, ref_preps, m, target_pf, ref_pf, rng,
                       max(0, min(calib_trials - len(acc.calib_y) // 2, m)))
            acc.done += m
            if progress:
                progress(acc.done, trials)
    except KeyboardInterrupt:
        complete = False
    return _report(setup, specs, preps, ref_preps, fals_setups, acc, target_pf, ref_pf, seed, falsify_mode,
                   complete, trials)


def _run_chunk(acc, setup, fals_setups, preps, ref_preps, m, target_pf, ref_pf, rng, n_calib):
    t0, t1 = _draw(setup, m, False, rng), _draw(setup, m, True, rng)
    d0, d1 = Draws(t0, setup.n_samples), Draws(t1, setup.n_samples)
    for prep, rprep in zip(preps, ref_preps):
        lab = prep.spec.label
        for key, pr, pf_ in ((lab, prep, target_pf), (("ref", lab), rprep, ref_pf)):
            acc.s0.setdefault(key, []).append(rule_statistic(pr, d0, pf_))
            acc.s1.setdefault(key, []).append(rule_statistic(pr, d1, pf_))
    # A falsifier's report does not depend on what is on the air, so one set of lies per chunk serves
    # both hypotheses; configuration f uses the lies of its first f falsifiers.
    lies = _draw(fals_setups[-1], m, False, rng) if len(fals_setups) > 1 else None
    changed = np.zeros(setup.n_nodes, bool)
    for f, fs in enumerate(fals_setups[1:], start=1):
        changed |= np.array([a != b for a, b in zip(fs.falsify, setup.falsify)])
        f0 = Draws(np.where(changed[:, None], lies, t0), setup.n_samples)
        f1 = Draws(np.where(changed[:, None], lies, t1), setup.n_samples)
        for prep in preps:
            lists = acc.fals.setdefault((prep.spec.label, f), ([], []))
            lists[0].append(rule_statistic(prep, f0, target_pf))
            lists[1].append(rule_statistic(prep, f1, target_pf))
    # Optimal k: Pd at the target Pf of every k-of-n, counted here.
    n = setup.n_nodes
    ks = np.arange(1, n + 1)
    p_loc = special.betaincinv(ks, n - ks + 1, target_pf)  # system.local_false_alarm for each k
    thr = _count_threshold(setup, p_loc)
    counts = np.array([np.count_nonzero(d1.kth(k) > thr[k - 1]) for k in ks])
    acc.kcount = counts if acc.kcount is None else acc.kcount + counts
    if n_calib:
        acc.calib_t.append(np.hstack([t0[:, :n_calib], t1[:, :n_calib]]))
        acc.calib_y.extend([0] * n_calib + [1] * n_calib)


def _point(s0, s1, thr, an):
    """MC and analytic Pd / Pf at one threshold."""
    m0, m1 = s0.size, s1.size
    x1, x0 = int(np.sum(s1 > thr)), int(np.sum(s0 > thr))
    lo1, hi1 = clopper_pearson(x1, m1)
    lo0, hi0 = clopper_pearson(x0, m0)
    qd = qf = None
    if an is not None:
        qd, qf = float(np.atleast_1d(an[0])[0]), float(np.atleast_1d(an[1])[0])
    return ({"monte_carlo": x1 / m1 if m1 else None, "ci": [float(lo1), float(hi1)], "analytic": qd},
            {"monte_carlo": x0 / m0 if m0 else None, "ci": [float(lo0), float(hi0)], "analytic": qf})


def _cat(parts):
    return np.concatenate(parts) if parts else np.zeros(0)


def _report(setup, specs, preps, ref_preps, fals_setups, acc, target_pf, ref_pf, seed, falsify_mode,
            complete, trials_asked):
    m = acc.done
    out_rules = []
    calib_t = np.hstack(acc.calib_t) if acc.calib_t else None
    calib_y = np.array(acc.calib_y, bool)
    for prep, rprep in zip(preps, ref_preps):
        spec, lab = prep.spec, prep.spec.label
        s0, s1 = _cat(acc.s0.get(lab, [])), _cat(acc.s1.get(lab, []))
        thr = target_threshold(spec, setup, target_pf)
        pd_t, pf_t = _point(s0, s1, thr, analytic_rates(prep, setup, [thr], target_pf))
        # ROC: thresholds at the H0 quantiles of the statistic (separate H1 draws measure Pd, so no bias).
        grid = _pf_grid(m)
        if s0.size:
            ths = np.unique(np.quantile(s0, 1 - grid, method="inverted_cdf"))
            ths = ths[np.isfinite(ths)]
        else:
            ths = np.zeros(0)
        roc_pf, roc_pd = _rate(s0, ths), _rate(s1, ths)
        an = analytic_rates(prep, setup, ths, target_pf) if ths.size else None
        # Reference point: the rule run at the reference Pf.
        r0, r1 = _cat(acc.s0.get(("ref", lab), [])), _cat(acc.s1.get(("ref", lab), []))
        rthr = target_threshold(spec, setup, ref_pf)
        rpd, rpf = _point(r0, r1, rthr, analytic_rates(rprep, setup, [rthr], ref_pf))
        lo = rpd["ci"][0]
        hi = rpd["ci"][1]
        verdict = "yes" if lo >= REFERENCE["pd"] and rpf["ci"][0] <= ref_pf else (
            "no" if hi < REFERENCE["pd"] or rpf["ci"][0] > ref_pf else "uncertain")
        entry = {
            "rule": spec.rule, "k": prep.k if spec.rule in _COUNTING else None, "label": lab,
            "threshold": thr,
            "pd_at_target_pf": pd_t, "pf_at_target_pf": pf_t,
            "roc": {"threshold": ths.tolist(), "pf": roc_pf.tolist(), "pd": roc_pd.tolist(),
                    "pf_analytic": None if an is None else np.asarray(an[1], float).tolist(),
                    "pd_analytic": None if an is None else np.asarray(an[0], float).tolist()},
            "reference": {"pd": rpd, "pf": rpf, "meets": verdict},
            "falsifiers": _falsifier_curve(prep, setup, fals_setups, acc, thr, target_pf, s1),
            "calibration": _calibration(spec, setup, calib_t, calib_y, target_pf),
        }
        out_rules.append(entry)
    return {
        "schema": "occfuse.evaluate/1",
        "complete": complete,
        "trials": m, "trials_requested": int(trials_asked), "seed": seed,
        "target_pf": float(target_pf),
        "setup": setup.description,
        "reference": REFERENCE,
        "rules": out_rules,
        "optimal_k": _optimal_k(setup, acc, target_pf),
        "falsify_mode": falsify_mode,
    }


def _falsifier_curve(prep, setup, fals_setups, acc, thr, target_pf, s1):
    counts, pd_mc, ci, pd_an, pf_mc = [0], [], [], [], []
    x = int(np.sum(s1 > thr))
    pd_mc.append(x / s1.size if s1.size else None)
    ci.append([float(v) for v in clopper_pearson(x, s1.size)])
    s0 = _cat(acc.s0.get(prep.spec.label, []))
    pf_mc.append(float(np.mean(s0 > thr)) if s0.size else None)
    a = analytic_rates(prep, setup, [thr], target_pf)
    pd_an.append(None if a is None else float(np.atleast_1d(a[0])[0]))
    for f in range(1, len(fals_setups)):
        f0, f1 = (_cat(v) for v in acc.fals.get((prep.spec.label, f), ([], [])))
        counts.append(f)
        x = int(np.sum(f1 > thr))
        pd_mc.append(x / f1.size if f1.size else None)
        ci.append([float(v) for v in clopper_pearson(x, f1.size)])
        pf_mc.append(float(np.mean(f0 > thr)) if f0.size else None)
        a = analytic_rates(prep, fals_setups[f], [thr], target_pf)
        pd_an.append(None if a is None else float(np.atleast_1d(a[0])[0]))
    return {"count": counts, "pd_monte_carlo": pd_mc, "ci": ci, "pf_monte_carlo": pf_mc,
            "pd_analytic": None if all(v is None for v in pd_an) else pd_an}


def _calibration(spec, setup, calib_t, calib_y, target_pf):
    """Reliability curve of fuse()'s posterior on the calibration subsample (half H0, half H1, prior 0.5)."""
    if calib_t is None or calib_t.shape[1] == 0:
        return None
    res = rules.fuse(calib_t, setup.n_samples, rule=spec.rule, target_pf=target_pf, k=spec.k, snr=setup.snr,
                     prior=0.5)
    c = calib.calibration(res.p_occupied, calib_y, n_bins=10)
    nan = lambda a: [None if not np.isfinite(v) else float(v) for v in a]  # noqa: E731
    return {"ece": c.ece, "mean_p": nan(c.mean_p), "frac_occupied": nan(c.frac_true), "count": c.count.tolist(),
            "trials": int(calib_t.shape[1]), "accuracy": float(np.mean(res.decision == calib_y))}


def _optimal_k(setup, acc, target_pf):
    """Pd at the target Pf for every k (MC and binomial), the best k, and Zhang's k."""
    n = setup.n_nodes
    if acc.kcount is None:
        return None
    ks = np.arange(1, n + 1)
    p_loc = special.betaincinv(ks, n - ks + 1, target_pf)  # system.local_false_alarm for each k
    mc = (acc.kcount / acc.done).tolist()
    rates = _vote_rates(setup, p_loc)
    analytic = None
    if rates is not None:
        analytic = [float(system.k_of_n_probability(rates[0][:, [k - 1]], np.array([k]))[0]) for k in ks]
    best = analytic if analytic is not None else mc
    zhang = None
    homog = np.allclose(setup.snr, setup.snr[0]) and np.allclose(setup.n_samples, setup.n_samples[0])
    if homog and setup.honest:
        lp = _vote_rates(setup, np.array([target_pf]))
        if lp is not None and lp[0][0, 0] > target_pf:
            zhang = system.optimal_k(n, float(np.clip(lp[0][0, 0], 1e-12, 1 - 1e-12)), target_pf)
    return {"k": [int(k) for k in ks], "pd_monte_carlo": mc, "pd_analytic": analytic,
            "best_k": int(ks[int(np.argmax(best))]),
            "zhang_min_error_k_at_local_pf_target": zhang}
