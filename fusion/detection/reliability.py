"""Per-node reliability learned online from the fused decisions, without ground truth.

Each epoch the fused decisions that clear a confidence bar serve as labels.  Against them the
model keeps, per node (and per node and channel):

* Beta counts of the node's local votes, giving ``Pd`` and ``Pf`` with their uncertainty
  (agreement counting with a Beta prior; one hard-label step of Dawid & Skene's EM [1]_);
* a robust noise floor from the powers it measured on channels decided free;
* the received per-sample SNR on channels decided occupied;
* a trust weight in [0, 1] and the flags ``silent``, ``stuck``, ``suspect`` and ``drift``.

The Pd/Pf estimates are what Chair & Varshney's weights need [2]_; the trust weight plays the
part of the reputation in the weighted sequential test of Chen, Park and Bian [3]_, but is a
posterior probability rather than a vote count.  Every node is indexed by its row in the
arrays; :meth:`ReliabilityModel.get_state` exports one JSON-able dict per node so a store can
key them by node name.

References
----------
.. [1] A. P. Dawid, A. M. Skene, "Maximum likelihood estimation of observer error-rates using
   the EM algorithm," J. R. Stat. Soc. C 28(1):20-28, 1979.
.. [2] Z. Chair, P. K. Varshney, "Optimal data fusion in multiple sensor detection systems,"
   IEEE Trans. Aerosp. Electron. Syst. AES-22(1):98-101, 1986.
.. [3] R. Chen, J.-M. Park, K. Bian, "Robust distributed spectrum sensing in cognitive radio
   networks," IEEE INFOCOM 2008.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from . import energy

__all__ = ["ReliabilityModel", "FLAGS", "PINS"]

FLAGS = ("silent", "stuck", "suspect", "drift")
PINS = ("trusted", "excluded")
_STATE_VERSION = 1
# Flag lists by bit pattern (bit k set: FLAGS[k] applies).
_FLAG_LISTS = tuple(tuple(f for k, f in enumerate(FLAGS) if code >> k & 1) for code in range(1 << len(FLAGS)))
_CLIP = 1e-6  # keeps ln(Pd/Pf) finite for always-yes / always-no nodes (common practice)

# Per-node state: name -> (shape kind, fill value).  "n" = scalar per node, "c" = per channel,
# "w" = per noise-window slot.  One table drives allocation, resizing and the JSON export.
_FIELDS = {
    "kd": ("n", 0.0), "nd": ("n", 0.0), "kf": ("n", 0.0), "nf": ("n", 0.0),
    "kd_ch": ("c", 0.0), "nd_ch": ("c", 0.0), "kf_ch": ("c", 0.0), "nf_ch": ("c", 0.0),
    "snr_sum": ("c", 0.0), "snr_weight": ("c", 0.0), "last_power": ("c", np.nan),
    "noise_history": ("w", np.nan), "noise_pos": ("n", 0.0), "stuck_run": ("n", 0.0),
    "last_used_s": ("n", np.nan), "last_seen_s": ("n", np.nan),
    "noise_reported_dbm": ("n", np.nan), "local_pf": ("n", np.nan), "suspect": ("n", 0.0),
}


def _check_state(state):
    if not isinstance(state, dict) or state.get("version") != _STATE_VERSION:
        got = state.get("version") if isinstance(state, dict) else type(state).__name__
        raise ValueError(f"`state` must be a dict of version {_STATE_VERSION}, was {got!r}")


def _nanmedian_rows(x):
    """Median of each row ignoring NaN, NaN for an empty row (np.nanmedian warns there)."""
    x = np.sort(x, axis=1)  # NaN sorts last
    count = np.sum(np.isfinite(x), axis=1)
    out = np.full(x.shape[0], np.nan)
    ok = count > 0
    rows = np.flatnonzero(ok)
    lo, hi = (count[ok] - 1) // 2, count[ok] // 2
    out[ok] = 0.5 * (x[rows, lo] + x[rows, hi])
    return out, count


def _by_row(f, n):
    """``f(n)`` for an (n_nodes, n_channels) array, evaluated once per row when each row holds one value.

    A node measures every channel with the same ``n_samples``, and the special functions of
    ``f`` cost ~100x an add: at 1,000 nodes x 256 channels this saves ~0.1 s per call.
    """
    if n.ndim == 2 and n.shape[1] > 1 and np.all(n == n[:, :1]):
        return np.broadcast_to(f(n[:, :1]), n.shape)
    return f(n)


def _to_json(value):
    arr = np.asarray(value, dtype=float)
    return np.where(np.isfinite(arr), arr, None).tolist()


class ReliabilityModel:
    """Online per-node Pd, Pf, noise floor, SNR, trust and flags for a sensing network.

    Parameters
    ----------
    prior_pd, prior_pf : (float, float)
        Beta prior ``(a, b)`` on each node's Pd and Pf.  Weak on purpose (5 and 10 pseudo-votes
        by default) so a new node starts at a typical operating point and its own votes soon
        dominate.  The prior must have mean Pd > mean Pf, or the labels can swap [1]_.
    confidence_bar : float
        A channel is used as a label only when ``P(occupied) >= bar`` (occupied) or
        ``<= 1 - bar`` (free), and agrees with the published decision if one is given.
    leave_one_out : bool
        Judge node ``i`` on a channel only where the posterior stays beyond the bar once its
        own contribution is taken out of the fused log-odds, so that a node cannot confirm
        itself.  Without it, honest nodes' Pd and SNR come out inflated (the tests measure
        it).
    memory, snr_memory : float
        Effective number of labelled observations remembered for Pd/Pf and for SNR
        (exponential forgetting), so estimates track nodes that change.
    local_pf : float
        Nominal local false-alarm rate of the node's vote threshold (used to compute votes
        when none are given, and as the reference of the ``suspect`` test).
    pf_margin, low_ratio : float
        A node meets its specification when
        ``low_ratio * local_pf <= Pf <= local_pf + pf_margin`` and ``Pd >= low_ratio * local_pf``.
        An honest energy detector with a right noise floor has ``Pf = local_pf`` exactly and
        ``Pd >= Pf`` at any SNR, and fusion errors only push both towards each other's
        values, so the band allows for estimation noise, not for physics.
    suspect_prob, clear_prob : float
        ``suspect`` is raised when the posterior probability that the node is out of
        specification reaches ``suspect_prob`` and cleared when it falls below ``clear_prob``.
    suspect_trust : float
        Trust cap of a suspect node (0 excludes it; its reports are still kept and learned from).
    drift_margin_db : float
        ``drift`` when the node's reported noise floor and the learned one differ by more.
    drift_trust : float
        Trust factor of a drifting node.
    drift_min_j : float
        A drifting node is also out of specification unless ``Pd - Pf >= drift_min_j``.
    learned_noise_on_drift : bool
        :meth:`noise_for` substitutes the learned floor for the own figure of a drifting node
        that is not suspect.
    noise_window, noise_min_epochs : int
        The noise floor is the median of the last ``noise_window`` per-epoch estimates, given
        once at least ``noise_min_epochs`` exist.
    stuck_epochs : int
        ``stuck`` after this many consecutive fresh reports repeating the previous values.
    channel_shrinkage : float
        Pseudo-observations pulling per-channel Pd/Pf towards the node's pooled value.
    ci_level : float
        Level of the equal-tailed Beta credible intervals ``pd_ci_`` and ``pf_ci_``.

    Attributes
    ----------
    pd_, pf_ : ndarray, shape (n_nodes,)
        Posterior means; ``pd_std_``, ``pf_std_`` their standard deviations and
        ``pd_ci_``, ``pf_ci_`` (n_nodes, 2) their credible intervals.
    pd_channel_, pf_channel_ : ndarray, shape (n_nodes, n_channels)
        Per node and channel, shrunk towards the pooled value where data are few.
    noise_dbm_ : ndarray, shape (n_nodes,)
        Learned noise power per sample, dBm; NaN until learned.
    snr_ : ndarray, shape (n_nodes, n_channels)
        Learned per-sample linear SNR while occupied; NaN until learned.
    trust_ : ndarray, shape (n_nodes,)
        In [0, 1]: the posterior probability that the node meets its specification, times the
        flag penalties; 1 if pinned trusted, 0 if pinned excluded.
    flags_ : list of list of str
        Per node, the names from :data:`FLAGS` that apply (empty when all is well).

    Notes
    -----
    Labels without ground truth are the fusion's own output, so a dishonest majority is
    learned as the truth: the estimates hold only while honest, informative nodes carry the
    confident decisions (Rawat et al. put the blind point at half the nodes flipping).

    With ``k`` votes of 1 among ``n`` labelled occupied observations the Pd posterior is
    ``Beta(a + k, b + n - k)`` (agreement counting against the fused decisions, a hard-label
    step of Dawid & Skene 1979); the mean is the Bayes predictive vote rate, so plugging it
    into the Chair-Varshney weights [2]_ needs no further shrinkage.  Fusion errors bias these
    counts; the confidence bar and the leave-one-out check bound that bias, and forgetting
    lets a wrong start wash out.
    Under H0 the mean power over ``N`` samples is ``sigma^2 Gamma(N, 1) / N``, so each
    free-channel power is divided by that law's median before the medians are taken.

    References
    ----------
    .. [1] A. P. Dawid, A. M. Skene, J. R. Stat. Soc. C 28(1):20-28, 1979.
    .. [2] Z. Chair, P. K. Varshney, IEEE Trans. Aerosp. Electron. Syst. AES-22(1):98-101, 1986.
    .. [3] R. Chen, J.-M. Park, K. Bian, IEEE INFOCOM 2008.

    Examples
    --------
    >>> m = ReliabilityModel().resize(3, n_channels=2)
    >>> [round(float(p), 3) for p in m.pd_], m.flags_[0]
    ([0.8, 0.8, 0.8], ['silent'])
    """

    def __init__(self, *, prior_pd=(4.0, 1.0), prior_pf=(1.0, 9.0), confidence_bar=0.9,
                 leave_one_out=True, memory=400.0, snr_memory=50.0, local_pf=0.1,
                 pf_margin=0.1, low_ratio=0.5, suspect_prob=0.99, clear_prob=0.5,
                 suspect_trust=0.0, drift_margin_db=2.0, drift_trust=0.5, drift_min_j=0.05,
                 learned_noise_on_drift=True, noise_window=21, noise_min_epochs=5,
                 stuck_epochs=3, channel_shrinkage=20.0, ci_level=0.95):
        self.prior_pd = prior_pd
        self.prior_pf = prior_pf
        self.confidence_bar = confidence_bar
        self.leave_one_out = leave_one_out
        self.memory = memory
        self.snr_memory = snr_memory
        self.local_pf = local_pf
        self.pf_margin = pf_margin
        self.low_ratio = low_ratio
        self.suspect_prob = suspect_prob
        self.clear_prob = clear_prob
        self.suspect_trust = suspect_trust
        self.drift_margin_db = drift_margin_db
        self.drift_trust = drift_trust
        self.drift_min_j = drift_min_j
        self.learned_noise_on_drift = learned_noise_on_drift
        self.noise_window = noise_window
        self.noise_min_epochs = noise_min_epochs
        self.stuck_epochs = stuck_epochs
        self.channel_shrinkage = channel_shrinkage
        self.ci_level = ci_level

    # -- parameters and allocation -------------------------------------------------------

    def _check_params(self):
        for name in ("prior_pd", "prior_pf"):
            ab = np.asarray(getattr(self, name), dtype=float)
            if ab.shape != (2,) or not np.all(ab > 0):
                raise ValueError(f"`{name}` must be two positive numbers (a, b), was {ab.tolist()!r}")
        if not self.prior_pd[0] / sum(self.prior_pd) > self.prior_pf[0] / sum(self.prior_pf):
            raise ValueError(f"`prior_pd` must have a larger mean than `prior_pf`, was "
                             f"{self.prior_pd!r} and {self.prior_pf!r}")
        for name in ("confidence_bar", "suspect_prob", "ci_level"):
            v = getattr(self, name)
            if not 0.5 < v < 1:
                raise ValueError(f"`{name}` must lie in (0.5, 1), was {v!r}")
        for name in ("local_pf", "low_ratio", "clear_prob"):
            v = getattr(self, name)
            if not 0 < v < 1:
                raise ValueError(f"`{name}` must lie in (0, 1), was {v!r}")
        for name in ("suspect_trust", "drift_trust", "drift_min_j"):
            v = getattr(self, name)
            if not 0 <= v <= 1:
                raise ValueError(f"`{name}` must lie in [0, 1], was {v!r}")
        for name in ("memory", "snr_memory", "pf_margin", "drift_margin_db", "channel_shrinkage"):
            v = getattr(self, name)
            if not v > 0:
                raise ValueError(f"`{name}` must be positive, was {v!r}")
        for name in ("noise_window", "noise_min_epochs", "stuck_epochs"):
            v = getattr(self, name)
            if int(v) != v or v < 1:
                raise ValueError(f"`{name}` must be a positive integer, was {v!r}")
        if self.clear_prob > self.suspect_prob:
            raise ValueError(f"`clear_prob` must not exceed `suspect_prob`, was {self.clear_prob!r}")

    def resize(self, n_nodes, *, n_channels=None):
        """Grow the model to ``n_nodes`` nodes; new nodes start neutral (prior only).

        Returns self.  ``n_channels`` is needed on the first call only.
        """
        self._allocate(n_nodes, n_channels=n_channels)
        self._refresh()
        return self

    def _allocate(self, n_nodes, *, n_channels=None, given=None):
        """:meth:`resize` without the refresh: the restores overwrite the new rows and refresh once.

        `given` maps field names to arrays to take as the new rows (as they are, no copy) where their
        shape fits, instead of filled ones that a restore would overwrite.
        """
        # Input validation
        self._check_params()
        old = getattr(self, "n_nodes_", 0)
        if int(n_nodes) != n_nodes or n_nodes < old:
            raise ValueError(f"`n_nodes` must be an integer >= {old} (nodes are only added), "
                             f"was {n_nodes!r}")
        if old == 0 and getattr(self, "n_channels_", None) is None:
            if n_channels is None or int(n_channels) != n_channels or n_channels < 1:
                raise ValueError(f"`n_channels` must be a positive integer, was {n_channels!r}")
            self.n_channels_ = int(n_channels)
            self.pinned_ = []
            self.now_s_, self.max_age_s_ = np.nan, np.inf
        elif n_channels is not None and n_channels != self.n_channels_:
            raise ValueError(f"`n_channels` must stay {self.n_channels_}, was {n_channels!r}; "
                             "rebuild with from_state(..., n_channels=...) after a plan change")

        n_new = int(n_nodes) - old
        widths = {"n": (), "c": (self.n_channels_,), "w": (int(self.noise_window),)}
        given = given or {}
        for name, (kind, fill) in _FIELDS.items():
            block = given.get(name)
            if block is None or block.shape != (n_new,) + widths[kind]:
                block = np.full((n_new,) + widths[kind], fill)
                if name == "local_pf":
                    block[:] = self.local_pf
            cur = getattr(self, name + "_", None)
            setattr(self, name + "_", block if cur is None else np.concatenate([cur, block]))
        self.pinned_ = list(self.pinned_) + [None] * n_new
        self.n_nodes_ = int(n_nodes)
        return self

    # -- the epoch update -----------------------------------------------------------------

    def update(self, *, t, n_samples, report_time_s, now_s, max_age_s, p_occupied, decision=None,
               power_dbm=None, noise_dbm_reported=None, votes=None, local_pf=None, contribution=None,
               pinned=None):
        """Learn from one fusion epoch.

        Parameters
        ----------
        t : array_like, shape (n_nodes, n_channels)
            Normalised energies used by the fusion; NaN where a node has no report.
        n_samples : array_like, broadcastable to ``t``
            Complex samples per measurement.
        report_time_s : array_like, shape (n_nodes,)
            Measurement time of the report each node contributed, seconds; NaN if none.
            A report is learned from once, and only while younger than ``max_age_s``.
        now_s, max_age_s : float
            Epoch time and report freshness limit, seconds.
        p_occupied : array_like, shape (n_channels,)
            Posterior P(occupied) of the fusion (after any tracking filter); NaN unknown.
        decision : array_like, shape (n_channels,), optional
            Published decision, 1 occupied, 0 free, NaN unknown.  When given, a label must
            also agree with it.  With ``leave_one_out`` leave it out: a decision that
            includes the node's own report biases its counts (it keeps the node's false
            alarms out of the "free" labels).
        power_dbm : array_like, shape (n_nodes, n_channels), optional
            Reported mean powers, dBm (noise floor learning and the ``stuck`` check).
        noise_dbm_reported : array_like, shape (n_nodes,), optional
            Each node's own noise floor figure, dBm; NaN where it gave none.
        votes : array_like, shape (n_nodes, n_channels), optional
            Local hard decisions (1/0; ignored where ``t`` is NaN), e.g. ``FusionResult.votes``.
            Default ``t > threshold(local_pf, N)``, the model's own vote at ``local_pf``.
        local_pf : float or array_like, shape (n_nodes,), optional
            Local false-alarm rate of the votes; default the ``local_pf`` parameter.
        contribution : array_like, shape (n_nodes, n_channels), optional
            Each node's term in the fused log-odds, nats (e.g. the clipped, trust-weighted
            ``node_llr`` of ``weighted_llr``), for the leave-one-out check.  Default: the
            Chair-Varshney weight of its vote times its trust.
        pinned : sequence of {"trusted", "excluded", None}, optional
            Admin pins, replacing the stored ones; ``None`` keeps them.

        Returns
        -------
        self
        """
        # Input validation
        t = np.asarray(t, dtype=float)
        if t.ndim != 2:
            raise ValueError(f"`t` must have shape (n_nodes, n_channels), was {t.shape}")
        n_nodes, n_channels = t.shape
        if getattr(self, "n_nodes_", 0) == 0 and getattr(self, "n_channels_", None) is None:
            self.resize(n_nodes, n_channels=n_channels)
        elif n_channels != self.n_channels_:
            raise ValueError(f"`t` must have {self.n_channels_} channels, was {n_channels}")
        elif n_nodes < self.n_nodes_:
            raise ValueError(f"`t` must have at least {self.n_nodes_} rows (one per known node), "
                             f"was {n_nodes}")
        elif n_nodes > self.n_nodes_:
            self.resize(n_nodes)
        n = np.asarray(n_samples, dtype=float)
        if n.ndim == 1 and n.shape[0] == n_nodes:
            n = n[:, None]  # (n_nodes,) means one value per node, as in rules.fuse
        n = np.broadcast_to(n, t.shape)
        if np.any(~(n > 0)):
            raise ValueError(f"`n_samples` must be positive, was {n[~(n > 0)].flat[0].item()!r}")
        rts = np.asarray(report_time_s, dtype=float)
        if rts.shape != (n_nodes,):
            raise ValueError(f"`report_time_s` must have shape ({n_nodes},), was {rts.shape}")
        if not np.isfinite(now_s):
            raise ValueError(f"`now_s` must be finite, was {now_s!r}")
        if not max_age_s > 0:
            raise ValueError(f"`max_age_s` must be positive, was {max_age_s!r}")
        p = np.asarray(p_occupied, dtype=float)
        dec = None if decision is None else np.asarray(decision, dtype=float)
        for name, arr in (("decision", dec), ("p_occupied", p)):
            if arr is not None and arr.shape != (n_channels,):
                raise ValueError(f"`{name}` must have shape ({n_channels},), was {arr.shape}")
        with np.errstate(invalid="ignore"):
            bad = np.isfinite(p) & ~((p >= 0) & (p <= 1))
        if np.any(bad) or np.any(np.isinf(p)):
            raise ValueError(f"`p_occupied` must lie in [0, 1], was {p[bad | np.isinf(p)][0].item()!r}")
        power = None if power_dbm is None else np.asarray(power_dbm, dtype=float)
        if power is not None and power.shape != t.shape:
            raise ValueError(f"`power_dbm` must have shape {t.shape}, was {power.shape}")
        noise_rep = (np.full(n_nodes, np.nan) if noise_dbm_reported is None
                     else np.asarray(noise_dbm_reported, dtype=float))
        if noise_rep.shape != (n_nodes,):
            raise ValueError(f"`noise_dbm_reported` must have shape ({n_nodes},), "
                             f"was {noise_rep.shape}")
        lpf = np.broadcast_to(np.asarray(self.local_pf if local_pf is None else local_pf,
                                         dtype=float), (n_nodes,))
        bad = ~((lpf > 0) & (lpf < 1))
        if np.any(bad):
            raise ValueError(f"`local_pf` must lie in (0, 1), was {lpf[bad][0].item()!r}")
        if votes is None:
            with np.errstate(invalid="ignore"):
                u = np.where(np.isfinite(t), t > _by_row(lambda m: energy.threshold(lpf[:, None], m), n), np.nan)
        else:
            u = np.asarray(votes, dtype=float)
            if u.shape != t.shape:
                raise ValueError(f"`votes` must have shape {t.shape}, was {u.shape}")
            with np.errstate(invalid="ignore"):
                bad = np.isfinite(u) & (u != 0) & (u != 1)
            if np.any(bad):
                raise ValueError(f"`votes` must be 0, 1 or NaN, was {u[bad][0].item()!r}")
        if contribution is not None:
            contribution = np.asarray(contribution, dtype=float)
            if contribution.shape != t.shape:
                raise ValueError(f"`contribution` must have shape {t.shape}, was {contribution.shape}")
        if pinned is not None:
            self.set_pins(pinned)

        # Which reports are new and fresh: each report is learned from exactly once.
        with np.errstate(invalid="ignore"):
            fresh = (np.isfinite(rts) & (now_s - rts <= max_age_s)
                     & ~(rts <= self.last_used_s_))
        self.last_used_s_ = np.where(fresh, rts, self.last_used_s_)
        self.last_seen_s_ = np.fmax(self.last_seen_s_, rts)
        self.now_s_, self.max_age_s_ = float(now_s), float(max_age_s)
        self.local_pf_ = np.where(fresh, lpf, self.local_pf_)
        self.noise_reported_dbm_ = np.where(fresh, noise_rep, self.noise_reported_dbm_)
        obs = fresh[:, None] & np.isfinite(u) & np.isfinite(t)

        label1, label0 = self._labels(u, dec, p, contribution)
        self._learn_rates(np.where(obs, u, 0.0), obs & label1, obs & label0)
        self._learn_snr(t / n - 1.0, obs & label1)
        if power is not None:
            self._learn_noise(power, n, fresh, fresh[:, None] & np.isfinite(power) & label0)
            self._track_stuck(power, fresh)
        else:
            self._track_stuck(t, fresh)
        self._refresh()
        return self

    def _labels(self, u, dec, p, contribution):
        """Confident labels per (node, channel), leave-one-out when asked."""
        cut = special.logit(self.confidence_bar)
        logit = special.logit(np.clip(np.nan_to_num(p, nan=0.5), 1e-12, 1 - 1e-12))
        logit = np.where(np.isnan(p), 0.0, logit)  # no posterior, no label
        with np.errstate(invalid="ignore"):
            gate1 = np.ones(p.shape, bool) if dec is None else dec == 1
            gate0 = np.ones(p.shape, bool) if dec is None else dec == 0
        if not self.leave_one_out:
            return (np.broadcast_to(gate1 & (logit >= cut), u.shape),
                    np.broadcast_to(gate0 & (logit <= -cut), u.shape))
        # Chair & Varshney (1986): node i adds w+ = ln(Pd/Pf) for a 1, w- = ln((1-Pd)/(1-Pf))
        # for a 0; remove it (scaled by trust, as a weighted rule would) from the fused log-odds.
        # Only this leave-one-out posterior may gate the label: gating on the full posterior
        # would drop the node's own false alarms from the "free" labels (a bias we measured).
        if contribution is None:
            pd = np.clip(self.pd_channel_, _CLIP, 1 - _CLIP)
            pf = np.clip(self.pf_, _CLIP, 1 - _CLIP)[:, None]
            w = np.log(np.where(u == 1, pd / pf, (1 - pd) / (1 - pf)))  # one log, not two: same values
            contribution = self.trust_[:, None] * w
        contrib = np.where(np.isfinite(u) & np.isfinite(contribution), contribution, 0.0)
        loo = logit[None, :] - contrib
        return gate1[None, :] & (loo >= cut), gate0[None, :] & (loo <= -cut)

    def _learn_rates(self, u, m1, m0):
        # Forgetting per observation: memory M keeps the last ~M labelled votes (lam = 1 - 1/M).
        lam = 1.0 - 1.0 / self.memory
        for k, n, mask in (("kd", "nd", m1), ("kf", "nf", m0)):
            cnt, hits = mask.sum(axis=1), np.where(mask, u, 0.0).sum(axis=1)
            decay = lam ** cnt
            setattr(self, k + "_", decay * getattr(self, k + "_") + hits)
            setattr(self, n + "_", decay * getattr(self, n + "_") + cnt)
            decay_ch = np.where(mask, lam, 1.0)
            setattr(self, k + "_ch_", decay_ch * getattr(self, k + "_ch_") + np.where(mask, u, 0.0))
            setattr(self, n + "_ch_", decay_ch * getattr(self, n + "_ch_") + mask)

    def _learn_snr(self, x, mask):
        # E[T] = N(1 + gamma_s) under H1 for deterministic and Gaussian signals alike
        # (Urkowitz 1967), so T/N - 1 is an unbiased per-sample SNR estimate.
        lam = np.where(mask, 1.0 - 1.0 / self.snr_memory, 1.0)
        self.snr_sum_ = lam * self.snr_sum_ + np.where(mask, x, 0.0)
        self.snr_weight_ = lam * self.snr_weight_ + mask

    def _learn_noise(self, power, n, fresh, mask):
        # Under H0, P / sigma^2 ~ Gamma(N, 1) / N: divide by its median, then take medians.
        med = _by_row(lambda m: special.gammaincinv(m, 0.5) / m, n)
        est = np.where(mask, power - 10.0 * np.log10(med), np.nan)
        epoch_est, count = _nanmedian_rows(est)
        push = fresh & (count > 0)
        rows = np.flatnonzero(push)
        pos = self.noise_pos_[rows].astype(int)
        self.noise_history_[rows, pos] = epoch_est[rows]
        self.noise_pos_[rows] = (pos + 1) % int(self.noise_window)

    def _track_stuck(self, values, fresh):
        # Reports carry float32 powers: identical means identical at that precision (also what a store
        # keeping last_power at float32, node_arrays(compact=True), gives back).
        values = np.asarray(values, dtype=np.float32).astype(float)
        finite = np.isfinite(values)
        same = (np.all(np.isfinite(self.last_power_) == finite, axis=1)
                & np.all(np.where(finite, values == self.last_power_, True), axis=1)
                & finite.any(axis=1))
        self.stuck_run_ = np.where(fresh, np.where(same, self.stuck_run_ + 1, 0), self.stuck_run_)
        self.last_power_ = np.where(fresh[:, None], values, self.last_power_)

    def set_pins(self, pinned):
        """Admin pins per node: "trusted" (trust 1), "excluded" (trust 0) or None; returns self."""
        # Input validation
        pins = list(pinned)
        if len(pins) != self.n_nodes_:
            raise ValueError(f"`pinned` must have {self.n_nodes_} entries, was {len(pins)}")
        for v in pins:
            if v is not None and v not in PINS:
                raise ValueError(f"`pinned` entries must be one of {PINS + (None,)}, was {v!r}")
        self.pinned_ = pins
        if hasattr(self, "trust_"):
            self._apply_pins()  # pins change nothing but the trust: no full refresh
        return self

    # -- derived estimates ----------------------------------------------------------------

    def _refresh(self):
        """Recompute the public estimates, trust and flags from the counts."""
        (ad, bd), (af, bf) = self.prior_pd, self.prior_pf
        post_d = (ad + self.kd_, bd + self.nd_ - self.kd_)
        post_f = (af + self.kf_, bf + self.nf_ - self.kf_)
        for name, (a, b) in (("pd", post_d), ("pf", post_f)):
            setattr(self, name + "_", a / (a + b))
            setattr(self, name + "_std_", np.sqrt(a * b / ((a + b) ** 2 * (a + b + 1))))
        with np.errstate(invalid="ignore", divide="ignore"):
            self.snr_ = np.where(self.snr_weight_ > 0,
                                 np.maximum(self.snr_sum_ / self.snr_weight_, 0.0), np.nan)
        floor, count = _nanmedian_rows(self.noise_history_)
        self.noise_dbm_ = np.where(count >= self.noise_min_epochs, floor, np.nan)

        with np.errstate(invalid="ignore"):
            silent = ~(self.now_s_ - self.last_seen_s_ <= self.max_age_s_)
            drift = np.abs(self.noise_reported_dbm_ - self.noise_dbm_) > self.drift_margin_db

        # Out of specification: Pf outside [low * local_pf, local_pf + margin], or Pd below
        # low * local_pf (an energy detector's Pd never falls below its Pf).
        low = self.low_ratio * self.local_pf_
        high = np.minimum(self.local_pf_ + self.pf_margin, 1.0)
        p_ok = ((special.betainc(*post_f, high) - special.betainc(*post_f, low))
                * special.betainc(post_d[1], post_d[0], 1.0 - low))
        # A drifting node must also stay informative, Pd - Pf >= drift_min_j (normal
        # approximation to the difference of the two Beta posteriors, common practice):
        # re-normalising a node that only adds an offset to every power (always "occupied")
        # by its learned floor leaves noise with Pd = Pf, which must not pass as honest.
        gap = (self.pd_ - self.pf_ - self.drift_min_j) / np.hypot(self.pd_std_, self.pf_std_)
        p_ok = p_ok * np.where(drift, special.ndtr(gap), 1.0)
        self.p_violation_ = 1.0 - p_ok
        raise_ = self.p_violation_ >= self.suspect_prob
        keep = (self.suspect_ > 0) & (self.p_violation_ >= self.clear_prob)
        self.suspect_ = (raise_ | keep).astype(float)

        stuck = self.stuck_run_ >= self.stuck_epochs
        suspect = self.suspect_ > 0
        trust = np.where(suspect, np.minimum(p_ok, self.suspect_trust), p_ok)
        self._trust_unpinned = np.where(stuck, 0.0, trust) * np.where(drift, self.drift_trust, 1.0)
        self._apply_pins()
        self.silent_, self.stuck_, self.drift_ = silent, stuck, drift
        # One bit per flag, in FLAGS order; a list per node from a table (a loop over flags per node cost
        # ~1 ms a call at 1,000 nodes).
        code = silent.astype(int) | stuck.astype(int) << 1 | suspect.astype(int) << 2 | drift.astype(int) << 3
        self.flags_ = [list(_FLAG_LISTS[c]) for c in code.tolist()]

    def _apply_pins(self):
        """``trust_`` from the learned trust and the pins (the one part of the estimates pins change)."""
        pins = np.array(self.pinned_, dtype=object)
        trust = np.where(pins == "trusted", 1.0, np.where(pins == "excluded", 0.0, self._trust_unpinned))
        self.trust_ = np.clip(trust.astype(float), 0.0, 1.0)

    def _credible_interval(self, a, b):
        # Equal-tailed Beta interval: betaincinv is the Beta quantile function.  Computed when asked for:
        # nothing in an epoch reads it, and it was the dearest part of every refresh.
        q = np.array([(1 - self.ci_level) / 2, (1 + self.ci_level) / 2])
        return special.betaincinv(a[:, None], b[:, None], q[None, :])

    # The per-channel rates are computed when read, like the intervals: an epoch reads pd_channel_ once (in
    # _labels) and pf_channel_ never, and each is a few passes over (n_nodes, n_channels) arrays.
    @property
    def pd_channel_(self):
        s = self.channel_shrinkage
        return (self.kd_ch_ + s * self.pd_[:, None]) / (self.nd_ch_ + s)

    @property
    def pf_channel_(self):
        s = self.channel_shrinkage
        return (self.kf_ch_ + s * self.pf_[:, None]) / (self.nf_ch_ + s)

    @property
    def pd_ci_(self):
        (a, b) = self.prior_pd
        return self._credible_interval(a + self.kd_, b + self.nd_ - self.kd_)

    @property
    def pf_ci_(self):
        (a, b) = self.prior_pf
        return self._credible_interval(a + self.kf_, b + self.nf_ - self.kf_)

    def noise_for(self, noise_dbm_reported):
        """Noise floor to normalise with: the node's own figure, else the learned floor.

        Parameters
        ----------
        noise_dbm_reported : array_like, shape (n_nodes,)
            Reported floors, dBm, NaN where a report carried none.

        Returns
        -------
        ndarray, shape (n_nodes,)
            dBm; the learned floor fills NaN (and replaces the figure of a drifting node
            that is not suspect, when ``learned_noise_on_drift``); NaN where neither is known.
        """
        # Input validation
        rep = np.asarray(noise_dbm_reported, dtype=float)
        if rep.shape != (self.n_nodes_,):
            raise ValueError(f"`noise_dbm_reported` must have shape ({self.n_nodes_},), "
                             f"was {rep.shape}")

        use_learned = ~np.isfinite(rep)
        if self.learned_noise_on_drift:
            # Never repair a suspect node: a liar that adds an offset to every power would
            # turn into plausible noise.  A node found drifting before it turned suspect
            # (a slow drift) is repaired.
            with np.errstate(invalid="ignore"):
                use_learned |= ((np.abs(rep - self.noise_dbm_) > self.drift_margin_db)
                                & ~(self.suspect_ > 0))
        return np.where(use_learned & np.isfinite(self.noise_dbm_), self.noise_dbm_,
                        np.where(use_learned, np.nan, rep))

    def snr_filled(self, default):
        """``snr_`` with NaN (not yet learned) replaced by ``default`` (linear, per sample)."""
        return np.where(np.isfinite(self.snr_), self.snr_, default)

    # -- persistence ----------------------------------------------------------------------

    def node_arrays(self, *, compact=False):
        """The per-node state as arrays with the node axis first, ``{name: ndarray}`` (copies).

        Row ``i`` of every array is what :meth:`get_state` writes for node ``i``; a store
        may keep these packed and hand them back to :meth:`from_arrays`.  ``compact=True``
        gives the per-channel arrays (the bulk of the state) as float32: half the bytes, for a
        relative rounding of 6e-8 on decayed counts and SNR sums, and none on the last powers
        (float32 already).
        """
        return {name: np.array(getattr(self, name + "_"),
                               dtype=np.float32 if compact and kind == "c" else float)
                for name, (kind, _) in _FIELDS.items()}

    def get_state(self, *, include_nodes=True):
        """Plain JSON-able state: ``{"version", "n_channels", "now_s", "max_age_s", "nodes"}``.

        ``nodes`` holds one dict per node (NaN written as None), so a store can key them by
        node name and hand them back in any order to :meth:`from_state`;
        ``include_nodes=False`` leaves it empty (for a store that keeps :meth:`node_arrays`).
        """
        nodes = []
        for i in range(self.n_nodes_ if include_nodes else 0):
            d = {name: _to_json(getattr(self, name + "_")[i]) for name in _FIELDS}
            d["pinned"] = self.pinned_[i]
            nodes.append(d)
        return {"version": _STATE_VERSION, "n_channels": self.n_channels_,
                "now_s": _to_json(self.now_s_), "max_age_s": _to_json(self.max_age_s_),
                "nodes": nodes}

    @classmethod
    def from_state(cls, state, *, nodes=None, n_channels=None, **params):
        """Rebuild a model from :meth:`get_state` output.

        Parameters
        ----------
        state : dict
            As exported.
        nodes : list of (dict or None), optional
            Per-node states to use instead of ``state["nodes"]`` (e.g. reordered by name);
            None starts that node neutral.
        n_channels : int, optional
            A new channel count after a plan change: per-channel estimates restart, the
            pooled ones are kept.
        **params
            Constructor parameters.
        """
        # Input validation
        _check_state(state)
        entries = list(state["nodes"] if nodes is None else nodes)
        n_ch_state = int(state["n_channels"])
        n_ch = n_ch_state if n_channels is None else int(n_channels)

        model = cls(**params)._allocate(len(entries), n_channels=n_ch)
        for i, d in enumerate(entries):
            if d is not None:
                model._set_node(i, d, same_channels=n_ch == n_ch_state)
                model.pinned_[i] = d.get("pinned")
        return model._finish_restore(state)

    @classmethod
    def from_arrays(cls, state, arrays, rows, *, n_channels=None, nodes=None, **params):
        """Rebuild a model from :meth:`get_state` (``include_nodes=False``) and :meth:`node_arrays` output.

        The vectorised counterpart of :meth:`from_state` for a store that keeps the arrays packed.

        Parameters
        ----------
        state : dict
            As exported by ``get_state(include_nodes=False)``.
        arrays : dict of str to ndarray
            As exported by :meth:`node_arrays`, one row per stored node.
        rows : array_like of int, shape (n_nodes,)
            Row of `arrays` for each node of the new model; -1 where it has none.
        n_channels : int, optional
            A new channel count, as in :meth:`from_state`.
        nodes : list of (dict or None), optional
            Per-node :meth:`get_state` dicts for nodes with no row (-1), e.g. from an older
            store; None starts that node neutral.
        **params
            Constructor parameters.
        """
        # Input validation
        _check_state(state)
        rows = np.asarray(rows, dtype=np.int64).reshape(-1)
        missing = sorted(set(_FIELDS) - set(arrays))
        if missing:
            raise ValueError(f"`arrays` lacks {', '.join(missing)}")
        stored = len(arrays["kd"])
        if rows.size and (rows.min() < -1 or rows.max() >= stored):
            raise ValueError(f"`rows` must lie in [-1, {stored}), got {rows.min()}..{rows.max()}")
        if nodes is not None and len(nodes) != rows.size:
            raise ValueError(f"`nodes` must have one entry per row ({rows.size}), had {len(nodes)}")
        n_ch_state = int(state["n_channels"])
        n_ch = n_ch_state if n_channels is None else int(n_channels)

        have = rows >= 0
        same = {name for name, (kind, _) in _FIELDS.items() if kind != "c" or n_ch == n_ch_state}
        if have.all():
            # Every node has a row (the usual epoch): the arrays are built from the stored ones at once.
            # Filling new 1,000 x 256 arrays first and then overwriting them cost ~10 ms in page faults.
            identity = rows.size == stored and np.array_equal(rows, np.arange(stored))
            given = {name: (np.asarray(arrays[name]) if identity else np.asarray(arrays[name])[rows]).astype(float)
                     for name in same}  # astype copies: the model never shares the caller's arrays
            # (_allocate fills any array whose shape does not fit, e.g. after a noise window change)
            return cls(**params)._allocate(rows.size, n_channels=n_ch, given=given)._finish_restore(state)
        model = cls(**params)._allocate(rows.size, n_channels=n_ch)
        for name in same:
            value = np.asarray(arrays[name], dtype=float)
            target = getattr(model, name + "_")
            if value.shape[1:] != target.shape[1:]:
                continue  # the noise window changed: relearn the floor
            target[have] = value[rows[have]]
        for i in np.flatnonzero(~have):
            if nodes is not None and nodes[i] is not None:
                model._set_node(i, nodes[i], same_channels=n_ch == n_ch_state)
                model.pinned_[i] = nodes[i].get("pinned")
        return model._finish_restore(state)

    def _set_node(self, i, d, *, same_channels):
        """Row `i` of every per-node array from one :meth:`get_state` node dict."""
        for name, (kind, _) in _FIELDS.items():
            if kind == "c" and not same_channels:
                continue
            value = np.array(d[name], dtype=float)  # None -> NaN
            if kind == "w" and value.shape != self.noise_history_.shape[1:]:
                continue  # window length changed: relearn the floor
            getattr(self, name + "_")[i] = value

    def _finish_restore(self, state):
        self.noise_pos_ = np.mod(self.noise_pos_, int(self.noise_window))
        self.now_s_ = np.nan if state["now_s"] is None else float(state["now_s"])
        self.max_age_s_ = np.inf if state["max_age_s"] is None else float(state["max_age_s"])
        self._refresh()
        return self
