"""Rollback: make a snapshot the current state again, with a new version.

The snapshot's checksum is verified first. Then, under WATCH of ``version`` and ``config``, in
ONE MULTI: a "pre-rollback" snapshot of the current state, the snapshot's state written as a
new version (:func:`state.versions.write_version`: lineage parent = the snapshot's version,
replaced = the old version, a history row with the snapshot's weights) and the ``replay``
record. With replay the watermark is the snapshot's own, so the worker re-reads the stream from
there and passes over every entry inside the skip rules recorded by this rollback AND by earlier
rollbacks (rules stay in force until their entries are trimmed from the stream); without replay
the watermark is the stream's last id, so only new traffic is learned.

``entries_read`` (see :mod:`state.queueing`) follows the state: with replay it is the
snapshot's own count (the entries after it will be read again); without replay it is the
stream's entries-added at the rollback (every entry up to the last one is passed over). It is
written into the restored state's metadata and into ``state_meta`` alike.

Labels: a snapshot keeps the labels hash as it stood with its state (:mod:`state.snapshots`),
and the same MULTI (``labels_version`` WATCHed too) replaces the labels hash with it, so merge
and retirement marks and label edits made after the snapshot go with the rolled-back state,
and the pre-rollback snapshot keeps the labels it replaces. The label history stays
append-only: every group whose label the rollback changed gets a row with action
``rollback`` (``fields`` names the snapshot) and the label it now has. A snapshot written
before snapshots kept labels still rolls back; the labels are then left as they are and the
result says so (``labels_restored`` False).

Label words (:mod:`state.label_words`): the same MULTI replaces the ``label_words`` hash with
the sketches the snapshot kept, i.e. each restored label gets back the words it was given to.
That, not a fresh sketch of the restored model, is what the stale-label check needs: it asks
how far a group moved from the words an operator judged when labelling, and the operator
judged those words, not the restored model's (a fresh sketch would call a label that was
already stale at the snapshot fresh again, and record a judgement nobody made). A snapshot
that kept labels but not words (written before they were kept; ``label_words_restored``
False) restores the labels and keeps of the recorded words only those that can have gone
with them: a group's sketch stays when its group still has a label and it was recorded before
the snapshot was taken (it was then the group's sketch at the snapshot: a later label write
would have replaced or removed it, and so would have been recorded after); any other is
removed, and the restored label has no recorded words (never stale until refreshed). The
times compared are two processes' clocks (the one that set the label, the one that took the
snapshot): a skew of more than the gap between a label write and a snapshot misjudges that
one sketch.

Replicas (:mod:`state.replicas`): with a requirement set, the rollback ends by waiting for
the replicas to hold its ``replay`` record (written last in the MULTI and unique to this
rollback, where the version number could already be a checkpoint's of the restored line).
Not confirmed, :class:`ReplicasUnconfirmedError` is raised (HTTP 503): the rollback is done on
the primary and is not to be repeated (a repeat writes yet another version); the message says
what to check.
"""

from __future__ import annotations

import json
import time
from collections.abc import Sequence
from typing import Any

import redis

from mixture.serialize import checksum, state_to_bytes
from mixture.stats import MixtureState
from state.errors import OptionsError, VersionConflictError
from state.handle import ModelHandle, loads_or_none
from state.label_words import WordSketch, parse_sketches
from state.labels import LABEL_HISTORY_LIMIT
from state.queueing import DocumentQueue
from state.records import PRE_ROLLBACK, RollbackResult, SnapshotInfo, dumps
from state.replicas import CHECK_REPLICAS, confirm_replicas, replica_requirement
from state.snapshots import Snapshots, decode_snapshot, stored_labels
from state.stream import SkipRanges, max_stream_id
from state.versions import VersionWrite, write_version


