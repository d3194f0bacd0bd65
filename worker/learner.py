"""The learning loop: one consumer-group learner per model.

How it reads (exactly-once effect from at-least-once delivery)
-------------------------------------------------------------
The worker holds the model's lease (the ``heartbeat`` key, a TTL naming it) or waits on
standby. Holding it, it loads the current checkpoint; its *cursor* starts at the checkpoint's
watermark. It learns strictly in stream order after the cursor:

1. XREADGROUP ``>`` (count, block) delivers new entries. With a backlog (a full reply) the next
   XREADGROUP is sent before the current entries are learned, so Redis prepares it meanwhile;
   a read-ahead that is dropped (reload, error, shutdown) is covered by step 2.
2. If entries exist between the cursor and the first delivered one (delivered earlier to a
   consumer that died, read before an aborted checkpoint, or to be replayed after a rollback),
   they are fetched first with XRANGE ``(cursor, first)``. With nothing delivered, XRANGE
   ``(cursor, +]`` catches up the same way, so a replay needs no new traffic.
3. Entries at or below the cursor are acknowledged and never learned again.
4. Undecodable entries become dead letters; entries inside a rollback's skip ranges are passed
   over; both are acknowledged.
5. Documents are learned in units of ``batch_size`` (``OnlineLearner.learn``); a partial unit is
   learned after ``flush_partial_seconds`` without new traffic (or never, when None).

The watermark is the last entry such that every entry up to it is handled. A checkpoint
(``ModelStore.commit_checkpoint``) writes state, version + 1, watermark, history row, lineage
record and the XACK of the handled entries in one MULTI under WATCH of version and lease. When
the WATCH fails (a rollback, or the lease moved) the in-memory work is dropped and the worker
reloads: nothing was acknowledged and the watermark did not move, so the entries are re-read.
Recovery never depends on the pending-entries list: XAUTOCLAIM and the XPENDING sweep only keep
it tidy, the XRANGE from the watermark is what guarantees that nothing is lost.
"""

from __future__ import annotations

import contextlib
import logging
import os
import socket
import threading
import time
from collections import deque
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import redis

from mixture.drift import js_divergence
from mixture.online import BatchReport, OnlineLearner
from mixture.serialize import state_from_bytes
from state.connection import redis_from_url
from state.errors import ModelNotFoundError, VersionConflictError
from state.keys import CONSUMER_GROUP
from state.options import ModelOptions
from state.records import WorkerStatus
from state.store import Checkpoint, ModelStore, default_worker_name
from state.stream import ZERO_ID, Document, SkipRanges, Undecodable, decode_entry, parse_stream_id

log = logging.getLogger(__name__)

_RETRYABLE = (redis.ConnectionError, redis.TimeoutError, redis.BusyLoadingError, OSError)


@dataclass
class _Pending:
    """Entries read after the watermark and not yet handled, in stream order.

    Two parallel lists: the stream ids as read, and per entry its text, an Undecodable, or None
    (skipped by a replay). ``others`` counts the entries that are not texts, so the common case
    (texts only) cuts units by slicing.
    """

    ids: list[bytes] = field(default_factory=list)
    items: list[str | Undecodable | None] = field(default_factory=list)
    documents: int = 0
    others: int = 0

    def clear(self) -> None:
        self.ids.clear()
        self.items.clear()
        self.documents = 0
        self.others = 0


