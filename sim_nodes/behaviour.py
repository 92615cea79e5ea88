"""How a simulated node departs from an honest sensor.

Each behaviour is a small object the network asks three things per measurement:

- ``reporting(t)``: does the node send anything at time ``t`` (False during silent spells);
- ``noise_offset_db(t)``: how far its *true* noise floor has moved from the one it reports
  (noise drift: its receiver warms up, its reported ``noise_dbm`` stays at calibration);
- ``transform(t, power_mw, noise_mw, n_samples, rng)``: the powers it reports, given the
  honest measurement (stuck nodes repeat an old sweep, falsifiers invent one).

Kinds (``kind`` in the scenario's node table):

============  ==============================================================================
honest        reports what it measures
silent        alternates active / silent spells, exponential with ``mean_active_s`` and
              ``mean_silent_s``
stuck         from ``after_s`` on, repeats its last sweep before that instant forever
drift         from ``after_s`` on, its true noise floor rises by ``rate_db_per_min`` (up to
              ``max_db``) while it keeps reporting the calibrated floor
falsify       from ``after_s`` on, reports ``mode`` = ``free`` (a noise-only draw),
              ``occupied`` (noise plus a signal ``fake_snr_db`` above it) or ``random``
              (one of the two per channel and sweep, evenly)
============  ==============================================================================
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from sim_nodes.activity import Timeline, markov_timeline

__all__ = ["BEHAVIOURS", "Behaviour", "make_behaviour"]

BEHAVIOURS = {"honest", "silent", "stuck", "drift", "falsify"}
_FALSIFY = {"free", "occupied", "random"}


@dataclass
class Behaviour:
    """A node's behaviour; build it with :func:`make_behaviour`."""

    kind: str = "honest"
    after_s: float = 0.0
    silent: Timeline | None = None  # True while silent
    rate_db_per_min: float = 0.0
    max_db: float = 20.0
    mode: str = "free"
    fake_snr_db: float = 10.0
    _frozen: np.ndarray | None = field(default=None, repr=False)

    def reporting(self, t):
        """Whether the node reports at time ``t`` (s)."""
        return not (self.kind == "silent" and bool(self.silent.state_at(t)))

    def noise_offset_db(self, t):
        """Rise of the node's true noise floor above its calibrated one at ``t``, dB."""
        if self.kind != "drift" or t < self.after_s:
            return 0.0
        return min(self.max_db, self.rate_db_per_min * (t - self.after_s) / 60.0)

    def transform(self, t, power_mw, noise_mw, n_samples, rng):
        """Reported per-channel powers (mW) given the honest ones at time ``t``."""
        power_mw = np.asarray(power_mw, dtype=float)
        if self.kind == "stuck":
            if t < self.after_s or self._frozen is None:
                self._frozen = power_mw.copy()
            return self._frozen.copy()
        if self.kind != "falsify" or t < self.after_s:
            return power_mw
        # A plausible lie: a genuine noise draw, Gamma(N, 1) / N times the floor, with a
        # Gaussian signal's (1 + snr) scale where it claims a signal (the Gaussian-signal law of the energy statistic).
        fake = np.full(power_mw.shape, self.mode == "occupied")
        if self.mode == "random":
            fake = rng.random(power_mw.shape) < 0.5
        scale = np.where(fake, 1.0 + 10.0 ** (self.fake_snr_db / 10.0), 1.0)
        return noise_mw * scale * rng.gamma(n_samples, 1.0, power_mw.shape) / n_samples


def make_behaviour(spec, horizon_s, rng=None):
    """A :class:`Behaviour` from a scenario table (``{"kind": ..., ...}``) or a kind name.

    Parameters
    ----------
    spec : str or mapping
    horizon_s : float
        Simulated duration, s (for silent spells).
    rng : seed or Generator, optional
    """
    # Input validation
    spec = {"kind": spec} if isinstance(spec, str) else dict(spec)
    kind = spec.pop("kind", "honest")
    if kind not in BEHAVIOURS:
        raise ValueError(f"behaviour `kind` must be one of {sorted(BEHAVIOURS)}, was {kind!r}")
    allowed = {
        "honest": set(),
        "silent": {"mean_active_s", "mean_silent_s"},
        "stuck": {"after_s"},
        "drift": {"after_s", "rate_db_per_min", "max_db"},
        "falsify": {"after_s", "mode", "fake_snr_db"},
    }[kind]
    unknown = set(spec) - allowed
    if unknown:
        raise ValueError(f"behaviour {kind!r} takes {sorted(allowed) or 'no options'}, got {sorted(unknown)}")
    if kind == "falsify" and spec.get("mode", "free") not in _FALSIFY:
        raise ValueError(f"falsify `mode` must be one of {sorted(_FALSIFY)}, was {spec['mode']!r}")

    rng = np.random.default_rng(rng)
    if kind == "silent":
        # The timeline's "on" state is the silent spell.
        silent = markov_timeline(
            float(spec.get("mean_silent_s", 10.0)), float(spec.get("mean_active_s", 30.0)), horizon_s, rng
        )
        return Behaviour(kind="silent", silent=silent)
    return Behaviour(kind=kind, **{k: (v if k == "mode" else float(v)) for k, v in spec.items()})
