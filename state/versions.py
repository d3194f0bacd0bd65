"""The model's current state and its versions: checkpoints, and the one function that writes a
version for both a checkpoint and a rollback.

**Checkpoint** (:meth:`Versions.commit`): WATCH ``version``, ``heartbeat`` and ``config``; check
that the model is still this handle's generation, that the version is the one the worker
loaded and that the worker still holds the lease; then ONE MULTI writes the version
(:func:`write_version`: state bytes, version + 1, watermark, ``state_meta`` with
``entries_read``, lineage record, history row, PUBLISH ``notify``), dead letters, a due
automatic snapshot (with retention), the checkpoint's alerts and the age trim of the stream
(XTRIM MINID, never past the watermark). If anything changed under the WATCH nothing is
written (:class:`VersionConflictError`); the worker reloads and re-reads from the watermark.

A checkpoint that carries group events (births, merges, retirements from
``OnlineLearner.learn``) also writes, in the same MULTI: a "pre-change" snapshot of the version
it replaces (the state just before the change, read under the WATCH; its own retention count),
the event records (:mod:`state.events`), an alert per event, and the label records that follow
the change (a merge's survivor keeps the absorbed group's label in ``merged_labels``; an
absorbed or retired group's label stays, marked ``merged_into`` or ``retired``). The labels'
counter is WATCHed then too, so a label set racing the change conflicts the checkpoint.

Every snapshot keeps the labels hash beside the state (:mod:`state.snapshots`): the pre-change
one the labels before the events, a due automatic one the labels the version leaves (the
labels' counter is WATCHed for it, so a label set racing it conflicts the checkpoint, which is
retried from the watermark like any other conflict). Both keep the ``label_words`` hash too
(the events do not change it).
"""

from __future__ import annotations

import json
import logging
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import redis
from redis.cluster import ClusterPipeline

from mixture.serialize import checksum, state_from_bytes, state_to_bytes
from mixture.stats import MixtureState
from state.errors import ReplicasUnconfirmedError, VersionConflictError
from state.events import EventRecord, GroupEvents, event_alert, event_record
from state.group_drift import group_ids_of
from state.handle import ModelHandle, loads_or_none
from state.label_words import WordSketch, parse_sketches
from state.records import (
    AUTOMATIC,
    CurrentState,
    HistoryRow,
    SnapshotInfo,
    VersionRecord,
    dumps,
)
from state.replicas import confirm_replicas, replica_requirement
from state.snapshots import Snapshots, stored_labels
from state.stream import ZERO_ID, Undecodable, parse_stream_id

log = logging.getLogger(__name__)


@dataclass
class Checkpoint:
    """Everything one checkpoint writes (built by the worker, committed by the store).

    ``state.metadata["entries_read"]`` (when the worker counts it) is copied into
    ``state_meta``.
    """

    worker: str
    expected_version: int
    state: MixtureState
    watermark: str
    dead_letters: list[Undecodable] = field(default_factory=list)
    batch_documents: int = 0
    log_likelihood_per_token: float = float("nan")
    no_evidence: int = 0
    snapshot_reason: str | None = None
    alerts: list[dict[str, Any]] = field(default_factory=list)
    events: list[Any] = field(default_factory=list)  # mixture.lifecycle.GroupEvent


@dataclass(frozen=True)
class VersionWrite:
    """One new version: its bytes, where it comes from, and what its history row says."""

    version: int
    parent: int | None
    kind: str  # "checkpoint" or "rollback"
    data: bytes
    state: MixtureState  # the state the bytes encode (for the summary)
    watermark: str
    time: float
    snapshot_id: str | None = None
    replaced: int | None = None
    replay: bool | None = None  # a rollback's replay flag (None for a checkpoint)
    log_likelihood_per_token: float = float("nan")
    no_evidence: int = 0
    batch_documents: int = 0


