"""One model's state in Redis: the API the HTTP service and the worker use.

The Redis protocol (also in DEVELOPERS.md, "Redis protocol"):

* **Stream.** :meth:`ModelStore.enqueue` runs one Lua call per document that does
  ``SET id:<client id> NX EX <id_ttl>`` and, only if that succeeded, ``XADD docs MAXLEN ~ ...``.
  The two happen atomically, so a client id seen within the window is never in the stream twice.
* **Checkpoint.** :meth:`ModelStore.commit_checkpoint` WATCHes ``version`` and ``heartbeat``,
  checks that the version is the one the worker loaded and that the worker still holds the
  lease, then in ONE MULTI writes the state bytes, version + 1, the watermark, the state
  summary, a history row, a lineage record, the XACK of every entry handled since the last
  checkpoint, dead letters, a due automatic snapshot (with retention), drift alerts, the age
  trim of the stream (never past the watermark) and a PUBLISH on ``notify``. If anything
  changed under the WATCH the transaction is dropped (:class:`VersionConflictError`); the worker
  reloads and carries on, and since nothing was acknowledged nothing is lost.
* **Snapshots** are immutable hashes (``meta`` JSON + ``state`` bytes) indexed by a sorted set
  scored by version. Retention only ever removes automatic snapshots.
* **Rollback** (:meth:`ModelStore.rollback`) verifies the snapshot's checksum, then under WATCH
  of ``version`` in one MULTI: a "pre-rollback" snapshot of the current state, the snapshot's
  state as current with version + 1 (lineage parent = the snapshot's version), and a ``replay``
  record. With replay the watermark is the snapshot's own, so the worker re-reads the stream
  from there by XRANGE (its gap fill) and skips entries inside the recorded ranges; without it
  the watermark is the stream's last id, so only new traffic is learned.
"""

from __future__ import annotations

import json
import os
import socket
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import redis

from mixture.drift import js_divergence, word_drift
from mixture.errors import InputError, StateFormatError
from mixture.serialize import checksum, state_from_bytes, state_to_bytes
from mixture.stats import MixtureState
from state.errors import (
    CorruptSnapshotError,
    ModelNotFoundError,
    OptionsError,
    SnapshotNotFoundError,
    StateError,
    VersionConflictError,
)
from state.keys import CONSUMER_GROUP, ModelKeys, validate_model_name
from state.options import ModelOptions
from state.records import (
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
    dumps,
)
from state.registry import ModelInfo, parse_model_info
from state.stream import ZERO_ID, SkipRanges, Undecodable, max_stream_id, parse_stream_id

MAX_CLIENT_ID_LENGTH = 256

# KEYS: docs, id key (or docs again when the id was generated), config.
# ARGV: id ttl ms, maxlen ("" = none), client id, text, metadata, received, "1" = check the id.
_ENQUEUE_LUA = """
if redis.call('EXISTS', KEYS[3]) == 0 then
  return redis.error_reply('NOMODEL the model does not exist')
end
if ARGV[7] == '1' and not redis.call('SET', KEYS[2], '1', 'NX', 'PX', ARGV[1]) then
  return false
end
if ARGV[2] ~= '' then
  return redis.call('XADD', KEYS[1], 'MAXLEN', '~', ARGV[2], '*',
                    'id', ARGV[3], 'text', ARGV[4], 'metadata', ARGV[5], 'received', ARGV[6])
end
return redis.call('XADD', KEYS[1], '*',
                  'id', ARGV[3], 'text', ARGV[4], 'metadata', ARGV[5], 'received', ARGV[6])
"""

# KEYS: heartbeat, worker_status. ARGV: worker, ttl ms, status JSON. 1 = holds the lease.
_LEASE_LUA = """
local holder = redis.call('GET', KEYS[1])
if holder == false then
  redis.call('SET', KEYS[1], ARGV[1], 'PX', ARGV[2])
elseif holder ~= ARGV[1] then
  return 0
else
  redis.call('PEXPIRE', KEYS[1], ARGV[2])
end
redis.call('SET', KEYS[2], ARGV[3], 'PX', ARGV[2])
return 1
"""

