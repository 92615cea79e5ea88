"""Numeric core of occfuse: energy detection, fusion rules, tracking (numpy and scipy only).

Submodules: :mod:`.energy` (single-node detector), :mod:`.rules` (``fuse`` and the rules),
:mod:`.system` (analytic system Pf/Pd and thresholds), :mod:`.tracking` (two-state Markov
filter per channel), :mod:`.calibration` (reliability curve and ECE).
"""