def state_summary(state: MixtureState) -> dict[str, Any]:
    """Documents learned, weights (uniform before the warm-up) and the entries-read count."""
    weights = state.weights() if state.warmed_up else np.full(state.n_groups, 1 / state.n_groups)
    out: dict[str, Any] = {
        "documents_learned": int(state.documents_learned),
        "weights": [float(w) for w in weights],
        "warmed_up": bool(state.warmed_up),
        "provisional": bool(not state.warmed_up and state.provisional is not None),
        "group_ids": group_ids_of(state),
    }
    entries_read = state.metadata.get("entries_read")
    if isinstance(entries_read, int) and not isinstance(entries_read, bool):
        out["entries_read"] = entries_read
    return out


# KEYS[1]: any key of the model (routes the script to its slot); ARGV: channel, message
_PUBLISH_LUA = "return redis.call('PUBLISH', ARGV[1], ARGV[2])"


def write_version(pipe: redis.client.Pipeline, handle: ModelHandle, w: VersionWrite) -> None:
    """Queue, inside the caller's MULTI, every write of a new version.

    State bytes, version number and the bytes' checksum, watermark, ``state_meta`` (the
    summary, with ``entries_read`` when the state counts it), the lineage record, the
    drift-history row (capped lists) and the ``notify`` message (``"<version> <checksum>"``).
    Used by checkpoints and rollbacks alike.
    """
    keys, options = handle.keys, handle.options
    summary = state_summary(w.state)
    digest = checksum(w.data)
    meta = {
        "version": w.version,
        "watermark": w.watermark,
        "checksum": digest,
        "size": len(w.data),
        "time": w.time,
        **summary,
    }
    record = VersionRecord(
        version=w.version,
        parent=w.parent,
        kind=w.kind,
        time=w.time,
        watermark=w.watermark,
        documents_learned=summary["documents_learned"],
        snapshot_id=w.snapshot_id,
        replaced=w.replaced,
        replay=w.replay,
    )
    row = HistoryRow(
        time=w.time,
        version=w.version,
        documents_learned=summary["documents_learned"],
        weights=summary["weights"],
        log_likelihood_per_token=w.log_likelihood_per_token,
        no_evidence=w.no_evidence,
        batch_documents=w.batch_documents,
        group_ids=summary["group_ids"],
        kind=w.kind,
        snapshot_id=w.snapshot_id,
        replay=w.replay,
    )
    pipe.set(keys.state, w.data)
    pipe.set(keys.version, w.version)
    pipe.set(keys.state_checksum, digest)
    pipe.set(keys.watermark, w.watermark)
    pipe.set(keys.state_meta, dumps(meta))
    pipe.rpush(keys.lineage, dumps(record.to_dict()))
    pipe.ltrim(keys.lineage, -options.lineage_limit, -1)
    pipe.rpush(keys.history, dumps(row.to_dict()))
    pipe.ltrim(keys.history, -options.history_limit, -1)
    # the checksum rides along: after a failover lost a version, the re-made one has the same
    # number but other bytes, and a reader that compared numbers only would keep the lost one
    notice = f"{w.version} {digest}"
    if isinstance(pipe, ClusterPipeline):
        # a cluster pipeline refuses PUBLISH (it has no key to route by); a script keyed by
        # one of the model's keys stays in the transaction's slot and publishes cluster-wide
        pipe.execute_command("EVAL", _PUBLISH_LUA, 1, keys.version, keys.notify, notice)
    else:
        pipe.publish(keys.notify, notice)


