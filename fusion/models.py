"""SQLAlchemy 2 models: what the service stores (see DESIGN.md, "Data").

One ``report`` row per node sweep with the per-channel powers packed as float32 (NaN = not measured), in the
channel order of the plan revision it was validated against. One ``decision`` row per epoch and channel.
"""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np
from sqlalchemy import (JSON, BigInteger, Boolean, DateTime, Float, ForeignKey, Index, Integer, LargeBinary,
                        MetaData, String, UniqueConstraint)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship
from sqlalchemy.types import TypeDecorator

__all__ = ["Base", "UTCDateTime", "Node", "PlanRevision", "Channel", "Report", "Epoch", "Decision",
           "NodeReliability", "FusionSettings", "FusionState", "JobLease", "utcnow", "pack", "unpack"]

NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


def utcnow() -> datetime:
    return datetime.now(timezone.utc)


def pack(values) -> bytes:
    """Pack a 1-D sequence of floats as little-endian float32 bytes (NaN kept)."""
    return np.asarray(values, dtype="<f4").tobytes()


def unpack(blob: bytes | None, n: int | None = None) -> np.ndarray:
    """Inverse of :func:`pack`; returns float64. `None` gives all-NaN of length `n`."""
    if blob is None:
        return np.full(n or 0, np.nan)
    return np.frombuffer(blob, dtype="<f4").astype(float)


