"""Request and response schemas (pydantic v2). The same classes validate requests and build the OpenAPI document.

Request models are strict (no ``"1"`` → 1, no ``true`` → 1.0) and forbid unknown fields, so a typo in a field
name is an error rather than a silently ignored value. Request bodies are validated from the raw JSON bytes,
which is what lets strict mode accept RFC 3339 strings for datetimes.
"""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Literal

from pydantic import AwareDatetime, BaseModel, ConfigDict, Field, model_validator

__all__ = ["NAME_PATTERN", "NodeIn", "NodeCreated", "NodeOut", "NodeList", "TokenOut", "NodeUpdate",
           "ChannelSpec", "PlanIn", "PlanOut", "MeasurementIn", "ReportIn", "ReportBatchIn", "ReportAck",
           "BatchAck", "ChannelState", "ChannelsOut", "HistoryPoint", "HistoryOut", "FusionSettingsIn",
           "FusionSettingsOut", "Health", "FreeQuery", "HistoryQuery", "Problem", "RULE_NAMES"]

NAME_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,63}$"
RULE_NAMES = ("or", "and", "k_of_n", "majority", "chair_varshney", "egc", "mrc", "llr", "weighted_llr")

Finite = Annotated[float, Field(allow_inf_nan=False)]
DBm = Annotated[float, Field(allow_inf_nan=False, ge=-300.0, le=100.0)]


class _In(BaseModel):
    model_config = ConfigDict(strict=True, extra="forbid")


class _Out(BaseModel):
    model_config = ConfigDict(from_attributes=True)


# --- nodes ------------------------------------------------------------------------------------------------

class NodeIn(_In):
    name: str = Field(pattern=NAME_PATTERN, description="Unique node name: letters, digits, '_', '.', '-'.")
    lat: Annotated[float, Field(allow_inf_nan=False, ge=-90, le=90)] | None = None
    lon: Annotated[float, Field(allow_inf_nan=False, ge=-180, le=180)] | None = None
    x_m: Finite | None = None
    y_m: Finite | None = None


class NodeUpdate(_In):
    disabled: bool | None = None
    pinned: Literal["trusted", "excluded"] | None = Field(
        default=None, description="Pin the node's trust; send null with `unpin: true` to remove a pin.")
    unpin: bool = False


class NodeCreated(_Out):
    id: int
    name: str
    token: str = Field(description="The node's bearer token. Shown once; only its hash is stored.")


class TokenOut(_Out):
    name: str
    token: str


class NodeOut(_Out):
    id: int
    name: str
    lat: float | None
    lon: float | None
    x_m: float | None
    y_m: float | None
    created_at: datetime
    last_seen: datetime | None
    disabled: bool
    trust: float | None
    pd: float | None
    pf: float | None
    noise_dbm: float | None
    flags: list[str]
    pinned: str | None
    last_seq: int | None = Field(default=None, description="Highest report seq stored for the node.")


class NodeList(_Out):
    nodes: list[NodeOut]


# --- plan -------------------------------------------------------------------------------------------------

class ChannelSpec(_In):
    id: str = Field(pattern=NAME_PATTERN, description="Channel id, unique within the plan.")
    center_hz: Annotated[float, Field(allow_inf_nan=False, gt=0, le=1e12)]
    bandwidth_hz: Annotated[float, Field(allow_inf_nan=False, gt=0, le=1e11)]


class PlanIn(_In):
    channels: list[ChannelSpec] = Field(min_length=1, max_length=4096)

    @model_validator(mode="after")
    def _unique_ids(self):
        seen: set[str] = set()
        for ch in self.channels:
            if ch.id in seen:
                raise ValueError(f"channel id {ch.id!r} appears more than once")
            seen.add(ch.id)
        return self


class PlanOut(_Out):
    revision: int | None
    channels: list[ChannelSpec]


# --- reports ----------------------------------------------------------------------------------------------

class MeasurementIn(_In):
    channel: str = Field(min_length=1, max_length=64)
    power_dbm: DBm = Field(description="Mean power per complex sample in the channel over n_samples, dBm.")
    noise_dbm: DBm | None = Field(default=None, description="This channel's noise floor, if it differs.")


class ReportIn(_In):
    """One sweep, in one of two forms: `measurements` (one object per channel) or `powers_dbm` (one value per
    channel, in the order of `channels`, given here or once for a whole batch). That exactly one form is given,
    consistently, is checked in fusion/ingest.py, whose errors name the field (a model validator's could not)."""

    seq: int = Field(ge=0, le=2**63 - 1, description="Per-node sequence number; a retry re-sends the same seq.")
    measured_at: AwareDatetime = Field(description="RFC 3339 time of the measurement, with a UTC offset.")
    n_samples: int = Field(ge=1, le=10**12, description="Complex samples per channel measurement.")
    noise_dbm: DBm | None = Field(default=None, description="The node's noise floor per channel, dBm.")
    node: str | None = Field(default=None, description="Optional; if given it must name the token's node.")
    measurements: list[MeasurementIn] | None = Field(
        default=None, min_length=1, max_length=4096,
        description="At most one per plan channel (plans hold <= 4096). Give this or `powers_dbm`.")
    channels: list[Annotated[str, Field(min_length=1, max_length=64)]] | None = Field(
        default=None, min_length=1, max_length=4096,
        description="Channel ids that `powers_dbm` follows; in a batch it may be given once for all reports.")
    powers_dbm: list[DBm | None] | None = Field(
        default=None, min_length=1, max_length=4096,
        description="Mean power per complex sample (dBm) for each of `channels`, in that order; null = not "
                    "measured. The compact form of `measurements` for a whole sweep.")


