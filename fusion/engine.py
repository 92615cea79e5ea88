"""One fusion epoch: read the fresh reports, build arrays, call the math, write decisions and what was learned.

``run_epoch(session, now, config)`` is a plain function: the scheduler calls it inside one transaction, the
tests call it directly with a chosen ``now``.
"""

from __future__ import annotations

import io
import math
import time
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any, Mapping

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from .detection import energy, rules
from .detection.reliability import ReliabilityModel
from .detection.tracking import MarkovTracker
from .models import Decision, Epoch, FusionState, Node, NodeReliability, Report, unpack
from .plan import current_plan
from .settings import get_settings, settings_dict

__all__ = ["EpochInputs", "EpochFusion", "gather", "fuse_epoch", "learn_epoch", "publish_states", "run_epoch"]


@dataclass
class EpochInputs:
    """The arrays of one epoch, one row per enabled node (also the silent ones)."""

    nodes: list[Node]
    power_dbm: np.ndarray  # (n_nodes, n_channels), NaN = no fresh measurement
    noise_dbm: np.ndarray  # (n_nodes, n_channels) as reported, NaN = not given
    n_samples: np.ndarray  # (n_nodes, n_channels) complex samples behind each value (pooled over the window)
    report_time_s: np.ndarray  # (n_nodes,) newest fresh report, POSIX seconds; NaN = none
    n_reports: int


def gather(session: Session, revision: int, n_channels: int, now: datetime, *, max_age_s: float,
           window_s: float, max_skew_s: float) -> EpochInputs:
    """Read each enabled node's fresh reports and pool those within `window_s` of its newest one.

    Pooling adds energies: with T = N P / noise per report, sum T over reports is Gamma(sum N, 1) under H0,
    so a pooled value is a mean power over the summed samples.
    """
    nodes = list(session.scalars(select(Node).where(Node.disabled.is_(False)).order_by(Node.id)))
    index = {node.id: i for i, node in enumerate(nodes)}
    shape = (len(nodes), n_channels)
    energy_sum = np.zeros(shape)  # sum of N * 10**(P/10) (linear, noise units cancel later)
    noise_lin = np.zeros(shape)  # sum of N * 10**(noise/10) where given
    noise_n = np.zeros(shape)
    n_sum = np.zeros(shape)
    newest = np.full(len(nodes), np.nan)
    stmt = (select(Report.node_id, Report.measured_at, Report.n_samples, Report.powers, Report.noise)
            .where(Report.plan_revision == revision, Report.measured_at >= now - timedelta(seconds=max_age_s),
                   Report.measured_at <= now + timedelta(seconds=max_skew_s))
            .order_by(Report.node_id, Report.measured_at.desc()))
    count = 0
    for node_id, measured_at, n, powers, noise in session.execute(stmt):
        i = index.get(node_id)
        if i is None:
            continue
        at = measured_at.timestamp()
        if math.isnan(newest[i]):
            newest[i] = at
        elif newest[i] - at > window_s:
            continue
        count += 1
        p = unpack(powers)
        seen = ~np.isnan(p)
        energy_sum[i, seen] += n * 10 ** (p[seen] / 10)
        n_sum[i, seen] += n
        if noise is not None:
            q = unpack(noise)
            given = ~np.isnan(q)
            noise_lin[i, given] += n * 10 ** (q[given] / 10)
            noise_n[i, given] += n
    with np.errstate(invalid="ignore", divide="ignore"):
        power = np.where(n_sum > 0, 10 * np.log10(energy_sum / np.where(n_sum > 0, n_sum, 1)), np.nan)
        noise = np.where(noise_n > 0, 10 * np.log10(noise_lin / np.where(noise_n > 0, noise_n, 1)), np.nan)
    return EpochInputs(nodes, power, noise, np.where(n_sum > 0, n_sum, 1.0), newest, count)


def publish_states(p_occupied: np.ndarray, n_reporting: np.ndarray, *, confidence: float,
                   min_nodes: int) -> np.ndarray:
    """free / occupied / unknown per channel. No evidence, too few nodes or too little confidence: unknown.

    ``free`` needs P(free) >= confidence *and* at least `min_nodes` fresh nodes; ``occupied`` needs
    P(occupied) >= confidence (calling a channel occupied on thin evidence is the safe error).
    """
    p = np.asarray(p_occupied, dtype=float)
    states = np.full(p.shape, "unknown", dtype=object)
    known = ~np.isnan(p)
    states[known & (p >= confidence)] = "occupied"
    states[known & (1 - p >= confidence) & (np.asarray(n_reporting) >= min_nodes)] = "free"
    return states


def _row_nanmedian(a: np.ndarray) -> np.ndarray:
    """Median of each row's non-NaN values; NaN for a row with none (without numpy's all-NaN warning)."""
    out = np.full(a.shape[0], np.nan)
    has = ~np.isnan(a).all(axis=1)
    if has.any():
        out[has] = np.nanmedian(a[has], axis=1)
    return out


