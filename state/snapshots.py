"""Snapshots: immutable copies of a checkpoint (``meta`` JSON + ``state`` bytes + ``labels``
JSON + ``label_words`` JSON in one hash), indexed by a sorted set scored by the version they
copy. Retention only ever removes automatic snapshots; requested and pre-rollback ones stay
until deleted.

``labels`` is the model's labels hash (:mod:`state.labels`) as it stood with the copied state,
group id -> stored label record, so that a rollback restores the labels with the state.
``label_words`` is the ``label_words`` hash read with it (group id -> the word sketch each
label was given to, :class:`state.label_words.WordSketch`), so that a rollback restores the
words the restored labels were given to and the stale-label check keeps comparing with those.
Both are read under the writer's WATCH of ``labels_version`` (every label change, and every
change of ``label_words``, bumps it).

With replicas required (:mod:`state.replicas`), :meth:`Snapshots.create` (a requested snapshot,
or an automatic one asked for through it) ends by waiting for them to hold the snapshot's
hash: not confirmed, :class:`ReplicasUnconfirmedError` (HTTP 503) says that the snapshot is
written on the primary and what to check. The snapshots a checkpoint or a rollback writes in
its own MULTI are confirmed with it (the replicas hold a MULTI whole or not at all).

Snapshots written before ``labels`` was kept have neither field: they still load and roll
back, and such a rollback leaves the labels as they are (:attr:`RollbackResult.labels_restored`
False). Snapshots written before ``label_words`` was kept have ``labels`` only: their labels
are restored, not the words (:attr:`RollbackResult.label_words_restored` False; what the
rollback then does with the recorded words: :mod:`state.rollback`).
"""

from __future__ import annotations

import json
import time
from collections.abc import Mapping
from typing import Any

import redis

from mixture.errors import StateFormatError
from mixture.serialize import checksum, state_from_bytes
from mixture.stats import MixtureState
from state.errors import (
    CorruptSnapshotError,
    OptionsError,
    SnapshotNotFoundError,
    StateError,
    VersionConflictError,
)
from state.handle import ModelHandle
from state.label_words import WordSketch, parse_sketches
from state.records import AUTOMATIC, REQUESTED, SnapshotInfo, dumps
from state.replicas import CHECK_REPLICAS, confirm_replicas, replica_requirement

Client = redis.Redis | redis.client.Pipeline

# KEYS: snapshot_seq, config. The next id number, or false for a deleted model (so that no
# counter is left behind by a writer racing the delete).
_NEXT_ID_LUA = """
if redis.call('EXISTS', KEYS[2]) == 0 then
  return false
end
return redis.call('INCR', KEYS[1])
"""