_RELEASE_LUA = """
if redis.call('GET', KEYS[1]) == ARGV[1] then
  redis.call('DEL', KEYS[1], KEYS[2])
  return 1
end
return 0
"""


@dataclass
class Checkpoint:
    """Everything one checkpoint writes (built by the worker, committed by the store)."""

    worker: str
    expected_version: int
    state: MixtureState
    watermark: str
    ack_ids: list[bytes | str]
    dead_letters: list[Undecodable] = field(default_factory=list)
    batch_documents: int = 0
    log_likelihood_per_token: float = float("nan")
    no_evidence: int = 0
    snapshot_reason: str | None = None
    alerts: list[dict[str, Any]] = field(default_factory=list)


def _summary(state: MixtureState) -> dict[str, Any]:
    weights = state.weights() if state.warmed_up else np.full(state.n_groups, 1 / state.n_groups)
    return {
        "documents_learned": int(state.documents_learned),
        "weights": [float(w) for w in weights],
        "warmed_up": bool(state.warmed_up),
    }


def _json(raw: bytes | None) -> Any:
    return None if raw is None else json.loads(raw)


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
        self._enqueue_script = redis.register_script(_ENQUEUE_LUA)
        self._lease_script = redis.register_script(_LEASE_LUA)
        self._release_script = redis.register_script(_RELEASE_LUA)

    @property
    def options(self) -> ModelOptions:
        return self.info.options

    # -- stream ------------------------------------------------------------------------------
    def ensure_group(self) -> None:
        """Create the consumer group (reading from the stream's start) if it is missing."""
        try:
            self.redis.xgroup_create(self.keys.docs, CONSUMER_GROUP, id="0", mkstream=True)
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise

    def enqueue(
        self,
        texts: Sequence[str],
        *,
        ids: Sequence[str | None] | None = None,
        metadata: Sequence[dict[str, Any] | None] | None = None,
        received: float | None = None,
    ) -> EnqueueResult:
        """Append documents to the stream; a client id already seen is not added again.

        Parameters
        ----------
        texts : sequence of str
            The documents.
        ids : sequence of (str or None), optional
            Client ids, idempotent within ``options.id_ttl_seconds``; None generates one.
        metadata : sequence of (dict or None), optional
            JSON-able objects stored with each document.
        received : float, optional
            Unix time to record (default: now).

        Raises
        ------
        InputError
            When an argument is malformed; nothing is written then.
        """
        if isinstance(texts, str):
            raise InputError("texts must be a sequence of strings, not one string")
        n = len(texts)
        if ids is not None and len(ids) != n:
            raise InputError(f"ids has {len(ids)} entries for {n} texts")
        if metadata is not None and len(metadata) != n:
            raise InputError(f"metadata has {len(metadata)} entries for {n} texts")
        encoded: list[tuple[str, str, bytes, bool]] = []
        for i, text in enumerate(texts):
            if not isinstance(text, str):
                raise InputError(f"texts[{i}] is {type(text).__name__}, expected str")
            client_id = None if ids is None else ids[i]
            given = client_id is not None
            if given:
                if not isinstance(client_id, str) or not client_id:
                    raise InputError(f"ids[{i}] must be a non-empty string")
                if len(client_id) > MAX_CLIENT_ID_LENGTH:
                    raise InputError(f"ids[{i}] is longer than {MAX_CLIENT_ID_LENGTH} characters")
            else:
                client_id = os.urandom(12).hex()
            meta = {} if metadata is None or metadata[i] is None else metadata[i]
            if not isinstance(meta, dict):
                raise InputError(f"metadata[{i}] must be an object")
            try:
                meta_json = dumps(meta)
            except (TypeError, ValueError) as exc:
                raise InputError(f"metadata[{i}] is not JSON-able: {exc}") from exc
            encoded.append((client_id, text, meta_json, given))
        now = repr(time.time() if received is None else float(received))
        ttl_ms = str(int(self.options.id_ttl_seconds * 1000))
        maxlen = self.options.stream_max_length
        pipe = self.redis.pipeline(transaction=False)
        limit = "" if maxlen is None else str(maxlen)
        for client_id, text, meta_json, given in encoded:
            id_key = self.keys.client_id(client_id) if given else self.keys.docs
            self._enqueue_script(
                keys=[self.keys.docs, id_key, self.keys.config],
                args=[ttl_ms, limit, client_id, text, meta_json, now, "1" if given else "0"],
                client=pipe,
            )
        try:
            results = pipe.execute() if encoded else []
        except redis.ResponseError as exc:
            if "NOMODEL" in str(exc):
                raise ModelNotFoundError(f"model {self.model!r} does not exist") from exc
            raise
        stream_ids = [None if r is None else r.decode() for r in results]
        return EnqueueResult(stream_ids, sum(1 for r in stream_ids if r is None))

    def stream_info(self) -> dict[str, Any]:
        """Length, first and last ids, consumer-group pending count, watermark."""
        pipe = self.redis.pipeline(transaction=False)
        pipe.xlen(self.keys.docs)
        pipe.xrange(self.keys.docs, count=1)
        pipe.xrevrange(self.keys.docs, count=1)
        pipe.get(self.keys.watermark)
        length, first, last, watermark = pipe.execute()
        pending = 0
        consumers = 0
        lag: int | None = None
        try:
            for group in self.redis.xinfo_groups(self.keys.docs):
                name = group.get("name", group.get(b"name"))
                if name in (CONSUMER_GROUP, CONSUMER_GROUP.encode()):
                    pending = int(group["pending"])
                    consumers = int(group["consumers"])
                    raw_lag = group.get("lag")  # Redis >= 7 only
                    lag = int(raw_lag) if raw_lag is not None else None
        except redis.ResponseError:
            pass
        return {
            "length": int(length),
            "first_id": first[0][0].decode() if first else None,
            "last_id": last[0][0].decode() if last else None,
            "pending": pending,
            "consumers": consumers,
            "lag": lag,  # entries not yet delivered to the group (None before Redis 7)
            "watermark": watermark.decode() if watermark else ZERO_ID,
        }

    def last_stream_id(self) -> str:
        """Id of the newest stream entry ("0-0" when empty)."""
        last = self.redis.xrevrange(self.keys.docs, count=1)
        return last[0][0].decode() if last else ZERO_ID

    def dead_letters(self, count: int = 100) -> list[dict[str, Any]]:
        """The newest dead letters, oldest first: id, source_id, reason, fields."""
        entries = self.redis.xrevrange(self.keys.dead_letters, count=count)
        out = []
        for entry_id, fields in reversed(entries):
            out.append(
                {
                    "id": entry_id.decode(),
                    "source_id": fields.get(b"source_id", b"").decode(),
                    "reason": fields.get(b"reason", b"").decode(),
                    "fields": json.loads(fields.get(b"fields", b"{}")),
                }
            )
        return out

    # -- current state -----------------------------------------------------------------------
    def version(self) -> int:
        """Current version (0 before the first checkpoint)."""
        raw = self.redis.get(self.keys.version)
        return int(raw) if raw else 0

    def current(self) -> CurrentState | None:
        """The current state bytes with version and watermark (read atomically)."""
        pipe = self.redis.pipeline(transaction=True)
        pipe.get(self.keys.version)
        pipe.get(self.keys.watermark)
        pipe.get(self.keys.state)
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
        """Small JSON summary of the current state (version, weights, documents, checksum)."""
        return _json(self.redis.get(self.keys.state_meta))

    def load_state(self) -> MixtureState | None:
        """The current state decoded, or None before the first checkpoint."""
        current = self.current()
        return None if current is None else state_from_bytes(current.data)

    def lineage(self, limit: int = 100) -> list[VersionRecord]:
        """The newest ``limit`` version records, oldest first."""
        rows = self.redis.lrange(self.keys.lineage, -limit, -1)
        return [VersionRecord.from_dict(json.loads(r)) for r in rows]

    def history(self, limit: int | None = None) -> list[HistoryRow]:
        """Drift-history rows, oldest first (the newest ``limit`` when given)."""
        start = 0 if limit is None else -int(limit)
        rows = self.redis.lrange(self.keys.history, start, -1)
        return [HistoryRow.from_dict(json.loads(r)) for r in rows]

    def replay_ranges(self) -> SkipRanges:
        """Skip ranges recorded by the last rollback (empty when none)."""
        raw = self.redis.get(self.keys.replay)
        if raw is None:
            return SkipRanges()
        d = json.loads(raw)
        return SkipRanges.from_dict(d.get("skip", {}))

    # -- lease / heartbeat -------------------------------------------------------------------
    def hold_lease(self, status: WorkerStatus) -> bool:
        """Take or renew the model's lease for ``status.worker``; False if another holds it."""
        ttl_ms = str(int(self.options.lease_seconds * 1000))
        held = self._lease_script(
            keys=[self.keys.heartbeat, self.keys.worker_status],
            args=[status.worker, ttl_ms, dumps(status.to_dict())],
        )
        return bool(held)

    def release_lease(self, worker: str) -> bool:
        """Give the lease up if ``worker`` holds it."""
        return bool(
            self._release_script(keys=[self.keys.heartbeat, self.keys.worker_status], args=[worker])
        )

    def lease_holder(self) -> str | None:
        """Name of the worker holding the model, or None."""
        raw = self.redis.get(self.keys.heartbeat)
        return raw.decode() if raw else None

    def worker_status(self) -> WorkerStatus | None:
        """What the worker holding the model last reported, or None when none holds it."""
        raw = self.redis.get(self.keys.worker_status)
        return None if raw is None else WorkerStatus.from_dict(json.loads(raw))

    # -- checkpoint --------------------------------------------------------------------------
    def commit_checkpoint(self, cp: Checkpoint) -> int:
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
            When the model was deleted meanwhile (nothing is written).
        """
        keys = self.keys
        options = self.options
        cp.state.watermark = cp.watermark
        data = state_to_bytes(cp.state)
        digest = checksum(data)
        summary = _summary(cp.state)
        now = time.time()
        snapshot_id = self._next_snapshot_id() if cp.snapshot_reason else None
        with self.redis.pipeline(transaction=True) as pipe:
            try:
                pipe.watch(keys.version, keys.heartbeat, keys.config)
                raw_version, holder = pipe.get(keys.version), pipe.get(keys.heartbeat)
                if not pipe.exists(keys.config):
                    raise ModelNotFoundError(f"model {self.model!r} was deleted")
                current_version = int(raw_version or 0)
                if current_version != cp.expected_version:
                    raise VersionConflictError(
                        f"model {self.model!r} is at version {current_version}, the worker "
                        f"loaded {cp.expected_version} (a rollback happened)"
                    )
                if holder is None or holder.decode() != cp.worker:
                    who = holder.decode() if holder else "nobody"
                    raise VersionConflictError(
                        f"worker {cp.worker!r} no longer holds model {self.model!r} ({who} does)"
                    )
                expired = self._snapshots_to_prune(pipe, extra=1 if snapshot_id else 0)
                new_version = current_version + 1
                meta = {
                    "version": new_version,
                    "watermark": cp.watermark,
                    "checksum": digest,
                    "size": len(data),
                    "time": now,
                    **summary,
                }
                row = HistoryRow(
                    time=now,
                    version=new_version,
                    documents_learned=summary["documents_learned"],
                    weights=summary["weights"],
                    log_likelihood_per_token=cp.log_likelihood_per_token,
                    no_evidence=cp.no_evidence,
                    batch_documents=cp.batch_documents,
                )
                record = VersionRecord(
                    version=new_version,
                    parent=current_version if current_version else None,
                    kind="checkpoint",
                    time=now,
                    watermark=cp.watermark,
                    documents_learned=summary["documents_learned"],
                )
                pipe.multi()
                pipe.set(keys.state, data)
                pipe.set(keys.version, new_version)
                pipe.set(keys.watermark, cp.watermark)
                pipe.set(keys.state_meta, dumps(meta))
                pipe.rpush(keys.history, dumps(row.to_dict()))
                pipe.ltrim(keys.history, -options.history_limit, -1)
                pipe.rpush(keys.lineage, dumps(record.to_dict()))
                pipe.ltrim(keys.lineage, -options.lineage_limit, -1)
                for start in range(0, len(cp.ack_ids), 10_000):
                    pipe.xack(keys.docs, CONSUMER_GROUP, *cp.ack_ids[start : start + 10_000])
                for letter in cp.dead_letters:
                    pipe.xadd(
                        keys.dead_letters,
                        letter.dead_letter_fields(),
                        maxlen=100_000,
                        approximate=True,
                    )
                if snapshot_id:
                    info = SnapshotInfo(
                        id=snapshot_id,
                        reason=cp.snapshot_reason or "automatic",
                        kind="automatic",
                        created=now,
                        version=new_version,
                        documents_learned=summary["documents_learned"],
                        weights=summary["weights"],
                        checksum=digest,
                        watermark=cp.watermark,
                        size=len(data),
                    )
                    self._write_snapshot(pipe, info, data)
                for old in expired:
                    pipe.delete(keys.snapshot(old))
                    pipe.zrem(keys.snapshots, old)
                for alert in cp.alerts:
                    pipe.xadd(
                        keys.alerts,
                        {k: str(v) for k, v in alert.items()},
                        maxlen=10_000,
                        approximate=True,
                    )
                if options.stream_max_age_seconds is not None:
                    cutoff_ms = int((now - options.stream_max_age_seconds) * 1000)
                    minid = cp.watermark
                    if parse_stream_id(minid) > (cutoff_ms, 0):
                        minid = f"{max(cutoff_ms, 0)}-0"
                    if minid != ZERO_ID:
                        pipe.xtrim(keys.docs, minid=minid, approximate=True)
                pipe.publish(keys.notify, str(new_version))
                pipe.execute()
            except redis.WatchError as exc:
                raise VersionConflictError(
                    f"model {self.model!r} changed during the checkpoint (rollback or lease)"
                ) from exc
        return new_version

    def acknowledge_up_to(self, watermark: str, count: int = 10_000) -> int:
        """XACK every pending entry at or below ``watermark`` (any consumer's)."""
        if watermark == ZERO_ID:
            return 0
        done = 0
        while True:
            pending = self.redis.xpending_range(
                self.keys.docs, CONSUMER_GROUP, min="-", max=watermark, count=count
            )
            if not pending:
                return done
            ids = [p["message_id"] for p in pending]
            done += int(self.redis.xack(self.keys.docs, CONSUMER_GROUP, *ids))
            if len(pending) < count:
                return done

    # -- snapshots ---------------------------------------------------------------------------
    def _next_snapshot_id(self) -> str:
        return f"snap-{int(self.redis.incr(self.keys.snapshot_seq)):06d}"

    def _write_snapshot(self, pipe: redis.client.Pipeline, info: SnapshotInfo, data: bytes) -> None:
        pipe.hset(
            self.keys.snapshot(info.id), mapping={"meta": dumps(info.to_dict()), "state": data}
        )
        pipe.zadd(self.keys.snapshots, {info.id: info.version})

    def _snapshots_to_prune(
        self, client: redis.Redis | redis.client.Pipeline, extra: int
    ) -> list[str]:
        """Automatic snapshots beyond ``snapshot_keep`` (counting ``extra`` about to be added)."""
        automatic = [s for s in self._list_snapshots(client) if s.kind == "automatic"]
        keep = self.options.snapshot_keep - extra
        if len(automatic) <= max(keep, 0):
            return []
        automatic.sort(key=lambda s: (s.created, s.id))
        cut = len(automatic) - max(keep, 0)
        return [s.id for s in automatic[:cut]]

    def _list_snapshots(self, client: redis.Redis | redis.client.Pipeline) -> list[SnapshotInfo]:
        ids = [m.decode() for m in client.zrange(self.keys.snapshots, 0, -1)]
        if not ids:
            return []
        metas = [client.hget(self.keys.snapshot(i), "meta") for i in ids]
        out = [SnapshotInfo.from_dict(json.loads(m)) for m in metas if m is not None]
        out.sort(key=lambda s: (s.version, s.created, s.id))
        return out

    def create_snapshot(self, reason: str, *, kind: str = "requested") -> SnapshotInfo:
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
        """
        if not isinstance(reason, str) or not reason.strip() or len(reason) > 500:
            raise OptionsError("snapshot reason must be 1-500 characters")
        if kind not in ("requested", "automatic"):
            raise OptionsError(f"snapshot kind must be 'requested' or 'automatic', got {kind!r}")
        snapshot_id = self._next_snapshot_id()
        pipe = self.redis.pipeline(transaction=True)
        pipe.get(self.keys.state)
        pipe.get(self.keys.state_meta)
        data, raw_meta = pipe.execute()
        if data is None or raw_meta is None:
            raise StateError(f"model {self.model!r} has no state to snapshot yet")
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
        with self.redis.pipeline(transaction=True) as write:
            self._write_snapshot(write, info, data)
            for old in self._snapshots_to_prune(self.redis, 1) if kind == "automatic" else []:
                write.delete(self.keys.snapshot(old))
                write.zrem(self.keys.snapshots, old)
            write.execute()
        return info

    def list_snapshots(self) -> list[SnapshotInfo]:
        """Every snapshot, by version then creation time."""
        return self._list_snapshots(self.redis)

    def get_snapshot(self, snapshot_id: str) -> SnapshotInfo:
        """One snapshot's metadata; :class:`SnapshotNotFoundError` when unknown."""
        raw = self.redis.hget(self.keys.snapshot(snapshot_id), "meta")
        if raw is None:
            raise SnapshotNotFoundError(f"model {self.model!r} has no snapshot {snapshot_id!r}")
        return SnapshotInfo.from_dict(json.loads(raw))

    def snapshot_bytes(self, snapshot_id: str) -> tuple[SnapshotInfo, bytes]:
        """Metadata and verified state bytes of a snapshot.

        Raises
        ------
        SnapshotNotFoundError
            When unknown.
        CorruptSnapshotError
            When the bytes do not match the recorded checksum or do not decode.
        """
        raw_meta, data = self.redis.hmget(self.keys.snapshot(snapshot_id), ["meta", "state"])
        if raw_meta is None:
            raise SnapshotNotFoundError(f"model {self.model!r} has no snapshot {snapshot_id!r}")
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

    def snapshot_state(self, snapshot_id: str) -> MixtureState:
        """A snapshot's state, checksum verified and decoded."""
        info, data = self.snapshot_bytes(snapshot_id)
        try:
            return state_from_bytes(data)
        except StateFormatError as exc:
            raise CorruptSnapshotError(f"snapshot {info.id!r} does not decode: {exc}") from exc

    def delete_snapshot(self, snapshot_id: str) -> None:
        """Delete a snapshot; :class:`SnapshotNotFoundError` when unknown."""
        pipe = self.redis.pipeline(transaction=True)
        pipe.delete(self.keys.snapshot(snapshot_id))
        pipe.zrem(self.keys.snapshots, snapshot_id)
        deleted, _ = pipe.execute()
        if not deleted:
            raise SnapshotNotFoundError(f"model {self.model!r} has no snapshot {snapshot_id!r}")

    # -- rollback ----------------------------------------------------------------------------
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
            Inclusive stream-id ranges not to learn during the replay.
        skip_received : sequence of [start, end]
            Inclusive received-time ranges (unix seconds) not to learn during the replay.

        Raises
        ------
        CorruptSnapshotError, SnapshotNotFoundError, OptionsError
        """
        if not replay and (skip_ids or skip_received):
            raise OptionsError("skip ranges need replay=True (without replay nothing is re-read)")
        info, data = self.snapshot_bytes(snapshot_id)
        try:
            restored = state_from_bytes(data)
        except StateFormatError as exc:
            raise CorruptSnapshotError(f"snapshot {snapshot_id!r} does not decode: {exc}") from exc
        # The rollback point is the stream's end now; entries added later are new traffic and
        # are learned. Serialising here keeps the (large) state out of the WATCH window.
        SkipRanges.build(skip_ids, skip_received)  # refuse bad ranges before anything else
        until = max_stream_id(self.last_stream_id(), info.watermark)
        watermark = info.watermark if replay else until
        restored.watermark = watermark
        restored.metadata = {**restored.metadata, "rollback": {"snapshot": snapshot_id}}
        new_data = state_to_bytes(restored)
        for _ in range(attempts):
            with self.redis.pipeline(transaction=True) as pipe:
                try:
                    pipe.watch(self.keys.version)
                    current_version = int(pipe.get(self.keys.version) or 0)
                    current_data = pipe.get(self.keys.state)
                    current_meta = _json(pipe.get(self.keys.state_meta))
                    new_version = current_version + 1
                    skip = SkipRanges.build(skip_ids, skip_received, until, new_version)
                    now = time.time()
                    safety = None
                    if current_data is not None and current_meta is not None:
                        safety = SnapshotInfo(
                            id=self._next_snapshot_id(),
                            reason=f"before rollback to {snapshot_id}",
                            kind="pre-rollback",
                            created=now,
                            version=current_version,
                            documents_learned=int(current_meta["documents_learned"]),
                            weights=[float(w) for w in current_meta["weights"]],
                            checksum=checksum(current_data),
                            watermark=str(current_meta["watermark"]),
                            size=len(current_data),
                        )
                    summary = _summary(restored)
                    record = VersionRecord(
                        version=new_version,
                        parent=info.version,
                        kind="rollback",
                        time=now,
                        watermark=watermark,
                        documents_learned=summary["documents_learned"],
                        snapshot_id=snapshot_id,
                        replaced=current_version,
                    )
                    result = RollbackResult(
                        version=new_version,
                        parent=info.version,
                        replaced_version=current_version,
                        snapshot_id=snapshot_id,
                        safety_snapshot_id=safety.id if safety else None,
                        replay=replay,
                        watermark=watermark,
                        skip_ids=list(skip.raw_ids),
                        skip_received=list(skip.received),
                        until=until,
                    )
                    pipe.multi()
                    if safety is not None and current_data is not None:
                        self._write_snapshot(pipe, safety, current_data)
                    pipe.set(self.keys.state, new_data)
                    pipe.set(self.keys.version, new_version)
                    pipe.set(self.keys.watermark, watermark)
                    pipe.set(
                        self.keys.state_meta,
                        dumps(
                            {
                                "version": new_version,
                                "watermark": watermark,
                                "checksum": checksum(new_data),
                                "size": len(new_data),
                                "time": now,
                                **summary,
                            }
                        ),
                    )
                    pipe.set(
                        self.keys.replay,
                        dumps({"result": result.to_dict(), "skip": skip.to_dict()}),
                    )
                    pipe.rpush(self.keys.lineage, dumps(record.to_dict()))
                    pipe.ltrim(self.keys.lineage, -self.options.lineage_limit, -1)
                    # the drift history shows the jump back to the snapshot's weights
                    row = HistoryRow(
                        time=now,
                        version=new_version,
                        documents_learned=summary["documents_learned"],
                        weights=summary["weights"],
                        log_likelihood_per_token=float("nan"),
                        no_evidence=0,
                        batch_documents=0,
                    )
                    pipe.rpush(self.keys.history, dumps(row.to_dict()))
                    pipe.ltrim(self.keys.history, -self.options.history_limit, -1)
                    pipe.publish(self.keys.notify, str(new_version))
                    pipe.execute()
                    return result
                except redis.WatchError:
                    continue
        raise VersionConflictError(
            f"rollback of model {self.model!r} kept racing checkpoints ({attempts} attempts)"
        )

    # -- drift -------------------------------------------------------------------------------
    def drift(
        self,
        reference: str | None = None,
        window: int | None = None,
        series_limit: int | None = None,
    ) -> DriftReport:
        """Weight series and divergence of the weights now against a reference.

        Parameters
        ----------
        reference : str, optional
            A snapshot id; adds the per-group word-distribution divergence
            (:func:`mixture.drift.word_drift`, groups aligned). None: the history row
            ``window`` checkpoints back.
        window : int, optional
            Checkpoints back (default ``options.drift_window``).
        series_limit : int, optional
            Newest history rows returned as the weight series (default: all that are kept).

        Raises
        ------
        StateError
            When there is no history yet.
        """
        window = self.options.drift_window if window is None else int(window)
        if window < 1:
            raise OptionsError(f"window must be >= 1, got {window}")
        series = self.history()
        threshold = self.options.drift_threshold
        summary = self.summary()
        if summary is None:
            raise StateError(f"model {self.model!r} has no state yet")
        now = np.asarray(summary["weights"], dtype=float)
        word_divergence = None
        if reference is None:
            if not series:
                raise StateError(f"model {self.model!r} has no drift history yet")
            ref_row = series[max(len(series) - 1 - window, 0)]
            label = f"window:{window}"
            ref = np.asarray(ref_row.weights, dtype=float)
        else:
            snap = self.get_snapshot(reference)
            ref = np.asarray(snap.weights, dtype=float)
            label = f"snapshot:{reference}"
            current_state = self.load_state()
            snap_state = self.snapshot_state(reference)
            if current_state is not None and current_state.warmed_up and snap_state.warmed_up:
                word_divergence = [float(v) for v in word_drift(snap_state, current_state)]
        value = float(js_divergence(now, ref))
        return DriftReport(
            reference=label,
            js_divergence=value,
            weights_now=[float(w) for w in now],
            weights_reference=[float(w) for w in ref],
            weight_change=[float(w) for w in now - ref],
            word_divergence=word_divergence,
            threshold=threshold,
            alert=value > threshold,
            series=series if series_limit is None else series[-int(series_limit) :],
        )

    def alert_count(self) -> int:
        """Number of alerts kept in the alerts stream."""
        return int(self.redis.xlen(self.keys.alerts))

    # -- group labels ------------------------------------------------------------------------
    def group_labels(self) -> dict[int, GroupLabel]:
        """Operator labels by group id (groups without one are absent)."""
        out: dict[int, GroupLabel] = {}
        for field_name, raw in self.redis.hgetall(self.keys.labels).items():
            d = json.loads(raw)
            group = int(field_name)
            out[group] = GroupLabel(
                group, d.get("label"), d.get("destination"), float(d.get("updated", 0.0))
            )
        return dict(sorted(out.items()))

    def labels_version(self) -> int:
        """Counter bumped by every label change (compare it to skip re-reading the labels)."""
        raw = self.redis.get(self.keys.labels_version)
        return int(raw) if raw else 0

    def set_group_label(self, group: int, label: str | None, destination: str | None) -> GroupLabel:
        """Set (or, with both None, clear) the label and destination of one group.

        Raises
        ------
        OptionsError
            When ``group`` is outside [0, K) or a text is empty or longer than 200 characters.
        """
        k = self.info.config.n_groups
        if isinstance(group, bool) or not isinstance(group, int) or not 0 <= group < k:
            raise OptionsError(f"group must be an integer in [0, {k}), got {group!r}")
        for name, value in (("label", label), ("destination", destination)):
            if value is not None and (
                not isinstance(value, str) or not value.strip() or len(value) > 200
            ):
                raise OptionsError(f"{name} must be 1-200 characters or null")
        record = GroupLabel(group, label, destination, time.time())
        pipe = self.redis.pipeline(transaction=True)
        if label is None and destination is None:
            pipe.hdel(self.keys.labels, str(group))
        else:
            pipe.hset(self.keys.labels, str(group), dumps(record.to_dict()))
        pipe.incr(self.keys.labels_version)
        pipe.execute()
        return record

    def alerts(self, count: int = 100) -> list[Alert]:
        """The newest ``count`` alerts, oldest first."""
        out = []
        for entry_id, f in reversed(self.redis.xrevrange(self.keys.alerts, count=count)):
            out.append(
                Alert(
                    id=entry_id.decode(),
                    time=float(f.get(b"time", b"0")),
                    kind=f.get(b"kind", b"").decode(),
                    reason=f.get(b"reason", b"").decode(),
                    value=float(f.get(b"value", b"nan")),
                    threshold=float(f.get(b"threshold", b"nan")),
                    version=int(f.get(b"version", b"0")),
                )
            )
        return out


def default_worker_name() -> str:
    """``<host>:<pid>``, unique enough among live workers."""
    return f"{socket.gethostname()}:{os.getpid()}"
