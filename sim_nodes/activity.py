"""Transmitter activity: when each simulated transmitter is on.

Two models:

- ``markov``: a continuous-time two-state Markov chain; on and off holding times are
  exponential with means ``mean_on_s`` and ``mean_off_s``, so the long-run duty cycle is
  ``mean_on / (mean_on + mean_off)`` (the standard alternating renewal process).
- ``schedule``: fixed ``[start_s, end_s)`` on-intervals.

Both produce a :class:`Timeline` over ``[0, horizon)``: the instants at which the state
changes, which the network samples and the ground-truth log writes out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Timeline", "markov_timeline", "schedule_timeline"]


@dataclass(frozen=True)
class Timeline:
    """Piecewise-constant on/off state over ``[0, horizon)``.

    Attributes
    ----------
    times : ndarray, shape (n,)
        Instants (s) at which a state begins; ``times[0] == 0``, increasing.
    states : ndarray of bool, shape (n,)
        The state that begins at each instant; consecutive states differ.
    horizon : float
    """

    times: np.ndarray
    states: np.ndarray
    horizon: float

    def state_at(self, t):
        """On/off state at time(s) ``t`` (s); times past the horizon keep the last state."""
        t = np.asarray(t, dtype=float)
        idx = np.searchsorted(self.times, t, side="right") - 1
        return self.states[np.clip(idx, 0, None)]

    def on_time(self, until=None):
        """Seconds spent on within ``[0, until)`` (default the horizon)."""
        until = self.horizon if until is None else until
        edges = np.append(np.minimum(self.times, until), until)
        return float(np.sum(np.diff(edges)[self.states]))


def _merge(times, states, horizon):
    # Drop repeated states so consecutive entries always differ.
    times, states = np.asarray(times, float), np.asarray(states, bool)
    keep = np.ones(len(states), bool)
    keep[1:] = states[1:] != states[:-1]
    return Timeline(times[keep], states[keep], float(horizon))


def markov_timeline(mean_on_s, mean_off_s, horizon_s, rng=None, *, start_on=None):
    """Alternating exponential on/off holding times up to ``horizon_s``.

    Parameters
    ----------
    mean_on_s, mean_off_s : float
        Mean holding times, s (positive).
    horizon_s : float
        Length of the timeline, s.
    rng : seed or Generator, optional
    start_on : bool, optional
        Initial state; default drawn from the stationary law ``P(on) = on / (on + off)``, so
        the process is stationary from ``t = 0`` (memorylessness makes the residual holding
        time exponential too).
    """
    # Input validation
    if not mean_on_s > 0:
        raise ValueError(f"`mean_on_s` must be positive, was {mean_on_s!r}")
    if not mean_off_s > 0:
        raise ValueError(f"`mean_off_s` must be positive, was {mean_off_s!r}")
    if not horizon_s > 0:
        raise ValueError(f"`horizon_s` must be positive, was {horizon_s!r}")

    rng = np.random.default_rng(rng)
    state = bool(rng.random() < mean_on_s / (mean_on_s + mean_off_s)) if start_on is None else bool(start_on)
    times, states, t = [0.0], [state], 0.0
    while True:
        t += rng.exponential(mean_on_s if state else mean_off_s)
        if t >= horizon_s:
            break
        state = not state
        times.append(t)
        states.append(state)
    return _merge(times, states, horizon_s)


def schedule_timeline(intervals, horizon_s):
    """Timeline that is on inside each ``[start_s, end_s)`` of ``intervals``.

    Examples
    --------
    >>> tl = schedule_timeline([(5, 10), (20, 30)], 60)
    >>> tl.times.tolist(), tl.states.tolist()
    ([0.0, 5.0, 10.0, 20.0, 30.0], [False, True, False, True, False])
    """
    # Input validation
    iv = sorted((float(a), float(b)) for a, b in intervals)
    for a, b in iv:
        if not 0 <= a < b:
            raise ValueError(f"schedule intervals must satisfy 0 <= start < end, was [{a}, {b})")
    for (_, b0), (a1, _) in zip(iv, iv[1:]):
        if a1 < b0:
            raise ValueError(f"schedule intervals must not overlap, [{a1}, ...) starts before {b0}")

    times, states = [0.0], [False]
    for a, b in iv:
        if a >= horizon_s:
            break
        times += [a, b] if b < horizon_s else [a]
        states += [True, False] if b < horizon_s else [True]
    if len(times) > 1 and times[1] == 0.0:
        times, states = times[1:], states[1:]
    return _merge(times, states, horizon_s)