def _load_state(session: Session, key: str) -> dict | None:
    row = session.get(FusionState, key)
    return row.value if row else None


def _save_state(session: Session, key: str, value: dict, blob: bytes | None = None) -> None:
    row = session.get(FusionState, key)
    if row is None:
        session.add(FusionState(key=key, value=value, blob=blob))
    else:
        row.value, row.blob = value, blob


def _pack_nodes(node_ids: list[int], arrays: dict[str, np.ndarray]) -> bytes:
    """The learner's per-node arrays and the node id of each row, as one numpy .npz."""
    buf = io.BytesIO()
    np.savez(buf, node_id=np.asarray(node_ids, dtype=np.int64), **arrays)
    return buf.getvalue()


def _unpack_nodes(blob: bytes | None) -> dict[int, dict[str, np.ndarray]]:
    """node id -> that node's row of every array, from :func:`_pack_nodes` output (empty for None)."""
    if not blob:
        return {}
    with np.load(io.BytesIO(blob), allow_pickle=False) as z:
        arrays = {name: z[name] for name in z.files}
    ids = arrays.pop("node_id")
    return {int(node_id): {name: a[i] for name, a in arrays.items()} for i, node_id in enumerate(ids)}


def _json_arrays(state: dict) -> dict:
    return {k: np.asarray(v).tolist() for k, v in state.items()}


def _reliability(session: Session, nodes: list[Node], revision: int, n_channels: int):
    rows = {r.node_id: r for r in session.scalars(select(NodeReliability).where(
        NodeReliability.node_id.in_([n.id for n in nodes])))}
    for node in nodes:
        if node.id not in rows:
            rows[node.id] = NodeReliability(node_id=node.id, flags=[], state={})
            session.add(rows[node.id])
    stored = session.get(FusionState, "reliability")
    if stored is None:
        model = ReliabilityModel().resize(len(nodes), n_channels=n_channels)
    else:
        glob = stored.value
        same_plan = glob.get("revision") == revision
        packed = _unpack_nodes(stored.blob)
        # Packed arrays first; per-node JSON is what databases written before migration 0003 hold.
        model = ReliabilityModel.from_state(
            glob["model"], nodes=[packed.get(n.id) or rows[n.id].state.get("model") for n in nodes],
            n_channels=None if same_plan and glob["model"]["n_channels"] == n_channels else n_channels)
    return model, rows


@dataclass
class EpochFusion:
    """What :func:`fuse_epoch` made of one epoch's inputs (nothing here touches the database)."""

    t: np.ndarray  # (n_nodes, n_channels) normalised energies, NaN = no fresh report
    reported_noise: np.ndarray  # (n_nodes,) each node's own noise figure (median over channels), NaN = none
    pins: np.ndarray  # (n_nodes,) of "trusted" / "excluded" / None
    prior: np.ndarray  # (n_channels,) P(occupied) the rule started from
    result: rules.FusionResult
    states: np.ndarray  # (n_channels,) of "free" / "occupied" / "unknown"


def fuse_epoch(x: EpochInputs, model: ReliabilityModel | None, pins, tracker: MarkovTracker, *, rule: str,
               k: int | None, target_pf: float, snr_db: float, prior: float, confidence: float,
               min_nodes: int) -> EpochFusion:
    """Normalise, fuse, publish and filter one epoch: the pure middle of :func:`run_epoch`.

    `model` is the reliability learner sized to ``x.nodes`` (None when there are no nodes); `tracker` is
    advanced by this epoch's posteriors.  `replay` runs this with other rules over stored reports.
    """
    n_nodes, n_ch = len(x.nodes), x.power_dbm.shape[1]
    pins = np.array(list(pins), dtype=object) if n_nodes else np.array([], dtype=object)
    if n_nodes:
        # Noise: the report's own figure, else the node's learned floor (also replacing a drifting figure).
        reported = _row_nanmedian(x.noise_dbm)  # the node's own figure, one per node
        floor = model.noise_for(reported)
        replaced = ~(floor == reported)
        noise = np.where(np.isnan(x.noise_dbm) | replaced[:, None], floor[:, None], x.noise_dbm)
        t = energy.normalise(x.power_dbm, noise, x.n_samples)
        node_trust = np.where(pins == "trusted", 1.0, np.where(pins == "excluded", 0.0, model.trust_))
        t[~np.isfinite(t)] = np.nan
    else:
        reported = np.zeros(0)
        t = np.full((0, n_ch), np.nan)

    # The configured prior until the tracker has seen an epoch, then its one-step prediction.
    prior_v = np.full(n_ch, prior) if tracker.n_updates_ == 0 else np.clip(tracker.prior_, 1e-6, 1 - 1e-6)
    design_snr = 10 ** (snr_db / 10)
    rows_needed = max(n_nodes, k or 1, 1)  # rules need k <= rows; absent nodes are rows of NaN
    t_in = np.vstack([t, np.full((rows_needed - n_nodes, n_ch), np.nan)])
    if n_nodes:
        # Nodes pinned excluded or judged suspect (trust 0) count for no rule. The learner still sees their
        # reports (learn_epoch), so a node that mends its ways can earn its trust back; the reports stay stored.
        t_in[:n_nodes][node_trust <= 0.0, :] = np.nan
    n_in = np.vstack([x.n_samples, np.ones((rows_needed - n_nodes, n_ch))])
    snr = np.full(t_in.shape, design_snr)
    trust = np.ones(rows_needed)
    if n_nodes:
        snr[:n_nodes] = model.snr_filled(design_snr)
        trust[:n_nodes] = np.clip(node_trust, 0.0, 1.0)
    result = rules.fuse(t_in, n_in, rule=rule, target_pf=target_pf, k=k if rule == "k_of_n" else None,
                        snr=snr, trust=trust, prior=prior_v)
    states = publish_states(result.p_occupied, result.n_reporting, confidence=confidence, min_nodes=min_nodes)
    tracker.update(result.p_occupied, prior_used=prior_v)
    return EpochFusion(t, reported, pins, prior_v, result, states)


