"""Two-state hidden Markov filter per channel, with on/off rates learned online.

Each channel is free (0) or occupied (1) and switches between epochs with
``P(0 -> 1) = p_on`` and ``P(1 -> 0) = p_off``.  The filter turns this epoch's fused
posterior into the next epoch's prior, so evidence accumulates over epochs while the
chain forgets it at the rate the channel actually changes.
"""

from __future__ import annotations

import numpy as np

__all__ = ["MarkovTracker"]

# Posteriors of exactly 0 or 1 would make the likelihood ratio infinite.
_P_EPS = 1e-12
_LAG_KEYS = ("lag_pi", "lag_log_lr", "lag_seen")


def _logit(p):
    p = np.clip(p, _P_EPS, 1 - _P_EPS)
    return np.log(p) - np.log1p(-p)


def _likelihoods(log_lr):
    """(l0, l1) proportional to the evidence's likelihood under free and occupied."""
    # Scale both by exp(-max(L, 0)) so large evidence cannot overflow.
    return np.exp(-np.maximum(log_lr, 0.0)), np.exp(np.minimum(log_lr, 0.0))


def _joint(pi, on, off, l0, l1):
    """Normalised P(x_{t-1}, x_t | evidence) in the order 00, 01, 10, 11, one row per channel."""
    joint = np.stack([(1 - pi) * (1 - on) * l0, (1 - pi) * on * l1, pi * off * l0, pi * (1 - off) * l1], axis=1)
    return joint / joint.sum(axis=1, keepdims=True)


