"""One fusion epoch: read the fresh reports, build arrays, call the math, write decisions and what was learned.

``run_epoch(session, now, config)`` is a plain function: the scheduler calls it inside one transaction, the
tests call it directly with a chosen ``now``.
"""

from __future__ import annotations

import io
import time
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any, Mapping

import numpy as np
from sqlalchemy import String, bindparam, cast, insert, select, type_coerce, update
from sqlalchemy.orm import Session

from .detection import energy, rules
from .detection.reliability import ReliabilityModel
from .detection.tracking import MarkovTracker
from .models import Decision, Epoch, FusionState, Node, NodeReliability, Report
from .plan import current_plan, newest_revision
from .settings import get_settings, settings_dict

__all__ = ["EpochInputs", "EpochFusion", "PreparedEpoch", "gather", "fuse_epoch", "learn_epoch", "publish_states",
           "epoch_basis", "prepare_epoch", "write_epoch", "run_epoch"]


@dataclass
class EpochInputs:
    """The arrays of one epoch, one row per enabled node (also the silent ones)."""

    nodes: list  # rows with the node's ``id``, in id order
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
    # Core rows (they have ``.id`` like a Node): loading 1,000 ORM objects cost ~10 ms of an epoch.
    nodes = session.execute(select(Node.id).where(Node.disabled.is_(False)).order_by(Node.id)).all()
    index = {node.id: i for i, node in enumerate(nodes)}
    shape = (len(nodes), n_channels)
    power = np.full(shape, np.nan)
    noise = np.full(shape, np.nan)
    n_total = np.ones(shape)  # 1 where a node has no measurement (NaN power), as the rules expect
    newest = np.full(len(nodes), np.nan)
    # No ORDER BY: SQLite sorted the whole rows, packed powers included, in a temporary B-tree (half the
    # query's time); the rows are put in order below, by numpy.
    as_text = session.get_bind().dialect.name == "sqlite"
    stmt = (select(Report.node_id, type_coerce(Report.measured_at, String) if as_text else Report.measured_at,
                   Report.n_samples, Report.powers, Report.noise)
            .where(Report.plan_revision == revision, Report.measured_at >= now - timedelta(seconds=max_age_s),
                   Report.measured_at <= now + timedelta(seconds=max_skew_s)))
    rows = session.execute(stmt).all()
    row_node = np.array([index.get(r[0], -1) for r in rows], dtype=np.int64)
    at = _posix_seconds([r[1] for r in rows], as_text=as_text)
    order = np.lexsort((-at, row_node))  # by node (as `nodes`), newest first within a node
    rows, row_node, at = [rows[i] for i in order.tolist()], row_node[order], at[order]
    # A node's first row is its newest.
    known = row_node >= 0
    np.fmax.at(newest, row_node[known], at[known])
    keep = known.copy()
    keep[known] = at[known] >= newest[row_node[known]] - window_s
    kept = [r for r, k in zip(rows, keep) if k]
    if kept:
        idx = row_node[keep]
        n = np.array([r[2] for r in kept], dtype=float)[:, None]
        p = _unpack_rows([r[3] for r in kept], n_channels)
        q = _unpack_rows([r[4] for r in kept], n_channels)
        starts = np.flatnonzero(np.r_[True, idx[1:] != idx[:-1]])  # idx is sorted: one run of rows per node
        at_node = idx[starts]
        if len(starts) == len(idx):  # one report per node (the usual case): nothing to pool
            power[idx], noise[idx] = p, q
            n_total[idx] = np.where(np.isnan(p), 1.0, n)
        else:
            power[at_node], n_total[at_node] = _pool(p, n, starts)
            noise[at_node], _ = _pool(q, n, starts)
    return EpochInputs(nodes, power, noise, n_total, newest, len(kept))


def _posix_seconds(values: list, *, as_text: bool) -> np.ndarray:
    """POSIX seconds of report times given as datetimes, or as the text SQLite stores (``as_text``).

    SQLAlchemy stores a UTC time on SQLite as naive ISO text, 'YYYY-MM-DD HH:MM:SS.ffffff'; numpy parses a
    whole column of it at once, where the DateTime type's per-row regex and datetime objects cost ~10 ms
    for the 3,000 fresh rows of 1,000 nodes. Microseconds / 1e6, as datetime.timestamp() computes it.
    """
    if as_text:
        return np.array(values, dtype="datetime64[us]").astype(np.int64) / 1e6
    return np.array([v.timestamp() for v in values], dtype=float)