class Rollbacks:
    """Roll a model back to one of its snapshots; read the skip rules in force."""

    def __init__(self, handle: ModelHandle, snapshots: Snapshots, queue: DocumentQueue) -> None:
        self.handle = handle
        self.snapshots = snapshots
        self.queue = queue

    def replay_ranges(self) -> SkipRanges:
        """Skip rules of every rollback still in force (empty when none)."""
        raw = self.handle.redis.get(self.handle.keys.replay)
        return SkipRanges() if raw is None else _recorded_rules(raw)

    def rollback(
        self,
        snapshot_id: str,
        *,
        replay: bool = False,
        skip_ids: Sequence[Sequence[str]] = (),
        skip_received: Sequence[Sequence[float]] = (),
        attempts: int = 20,
    ) -> RollbackResult:
        """Make a snapshot the current state, with a new version.

        Parameters
        ----------
        snapshot_id : str
            The snapshot to restore (its checksum is verified first).
        replay : bool
            Re-learn the stream after the snapshot's watermark (needs the stream to still hold
            those entries); without it, traffic after the snapshot is dropped.
        skip_ids : sequence of [first, last]
            Inclusive stream-id ranges not to learn during this and later replays.
        skip_received : sequence of [start, end]
            Inclusive received-time ranges (unix seconds) not to learn, likewise.

        Raises
        ------
        CorruptSnapshotError, SnapshotNotFoundError, OptionsError
        ModelNotFoundError
            When the model was deleted (nothing is written).
        ReplicasUnconfirmedError
            When replicas are required (:mod:`state.replicas`) and did not confirm the
            rollback in time: it is done on the primary (do not repeat it).
        """
        if not replay and (skip_ids or skip_received):
            raise OptionsError("skip ranges need replay=True (without replay nothing is re-read)")
        SkipRanges.build(skip_ids, skip_received)  # refuse bad ranges before anything else
        info, data = self.snapshots.data(snapshot_id)
        restored = decode_snapshot(snapshot_id, data)
        labels = self.snapshots.labels(snapshot_id)  # None: an older snapshot without them
        # None: a snapshot that kept labels but not yet the words they were given to
        sketches = None if labels is None else self.snapshots.label_words(snapshot_id)
        # The rollback point is the stream's end now (read with the entries-added count, at
        # once); entries added later are new traffic and are learned.
        added, last_id = self.queue.counts()
        until = max_stream_id(last_id, info.watermark)
        restored.watermark = info.watermark if replay else until
        restored.metadata = {**restored.metadata, "rollback": {"snapshot": snapshot_id}}
        if not replay:
            restored.metadata["entries_read"] = added
        new_data = state_to_bytes(restored)  # outside the WATCH window: it can be large
        for _ in range(attempts):
            with self.handle.redis.pipeline(transaction=True) as pipe:
                try:
                    result, record = self._commit(
                        pipe,
                        info,
                        restored,
                        new_data,
                        labels,
                        sketches,
                        until,
                        replay,
                        skip_ids,
                        skip_received,
                    )
                except redis.WatchError:
                    continue
            if replica_requirement().active:
                self._confirm(result, record)
            return result
        raise VersionConflictError(
            f"rollback of model {self.handle.model!r} kept racing checkpoints ({attempts} tries)"
        )

    def _confirm(self, result: RollbackResult, record: str) -> None:
        """Wait for the replicas to hold the rollback's ``replay`` record, the MULTI's last
        write (:func:`state.replicas.confirm_replicas`; raises when they do not)."""
        keys, model = self.handle.keys, self.handle.model
        confirm_replicas(
            self.handle.redis,
            keys.replica_fence,
            keys.replay,
            "equals",
            [record],
            what=f"rollback of model {model!r} to {result.snapshot_id!r}, version {result.version}",
            retry_hint=f"it is done and served, do not repeat it; {CHECK_REPLICAS}; after a "
            f"failover, see that the version is {result.version} or later",
            repeatable=False,
        )

    def _commit(
        self,
        pipe: redis.client.Pipeline,
        info: SnapshotInfo,
        restored: MixtureState,
        new_data: bytes,
        labels: dict[int, dict[str, Any]] | None,
        sketches: dict[int, WordSketch] | None,
        until: str,
        replay: bool,
        skip_ids: Sequence[Sequence[str]],
        skip_received: Sequence[Sequence[float]],
    ) -> tuple[RollbackResult, str]:
        """Under WATCH: the safety snapshot, the version write, the labels with their words
        and the replay record (returned too: the replicas are asked for it)."""
        keys = self.handle.keys
        pipe.watch(keys.version, keys.config, keys.labels_version)
        self.handle.check_alive(pipe.get(keys.config))
        current_version = int(pipe.get(keys.version) or 0)
        new_version = current_version + 1
        rule = SkipRanges.build(skip_ids, skip_received, until, new_version)
        # earlier rollbacks' rules stay, minus what the stream no longer holds
        earlier = pipe.get(keys.replay)
        kept = (SkipRanges() if earlier is None else _recorded_rules(earlier)).plus(rule)
        kept = kept.trimmed(self.queue.first_stream_id())
        current_labels = stored_labels(pipe.hgetall(keys.labels))
        current_sketches = parse_sketches(pipe.hgetall(keys.label_words))
        safety = self._safety_snapshot(pipe, info.id, current_version)
        changed_groups: list[int] = []
        sketches_after = current_sketches
        if labels is not None:
            changed_groups = _changed(labels, current_labels)
            sketches_after = restored_sketches(labels, sketches, current_sketches, info.created)
        words_changed = bool(_changed(sketches_after, current_sketches))
        histories = {g: pipe.hget(keys.label_history, str(g)) for g in changed_groups}
        now = time.time()
        result = RollbackResult(
            version=new_version,
            parent=info.version,
            replaced_version=current_version,
            snapshot_id=info.id,
            safety_snapshot_id=safety[0].id if safety else None,
            replay=replay,
            watermark=restored.watermark,
            skip_ids=list(rule.newest.raw_ids),
            skip_received=list(rule.newest.received),
            until=until,
            labels_restored=labels is not None,
            label_words_restored=sketches is not None,
        )
        write = VersionWrite(
            version=new_version,
            parent=info.version,
            kind="rollback",
            data=new_data,
            state=restored,
            watermark=restored.watermark,
            time=now,
            snapshot_id=info.id,
            replaced=current_version,
            replay=replay,
        )
        record = dumps({"result": result.to_dict(), "skip": kept.to_dict()}).decode()
        pipe.multi()
        if safety is not None:
            self.snapshots.write(pipe, *safety, current_labels, current_sketches)
        write_version(pipe, self.handle, write)
        if labels is not None and (changed_groups or words_changed):
            words = sketches_after if words_changed else None
            self._restore_labels(pipe, info.id, new_version, now, labels, histories, words)
        pipe.set(keys.replay, record)
        pipe.execute()
        return result, record

    def _restore_labels(
        self,
        pipe: redis.client.Pipeline,
        snapshot_id: str,
        new_version: int,
        now: float,
        labels: dict[int, dict[str, Any]],
        histories: dict[int, bytes | None],
        sketches: dict[int, WordSketch] | None,
    ) -> None:
        """Inside the MULTI: the labels hash becomes the snapshot's and, when ``sketches`` is
        given, the ``label_words`` hash becomes it; a history row for each group whose label
        changed (``histories``: their current rows)."""
        keys = self.handle.keys
        pipe.delete(keys.labels)
        if labels:
            pipe.hset(keys.labels, mapping={str(g): dumps(record) for g, record in labels.items()})
        if sketches is not None:
            pipe.delete(keys.label_words)
            if sketches:
                pipe.hset(
                    keys.label_words, mapping={str(g): s.to_json() for g, s in sketches.items()}
                )
        for group, raw_history in histories.items():
            record = labels.get(group) or {}
            history = json.loads(raw_history) if raw_history else []
            history.append(
                {
                    "time": now,
                    "action": "rollback",
                    "fields": {"snapshot": snapshot_id},
                    "label": record.get("label"),
                    "destination": record.get("destination"),
                    "version": new_version,
                    "words_recorded": False,
                }
            )
            pipe.hset(keys.label_history, str(group), dumps(history[-LABEL_HISTORY_LIMIT:]))
        pipe.incr(keys.labels_version)

    def _safety_snapshot(
        self, pipe: redis.client.Pipeline, snapshot_id: str, current_version: int
    ) -> tuple[SnapshotInfo, bytes] | None:
        """The "pre-rollback" snapshot of the current state (None before the first state)."""
        keys = self.handle.keys
        current_data = pipe.get(keys.state)
        current_meta = loads_or_none(pipe.get(keys.state_meta))
        if current_data is None or current_meta is None:
            return None
        info = SnapshotInfo(
            id=self.snapshots.next_id(),
            reason=f"before rollback to {snapshot_id}",
            kind=PRE_ROLLBACK,
            created=time.time(),
            version=current_version,
            documents_learned=int(current_meta["documents_learned"]),
            weights=[float(w) for w in current_meta["weights"]],
            checksum=checksum(current_data),
            watermark=str(current_meta["watermark"]),
            size=len(current_data),
        )
        return info, current_data


