"""Scenario files: the band plan, the site, the nodes and the transmitters, in TOML.

A scenario file looks like this (every key but the channels, nodes and transmitters has a
default; ``sim_nodes/scenarios/demo.toml`` is a complete example)::

    name = "Example site"
    [area]                       # metres, local x/y
    width_m = 2000.0
    height_m = 2000.0
    [propagation]
    model = "log_distance"       # or "free_space"
    exponent = 3.0               # log-distance n
    reference_m = 1.0            # d0, free space up to here
    shadowing_db = 6.0           # sigma of log-normal shadowing
    decorrelation_m = 150.0      # Gudmundson d_c (1/e distance)
    fading = "rayleigh"          # "none", "rayleigh" or "nakagami"
    nakagami_m = 2.0
    noise_uncertainty_db = 0.5   # true floor within +-x dB of the calibrated one (uniform)
    signal = "gaussian"          # transmitted waveform law: "gaussian" (noise-like) or "ofdm"
    [measurement]
    mode = "fast"                # "fast" (exact statistic) or "iq" (synthesised samples)
    oversample = 1.25            # IQ mode: sample rate = next channel multiple over span * this
    [node_defaults]
    noise_figure_db = 7.0
    n_samples = 1000             # complex samples per channel and measurement
    interval_s = 1.0
    gain_dbi = 0.0
    [[channel]]
    id = "A1"; center_hz = 600.0e6; bandwidth_hz = 200.0e3
    [[node]]
    name = "north-mast"; x_m = 100.0; y_m = 250.0
    behaviour = { kind = "drift", after_s = 20.0, rate_db_per_min = 3.0 }
    [[transmitter]]
    name = "relay-1"; x_m = 900.0; y_m = 800.0; eirp_dbm = 10.0; channels = ["A1"]
    activity = { kind = "markov", mean_on_s = 30.0, mean_off_s = 40.0 }
    # or: activity = { kind = "schedule", on = [[0.0, 15.0], [40.0, 60.0]] }

The channel plan uses the same ``[[channel]]`` tables as the service's plan files.
"""

from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from sim_nodes.behaviour import BEHAVIOURS

__all__ = [
    "DEMO_SCENARIO",
    "SCENARIO_DIR",
    "Channel",
    "Propagation",
    "Measurement",
    "NodeSpec",
    "TransmitterSpec",
    "Scenario",
    "load_scenario",
    "parse_scenario",
]

SCENARIO_DIR = Path(__file__).resolve().parent / "scenarios"
DEMO_SCENARIO = SCENARIO_DIR / "demo.toml"

_NAME = re.compile(r"^[A-Za-z0-9_.-]{1,64}$")  # the service's node-name rule


@dataclass(frozen=True)
class Channel:
    id: str
    center_hz: float
    bandwidth_hz: float


@dataclass(frozen=True)
class Propagation:
    model: str = "log_distance"
    exponent: float = 3.0
    reference_m: float = 1.0
    shadowing_db: float = 6.0
    decorrelation_m: float = 150.0
    fading: str = "rayleigh"
    nakagami_m: float = 2.0
    noise_uncertainty_db: float = 0.0
    signal: str = "gaussian"


@dataclass(frozen=True)
class Measurement:
    mode: str = "fast"
    oversample: float = 1.25


@dataclass(frozen=True)
class NodeSpec:
    name: str
    x_m: float
    y_m: float
    noise_figure_db: float = 7.0
    n_samples: int = 1000
    interval_s: float = 1.0
    gain_dbi: float = 0.0
    behaviour: dict = field(default_factory=lambda: {"kind": "honest"})


@dataclass(frozen=True)
class TransmitterSpec:
    name: str
    x_m: float
    y_m: float
    eirp_dbm: float
    channels: tuple[str, ...]
    activity: dict


@dataclass(frozen=True)
class Scenario:
    name: str
    channels: tuple[Channel, ...]
    nodes: tuple[NodeSpec, ...]
    transmitters: tuple[TransmitterSpec, ...]
    propagation: Propagation = Propagation()
    measurement: Measurement = Measurement()
    width_m: float = 1000.0
    height_m: float = 1000.0
    description: str = ""

    @property
    def channel_ids(self):
        return [c.id for c in self.channels]

    def plan_json(self):
        """The band plan as the body of ``PUT /api/v1/plan``."""
        return {"channels": [{"id": c.id, "center_hz": c.center_hz, "bandwidth_hz": c.bandwidth_hz}
                             for c in self.channels]}


def _take(table, cls, where, **fixed):
    known = set(cls.__dataclass_fields__) - set(fixed)
    unknown = set(table) - known
    if unknown:
        raise ValueError(f"{where}: unknown keys {sorted(unknown)}; known are {sorted(known)}")
    try:
        return cls(**table, **fixed)
    except TypeError as exc:  # a missing required key
        raise ValueError(f"{where}: {exc}") from None