def _pool(db: np.ndarray, n: np.ndarray, starts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sample-weighted mean power (dB) and summed samples of each run of rows beginning at `starts`.

    NaN values are left out of both; a run with none gives NaN and 1 sample.
    """
    seen = ~np.isnan(db)
    weight = np.where(seen, n, 0.0)
    energy = np.add.reduceat(np.where(seen, n * 10 ** (db / 10), 0.0), starts, axis=0)
    total = np.add.reduceat(weight, starts, axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(total > 0, 10 * np.log10(energy / np.where(total > 0, total, 1)), np.nan)
    return mean, np.where(total > 0, total, 1.0)


def _unpack_rows(blobs: list[bytes | None], n_channels: int) -> np.ndarray:
    """(len(blobs), n_channels) float64 from packed float32 rows; a None row (no noise given) is all NaN."""
    out = np.full((len(blobs), n_channels), np.nan)
    width = 4 * n_channels
    full = [i for i, b in enumerate(blobs) if b is not None and len(b) == width]
    if full:
        out[full] = np.frombuffer(b"".join(blobs[i] for i in full), dtype="<f4").reshape(len(full), n_channels)
    return out


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
        # A report's noise is usually one figure for every channel: where a row's values are all equal that
        # figure is the median (np.nanmedian cost ~5 ms at 1,000 x 256).
        b = a[has]
        with np.errstate(invalid="ignore"):
            lo, hi = np.fmin.reduce(b, axis=1), np.fmax.reduce(b, axis=1)
        med = lo.copy()
        spread = lo != hi
        if spread.any():
            med[spread] = np.nanmedian(b[spread], axis=1)
        out[has] = med
    return out


def _load_state(session: Session, key: str) -> dict | None:
    row = session.get(FusionState, key)
    return row.value if row else None


def _save_state(session: Session, key: str, value: dict, blob: bytes | None = None) -> None:
    # Core, not session.get: in a write transaction of its own the ORM would first load the old ~7 MB blob.
    t = FusionState.__table__
    if not session.execute(update(t).where(t.c.key == key).values(value=value, blob=blob)).rowcount:
        session.execute(insert(t).values(key=key, value=value, blob=blob))


def _pack_nodes(node_ids: list[int], arrays: dict[str, np.ndarray]) -> bytes:
    """The learner's per-node arrays and the node id of each row, as one numpy .npz."""
    buf = io.BytesIO()
    np.savez(buf, node_id=np.asarray(node_ids, dtype=np.int64), **arrays)
    return buf.getvalue()


def _unpack_nodes(blob: bytes | None) -> tuple[list[int], dict[str, np.ndarray] | None]:
    """The node ids and the arrays of :func:`_pack_nodes` output; ``([], None)`` for None."""
    if not blob:
        return [], None
    with np.load(io.BytesIO(blob), allow_pickle=False) as z:
        arrays = {name: z[name] for name in z.files}
    return arrays.pop("node_id").tolist(), arrays


def _json_arrays(state: dict) -> dict:
    return {k: np.asarray(v).tolist() for k, v in state.items()}


def _reliability(session: Session, nodes: list[Node], revision: int,
                 n_channels: int) -> tuple[ReliabilityModel, dict[int, tuple[str | None, bool]]]:
    """The learner sized to `nodes`, and node id -> (pin, row still holds pre-0003 JSON state) for every node
    that has a node_reliability row."""
    # Databases written before migration 0003 hold the learner state as JSON per node. Only rows whose JSON
    # is not the empty object are decoded (decoding 1,000 "{}" cost ~5 ms an epoch); NULL was never legacy.
    state = NodeReliability.state
    legacy = {node_id: value.get("model") for node_id, value in session.execute(
        select(NodeReliability.node_id, state).where(cast(state, String) != "{}")) if value}
    rows = {node_id: (pinned, node_id in legacy)
            for node_id, pinned in session.execute(select(NodeReliability.node_id, NodeReliability.pinned))}
    stored = session.execute(select(FusionState.value, FusionState.blob)
                             .where(FusionState.key == "reliability")).first()
    if stored is None:
        return ReliabilityModel().resize(len(nodes), n_channels=n_channels), rows
    glob = stored.value
    keep_channels = glob.get("revision") == revision and glob["model"]["n_channels"] == n_channels
    new_channels = None if keep_channels else n_channels
    ids = [n.id for n in nodes]
    stored_ids, arrays = _unpack_nodes(stored.blob)
    if arrays is None:
        model = ReliabilityModel.from_state(glob["model"], nodes=[legacy.get(i) for i in ids],
                                            n_channels=new_channels)
    else:
        at = {node_id: k for k, node_id in enumerate(stored_ids)}
        where = [at.get(i, -1) for i in ids]
        model = ReliabilityModel.from_arrays(glob["model"], arrays, where, n_channels=new_channels,
                                             nodes=[legacy.get(i) if w < 0 else None for i, w in zip(ids, where)])
    return model, rows


def _reliability_values(nodes: list, model: ReliabilityModel, now: datetime) -> list[dict]:
    """One node_reliability row per node (the API's view of the learner), as executemany parameters."""
    (a_d, b_d), (a_f, b_f) = model.prior_pd, model.prior_pf
    cols = {name: np.asarray(v, dtype=float).tolist() for name, v in {
        "pd_a": a_d + model.kd_, "pd_b": b_d + model.nd_ - model.kd_,
        "pf_a": a_f + model.kf_, "pf_b": b_f + model.nf_ - model.kf_, "trust": model.trust_}.items()}
    noise = [None if np.isnan(v) else float(v) for v in model.noise_dbm_]
    return [{"node_id": node.id, **{name: col[i] for name, col in cols.items()}, "noise_dbm": noise[i],
             "flags": list(model.flags_[i]), "updated_at": now} for i, node in enumerate(nodes)]


def _write_reliability(session: Session, values: list[dict], rows: dict[int, tuple[str | None, bool]]) -> None:
    """Write :func:`_reliability_values` in two executemany statements (update the rows there, insert the rest)."""
    # Read again here: an admin's PATCH may have made a node's row since the epoch was prepared.
    have = set(session.scalars(select(NodeReliability.node_id)))
    old = [v for v in values if v["node_id"] in have]
    new = [v | {"state": {}} for v in values if v["node_id"] not in have]
    if old:  # a Core executemany: about half the time of the ORM's bulk UPDATE by primary key
        t = NodeReliability.__table__
        session.execute(update(t).where(t.c.node_id == bindparam("key")).values(
            {name: bindparam(name) for name in old[0] if name != "node_id"}),
            [v | {"key": v["node_id"]} for v in old])
    if new:
        session.execute(insert(NodeReliability), new)
    legacy = [v["node_id"] for v in values if rows.get(v["node_id"], (None, False))[1]]
    if legacy:  # the learner state now lives packed in fusion_state (see _pack_nodes)
        session.execute(update(NodeReliability).where(NodeReliability.node_id.in_(legacy)).values(state={}))


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


@dataclass
class PreparedEpoch:
    """An epoch computed but not yet written (:func:`prepare_epoch`): the rows and state to write, ready to go,
    and what the epoch was computed from."""

    now: datetime
    started: float  # perf_counter() when the epoch began
    revision: int
    rule: str
    params: dict
    n_reports: int  # fresh reports fused
    rel_rows: dict[int, tuple[str | None, bool]]  # node id -> (pin, pre-0003 JSON state) as read
    tracker_state: dict
    reliability: tuple[list[dict], dict, bytes] | None  # node_reliability rows, fusion_state value and blob
    decisions: list[dict]  # one per plan channel, without the epoch id
    basis: tuple  # epoch_basis() as read: the learned state and plan this epoch started from


def epoch_basis(session: Session) -> tuple:
    """What an epoch's result depends on besides the reports: each learned-state row's last update and the
    newest plan revision. Unchanged between two reads means no other epoch or plan landed in between."""
    rows = session.execute(select(FusionState.key, FusionState.updated_at).order_by(FusionState.key)).all()
    return tuple(tuple(r) for r in rows), newest_revision(session)


def prepare_epoch(session: Session, now: datetime, config: Mapping[str, Any]) -> PreparedEpoch | None:
    """Read and compute one epoch without writing anything (None: no plan yet, nothing to decide).

    The scheduler runs this in a read transaction and :func:`write_epoch` in a write transaction, so the
    SQLite write lock is held only while writing (ingest waits for that lock).
    """
    started = time.perf_counter()
    fs = get_settings(session, config)
    params = settings_dict(fs)
    basis = epoch_basis(session)
    plan = current_plan(session)
    if plan is None or not plan.channels:
        return None
    ids = [c.channel_id for c in plan.channels]
    x = gather(session, plan.revision, len(ids), now, max_age_s=fs.max_age_s, window_s=fs.window_s,
               max_skew_s=config["MAX_SKEW_S"])
    n_nodes = len(x.nodes)
    model, rel_rows = _reliability(session, x.nodes, plan.revision, len(ids)) if n_nodes else (None, {})
    pins = [rel_rows.get(n.id, (None, False))[0] for n in x.nodes]

    tracker = MarkovTracker(len(ids))
    saved = _load_state(session, "tracker")
    if saved and saved.get("revision") == plan.revision:
        tracker.set_state(saved["state"])
    fused = fuse_epoch(x, model, pins, tracker, rule=fs.rule, k=fs.k, target_pf=fs.target_pf, snr_db=fs.snr_db,
                       prior=fs.prior, confidence=fs.confidence, min_nodes=fs.min_nodes)
    reliability = None
    if n_nodes:
        learn_epoch(model, x, fused, now_s=now.timestamp(), max_age_s=fs.max_age_s)
        # Everything the writes need is built here, outside the write transaction.
        reliability = (_reliability_values(x.nodes, model, now),
                       {"revision": plan.revision, "model": model.get_state(include_nodes=False)},
                       _pack_nodes([n.id for n in x.nodes], model.node_arrays(compact=True)))
    result, states = fused.result, fused.states
    p, stat = result.p_occupied, result.statistic
    decisions = [{"channel_id": cid, "decided_at": now, "state": str(states[j]),
                  "p_occupied": None if np.isnan(p[j]) else float(p[j]), "nodes": int(result.n_reporting[j]),
                  "rule": fs.rule, "statistic": None if not np.isfinite(stat[j]) else float(stat[j])}
                 for j, cid in enumerate(ids)]
    tracker_state = {"revision": plan.revision, "state": _json_arrays(tracker.get_state())}
    return PreparedEpoch(now, started, plan.revision, fs.rule, params, x.n_reports, rel_rows, tracker_state,
                         reliability, decisions, basis)


def write_epoch(session: Session, prep: PreparedEpoch) -> Epoch:
    """Write a prepared epoch: learned state, node_reliability rows, the epoch and its decisions.

    The caller checks first that ``epoch_basis(session) == prep.basis`` when `session` is not the one the
    epoch was prepared in (else the learned state of an epoch that landed in between would be overwritten).
    """
    _save_state(session, "tracker", prep.tracker_state)
    if prep.reliability is not None:
        values, state, blob = prep.reliability
        _write_reliability(session, values, prep.rel_rows)
        _save_state(session, "reliability", state, blob=blob)
    epoch = Epoch(started_at=prep.now, duration_s=0.0, plan_revision=prep.revision, rule=prep.rule,
                  params=prep.params, n_reports=prep.n_reports)
    session.add(epoch)
    session.flush()
    session.execute(insert(Decision), [d | {"epoch_id": epoch.id} for d in prep.decisions])
    epoch.duration_s = time.perf_counter() - prep.started
    return epoch


def run_epoch(session: Session, now: datetime, config: Mapping[str, Any]) -> Epoch | None:
    """Fuse the fresh reports as of `now` and write one decision per plan channel; return the epoch."""
    prep = prepare_epoch(session, now, config)
    return None if prep is None else write_epoch(session, prep)