class ReportBatchIn(_In):
    """Reports of one node. Whether each `powers_dbm` report has a channel list of the right length (its own,
    or this one) is checked in fusion/ingest.py, which names the offending report's field in the error."""

    channels: list[Annotated[str, Field(min_length=1, max_length=64)]] | None = Field(
        default=None, min_length=1, max_length=4096,
        description="Channel ids that every `powers_dbm` report without its own `channels` follows.")
    reports: list[ReportIn] = Field(min_length=1)


class ReportAck(_Out):
    seq: int
    status: Literal["created", "duplicate"]


class BatchAck(_Out):
    created: int
    duplicates: int
    results: list[ReportAck]


# --- channels and decisions -------------------------------------------------------------------------------

class ChannelState(_Out):
    id: str
    center_hz: float
    bandwidth_hz: float
    state: Literal["free", "occupied", "unknown"]
    p_occupied: float | None = Field(description="Posterior probability the channel is occupied.")
    confidence: float | None = Field(description="Probability the published state is right (null if unknown).")
    nodes: int = Field(description="Nodes with a fresh report on this channel.")
    decided_at: datetime | None


class ChannelsOut(_Out):
    as_of: datetime | None
    rule: str | None
    channels: list[ChannelState]


class HistoryPoint(_Out):
    decided_at: datetime
    state: Literal["free", "occupied", "unknown"]
    p_occupied: float | None
    nodes: int


class HistoryOut(_Out):
    channel: str
    since: datetime
    until: datetime
    decisions: list[HistoryPoint]
    occupancy: float | None = Field(description="Fraction of decided (not unknown) epochs that were occupied.")


class FreeQuery(BaseModel):
    model_config = ConfigDict(extra="forbid")
    min_confidence: float = Field(default=0.95, ge=0.0, le=1.0, allow_inf_nan=False)


class HistoryQuery(BaseModel):
    model_config = ConfigDict(extra="forbid")
    since: AwareDatetime | None = None
    until: AwareDatetime | None = None
    limit: int = Field(default=1000, ge=1, le=100_000)


# --- fusion settings --------------------------------------------------------------------------------------

class FusionSettingsIn(_In):
    """Fusion settings; a PUT may send any subset, the rest stay as they are."""

    rule: Literal[RULE_NAMES] | None = None  # type: ignore[valid-type]
    k: int | None = Field(default=None, ge=1, le=10_000, description="k for k_of_n (votes needed).")
    target_pf: float | None = Field(default=None, gt=0, lt=0.5, allow_inf_nan=False,
                                    description="System false-alarm probability the threshold is set for.")
    min_nodes: int | None = Field(default=None, ge=1, le=100_000)
    window_s: float | None = Field(default=None, ge=0, le=86_400, allow_inf_nan=False,
                                   description="Pool each node's reports within this span of its newest one.")
    max_age_s: float | None = Field(default=None, gt=0, le=86_400, allow_inf_nan=False,
                                    description="Reports older than this are no evidence at all.")
    interval_s: float | None = Field(default=None, ge=0.5, le=86_400, allow_inf_nan=False)
    confidence: float | None = Field(default=None, ge=0.5, lt=1, allow_inf_nan=False,
                                     description="Probability needed to publish free or occupied.")
    prior: float | None = Field(default=None, gt=0, lt=1, allow_inf_nan=False,
                                description="P(occupied) before any evidence.")
    snr_db: float | None = Field(default=None, ge=-40, le=40, allow_inf_nan=False,
                                 description="Per-sample SNR (dB) assumed for a node's detector when occupied.")


class FusionSettingsOut(_Out):
    rule: str
    k: int | None
    target_pf: float
    min_nodes: int
    window_s: float
    max_age_s: float
    interval_s: float
    confidence: float
    prior: float
    snr_db: float
    updated_at: datetime
    warnings: list[str] = Field(default_factory=list)


class Health(_Out):
    """Liveness (the process answers) and readiness (database reachable, epochs not stale)."""

    status: Literal["ok", "degraded"]
    live: bool
    ready: bool
    database: bool
    last_epoch_at: datetime | None
    last_epoch_age_s: float | None
    max_epoch_age_s: float
    problems: list[str]


class Problem(BaseModel):
    """RFC 9457 problem details."""

    type: str = "about:blank"
    title: str
    status: int
    detail: str | None = None
    errors: list[dict] | None = Field(default=None, description="Each bad field: {path, message}; at most 100.")
    errors_total: int | None = Field(default=None, description="How many errors there were, when over 100.")