class UTCDateTime(TypeDecorator):
    """Timezone-aware UTC datetimes on every backend (SQLite stores naive values)."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value, dialect):
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime given to a UTC column")
        value = value.astimezone(timezone.utc)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value, dialect):
        if value is None:
            return None
        return value.replace(tzinfo=timezone.utc) if value.tzinfo is None else value.astimezone(timezone.utc)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)


class Node(Base):
    __tablename__ = "node"

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)  # sha256 hex; the token itself is never stored
    lat: Mapped[float | None] = mapped_column(Float)
    lon: Mapped[float | None] = mapped_column(Float)
    x_m: Mapped[float | None] = mapped_column(Float)
    y_m: Mapped[float | None] = mapped_column(Float)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    last_seen: Mapped[datetime | None] = mapped_column(UTCDateTime)
    disabled: Mapped[bool] = mapped_column(Boolean, default=False)

    def __repr__(self) -> str:
        return f"Node(id={self.id!r}, name={self.name!r}, disabled={self.disabled!r})"


class PlanRevision(Base):
    __tablename__ = "plan_revision"

    revision: Mapped[int] = mapped_column(primary_key=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    channels: Mapped[list["Channel"]] = relationship(order_by="Channel.position", back_populates="plan")

    def __repr__(self) -> str:
        return f"PlanRevision(revision={self.revision!r})"


class Channel(Base):
    __tablename__ = "channel"
    __table_args__ = (UniqueConstraint("revision", "channel_id", name="uq_channel_revision_channel_id"),)

    pk: Mapped[int] = mapped_column(primary_key=True)
    revision: Mapped[int] = mapped_column(ForeignKey("plan_revision.revision"))
    position: Mapped[int] = mapped_column(Integer)  # index into a report's packed powers
    channel_id: Mapped[str] = mapped_column(String(64))
    center_hz: Mapped[float] = mapped_column(Float)
    bandwidth_hz: Mapped[float] = mapped_column(Float)
    plan: Mapped[PlanRevision] = relationship(back_populates="channels")

    def __repr__(self) -> str:
        return f"Channel(revision={self.revision!r}, channel_id={self.channel_id!r}, center_hz={self.center_hz!r})"


class Report(Base):
    __tablename__ = "report"
    __table_args__ = (
        UniqueConstraint("node_id", "seq", name="uq_report_node_id_seq"),
        Index("ix_report_revision_measured_at", "plan_revision", "measured_at"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    node_id: Mapped[int] = mapped_column(ForeignKey("node.id", ondelete="CASCADE"))
    seq: Mapped[int] = mapped_column(BigInteger)
    measured_at: Mapped[datetime] = mapped_column(UTCDateTime)
    received_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)
    n_samples: Mapped[int] = mapped_column(BigInteger)
    plan_revision: Mapped[int] = mapped_column(ForeignKey("plan_revision.revision"))
    powers: Mapped[bytes] = mapped_column(LargeBinary)  # float32 dBm per plan position, NaN = not measured
    noise: Mapped[bytes | None] = mapped_column(LargeBinary)  # float32 dBm per position, NaN = not given
    content_hash: Mapped[str] = mapped_column(String(64))  # tells a retry (same) from a conflict (other)

    def __repr__(self) -> str:
        return f"Report(id={self.id!r}, node_id={self.node_id!r}, seq={self.seq!r}, measured_at={self.measured_at!r})"


class Epoch(Base):
    __tablename__ = "epoch"

    id: Mapped[int] = mapped_column(primary_key=True)
    started_at: Mapped[datetime] = mapped_column(UTCDateTime, index=True)
    duration_s: Mapped[float] = mapped_column(Float)
    plan_revision: Mapped[int | None] = mapped_column(Integer)
    rule: Mapped[str] = mapped_column(String(32))
    params: Mapped[dict] = mapped_column(JSON)
    n_reports: Mapped[int] = mapped_column(Integer)

    def __repr__(self) -> str:
        return f"Epoch(id={self.id!r}, started_at={self.started_at!r}, rule={self.rule!r})"


class Decision(Base):
    __tablename__ = "decision"
    __table_args__ = (Index("ix_decision_channel_decided_at", "channel_id", "decided_at"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    epoch_id: Mapped[int] = mapped_column(ForeignKey("epoch.id", ondelete="CASCADE"), index=True)
    channel_id: Mapped[str] = mapped_column(String(64))
    decided_at: Mapped[datetime] = mapped_column(UTCDateTime)
    state: Mapped[str] = mapped_column(String(16))  # free | occupied | unknown
    p_occupied: Mapped[float | None] = mapped_column(Float)
    nodes: Mapped[int] = mapped_column(Integer)
    rule: Mapped[str] = mapped_column(String(32))
    statistic: Mapped[float | None] = mapped_column(Float)

    def __repr__(self) -> str:
        return f"Decision(channel_id={self.channel_id!r}, decided_at={self.decided_at!r}, state={self.state!r})"


class NodeReliability(Base):
    __tablename__ = "node_reliability"

    node_id: Mapped[int] = mapped_column(ForeignKey("node.id", ondelete="CASCADE"), primary_key=True)
    pd_a: Mapped[float] = mapped_column(Float, default=1.0)  # Beta counts for Pd
    pd_b: Mapped[float] = mapped_column(Float, default=1.0)
    pf_a: Mapped[float] = mapped_column(Float, default=1.0)  # Beta counts for Pf
    pf_b: Mapped[float] = mapped_column(Float, default=1.0)
    noise_dbm: Mapped[float | None] = mapped_column(Float)
    trust: Mapped[float] = mapped_column(Float, default=1.0)
    flags: Mapped[list] = mapped_column(JSON, default=list)
    pinned: Mapped[str | None] = mapped_column(String(16))  # trusted | excluded | None
    # Learner state as written before migration 0003; it now lives packed in fusion_state.blob.
    state: Mapped[dict] = mapped_column(JSON, default=dict)
    updated_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)

    def __repr__(self) -> str:
        return f"NodeReliability(node_id={self.node_id!r}, trust={self.trust!r}, flags={self.flags!r})"


class FusionSettings(Base):
    """The one row of live fusion settings; read at the start of every epoch."""

    __tablename__ = "fusion_settings"

    id: Mapped[int] = mapped_column(primary_key=True)
    rule: Mapped[str] = mapped_column(String(32))
    k: Mapped[int | None] = mapped_column(Integer)
    target_pf: Mapped[float] = mapped_column(Float)
    min_nodes: Mapped[int] = mapped_column(Integer)
    window_s: Mapped[float] = mapped_column(Float)
    max_age_s: Mapped[float] = mapped_column(Float)
    interval_s: Mapped[float] = mapped_column(Float)
    confidence: Mapped[float] = mapped_column(Float)
    prior: Mapped[float] = mapped_column(Float)
    snr_db: Mapped[float] = mapped_column(Float)
    updated_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow)

    def __repr__(self) -> str:
        return f"FusionSettings(rule={self.rule!r}, k={self.k!r}, interval_s={self.interval_s!r})"


class FusionState(Base):
    """Learned state of the epoch that is not per node (the channel tracker), keyed by name."""

    __tablename__ = "fusion_state"

    key: Mapped[str] = mapped_column(String(64), primary_key=True)
    value: Mapped[dict] = mapped_column(JSON)
    # Bulk numeric state (the learner's per-node arrays as a numpy .npz): at 1,000 nodes x 256 channels JSON
    # encoding and decoding of it cost more than the whole epoch's math.
    blob: Mapped[bytes | None] = mapped_column(LargeBinary)
    updated_at: Mapped[datetime] = mapped_column(UTCDateTime, default=utcnow, onupdate=utcnow)

    def __repr__(self) -> str:
        return f"FusionState(key={self.key!r})"


class JobLease(Base):
    """Who runs a periodic job (the fusion epoch) among several workers, until when (see fusion/lease.py)."""

    __tablename__ = "job_lease"

    name: Mapped[str] = mapped_column(String(64), primary_key=True)
    holder: Mapped[str] = mapped_column(String(128))  # "host:pid:uuid" of the leader
    expires_at: Mapped[float] = mapped_column(Float)  # POSIX seconds; plain numbers compare the same everywhere

    def __repr__(self) -> str:
        return f"JobLease(name={self.name!r}, holder={self.holder!r}, expires_at={self.expires_at!r})"
