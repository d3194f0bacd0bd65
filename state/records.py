"""Plain records read from and written to Redis (JSON inside; ``to_dict`` for HTTP responses)."""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, field
from typing import Any


def _json_float(value: float) -> float | None:
    """NaN and infinities are not JSON: store them as null."""
    return None if value is None or not math.isfinite(value) else float(value)


def dumps(obj: Any) -> bytes:
    """Compact JSON bytes (no NaN: callers map them to null first)."""
    return json.dumps(obj, separators=(",", ":"), allow_nan=False).encode()


@dataclass(frozen=True)
class EnqueueResult:
    """Outcome of :meth:`state.store.ModelStore.enqueue`.

    ``stream_ids[i]`` is the stream id of document i, or None when its client id was already
    seen within the idempotency window (the document was not added again).
    """

    stream_ids: list[str | None]
    duplicates: int

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class CurrentState:
    """The current checkpoint: raw state bytes with their version and watermark."""

    version: int
    watermark: str
    data: bytes
    checksum: str


# The snapshot kinds, the one set of names in every output (API, command line, dashboard).
REQUESTED = "requested"  # asked for by a person or a client; kept until deleted
AUTOMATIC = "automatic"  # taken on the worker's schedule; retention prunes these only
PRE_ROLLBACK = "pre-rollback"  # the safety copy a rollback takes of the state it replaces
SNAPSHOT_KINDS: tuple[str, ...] = (REQUESTED, AUTOMATIC, PRE_ROLLBACK)


@dataclass(frozen=True)
class SnapshotInfo:
    """Metadata of one immutable snapshot (its state bytes live beside it in Redis)."""

    id: str
    reason: str
    kind: str  # one of SNAPSHOT_KINDS
    created: float
    version: int
    documents_learned: int
    weights: list[float]
    checksum: str
    watermark: str
    size: int

    @property
    def automatic(self) -> bool:
        """True for snapshots taken by the worker's schedule (the only ones retention prunes)."""
        return self.kind == AUTOMATIC

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["automatic"] = self.automatic
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> SnapshotInfo:
        return cls(
            id=str(d["id"]),
            reason=str(d["reason"]),
            kind=str(d["kind"]),
            created=float(d["created"]),
            version=int(d["version"]),
            documents_learned=int(d["documents_learned"]),
            weights=[float(w) for w in d["weights"]],
            checksum=str(d["checksum"]),
            watermark=str(d["watermark"]),
            size=int(d["size"]),
        )


@dataclass(frozen=True)
class VersionRecord:
    """One entry of the version lineage.

    A checkpoint's parent is the version it was learned on; a rollback's parent is the version
    of the snapshot it restored, and ``replaced`` is the version it superseded.
    """

    version: int
    parent: int | None
    kind: str  # "checkpoint" or "rollback"
    time: float
    watermark: str
    documents_learned: int
    snapshot_id: str | None = None
    replaced: int | None = None
    replay: bool | None = None  # a rollback's: whether the stream after the snapshot is re-read

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> VersionRecord:
        return cls(**d)


@dataclass(frozen=True)
class HistoryRow:
    """One drift-history row, written by every version (checkpoint or rollback).

    ``time`` is the wall-clock time the version was written: it only grows, also across a
    rollback (whose row carries the restored weights), so it is the time axis of the weight
    plots. A rollback's row says so (``kind``, ``snapshot_id``, ``replay``); rows written before
    these fields read as checkpoints.
    """

    time: float
    version: int
    documents_learned: int
    weights: list[float]
    log_likelihood_per_token: float  # mean over the documents since the last checkpoint
    no_evidence: int  # documents with no known word since the last checkpoint
    batch_documents: int  # documents learned since the last checkpoint
    group_ids: list[int] | None = None  # the weights' group ids (None: rows before ids, 0..K-1)
    kind: str = "checkpoint"  # or "rollback"
    snapshot_id: str | None = None  # a rollback's restored snapshot
    replay: bool | None = None  # a rollback's: the stream after the snapshot is learned again

    def ids(self) -> list[int]:
        """Group id of each weight."""
        if self.group_ids is None:
            return list(range(len(self.weights)))
        return list(self.group_ids)

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["log_likelihood_per_token"] = _json_float(self.log_likelihood_per_token)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> HistoryRow:
        ll = d.get("log_likelihood_per_token")
        return cls(
            time=float(d["time"]),
            version=int(d["version"]),
            documents_learned=int(d["documents_learned"]),
            weights=[float(w) for w in d["weights"]],
            log_likelihood_per_token=float("nan") if ll is None else float(ll),
            no_evidence=int(d["no_evidence"]),
            batch_documents=int(d["batch_documents"]),
            group_ids=None if d.get("group_ids") is None else [int(g) for g in d["group_ids"]],
            kind=str(d.get("kind", "checkpoint")),
            snapshot_id=None if d.get("snapshot_id") is None else str(d["snapshot_id"]),
            replay=None if d.get("replay") is None else bool(d["replay"]),
        )


@dataclass(frozen=True)
class RollbackResult:
    """What a rollback did."""

    version: int
    parent: int
    replaced_version: int
    snapshot_id: str
    safety_snapshot_id: str | None
    replay: bool
    watermark: str
    skip_ids: list[tuple[str, str]] = field(default_factory=list)
    skip_received: list[tuple[float, float]] = field(default_factory=list)
    until: str = "0-0"  # skip ranges apply to stream ids up to this one
    labels_restored: bool = False  # False: the snapshot predates kept labels, left as they were
    # False: the snapshot predates kept label words (state.rollback says which stay)
    label_words_restored: bool = False

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["skip_ids"] = [list(r) for r in self.skip_ids]
        d["skip_received"] = [list(r) for r in self.skip_received]
        return d


@dataclass(frozen=True)
class DriftReport:
    """Answer of a drift query."""

    reference: str  # "window:<n>" or "snapshot:<id>"
    js_divergence: float
    weights_now: list[float]
    weights_reference: list[float]
    weight_change: list[float]
    word_divergence: list[float] | None
    threshold: float
    alert: bool
    series: list[HistoryRow]
    group_ids: list[int] | None = None  # ids of weights_now / weights_reference (both points)
    groups_born: list[int] | None = None  # ids present now only (not in the divergence)
    groups_gone: list[int] | None = None  # ids present at the reference only

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["series"] = [row.to_dict() for row in self.series]
        return d


@dataclass(frozen=True)
class Alert:
    """One entry of the alerts stream."""

    id: str
    time: float
    kind: str
    reason: str
    value: float
    threshold: float
    version: int

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class WorkerStatus:
    """What the worker holding a model last reported."""

    worker: str
    pid: int
    host: str
    time: float
    version: int
    documents_learned: int
    state: str = "learning"  # "warming-up", "learning", "stopping"

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> WorkerStatus:
        return cls(**d)


@dataclass(frozen=True)
class GroupLabel:
    """An operator's label and destination for one group."""

    group: int
    label: str | None
    destination: str | None
    updated: float
    merged_labels: list[dict[str, Any]] | None = None  # labels of groups this one absorbed
    merged_into: int | None = None  # set when this group was absorbed by a merge
    retired: int | None = None  # the version that retired this group

    @classmethod
    def from_dict(cls, group: int, d: dict[str, Any]) -> GroupLabel:
        return cls(
            group,
            d.get("label"),
            d.get("destination"),
            float(d.get("updated", 0.0)),
            merged_labels=d.get("merged_labels"),
            merged_into=None if d.get("merged_into") is None else int(d["merged_into"]),
            retired=None if d.get("retired") is None else int(d["retired"]),
        )

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)