class Versions:
    """Read the current state and its lineage; commit checkpoints."""

    def __init__(self, handle: ModelHandle, snapshots: Snapshots) -> None:
        self.handle = handle
        self.snapshots = snapshots

    def version(self) -> int:
        """Current version (0 before the first checkpoint)."""
        raw = self.handle.redis.get(self.handle.keys.version)
        return int(raw) if raw else 0

    def current(self) -> CurrentState | None:
        """The current state bytes with version and watermark (read atomically)."""
        keys = self.handle.keys
        pipe = self.handle.redis.pipeline(transaction=True)
        pipe.get(keys.version)
        pipe.get(keys.watermark)
        pipe.get(keys.state)
        version, watermark, data = pipe.execute()
        if data is None:
            return None
        return CurrentState(
            version=int(version or 0),
            watermark=watermark.decode() if watermark else ZERO_ID,
            data=data,
            checksum=checksum(data),
        )

    def summary(self) -> dict[str, Any] | None:
        """Small JSON summary of the current state (version, weights, documents, checksum,
        ``entries_read`` when counted)."""
        return loads_or_none(self.handle.redis.get(self.handle.keys.state_meta))

    def load_state(self) -> MixtureState | None:
        """The current state decoded, or None before the first checkpoint."""
        current = self.current()
        return None if current is None else state_from_bytes(current.data)

    def lineage(self, limit: int = 100) -> list[VersionRecord]:
        """The newest ``limit`` version records, oldest first."""
        rows = self.handle.redis.lrange(self.handle.keys.lineage, -limit, -1)
        return [VersionRecord.from_dict(loads_or_none(r)) for r in rows]

    def commit(self, cp: Checkpoint) -> int:
        """Write one checkpoint atomically (see the module docstring).

        Returns
        -------
        int
            The new version.

        Raises
        ------
        VersionConflictError
            When the version moved (a rollback) or the lease is no longer ``cp.worker``'s.
        ModelNotFoundError
            When the model was deleted meanwhile, or deleted and created again (nothing is
            written).
        """
        cp.state.watermark = cp.watermark
        data = state_to_bytes(cp.state)
        snapshot_id = self.snapshots.next_id() if cp.snapshot_reason else None
        change_id = self.snapshots.next_id() if cp.events else None
        keys = self.handle.keys
        with self.handle.redis.pipeline(transaction=True) as pipe:
            try:
                current_version = self._check(pipe, cp)
                change = self._before_change(pipe, cp, change_id) if cp.events else None
                expired = self.snapshots.to_prune(pipe, extra=1 if snapshot_id else 0)
                if change is not None and change[0] is not None:
                    expired += self.snapshots.to_prune(pipe, extra=1, kind="pre-change")
                now = time.time()
                write = VersionWrite(
                    version=current_version + 1,
                    parent=current_version or None,
                    kind="checkpoint",
                    data=data,
                    state=cp.state,
                    watermark=cp.watermark,
                    time=now,
                    log_likelihood_per_token=cp.log_likelihood_per_token,
                    no_evidence=cp.no_evidence,
                    batch_documents=cp.batch_documents,
                )
                snapshot_labels = None
                if snapshot_id and change is None:  # the snapshot keeps the labels as they are
                    pipe.watch(keys.labels_version)
                    snapshot_labels = stored_labels(pipe.hgetall(keys.labels))
                # the words the labels were given to (events never change them; labels_version
                # is WATCHed whenever a snapshot is written)
                sketches: dict[int, WordSketch] = {}
                if snapshot_id or change is not None:
                    sketches = parse_sketches(pipe.hgetall(keys.label_words))
                pipe.multi()
                write_version(pipe, self.handle, write)
                self._write_extras(pipe, cp, write, expired)
                if change is not None:
                    self._write_change(pipe, cp, write, *change, sketches)
                    snapshot_labels = change[2]  # as the events left them
                if snapshot_id:
                    self._write_automatic_snapshot(
                        pipe, cp, write, snapshot_id, snapshot_labels, sketches
                    )
                pipe.execute()
            except redis.WatchError as exc:
                raise VersionConflictError(
                    f"model {self.handle.model!r} changed during the checkpoint "
                    "(rollback, lease, delete, or a label edit while a snapshot or group "
                    "event was written with it)"
                ) from exc
        if replica_requirement().active:
            written = [snapshot_id] if snapshot_id else []
            if change is not None and change[0] is not None:
                written.insert(0, change[0].id)
            self._confirm(write.version, written)
        return write.version

    def _confirm(self, version: int, snapshots: list[str]) -> None:
        """Wait for the replicas to hold ``version`` (:mod:`state.replicas`) and with it the
        ``snapshots`` its MULTI wrote (named in the warning: one lost in a failover is not
        necessarily taken again by the replay).

        Not confirmed, the version stands on the primary and is logged: learning goes on. Were
        it lost in a failover, the promoted replica's older version is what the worker's next
        step reads (and its next WATCH checks): it reloads that version and learns its
        entries again from its watermark (they were confirmed when queued), never writing
        over it.
        """
        keys = self.handle.keys
        with_snapshots = f" (with snapshot {', '.join(snapshots)})" if snapshots else ""
        try:
            confirm_replicas(
                self.handle.redis,
                keys.replica_fence,
                keys.version,
                "equals",
                [str(version)],
                what=f"checkpoint version {version}{with_snapshots} of model {self.handle.model!r}",
                retry_hint="learning goes on; a failover would make the worker reload and learn "
                "those documents again",
            )
        except ReplicasUnconfirmedError as exc:
            log.warning("%s", exc, extra={"model": self.handle.model, "version": version})

    def _check(self, pipe: redis.client.Pipeline, cp: Checkpoint) -> int:
        """WATCH and check generation, version and lease; the current version."""
        keys = self.handle.keys
        pipe.watch(keys.version, keys.heartbeat, keys.config)
        raw_version, holder = pipe.get(keys.version), pipe.get(keys.heartbeat)
        self.handle.check_alive(pipe.get(keys.config))
        current_version = int(raw_version or 0)
        if current_version != cp.expected_version:
            raise VersionConflictError(
                f"model {self.handle.model!r} is at version {current_version}, the worker "
                f"loaded {cp.expected_version} (a rollback happened)"
            )
        if holder is None or holder.decode() != cp.worker:
            who = holder.decode() if holder else "nobody"
            raise VersionConflictError(
                f"worker {cp.worker!r} no longer holds model {self.handle.model!r} ({who} does)"
            )
        return current_version

    def _before_change(
        self, pipe: redis.client.Pipeline, cp: Checkpoint, change_id: str | None
    ) -> tuple[SnapshotInfo | None, bytes | None, dict[int, dict[str, Any]]]:
        """Under the WATCH: the pre-change snapshot of the version about to be replaced (None
        before the first version) and the labels the events touch (labels WATCHed)."""
        keys = self.handle.keys
        pipe.watch(keys.labels_version)
        labels = {int(k): json.loads(v) for k, v in pipe.hgetall(keys.labels).items()}
        previous, raw_meta = pipe.get(keys.state), pipe.get(keys.state_meta)
        if previous is None or raw_meta is None or change_id is None:
            return None, None, labels
        meta = json.loads(raw_meta)
        kinds = ", ".join(f"{e.kind} {list(e.groups)}" for e in cp.events)
        info = SnapshotInfo(
            id=change_id,
            reason=f"before {kinds}"[:500],
            kind="pre-change",
            created=time.time(),
            version=int(meta["version"]),
            documents_learned=int(meta["documents_learned"]),
            weights=[float(w) for w in meta["weights"]],
            checksum=checksum(previous),
            watermark=str(meta["watermark"]),
            size=len(previous),
        )
        return info, previous, labels

    def _write_change(
        self,
        pipe: redis.client.Pipeline,
        cp: Checkpoint,
        write: VersionWrite,
        info: SnapshotInfo | None,
        previous: bytes | None,
        labels: dict[int, dict[str, Any]],
        sketches: dict[int, WordSketch],
    ) -> None:
        """The pre-change snapshot, the event records with their alerts, the labels that
        follow a merge or a retirement (see the module docstring)."""
        keys = self.handle.keys
        if info is not None and previous is not None:  # with the labels before the events
            self.snapshots.write(pipe, info, previous, labels, sketches)
        records = [
            event_record(
                e, version=write.version, time=write.time, snapshot_id=info.id if info else None
            )
            for e in cp.events
        ]
        GroupEvents(self.handle).write(pipe, records)
        changed: dict[int, dict[str, Any]] = {}
        for record in records:
            pipe.xadd(
                keys.alerts,
                {k: str(v) for k, v in event_alert(record).items()},
                maxlen=10_000,
                approximate=True,
            )
            follow_labels(record, labels, changed)
        for group, value in changed.items():
            pipe.hset(keys.labels, str(group), dumps(value))
        if changed:
            pipe.incr(keys.labels_version)

    def _write_extras(
        self,
        pipe: redis.client.Pipeline,
        cp: Checkpoint,
        write: VersionWrite,
        expired: list[str],
    ) -> None:
        """Dead letters, snapshot retention, alerts, the stream trim."""
        keys, options = self.handle.keys, self.handle.options
        for letter in cp.dead_letters:
            pipe.xadd(
                keys.dead_letters, letter.dead_letter_fields(), maxlen=100_000, approximate=True
            )
        self.snapshots.prune(pipe, expired)
        for alert in cp.alerts:
            pipe.xadd(
                keys.alerts, {k: str(v) for k, v in alert.items()}, maxlen=10_000, approximate=True
            )
        minid = trim_floor(cp.watermark, options.stream_max_age_seconds, write.time)
        if minid is not None:
            pipe.xtrim(keys.docs, minid=minid, approximate=True)

    def _write_automatic_snapshot(
        self,
        pipe: redis.client.Pipeline,
        cp: Checkpoint,
        write: VersionWrite,
        snapshot_id: str,
        labels: dict[int, dict[str, Any]] | None,
        sketches: dict[int, WordSketch],
    ) -> None:
        """The due automatic snapshot of the version written, with the labels it leaves."""
        summary = state_summary(cp.state)
        info = SnapshotInfo(
            id=snapshot_id,
            reason=cp.snapshot_reason or "automatic",
            kind=AUTOMATIC,
            created=write.time,
            version=write.version,
            documents_learned=summary["documents_learned"],
            weights=summary["weights"],
            checksum=checksum(write.data),
            watermark=cp.watermark,
            size=len(write.data),
        )
        self.snapshots.write(pipe, info, write.data, labels or {}, sketches)