def learn_epoch(model: ReliabilityModel, x: EpochInputs, fused: EpochFusion, *, now_s: float,
                max_age_s: float) -> ReliabilityModel:
    """Update the reliability learner from one fused epoch (no database)."""
    # Labels come from the posterior with each node's own contribution removed (leave-one-out inside the
    # model); also requiring the published state was measured to bias every node's Pf low.
    return model.update(t=fused.t, n_samples=x.n_samples, report_time_s=x.report_time_s, now_s=now_s,
                        max_age_s=max_age_s, p_occupied=fused.result.p_occupied, power_dbm=x.power_dbm,
                        noise_dbm_reported=fused.reported_noise, pinned=list(fused.pins))


def run_epoch(session: Session, now: datetime, config: Mapping[str, Any]) -> Epoch | None:
    """Fuse the fresh reports as of `now` and write one decision per plan channel; return the epoch."""
    started = time.perf_counter()
    fs = get_settings(session, config)
    params = settings_dict(fs)
    plan = current_plan(session)
    if plan is None or not plan.channels:
        return None
    ids = [c.channel_id for c in plan.channels]
    x = gather(session, plan.revision, len(ids), now, max_age_s=fs.max_age_s, window_s=fs.window_s,
               max_skew_s=config["MAX_SKEW_S"])
    n_nodes = len(x.nodes)
    model, rel_rows = _reliability(session, x.nodes, plan.revision, len(ids)) if n_nodes else (None, {})
    pins = [rel_rows[n.id].pinned for n in x.nodes]

    tracker = MarkovTracker(len(ids))
    saved = _load_state(session, "tracker")
    if saved and saved.get("revision") == plan.revision:
        tracker.set_state(saved["state"])
    fused = fuse_epoch(x, model, pins, tracker, rule=fs.rule, k=fs.k, target_pf=fs.target_pf, snr_db=fs.snr_db,
                       prior=fs.prior, confidence=fs.confidence, min_nodes=fs.min_nodes)
    result, states = fused.result, fused.states
    p = result.p_occupied
    _save_state(session, "tracker", {"revision": plan.revision, "state": _json_arrays(tracker.get_state())})

    if n_nodes:
        learn_epoch(model, x, fused, now_s=now.timestamp(), max_age_s=fs.max_age_s)
        for i, node in enumerate(x.nodes):
            row = rel_rows[node.id]
            a_d, b_d = model.prior_pd
            a_f, b_f = model.prior_pf
            row.pd_a, row.pd_b = float(a_d + model.kd_[i]), float(b_d + model.nd_[i] - model.kd_[i])
            row.pf_a, row.pf_b = float(a_f + model.kf_[i]), float(b_f + model.nf_[i] - model.kf_[i])
            row.noise_dbm = None if np.isnan(model.noise_dbm_[i]) else float(model.noise_dbm_[i])
            row.trust = float(model.trust_[i])
            row.flags = list(model.flags_[i])
            if row.state:
                row.state = {}  # the learner state now lives packed in fusion_state (see _pack_nodes)
            row.updated_at = now
        _save_state(session, "reliability", {"revision": plan.revision, "model": model.get_state(include_nodes=False)},
                    blob=_pack_nodes([n.id for n in x.nodes], model.node_arrays()))

    epoch = Epoch(started_at=now, duration_s=0.0, plan_revision=plan.revision, rule=fs.rule, params=params,
                  n_reports=x.n_reports)
    session.add(epoch)
    session.flush()
    stat = result.statistic
    session.add_all([
        Decision(epoch_id=epoch.id, channel_id=cid, decided_at=now, state=str(states[j]),
                 p_occupied=None if np.isnan(p[j]) else float(p[j]), nodes=int(result.n_reporting[j]),
                 rule=fs.rule, statistic=None if not np.isfinite(stat[j]) else float(stat[j]))
        for j, cid in enumerate(ids)])
    epoch.duration_s = time.perf_counter() - started
    return epoch
