"""A simulated sensing network that drives the real occfuse service over HTTP.

Modules: :mod:`~sim_nodes.scenario` (TOML files), :mod:`~sim_nodes.propagation`,
:mod:`~sim_nodes.activity` (transmitters on/off), :mod:`~sim_nodes.behaviour` (node faults),
:mod:`~sim_nodes.network` (measurements, fast or IQ-level), :mod:`~sim_nodes.client` (drives
a live service), :mod:`~sim_nodes.truth` (ground-truth log and scoring), :mod:`~sim_nodes.evaluate`
(Monte Carlo and analytic evaluation of the fusion rules; `occfuse evaluate`).
"""

__all__ = ["DEMO_SCENARIO", "load_scenario", "run_scenario", "load_truth"]

from sim_nodes.client import run_scenario
from sim_nodes.scenario import DEMO_SCENARIO, load_scenario
from sim_nodes.truth import load_truth