class Snapshots:
    """Create, list, read, verify and delete the snapshots of one model."""

    def __init__(self, handle: ModelHandle) -> None:
        self.handle = handle
        self._next = handle.redis.register_script(_NEXT_ID_LUA)

    def next_id(self) -> str:
        """A fresh snapshot id (``snap-000001``, ...); :class:`ModelNotFoundError` when the
        model was deleted."""
        keys = self.handle.keys
        number = self._next(keys=[keys.snapshot_seq, keys.config])
        if number is None:
            self.handle.check_alive(None)
        return f"snap-{int(number):06d}"

    def write(
        self,
        pipe: redis.client.Pipeline,
        info: SnapshotInfo,
        data: bytes,
        labels: Mapping[int, Mapping[str, Any]],
        sketches: Mapping[int, WordSketch],
    ) -> None:
        """Queue the writes of one snapshot on ``pipe`` (inside the caller's MULTI).

        ``labels`` is the labels hash as it stands with ``data`` (group id -> label record)
        and ``sketches`` the ``label_words`` hash (group id -> word sketch), both read under
        the caller's WATCH of ``labels_version``.
        """
        keys = self.handle.keys
        stored = dumps({str(group): dict(record) for group, record in labels.items()})
        words = dumps({str(group): sketch.to_dict() for group, sketch in sketches.items()})
        pipe.hset(
            keys.snapshot(info.id),
            mapping={
                "meta": dumps(info.to_dict()),
                "state": data,
                "labels": stored,
                "label_words": words,
            },
        )
        pipe.zadd(keys.snapshots, {info.id: info.version})

    def prune(self, pipe: redis.client.Pipeline, expired: list[str]) -> None:
        """Queue the removal of ``expired`` snapshots on ``pipe``."""
        for old in expired:
            pipe.delete(self.handle.keys.snapshot(old))
            pipe.zrem(self.handle.keys.snapshots, old)

    def to_prune(self, client: Client, extra: int, kind: str = AUTOMATIC) -> list[str]:
        """Snapshots of ``kind`` ("automatic" or "pre-change") beyond ``snapshot_keep``
        (counting ``extra`` about to be added); each kind is kept by its own count."""
        automatic = [s for s in self.listed(client) if s.kind == kind]
        keep = max(self.handle.options.snapshot_keep - extra, 0)
        if len(automatic) <= keep:
            return []
        automatic.sort(key=lambda s: (s.created, s.id))
        return [s.id for s in automatic[: len(automatic) - keep]]

    def listed(self, client: Client) -> list[SnapshotInfo]:
        """Every snapshot read through ``client``, by version then creation time."""
        keys = self.handle.keys
        ids = [m.decode() for m in client.zrange(keys.snapshots, 0, -1)]
        if not ids:
            return []
        metas = [client.hget(keys.snapshot(i), "meta") for i in ids]
        out = [SnapshotInfo.from_dict(json.loads(m)) for m in metas if m is not None]
        out.sort(key=lambda s: (s.version, s.created, s.id))
        return out

    def create(self, reason: str, *, kind: str = REQUESTED, attempts: int = 20) -> SnapshotInfo:
        """Copy the current state into a new immutable snapshot.

        Parameters
        ----------
        reason : str
            Why (shown in listings); 1-500 characters.
        kind : str
            ``"requested"`` (kept until deleted) or ``"automatic"`` (subject to retention).

        Raises
        ------
        StateError
            When the model has no state yet.
        ModelNotFoundError
            When the model was deleted (nothing is written).
        ReplicasUnconfirmedError
            When replicas are required (:mod:`state.replicas`) and did not confirm the
            snapshot in time: it is written on the primary (a repeat takes a second one).
        """
        if not isinstance(reason, str) or not reason.strip() or len(reason) > 500:
            raise OptionsError("snapshot reason must be 1-500 characters")
        if kind not in (REQUESTED, AUTOMATIC):
            raise OptionsError(f"snapshot kind must be 'requested' or 'automatic', got {kind!r}")
        snapshot_id = self.next_id()
        for _ in range(attempts):
            with self.handle.redis.pipeline(transaction=True) as pipe:
                try:
                    info = self._write_copy(pipe, snapshot_id, reason, kind)
                except redis.WatchError:
                    continue  # a checkpoint or a delete moved the state under us
            if replica_requirement().active:
                self._confirm(info)
            return info
        raise VersionConflictError(
            f"snapshot of model {self.handle.model!r} kept racing checkpoints ({attempts} tries)"
        )

    def _confirm(self, info: SnapshotInfo) -> None:
        """Wait for the replicas to hold the snapshot's hash (its id is never reused)."""
        keys, model = self.handle.keys, self.handle.model
        confirm_replicas(
            self.handle.redis,
            keys.replica_fence,
            keys.snapshot(info.id),
            "exists",
            what=f"snapshot {info.id!r} of model {model!r}, version {info.version}",
            retry_hint=f"it is written and listed, a repeat takes another; {CHECK_REPLICAS}; "
            "after a failover, see that it is listed",
            repeatable=False,
        )

    def _write_copy(
        self, pipe: redis.client.Pipeline, snapshot_id: str, reason: str, kind: str
    ) -> SnapshotInfo:
        """Under WATCH of config and state: read the current state, write the snapshot."""
        handle = self.handle
        keys = handle.keys
        # a delete landing meanwhile makes this write nothing; a label change, a new copy
        pipe.watch(keys.config, keys.state, keys.labels_version)
        handle.check_alive(pipe.get(keys.config))
        data, raw_meta = pipe.get(keys.state), pipe.get(keys.state_meta)
        labels = stored_labels(pipe.hgetall(keys.labels))
        sketches = parse_sketches(pipe.hgetall(keys.label_words))
        if data is None or raw_meta is None:
            raise StateError(f"model {handle.model!r} has no state to snapshot yet")
        meta = json.loads(raw_meta)
        info = SnapshotInfo(
            id=snapshot_id,
            reason=reason,
            kind=kind,
            created=time.time(),
            version=int(meta["version"]),
            documents_learned=int(meta["documents_learned"]),
            weights=[float(w) for w in meta["weights"]],
            checksum=checksum(data),
            watermark=str(meta["watermark"]),
            size=len(data),
        )
        expired = self.to_prune(pipe, 1) if kind == AUTOMATIC else []
        pipe.multi()
        self.write(pipe, info, data, labels, sketches)
        self.prune(pipe, expired)
        pipe.execute()
        return info

    def list(self) -> list[SnapshotInfo]:
        """Every snapshot, by version then creation time."""
        return self.listed(self.handle.redis)

    def get(self, snapshot_id: str) -> SnapshotInfo:
        """One snapshot's metadata; :class:`SnapshotNotFoundError` when unknown."""
        raw = self.handle.redis.hget(self.handle.keys.snapshot(snapshot_id), "meta")
        if raw is None:
            raise self._missing(snapshot_id)
        return SnapshotInfo.from_dict(json.loads(raw))

    def data(self, snapshot_id: str) -> tuple[SnapshotInfo, bytes]:
        """Metadata and verified state bytes of a snapshot.

        Raises
        ------
        SnapshotNotFoundError
            When unknown.
        CorruptSnapshotError
            When the bytes do not match the recorded checksum.
        """
        raw_meta, data = self.handle.redis.hmget(
            self.handle.keys.snapshot(snapshot_id), ["meta", "state"]
        )
        if raw_meta is None:
            raise self._missing(snapshot_id)
        info = SnapshotInfo.from_dict(json.loads(raw_meta))
        if data is None:
            raise CorruptSnapshotError(f"snapshot {snapshot_id!r} has no state bytes")
        actual = checksum(data)
        if actual != info.checksum:
            raise CorruptSnapshotError(
                f"snapshot {snapshot_id!r} is corrupt: its bytes hash to {actual[:16]}..., "
                f"the recorded checksum is {info.checksum[:16]}...; refusing to use it"
            )
        return info, data

    def labels(self, snapshot_id: str) -> dict[int, dict[str, Any]] | None:
        """The labels hash a snapshot kept (group id -> label record), or None for a snapshot
        written before snapshots kept labels."""
        raw = self.handle.redis.hget(self.handle.keys.snapshot(snapshot_id), "labels")
        if raw is None:
            return None
        return {int(group): record for group, record in json.loads(raw).items()}

    def label_words(self, snapshot_id: str) -> dict[int, WordSketch] | None:
        """The word sketches a snapshot kept with its labels (group id -> sketch), or None for
        a snapshot written before snapshots kept them."""
        raw = self.handle.redis.hget(self.handle.keys.snapshot(snapshot_id), "label_words")
        if raw is None:
            return None
        return {
            int(group): WordSketch.from_dict(sketch) for group, sketch in json.loads(raw).items()
        }

    def state(self, snapshot_id: str) -> MixtureState:
        """A snapshot's state, checksum verified and decoded."""
        info, data = self.data(snapshot_id)
        return decode_snapshot(info.id, data)

    def delete(self, snapshot_id: str) -> None:
        """Delete a snapshot; :class:`SnapshotNotFoundError` when unknown."""
        pipe = self.handle.redis.pipeline(transaction=True)
        pipe.delete(self.handle.keys.snapshot(snapshot_id))
        pipe.zrem(self.handle.keys.snapshots, snapshot_id)
        deleted, _ = pipe.execute()
        if not deleted:
            raise self._missing(snapshot_id)

    def _missing(self, snapshot_id: str) -> SnapshotNotFoundError:
        return SnapshotNotFoundError(f"model {self.handle.model!r} has no snapshot {snapshot_id!r}")


def decode_snapshot(snapshot_id: str, data: bytes) -> MixtureState:
    """Decode verified snapshot bytes; :class:`CorruptSnapshotError` when they do not decode."""
    try:
        return state_from_bytes(data)
    except StateFormatError as exc:
        raise CorruptSnapshotError(f"snapshot {snapshot_id!r} does not decode: {exc}") from exc


def stored_labels(raw: Mapping[bytes, bytes]) -> dict[int, dict[str, Any]]:
    """The labels hash as read (``HGETALL``), group id -> label record."""
    return {int(group): json.loads(record) for group, record in raw.items()}