def parse_scenario(data, *, source="scenario"):
    """A :class:`Scenario` from an already-parsed TOML mapping; ValueError names the bad key."""
    data = dict(data)
    area = data.pop("area", {})
    prop = _take(data.pop("propagation", {}), Propagation, f"{source} [propagation]")
    meas = _take(data.pop("measurement", {}), Measurement, f"{source} [measurement]")
    defaults = data.pop("node_defaults", {})
    channels = tuple(_take(c, Channel, f"{source} [[channel]] #{i}") for i, c in enumerate(data.pop("channel", [])))
    nodes = []
    for i, n in enumerate(data.pop("node", [])):
        n = {**defaults, **n}
        if isinstance(n.get("behaviour"), str):
            n["behaviour"] = {"kind": n["behaviour"]}
        nodes.append(_take(n, NodeSpec, f"{source} [[node]] #{i}"))
    txs = []
    for i, t in enumerate(data.pop("transmitter", [])):
        t = dict(t)
        t["channels"] = tuple(t.get("channels", ()))
        txs.append(_take(t, TransmitterSpec, f"{source} [[transmitter]] #{i}"))
    name = data.pop("name", Path(str(source)).stem)
    description = data.pop("description", "")
    if data:
        raise ValueError(f"{source}: unknown top-level keys {sorted(data)}")
    sc = Scenario(name=name, description=description, channels=channels, nodes=tuple(nodes),
                  transmitters=tuple(txs), propagation=prop, measurement=meas,
                  width_m=float(area.get("width_m", 1000.0)), height_m=float(area.get("height_m", 1000.0)))
    _validate(sc, source)
    return sc


def _validate(sc, where):
    if not sc.channels:
        raise ValueError(f"{where}: needs at least one [[channel]]")
    ids = sc.channel_ids
    if len(set(ids)) != len(ids):
        raise ValueError(f"{where}: channel ids must be unique, were {ids}")
    for c in sc.channels:
        if not c.bandwidth_hz > 0 or not c.center_hz > 0:
            raise ValueError(f"{where}: channel {c.id!r} needs positive center_hz and bandwidth_hz")
    names = [n.name for n in sc.nodes]
    if len(set(names)) != len(names):
        raise ValueError(f"{where}: node names must be unique, were {names}")
    for n in sc.nodes:
        if not _NAME.match(n.name):
            raise ValueError(f"{where}: node name {n.name!r} must be 1-64 characters of [A-Za-z0-9_.-]")
        if int(n.n_samples) != n.n_samples or n.n_samples < 1:
            raise ValueError(f"{where}: node {n.name!r} `n_samples` must be a positive integer")
        if not n.interval_s > 0:
            raise ValueError(f"{where}: node {n.name!r} `interval_s` must be positive")
        if n.behaviour.get("kind", "honest") not in BEHAVIOURS:
            raise ValueError(f"{where}: node {n.name!r} behaviour kind must be one of {sorted(BEHAVIOURS)}")
    for t in sc.transmitters:
        bad = set(t.channels) - set(ids)
        if bad or not t.channels:
            raise ValueError(f"{where}: transmitter {t.name!r} names unknown channels {sorted(bad)} (or none)")
        kind = t.activity.get("kind")
        if kind not in {"markov", "schedule"}:
            raise ValueError(f"{where}: transmitter {t.name!r} activity kind must be 'markov' or 'schedule'")
    p = sc.propagation
    if p.model not in {"free_space", "log_distance"}:
        raise ValueError(f"{where}: propagation model must be 'free_space' or 'log_distance', was {p.model!r}")
    if p.fading not in {"none", "rayleigh", "nakagami"}:
        raise ValueError(f"{where}: fading must be 'none', 'rayleigh' or 'nakagami', was {p.fading!r}")
    if p.signal not in {"gaussian", "ofdm"}:
        raise ValueError(f"{where}: signal must be 'gaussian' or 'ofdm', was {p.signal!r}")
    if sc.measurement.mode not in {"fast", "iq"}:
        raise ValueError(f"{where}: measurement mode must be 'fast' or 'iq', was {sc.measurement.mode!r}")


def load_scenario(path):
    """Read a scenario TOML file (a path, or the name of a file in ``sim_nodes/scenarios``)."""
    p = Path(path)
    if not p.exists() and (SCENARIO_DIR / f"{p.name}.toml").exists():
        p = SCENARIO_DIR / f"{p.name}.toml"
    with open(p, "rb") as fh:
        data = tomllib.load(fh)
    return parse_scenario(data, source=str(p))
