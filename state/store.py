"""One model's state in Redis: the API the HTTP service and the worker use.

:class:`ModelStore` is a facade over the parts, each in its own module (the protocol of each
part is described there):

=========================  ================================================================
:mod:`state.queueing`      enqueue with backpressure, stream counts and info, dead letters
:mod:`state.lease`         the one-learner-at-a-time lease and the worker's status
:mod:`state.versions`      current state, lineage, checkpoints, the one version writer
:mod:`state.snapshots`     immutable snapshots and their retention
:mod:`state.rollback`      rollback and the skip rules of every replay
:mod:`state.drift_history` history rows, drift report, alerts
:mod:`state.labels`        operator labels per group, their history and recorded words
=========================  ================================================================
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import redis

from mixture.stats import MixtureState
from state.drift_history import DriftHistory
from state.errors import ModelNotFoundError
from state.events import EventRecord, GroupEvents
from state.handle import ModelHandle
from state.keys import ModelKeys, validate_model_name
from state.label_words import WordSketch
from state.labels import GroupLabels
from state.lease import Lease, default_worker_name
from state.options import ModelOptions
from state.queueing import MAX_CLIENT_ID_LENGTH, DocumentQueue
from state.records import (
    REQUESTED,
    Alert,
    CurrentState,
    DriftReport,
    EnqueueResult,
    GroupLabel,
    HistoryRow,
    RollbackResult,
    SnapshotInfo,
    VersionRecord,
    WorkerStatus,
)
from state.registry import ModelInfo, parse_model_info
from state.rollback import Rollbacks
from state.snapshots import Snapshots
from state.stream import SkipRanges
from state.versions import Checkpoint, Versions

__all__ = ["MAX_CLIENT_ID_LENGTH", "Checkpoint", "ModelStore", "default_worker_name"]


class ModelStore:
    """Redis-side API of one model.

    Parameters
    ----------
    redis : redis.Redis
        Client with ``decode_responses=False``.
    model : str
        A registered model's name.

    Raises
    ------
    ModelNotFoundError
        When the model is not registered.
    """

    def __init__(self, redis: redis.Redis, model: str) -> None:
        self.redis = redis
        self.model = validate_model_name(model)
        self.keys = ModelKeys(model)
        raw = redis.get(self.keys.config)
        if raw is None:
            raise ModelNotFoundError(f"model {model!r} does not exist")
        self.info: ModelInfo = parse_model_info(raw, model)
        handle = ModelHandle(redis, self.keys, self.info)
        self.queue = DocumentQueue(handle)
        self.lease = Lease(handle)
        self.snapshots = Snapshots(handle)
        self.versions = Versions(handle, self.snapshots)
        self.rollbacks = Rollbacks(handle, self.snapshots, self.queue)
        self.drift_history = DriftHistory(handle, self.versions, self.snapshots)
        self.labels = GroupLabels(handle)
        self.group_events = GroupEvents(handle)

    @property
    def options(self) -> ModelOptions:
        return self.info.options

    # -- stream (state.queueing) -------------------------------------------------------------
    def enqueue(
        self,
        texts: Sequence[str],
        *,
        ids: Sequence[str | None] | None = None,
        metadata: Sequence[dict[str, Any] | None] | None = None,
        received: float | None = None,
    ) -> EnqueueResult:
        """See :meth:`state.queueing.DocumentQueue.enqueue` (raises StreamFullError at the cap)."""
        return self.queue.enqueue(texts, ids=ids, metadata=metadata, received=received)

    def enqueue_labelled(self, entries: Sequence[Sequence[str | bytes]]) -> list[str]:
        """See :meth:`state.queueing.DocumentQueue.enqueue_labelled` (corrections, examples,
        withdrawals; raises StreamFullError at the cap)."""
        return self.queue.enqueue_labelled(entries)

    def labelled_queued(self) -> int:
        """Corrections, examples and withdrawals queued after the watermark (not learned)."""
        return self.queue.labelled_queued()

    def texts_of(self, client_ids: Sequence[str]) -> list[tuple[str | None, str | None]]:
        """See :meth:`state.queueing.DocumentQueue.texts_of`: (stream id, text) per id."""
        return self.queue.texts_of(client_ids)

    def stream_info(self) -> dict[str, Any]:
        """See :meth:`state.queueing.DocumentQueue.stream_info`."""
        return self.queue.stream_info()

    def entries_added(self) -> int:
        """Entries ever added to the stream (Redis 7's entries-added, else our counter)."""
        return self.queue.entries_added()

    def last_stream_id(self) -> str:
        """Id of the newest stream entry ("0-0" when empty)."""
        return self.queue.last_stream_id()

    def dead_letters(self, count: int = 100) -> list[dict[str, Any]]:
        """The newest dead letters, oldest first: id, source_id, reason, fields."""
        return self.queue.dead_letters(count)

    # -- current state (state.versions) ------------------------------------------------------
    def version(self) -> int:
        """Current version (0 before the first checkpoint)."""
        return self.versions.version()

    def current(self) -> CurrentState | None:
        """The current state bytes with version and watermark (read atomically)."""
        return self.versions.current()

    def summary(self) -> dict[str, Any] | None:
        """Small JSON summary of the current state (version, weights, documents, checksum)."""
        return self.versions.summary()

    def load_state(self) -> MixtureState | None:
        """The current state decoded, or None before the first checkpoint."""
        return self.versions.load_state()

    def lineage(self, limit: int = 100) -> list[VersionRecord]:
        """The newest ``limit`` version records, oldest first."""
        return self.versions.lineage(limit)

    def commit_checkpoint(self, cp: Checkpoint) -> int:
        """See :meth:`state.versions.Versions.commit`; returns the new version."""
        return self.versions.commit(cp)

    # -- lease (state.lease) -----------------------------------------------------------------
    def hold_lease(self, status: WorkerStatus) -> bool:
        """Take or renew the model's lease for ``status.worker``; False if another holds it."""
        return self.lease.hold(status)

    def release_lease(self, worker: str) -> bool:
        """Give the lease up if ``worker`` holds it."""
        return self.lease.release(worker)

    def lease_holder(self) -> str | None:
        """Name of the worker holding the model, or None."""
        return self.lease.holder()

    def worker_status(self) -> WorkerStatus | None:
        """What the worker holding the model last reported, or None when none holds it."""
        return self.lease.worker_status()

    # -- snapshots and rollback (state.snapshots, state.rollback) ----------------------------
    def create_snapshot(self, reason: str, *, kind: str = REQUESTED) -> SnapshotInfo:
        """Copy the current state into a new immutable snapshot."""
        return self.snapshots.create(reason, kind=kind)

    def list_snapshots(self) -> list[SnapshotInfo]:
        """Every snapshot, by version then creation time."""
        return self.snapshots.list()

    def get_snapshot(self, snapshot_id: str) -> SnapshotInfo:
        """One snapshot's metadata; :class:`SnapshotNotFoundError` when unknown."""
        return self.snapshots.get(snapshot_id)

    def snapshot_bytes(self, snapshot_id: str) -> tuple[SnapshotInfo, bytes]:
        """Metadata and verified state bytes of a snapshot."""
        return self.snapshots.data(snapshot_id)

    def snapshot_state(self, snapshot_id: str) -> MixtureState:
        """A snapshot's state, checksum verified and decoded."""
        return self.snapshots.state(snapshot_id)

    def delete_snapshot(self, snapshot_id: str) -> None:
        """Delete a snapshot; :class:`SnapshotNotFoundError` when unknown."""
        self.snapshots.delete(snapshot_id)

    def rollback(
        self,
        snapshot_id: str,
        *,
        replay: bool = False,
        skip_ids: Sequence[Sequence[str]] = (),
        skip_received: Sequence[Sequence[float]] = (),
        attempts: int = 20,
    ) -> RollbackResult:
        """See :meth:`state.rollback.Rollbacks.rollback`."""
        return self.rollbacks.rollback(
            snapshot_id,
            replay=replay,
            skip_ids=skip_ids,
            skip_received=skip_received,
            attempts=attempts,
        )

    def replay_ranges(self) -> SkipRanges:
        """Skip rules of every rollback still in force (empty when none)."""
        return self.rollbacks.replay_ranges()

    # -- drift (state.drift_history) ---------------------------------------------------------
    def history(self, limit: int | None = None) -> list[HistoryRow]:
        """Drift-history rows, oldest first (the newest ``limit`` when given)."""
        return self.drift_history.history(limit)

    def drift(
        self,
        reference: str | None = None,
        window: int | None = None,
        series_limit: int | None = None,
    ) -> DriftReport:
        """See :meth:`state.drift_history.DriftHistory.drift`."""
        return self.drift_history.drift(reference, window, series_limit)

    def alerts(self, count: int = 100) -> list[Alert]:
        """The newest ``count`` alerts, oldest first."""
        return self.drift_history.alerts(count)

    def alert_count(self) -> int:
        """Number of alerts kept in the alerts stream."""
        return self.drift_history.alert_count()

    # -- group labels (state.labels) ---------------------------------------------------------
    def group_labels(self) -> dict[int, GroupLabel]:
        """Operator labels by group id (groups without one are absent)."""
        return self.labels.all()

    def labels_version(self) -> int:
        """Counter bumped by every label change."""
        return self.labels.version()

    # -- group events (state.events) ---------------------------------------------------------
    def events(self, limit: int = 100) -> list[EventRecord]:
        """The newest ``limit`` group events (births, merges, retirements), newest first; an
        event whose version a rollback left behind is marked ``undone``."""
        return self.group_events.list(limit, self.current_line())

    def current_line(self) -> set[int]:
        """Versions on the current line: from the current version back along the parents
        (a rollback's parent is the snapshot's version), within the lineage kept."""
        records = {r.version: r for r in self.versions.lineage(self.options.lineage_limit)}
        line: set[int] = set()
        version: int | None = self.versions.version()
        while version and version not in line:
            line.add(version)
            record = records.get(version)
            version = record.parent if record is not None else version - 1
        return line

    def event_counts(self) -> dict[str, int]:
        """Group events ever written, by kind."""
        return self.group_events.counts()

    def set_group_label(
        self,
        group: int,
        label: str | None,
        destination: str | None,
        sketch: WordSketch | None = None,
    ) -> GroupLabel:
        """Replace (or, with both None, clear) the label and destination of one group; see
        :meth:`state.labels.GroupLabels.set`."""
        return self.labels.set(group, label, destination, sketch)

    def patch_group_label(
        self, group: int, changes: Mapping[str, str | None], sketch: WordSketch | None = None
    ) -> GroupLabel:
        """Change only the given fields of one group's label; see
        :meth:`state.labels.GroupLabels.patch`."""
        return self.labels.patch(group, changes, sketch)

    def label_sketches(self) -> dict[int, WordSketch]:
        """The words each label was given to, by group id."""
        return self.labels.sketches()

    def label_history(self, group: int) -> list[dict[str, Any]]:
        """One group's label changes, oldest first."""
        return self.labels.history(group)