class Worker:
    """Learns one model from its Redis stream; run in a thread or as a process.

    Parameters
    ----------
    redis : redis.Redis or str
        A client (``decode_responses=False``) or a Redis URL.
    model : str
        Registered model name.
    name : str, optional
        Consumer and lease name (default ``<host>:<pid>:<random>``).
    options : ModelOptions, optional
        Override the model's stored options (tests, benchmarks).

    Examples
    --------
    >>> worker = Worker(client, "inbox")              # doctest: +SKIP
    >>> thread = threading.Thread(target=worker.run); thread.start()
    >>> worker.stop(); thread.join()
    """

    def __init__(
        self,
        redis: redis.Redis | str,
        model: str,
        *,
        name: str | None = None,
        options: ModelOptions | None = None,
    ) -> None:
        self.redis = redis_from_url(redis) if isinstance(redis, str) else redis
        self.store = ModelStore(self.redis, model)
        self.model = model
        self.options = options or self.store.options
        self.config = self.store.info.config
        self.name = name or f"{default_worker_name()}:{os.urandom(3).hex()}"
        self._stop = threading.Event()
        self._loaded = False
        self.learner: OnlineLearner | None = None
        self.version = 0
        self.cursor = ZERO_ID
        self.handled = ZERO_ID  # the watermark to write: every entry up to it is handled
        self._committed = ZERO_ID  # the watermark of the last checkpoint
        self.skip = SkipRanges()
        self._pending = _Pending()
        self._prefetch: Any = None  # a connection whose XREADGROUP reply is not read yet
        self._ack_ids: list[bytes | str] = []
        self._dead: list[Undecodable] = []
        self._report = BatchReport()
        self._documents_since_checkpoint = 0
        self._last_checkpoint = time.monotonic()
        self._last_arrival = time.monotonic()
        self._last_lease = 0.0
        self._last_claim = time.monotonic()
        self._recent_weights: deque[list[float]] = deque(maxlen=self.options.drift_window)
        self._last_auto_snapshot_docs = 0
        self._last_auto_snapshot_time = time.time()
        self.holding = False
        self.checkpoints = 0
        self.conflicts = 0
        self.reconnects = 0
        self.errors = 0
        self.deleted = False

    # -- public ------------------------------------------------------------------------------
    def _log_fields(self) -> dict[str, object]:
        """Structured fields for JSON log lines (service.logs prints them)."""
        return {"model": self.model, "worker": self.name, "version": self.version}

    def stop(self) -> None:
        """Ask the loop to finish its batch, checkpoint and return (thread-safe)."""
        self._stop.set()

    @property
    def stopping(self) -> bool:
        return self._stop.is_set()

    def run(self) -> None:
        """Learn until :meth:`stop`; survives lost connections (retry with backoff)."""
        backoff = 0.1
        log.info("worker %s starting on model %r", self.name, self.model, extra=self._log_fields())
        while not self._stop.is_set():
            try:
                self.run_once()
                backoff = 0.1
            except _RETRYABLE as exc:
                self.reconnects += 1
                log.warning(
                    "worker %s lost Redis (%s: %s); retrying in %.1fs",
                    self.name,
                    type(exc).__name__,
                    exc,
                    backoff,
                    extra=self._log_fields(),
                )
                self._drop_work()
                self._stop.wait(backoff)
                backoff = min(backoff * 2, 5.0)
            except Exception:
                # a bug or a Redis-side surprise must not kill the loop silently: log it,
                # drop the uncommitted work (nothing was acknowledged) and start over
                self.errors += 1
                log.exception(
                    "worker %s: unexpected error; reloading in %.1fs",
                    self.name,
                    backoff,
                    extra=self._log_fields(),
                )
                self._drop_work()
                self._stop.wait(backoff)
                backoff = min(backoff * 2, 5.0)
        self._shutdown()

    def run_once(self) -> int:
        """One step: keep the lease, read, learn, checkpoint when due. Returns docs learned."""
        if not self._keep_lease():
            self._stop.wait(min(1.0, self.options.lease_seconds / 3))
            return 0
        if not self._loaded:
            self._load()
        elif not self._same_version():
            self._drop_work()
            self._load()
        if self.deleted:
            return 0
        learned = self._read_and_learn()
        if self._checkpoint_due():
            self.checkpoint()
        self._maybe_tidy_pending()
        return learned

    def checkpoint(self) -> bool:
        """Commit what was handled since the last checkpoint. False if nothing to write."""
        if self.learner is None:
            return False
        if self.handled == self._committed and not self._dead:
            # only redeliveries at or below the watermark: acknowledge, no new version
            if self._ack_ids:
                self.redis.xack(self.store.keys.docs, CONSUMER_GROUP, *self._ack_ids)
                self._ack_ids.clear()
            self._last_checkpoint = time.monotonic()
            return False
        state = self.learner.state
        # renew the lease first: a long step (a big warm-up fit) may have outlived its TTL; if
        # nobody took the model meanwhile, the work is still ours to commit
        if not self.store.hold_lease(self._status("learning" if state.warmed_up else "warming-up")):
            log.warning(
                "worker %s lost the lease of model %r before its checkpoint",
                self.name,
                self.model,
                extra=self._log_fields(),
            )
            self.holding = False
            self._drop_work()
            return False
        self._last_lease = time.monotonic()
        alerts = self._drift_alerts(state)
        snapshot_reason = self._snapshot_due(state)
        cp = Checkpoint(
            worker=self.name,
            expected_version=self.version,
            state=state,
            watermark=self.handled,
            ack_ids=list(self._ack_ids),
            dead_letters=list(self._dead),
            batch_documents=self._documents_since_checkpoint,
            log_likelihood_per_token=self._report.log_likelihood_per_token,
            no_evidence=self._report.no_evidence,
            snapshot_reason=snapshot_reason,
            alerts=alerts,
        )
        try:
            self.version = self.store.commit_checkpoint(cp)
        except ModelNotFoundError:
            self._stop_for_deletion()
            self._drop_work()
            return False
        except VersionConflictError as exc:
            self.conflicts += 1
            self._last_lease = 0.0  # re-check the lease at the next step (it may have moved)
            log.info("worker %s: %s; reloading", self.name, exc, extra=self._log_fields())
            self._drop_work()
            return False
        self.checkpoints += 1
        self._committed = self.handled
        if state.warmed_up:
            self._recent_weights.append([float(w) for w in state.weights()])
        if snapshot_reason:
            self._last_auto_snapshot_docs = state.documents_learned
            self._last_auto_snapshot_time = time.time()
        self._ack_ids.clear()
        self._dead.clear()
        self._report = BatchReport()
        self._documents_since_checkpoint = 0
        self._last_checkpoint = time.monotonic()
        return True

    def _stop_for_deletion(self) -> None:
        log.warning(
            "worker %s: model %r was deleted; stopping",
            self.name,
            self.model,
            extra=self._log_fields(),
        )
        self.deleted = True
        self._stop.set()

    def _same_version(self) -> bool:
        """True while the model's version is the one loaded (a rollback moves it)."""
        pipe = self.redis.pipeline(transaction=False)
        pipe.get(self.store.keys.version)
        pipe.exists(self.store.keys.config)
        raw_version, exists = pipe.execute()
        if not exists:
            self._stop_for_deletion()
            return True
        version = int(raw_version or 0)
        if version != self.version:
            log.info(
                "worker %s: model %r moved to version %d (loaded %d); reloading",
                self.name,
                self.model,
                version,
                self.version,
                extra=self._log_fields(),
            )
            return False
        return True

    # -- lease -------------------------------------------------------------------------------
    def _status(self, phase: str) -> WorkerStatus:
        state = self.learner.state if self.learner is not None else None
        return WorkerStatus(
            worker=self.name,
            pid=os.getpid(),
            host=socket.gethostname(),
            time=time.time(),
            version=self.version,
            documents_learned=int(state.documents_learned) if state is not None else 0,
            state=phase,
        )

    def _keep_lease(self) -> bool:
        now = time.monotonic()
        if self.holding and now - self._last_lease < self.options.lease_seconds / 3:
            return True
        phase = "learning"
        if self.learner is not None and not self.learner.state.warmed_up:
            phase = "warming-up"
        held = self.store.hold_lease(self._status(phase))
        if held and not self.holding:
            log.info("worker %s holds model %r", self.name, self.model, extra=self._log_fields())
            self._loaded = False  # (re)load: another worker may have written meanwhile
        elif not held and self.holding:
            log.warning(
                "worker %s lost the lease of model %r",
                self.name,
                self.model,
                extra=self._log_fields(),
            )
            self._drop_work()
        self.holding = held
        self._last_lease = now
        return held

    # -- loading -----------------------------------------------------------------------------
    def _load(self) -> None:
        if not self.redis.exists(self.store.keys.config):
            self._stop_for_deletion()
            return
        self.store.ensure_group()
        current = self.store.current()
        if current is None:
            self.learner = OnlineLearner(self.config, seed=self.options.seed)
            self.version = 0
            self.cursor = ZERO_ID
        else:
            state = state_from_bytes(current.data)
            self.learner = OnlineLearner.from_state(state)
            self.version = current.version
            self.cursor = current.watermark
            state.watermark = current.watermark
        self.handled = self.cursor
        self._committed = self.cursor
        self.skip = self.store.replay_ranges()
        self._pending.clear()
        self._ack_ids.clear()
        self._dead.clear()
        self._report = BatchReport()
        self._documents_since_checkpoint = 0
        self._recent_weights.clear()
        # the drift window never reaches back across a rollback (the spoiled state's weights)
        rollbacks = [r.version for r in self.store.lineage(1000) if r.kind == "rollback"]
        since = max(rollbacks, default=0)
        for row in self.store.history(self.options.drift_window):
            if row.version >= since:
                self._recent_weights.append(row.weights)
        autos = [s for s in self.store.list_snapshots() if s.automatic]
        if autos:
            last = max(autos, key=lambda s: s.created)
            self._last_auto_snapshot_docs = last.documents_learned
            self._last_auto_snapshot_time = last.created
        else:
            self._last_auto_snapshot_docs = (
                self.learner.state.documents_learned if current is not None else 0
            )
            self._last_auto_snapshot_time = time.time()
        self.store.acknowledge_up_to(self.cursor)
        self._loaded = True
        log.info(
            "worker %s loaded model %r at version %d, watermark %s",
            self.name,
            self.model,
            self.version,
            self.cursor,
            extra=self._log_fields(),
        )

    def _drop_work(self) -> None:
        """Forget everything not checkpointed; the next step reloads from Redis."""
        self._loaded = False
        self.learner = None
        self._drop_prefetch()
        self._pending.clear()
        self._ack_ids.clear()
        self._dead.clear()

    # -- reading -----------------------------------------------------------------------------
    def _read_and_learn(self) -> int:
        opts = self.options
        block = opts.read_block_ms
        if self._pending.documents and opts.flush_partial_seconds is not None:
            block = min(block, max(int(opts.flush_partial_seconds * 1000), 1))
        delivered = self._xreadgroup(block)
        learned = 0
        if delivered:
            first = delivered[0][0].decode()
            learned += self._catch_up(until=first)
            if len(delivered) >= opts.read_count and not self._stop.is_set():
                # Only now: Redis runs commands in order, and the XRANGE above would otherwise
                # wait behind this read instead of the read running beside the learning below.
                self._send_prefetch(block)
            learned += self._take(delivered)
        else:
            learned += self._catch_up(until=None)
        if (
            self._pending.documents
            and opts.flush_partial_seconds is not None
            and time.monotonic() - self._last_arrival >= opts.flush_partial_seconds
        ):
            learned += self._learn_units(flush=True)
        return learned

    def _catch_up(self, until: str | None) -> int:
        """XRANGE the entries after the cursor and before ``until`` (or to the end)."""
        learned = 0
        maximum = "+" if until is None else f"({until}"
        while not self._stop.is_set():
            entries = self.redis.xrange(
                self.store.keys.docs,
                min=f"({self.cursor}",
                max=maximum,
                count=self.options.read_count,
            )
            if not entries:
                return learned
            learned += self._take(entries)
            if len(entries) < self.options.read_count or until is None:
                return learned
        return learned

    def _xreadgroup(self, block: int) -> list[Any]:
        """XREADGROUP ``>`` with the reply left as Redis sent it: ``[[id, [f, v, ...]], ...]``.

        redis-py's reply conversion (a dict per entry) costs more than the read itself, so the
        command goes over a pooled connection without it. Works with RESP2 and RESP3 replies.

        When a reply is full (a backlog), the caller sends the next XREADGROUP before learning
        this one (:meth:`_send_prefetch`) and its reply is read here on the next call: Redis
        prepares it on its own core while this one learns. Its entries are in this consumer's
        pending list; if the reply is ever dropped (reload, error, shutdown) they are not
        lost, because reading always catches up from the cursor with XRANGE (step 2 of the
        module docstring).
        """
        pool = self.redis.connection_pool
        connection = self._prefetch
        self._prefetch = None
        try:
            if connection is None:
                connection = pool.get_connection()
                connection.send_command(*self._xreadgroup_args(block))
            reply = connection.read_response()
        except BaseException:
            if connection is not None:
                connection.disconnect()  # a half-read reply must not reach the next user
            raise
        finally:
            if connection is not None:
                pool.release(connection)
        if not reply:
            return []
        # RESP3: {stream: entries}; RESP2: [[stream, entries]]
        return next(iter(reply.values())) if isinstance(reply, dict) else reply[0][1]

    def _xreadgroup_args(self, block: int) -> list[Any]:
        args: list[Any] = [
            "XREADGROUP",
            "GROUP",
            CONSUMER_GROUP,
            self.name,
            "COUNT",
            self.options.read_count,
        ]
        if block > 0:
            args += ["BLOCK", block]
        args += ["STREAMS", self.store.keys.docs, ">"]
        return args

    def _send_prefetch(self, block: int) -> None:
        pool = self.redis.connection_pool
        connection = pool.get_connection()
        try:
            connection.send_command(*self._xreadgroup_args(block))
        except _RETRYABLE:
            connection.disconnect()
            pool.release(connection)  # no prefetch this time; the next read sends its own
            return
        self._prefetch = connection

    def _drop_prefetch(self) -> None:
        """Forget a read in flight (its entries are re-read by the XRANGE catch-up)."""
        connection, self._prefetch = self._prefetch, None
        if connection is not None:
            connection.disconnect()
            self.redis.connection_pool.release(connection)

    def _take(self, entries: list[Any]) -> int:
        """Queue entries after the cursor, acknowledge the rest, learn full units."""
        # entries come sorted by id: only a leading run can be at or below the cursor
        cursor = parse_stream_id(self.cursor)
        start = 0
        while start < len(entries) and parse_stream_id(entries[start][0]) <= cursor:
            self._ack_ids.append(entries[start][0].decode())  # redelivered: already handled
            start += 1
        fresh = start < len(entries)
        skip = self.skip
        skipping = bool(skip)
        pending = self._pending
        if fresh and not skipping:
            rest = entries[start:] if start else entries
            texts = _plain_texts(rest)
            if texts is not None:  # the common case, in three list comprehensions
                pending.ids.extend([entry[0] for entry in rest])
                pending.items.extend(texts)
                pending.documents += len(texts)
                self.cursor = entries[-1][0].decode()
                self._last_arrival = time.monotonic()
                return self._learn_units(flush=False)
        add_id, add_item = pending.ids.append, pending.items.append
        documents = others = 0
        for raw_id, fields in entries[start:]:
            if type(fields) is list:  # a raw reply: [field, value, ...]
                if (
                    len(fields) == 8
                    and fields[2] == b"text"
                    and fields[4] == b"metadata"
                    and fields[5] == b"{}"
                    and not skipping
                ):
                    try:  # our own enqueue's layout with no metadata: the text is all we need
                        text = fields[3].decode("utf-8")
                    except UnicodeDecodeError:
                        pass
                    else:
                        add_id(raw_id)
                        add_item(text)
                        documents += 1
                        continue
                fields = dict(zip(fields[::2], fields[1::2], strict=False))
            elif fields is None:  # an entry deleted after delivery
                fields = {}
            raw_text = fields.get(b"text")
            raw_meta = fields.get(b"metadata")
            if raw_text is not None and not skipping and (not raw_meta or raw_meta == b"{}"):
                try:  # fast path: plain text, no metadata to check, no replay filter
                    text = raw_text.decode("utf-8")
                except UnicodeDecodeError:
                    pass
                else:
                    add_id(raw_id)
                    add_item(text)
                    documents += 1
                    continue
            stream_id = raw_id.decode()
            item = decode_entry(stream_id, fields)
            add_id(raw_id)
            if isinstance(item, Document) and not (
                skipping and skip.skips(stream_id, item.received)
            ):
                add_item(item.text)
                documents += 1
            else:
                add_item(item if isinstance(item, Undecodable) else None)
                others += 1
        pending.documents += documents
        pending.others += others
        if fresh:
            self.cursor = entries[-1][0].decode()
        if fresh:
            self._last_arrival = time.monotonic()
        return self._learn_units(flush=False)

    def _learn_units(self, flush: bool) -> int:
        """Learn whole units of batch_size documents (and the partial rest when flushing)."""
        assert self.learner is not None
        unit = self.config.batch_size
        pending = self._pending
        learned = 0
        while pending.documents >= unit or (flush and pending.documents):
            take = min(unit, pending.documents)
            if pending.others == 0:  # texts only: the unit is a slice
                cut = take
                texts = pending.items[:take]
            else:
                texts = []
                cut = 0
                for cut, item in enumerate(pending.items):  # noqa: B007
                    if isinstance(item, str):
                        texts.append(item)
                        if len(texts) == take:
                            break
                cut += 1
                # entries that carry no learning right after the unit are handled with it
                while cut < len(pending.items) and not isinstance(pending.items[cut], str):
                    cut += 1
            report = self.learner.learn(texts)  # type: ignore[arg-type]
            self._report = self._report.merge(report)
            self._documents_since_checkpoint += len(texts)
            learned += len(texts)
            self._handle(cut)
            pending.documents -= len(texts)
        if not pending.documents and pending.ids:
            self._handle(len(pending.ids))
        return learned

    def _handle(self, cut: int) -> None:
        """Mark the first ``cut`` pending entries handled: to acknowledge, dead letters out."""
        pending = self._pending
        self._ack_ids.extend(pending.ids[:cut])
        if pending.others:
            for stream_id, item in zip(pending.ids[:cut], pending.items[:cut], strict=True):
                if isinstance(item, str):
                    continue
                pending.others -= 1
                if isinstance(item, Undecodable):
                    log.warning(
                        "model %r: entry %s to dead letters: %s",
                        self.model,
                        stream_id.decode(),
                        item.reason,
                        extra=self._log_fields(),
                    )
                    self._dead.append(item)
        if cut:
            self.handled = pending.ids[cut - 1].decode()
            del pending.ids[:cut]
            del pending.items[:cut]

    # -- checkpoint policy -------------------------------------------------------------------
    def _checkpoint_due(self) -> bool:
        if len(self._ack_ids) == 0 and not self._dead:
            return False
        if self._documents_since_checkpoint >= self.options.checkpoint_documents:
            return True
        return time.monotonic() - self._last_checkpoint >= self.options.checkpoint_seconds

    def _snapshot_due(self, state: object) -> str | None:
        opts = self.options
        learner_state = self.learner.state if self.learner is not None else None
        if learner_state is None or not learner_state.warmed_up:
            return None
        since_docs = learner_state.documents_learned - self._last_auto_snapshot_docs
        if (
            opts.snapshot_every_documents is not None
            and since_docs >= opts.snapshot_every_documents
        ):
            return f"automatic: {since_docs} documents since the last automatic snapshot"
        since = time.time() - self._last_auto_snapshot_time
        if opts.snapshot_every_seconds is not None and since >= opts.snapshot_every_seconds:
            return f"automatic: {since:.0f}s since the last automatic snapshot"
        return None

    def _drift_alerts(self, state: object) -> list[dict[str, object]]:
        learner_state = self.learner.state if self.learner is not None else None
        if learner_state is None or not learner_state.warmed_up or not self._recent_weights:
            return []
        reference = np.asarray(self._recent_weights[0], dtype=float)
        now = learner_state.weights()
        if reference.shape != now.shape:
            return []
        value = float(js_divergence(now, reference))
        threshold = self.options.drift_threshold
        alarmed = bool(learner_state.metadata.get("drift_alarm", False))
        alerts: list[dict[str, object]] = []
        if value > threshold and not alarmed:
            change = now - reference
            group = int(np.argmax(np.abs(change)))
            alerts.append(
                {
                    "time": time.time(),
                    "kind": "weight_drift",
                    "reason": (
                        f"JS divergence of the mixture weights over the last "
                        f"{len(self._recent_weights)} checkpoints is {value:.4f} > {threshold}; "
                        f"largest change: group {group} {reference[group]:.3f} -> "
                        f"{now[group]:.3f}"
                    ),
                    "value": value,
                    "threshold": threshold,
                    "version": self.version + 1,
                }
            )
            learner_state.metadata["drift_alarm"] = True
        elif value <= threshold and alarmed:
            learner_state.metadata["drift_alarm"] = False
        return alerts

    # -- housekeeping ------------------------------------------------------------------------
    def _maybe_tidy_pending(self) -> None:
        """Claim a dead consumer's idle entries and acknowledge what the watermark covers."""
        idle = self.options.claim_idle_seconds
        if time.monotonic() - self._last_claim < max(idle / 2, 1.0):
            return
        self._last_claim = time.monotonic()
        keys = self.store.keys
        watermark = parse_stream_id(self.handled)
        start = "0-0"
        while True:
            reply = self.redis.xautoclaim(
                keys.docs,
                CONSUMER_GROUP,
                self.name,
                min_idle_time=int(idle * 1000),
                start_id=start,
                count=1000,
            )
            # [next start, [(id, fields), ...]] (+ deleted ids on Redis 7)
            next_start, claimed = reply[0], reply[1]
            covered = [entry[0] for entry in claimed if parse_stream_id(entry[0]) <= watermark]
            if covered:
                self.redis.xack(keys.docs, CONSUMER_GROUP, *covered)
            start = next_start.decode() if isinstance(next_start, bytes) else str(next_start)
            if start == "0-0":
                break
        try:
            for consumer in self.redis.xinfo_consumers(keys.docs, CONSUMER_GROUP):
                name = consumer["name"]
                name = name.decode() if isinstance(name, bytes) else str(name)
                if (
                    name != self.name
                    and int(consumer["pending"]) == 0
                    and int(consumer["idle"]) > idle * 1000
                ):
                    self.redis.xgroup_delconsumer(keys.docs, CONSUMER_GROUP, name)
        except redis.ResponseError:
            pass

    def _shutdown(self) -> None:
        """Finish: learn a partial unit when latency mode is on, checkpoint, release the lease."""
        self._drop_prefetch()
        if self.deleted:
            with contextlib.suppress(*_RETRYABLE):
                self.store.release_lease(self.name)  # leave no key of a deleted model behind
            self.holding = False
            log.info("worker %s stopped: model deleted", self.name, extra=self._log_fields())
            return
        try:
            if self.holding and self.learner is not None:
                if self.options.flush_partial_seconds is not None and self._pending.documents:
                    self._learn_units(flush=True)
                self.checkpoint()
            if self.holding:
                self.store.release_lease(self.name)
                self.holding = False
        except _RETRYABLE as exc:
            log.warning(
                "worker %s could not checkpoint at shutdown (%s); the entries stay "
                "unacknowledged and will be learned by the next worker",
                self.name,
                exc,
                extra=self._log_fields(),
            )
        log.info(
            "worker %s stopped (%d checkpoints)",
            self.name,
            self.checkpoints,
            extra=self._log_fields(),
        )


def _plain_texts(entries: list[Any]) -> list[str] | None:
    """The texts of raw entries in our enqueue's layout with no metadata, else None.

    None (take the per-entry path) when any entry has another layout, metadata to check, or
    text that is not UTF-8.
    """
    if not all(
        [
            type(fields) is list
            and len(fields) == 8
            and fields[2] == b"text"
            and fields[4] == b"metadata"
            and fields[5] == b"{}"
            for _, fields in entries
        ]
    ):
        return None
    try:
        return [fields[3].decode("utf-8") for _, fields in entries]
    except UnicodeDecodeError:
        return None


__all__ = ["Worker"]