class MarkovTracker:
    """Forward filter of a two-state Markov chain per channel (Rabiner's alpha recursion).

    Parameters
    ----------
    n_channels : int
        Channels tracked.
    p_on, p_off : float
        Initial per-epoch switching probabilities, in (0, 1).
    pseudo_count : float
        Weight, in epochs, of the initial rates against the learned transition counts.
    learn : bool
        Learn ``p_on_`` and ``p_off_`` from the posteriors (expected transition counts).
    min_rate, max_rate : float
        Learned rates are kept in ``[min_rate, max_rate]`` so that the prior never
        locks at 0 or 1 and a channel can always be seen to change.
    lag : int
        Epochs of later evidence used before a transition is counted (fixed-lag
        smoothing).  Weak per-epoch evidence needs a longer lag; the cost is ``lag``
        vector operations per update and ``3 lag`` floats per channel of state.

    Attributes
    ----------
    prior_ : ndarray (n_channels,)
        P(occupied) predicted for the next epoch; pass it to ``fuse(prior=...)``.
    p_occupied_ : ndarray (n_channels,)
        Filtered P(occupied) after the last update.
    p_on_, p_off_ : ndarray (n_channels,)
        Current switching probabilities.
    counts_ : ndarray (n_channels, 4)
        Expected transition counts ``00, 01, 10, 11`` learned so far.
    n_updates_ : int

    Notes
    -----
    With ``pi`` the last posterior, the prediction is
    ``prior = pi (1 - p_off) + (1 - pi) p_on``.  An update takes the epoch's posterior
    ``p_obs``, computed with prior ``prior_used`` (by default ``prior_`` itself), turns it
    into a likelihood ratio ``LR = odds(p_obs) / odds(prior_used)`` and forms the joint
    posterior of (previous, current) state, which gives the new posterior.  The expected
    transition counts are summed ``lag`` epochs late: the pair (t-1, t) is counted once the
    evidence up to t + lag is in, through the backward factor ``beta_t`` (fixed-lag
    smoothing [2]_), an online form of Baum-Welch re-estimation [1]_.  Counting the pair at
    t alone biases the rates low, since a sticky filter reads a change as noise, and with
    weak evidence leaves them where they started.  A channel without evidence (``p_obs``
    NaN) keeps the predicted prior and adds no counts.

    References
    ----------
    .. [1] L. R. Rabiner, "A tutorial on hidden Markov models and selected applications in
       speech recognition," Proc. IEEE 77(2):257-286, 1989.
    .. [2] O. Cappé, E. Moulines, T. Rydén, *Inference in Hidden Markov Models*,
       Springer, 2005, ch. 3 (fixed-lag smoothing).

    Examples
    --------
    >>> tr = MarkovTracker(2, p_on=0.1, p_off=0.1)
    >>> tr.prior_.tolist()
    [0.5, 0.5]
    >>> [round(p, 3) for p in tr.update(np.array([0.9, np.nan])).prior_.tolist()]
    [0.82, 0.5]
    """

    def __init__(self, n_channels, *, p_on=0.05, p_off=0.05, pseudo_count=20.0, learn=True,
                 min_rate=1e-3, max_rate=0.5, lag=10):
        self.n_channels = n_channels
        self.lag = lag
        self.p_on = p_on
        self.p_off = p_off
        self.pseudo_count = pseudo_count
        self.learn = learn
        self.min_rate = min_rate
        self.max_rate = max_rate

    # -- state ----------------------------------------------------------------------------
    def _validate_params(self):
        if int(self.n_channels) != self.n_channels or self.n_channels < 1:
            raise ValueError(f"`n_channels` must be a positive integer, was {self.n_channels!r}")
        for name in ("p_on", "p_off"):
            v = getattr(self, name)
            if not 0 < v < 1:
                raise ValueError(f"`{name}` must lie in (0, 1), was {v!r}")
        if int(self.lag) != self.lag or self.lag < 1:
            raise ValueError(f"`lag` must be a positive integer, was {self.lag!r}")
        if not self.pseudo_count > 0:
            raise ValueError(f"`pseudo_count` must be positive, was {self.pseudo_count!r}")
        if not 0 < self.min_rate <= self.max_rate < 1:
            raise ValueError(
                f"`min_rate` and `max_rate` must satisfy 0 < min_rate <= max_rate < 1, "
                f"were {self.min_rate!r}, {self.max_rate!r}"
            )

    def _state(self):
        if not hasattr(self, "_st"):
            self._validate_params()
            c = int(self.n_channels)
            on, off = float(self.p_on), float(self.p_off)
            self._st = {
                # The stationary law of the initial chain, so the first prior is neutral.
                "p_occupied": np.full(c, on / (on + off)),
                "p_on": np.full(c, on),
                "p_off": np.full(c, off),
                "counts": np.zeros((c, 4)),
                "n_updates": np.array(0),
                # The last `lag` epochs' state before their update, their evidence (log LR) and
                # whether they had any, oldest first: the window of the fixed-lag count.
                "lag_pi": np.full((self.lag, c), on / (on + off)),
                "lag_log_lr": np.zeros((self.lag, c)),
                "lag_seen": np.zeros((self.lag, c)),
            }
        return self._st

    @property
    def p_occupied_(self):
        return self._state()["p_occupied"].copy()

    @property
    def p_on_(self):
        return self._state()["p_on"].copy()

    @property
    def p_off_(self):
        return self._state()["p_off"].copy()

    @property
    def counts_(self):
        return self._state()["counts"].copy()

    @property
    def n_updates_(self):
        return int(self._state()["n_updates"])

    @property
    def prior_(self):
        st = self._state()
        p = st["p_occupied"]
        return p * (1.0 - st["p_off"]) + (1.0 - p) * st["p_on"]

    def get_state(self):
        """The learned state as a dict of plain numpy arrays (for persistence)."""
        return {key: np.array(v, copy=True) for key, v in self._state().items()}

    def set_state(self, state):
        """Restore a state from :meth:`get_state`; returns self.

        Raises
        ------
        ValueError
            When a key is missing or an array has the wrong shape or range.
        """
        # Input validation
        current = self._state()
        # States saved before the lag-1 count existed restart that count from scratch.
        state = {**{k: current[k] for k in _LAG_KEYS}, **state}
        missing = set(current) - set(state)
        if missing:
            raise ValueError(f"`state` lacks {sorted(missing)}")
        new = {}
        for key, ref in current.items():
            arr = np.asarray(state[key], dtype=float)
            if arr.shape != ref.shape:
                raise ValueError(f"`state[{key!r}]` must have shape {ref.shape}, was {arr.shape}")
            if np.any(~np.isfinite(arr)) or (key not in ("n_updates", "lag_log_lr") and np.any(arr < 0)):
                raise ValueError(f"`state[{key!r}]` must be finite and non-negative")
            new[key] = arr
        for key in ("p_occupied", "p_on", "p_off", "lag_pi", "lag_seen"):
            if np.any(new[key] > 1):
                raise ValueError(f"`state[{key!r}]` must lie in [0, 1]")
        new["n_updates"] = np.array(int(new["n_updates"]))
        self._st = new
        return self

    # -- learning -------------------------------------------------------------------------
    def update(self, p_obs, *, prior_used=None):
        """Fold one epoch's fused posterior into the filter; returns self.

        Parameters
        ----------
        p_obs : array_like (n_channels,)
            Posterior P(occupied) of the epoch (``FusionResult.p_occupied``); NaN = no
            evidence for that channel.
        prior_used : array_like (n_channels,) or float, optional
            The prior ``p_obs`` was computed with.  Default: ``prior_``, i.e. the caller
            passed ``prior=tracker.prior_`` to ``fuse``.
        """
        # Input validation
        st = self._state()
        p_obs = np.asarray(p_obs, dtype=float)
        if p_obs.shape != (st["p_on"].size,):
            raise ValueError(f"`p_obs` must have shape ({st['p_on'].size},), was {p_obs.shape}")
        seen = ~np.isnan(p_obs)
        bad = seen & ~((p_obs >= 0) & (p_obs <= 1))
        if np.any(bad):
            raise ValueError(f"`p_obs` must lie in [0, 1] or be NaN, was {p_obs[bad].flat[0].item()!r}")
        prior_pred = self.prior_
        used = prior_pred if prior_used is None else np.broadcast_to(np.asarray(prior_used, dtype=float), p_obs.shape)
        if np.any(~((used > 0) & (used < 1))):
            raise ValueError("`prior_used` must lie in (0, 1)")

        log_lr = np.where(seen, _logit(np.where(seen, p_obs, 0.5)) - _logit(used), 0.0)
        l0, l1 = _likelihoods(log_lr)
        pi, on, off = st["p_occupied"], st["p_on"], st["p_off"]
        post = _joint(pi, on, off, l0, l1)
        post = post[:, 1] + post[:, 3]
        # Count the pair (t-L-1, t-L) only once L more epochs of evidence are in (fixed-lag
        # smoothing): counted at once, a change looks like noise to a sticky filter, which
        # then keeps rates that are too low (or wherever they started, with weak evidence).
        win_pi = np.vstack([st["lag_pi"], pi[None]])
        win_llr = np.vstack([st["lag_log_lr"], log_lr[None]])
        beta0, beta1 = np.ones_like(pi), np.ones_like(pi)
        for r in range(win_llr.shape[0] - 1, 0, -1):  # backward recursion, Rabiner (1989) eq. 25
            b0, b1 = _likelihoods(win_llr[r])
            beta0, beta1 = ((1 - on) * b0 * beta0 + on * b1 * beta1, off * b0 * beta0 + (1 - off) * b1 * beta1)
            scale = beta0 + beta1
            beta0, beta1 = beta0 / scale, beta1 / scale
        l0_old, l1_old = _likelihoods(win_llr[0])
        pair = _joint(win_pi[0], on, off, l0_old, l1_old) * np.stack([beta0, beta1, beta0, beta1], axis=1)
        pair /= pair.sum(axis=1, keepdims=True)
        counts = st["counts"] + np.where(st["lag_seen"][0][:, None] > 0, pair, 0.0)
        if self.learn:
            a = float(self.pseudo_count)
            on = (a * self.p_on + counts[:, 1]) / (a + counts[:, 0] + counts[:, 1])
            off = (a * self.p_off + counts[:, 2]) / (a + counts[:, 2] + counts[:, 3])
            on = np.clip(on, self.min_rate, self.max_rate)
            off = np.clip(off, self.min_rate, self.max_rate)
        st.update(p_occupied=np.where(seen, post, prior_pred), p_on=on, p_off=off, counts=counts,
                  n_updates=np.array(int(st["n_updates"]) + 1),
                  lag_pi=win_pi[1:], lag_log_lr=win_llr[1:],
                  lag_seen=np.vstack([st["lag_seen"][1:], seen[None].astype(float)]))
        return self
