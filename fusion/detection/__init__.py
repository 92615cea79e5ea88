"""Numeric core of occfuse: energy detection, fusion rules, tracking (numpy and scipy only).

Submodules: :mod:`.energy` (single-node detector), :mod:`.rules` (``fuse`` and the rules),
:mod:`.system` (analytic system Pf/Pd and thresholds), :mod:`.performance` (system Pf/Pd of each
rule), :mod:`.tracking` (two-state Markov filter per channel), :mod:`.calibration` (reliability
curve and ECE), :mod:`.reliability` (per-node trust learning), :mod:`.channelizer` (per-channel
power from complex samples).
"""

from . import calibration, channelizer, energy, performance, reliability, rules, system, tracking

__all__ = ["calibration", "channelizer", "energy", "performance", "reliability", "rules", "system", "tracking"]