def _recorded_rules(raw: bytes) -> SkipRanges:
    return SkipRanges.from_dict(json.loads(raw).get("skip", {}))


def restored_sketches(
    labels: dict[int, dict[str, Any]],
    kept: dict[int, WordSketch] | None,
    current: dict[int, WordSketch],
    snapshot_created: float,
) -> dict[int, WordSketch]:
    """The ``label_words`` a rollback leaves, by group id (see the module docstring).

    Parameters
    ----------
    labels : dict
        The labels the rollback restores (the snapshot's).
    kept : dict or None
        The sketches the snapshot kept; None for a snapshot written before it kept them.
    current : dict
        The sketches recorded now.
    snapshot_created : float
        When the snapshot was taken (unix seconds).

    Returns
    -------
    dict
        ``kept`` when the snapshot has them; else the current sketches that can have gone
        with the restored labels: of a labelled group, recorded before the snapshot.
    """
    if kept is not None:
        return dict(kept)
    return {
        group: sketch
        for group, sketch in current.items()
        if group in labels and sketch.recorded <= snapshot_created
    }


def _changed(after: dict[int, Any], before: dict[int, Any]) -> list[int]:
    """Group ids whose value differs between two maps (present in one only included)."""
    return sorted(g for g in set(after) | set(before) if after.get(g) != before.get(g))