def follow_labels(
    record: EventRecord, labels: dict[int, dict[str, Any]], changed: dict[int, dict[str, Any]]
) -> None:
    """Update ``labels`` (group id -> stored label dict) for one event, noting what changed.

    Merge: the survivor keeps its own label and adds the absorbed group's label (and those it
    had absorbed before) to ``merged_labels``; when the survivor had no label of its own it
    takes the absorbed one's. The absorbed group's record stays, marked ``merged_into``.
    Retirement: the record stays, marked ``retired`` (ids are never reused, so it keeps its
    meaning as history).
    """
    if record.kind == "merge" and len(record.groups) == 2:
        survivor, absorbed = record.groups
        gone = labels.get(absorbed)
        if gone is None:
            return
        kept = dict(labels.get(survivor) or {"group": survivor, "updated": record.time})
        merged = list(kept.get("merged_labels") or [])
        merged.append(
            {"group": absorbed, "label": gone.get("label"), "destination": gone.get("destination")}
        )
        merged.extend(gone.get("merged_labels") or [])
        kept["merged_labels"] = merged
        if kept.get("label") is None and kept.get("destination") is None:
            kept["label"], kept["destination"] = gone.get("label"), gone.get("destination")
        labels[survivor] = changed[survivor] = kept
        labels[absorbed] = changed[absorbed] = {**gone, "merged_into": survivor}
    elif record.kind == "retire" and record.groups:
        group = record.groups[0]
        if group in labels:
            labels[group] = changed[group] = {**labels[group], "retired": record.version}


def trim_floor(watermark: str, max_age_seconds: float | None, now: float) -> str | None:
    """The XTRIM MINID of a checkpoint: entries older than the age limit, never past the
    watermark (MINID keeps its own id, so the watermark entry itself always stays).

    None when nothing may be trimmed (no age limit, or nothing learned yet).
    """
    if max_age_seconds is None or watermark == ZERO_ID:
        return None
    cutoff = (max(int((now - max_age_seconds) * 1000), 0), 0)
    floor = min(parse_stream_id(watermark), cutoff)
    return None if floor == (0, 0) else f"{floor[0]}-{floor[1]}"
