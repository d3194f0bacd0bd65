"""The learning loop: one reader per model, reading its stream from the watermark.

How it reads (exactly-once effect, one read path)
-------------------------------------------------
The worker holds the model's lease (the ``heartbeat`` key, a TTL naming it) or waits on
standby. Holding it, it loads the current checkpoint; its *cursor* starts at the checkpoint's
watermark. Every step reads ONE page, ``XREAD COUNT read_count BLOCK read_block_ms STREAMS
docs <cursor>`` (:class:`state.reader.PageReader`), and learns it strictly in stream order
(after a full page the next page's read is sent before the page is learned, and used only if
the cursor is still that page's last id: the cursor alone says what comes next):

1. Live traffic, the catch-up after a restart and the replay after a rollback (which moves the
   watermark back to the snapshot's) are the same read: pages after the cursor.
2. A reload (a rollback, the lease regained), an error or a shutdown drops nothing that
   matters: the next read starts from the cursor of the state loaded.
3. Undecodable entries become dead letters; entries inside a rollback's skip ranges
   (``ModelStore.replay_ranges``) are passed over, entry by entry.
4. Documents are learned in units of ``batch_size`` (``OnlineLearner.learn``); a partial unit is
   learned after ``flush_partial_seconds`` without new traffic (or never, when None: then the
   state is a function of the stream alone).
5. Each step renews the lease when a third of it has passed and checkpoints when the policy
   says so (``checkpoint_documents`` / ``checkpoint_seconds``), so a catch-up or a replay of
   a million entries holds the lease and commits its progress page after page instead of
   being taken over by the standby and thrown away.

Corrections and examples (labelled entries)
-------------------------------------------
An entry of kind ``correction`` (an operator's correction or an example) is learned with
``OnlineLearner.learn_labelled``, one of kind ``withdraw`` with ``withdraw_labelled``
(``state.stream``). Where in the stream they take effect is fixed by the stream alone: a
labelled entry with no document pending before it (every earlier document is in a learned
unit) takes effect at once; one read while documents of an incomplete unit are pending takes
effect right after that unit is learned, before the next. So the state is the same whatever
the read page size, and equal to the core fed the same units and labelled items in that
order. The watermark moves past a labelled entry only once it is applied, and the checkpoint's
MULTI carries its effect with the watermark: a crash before it leaves nothing, the next worker
reads the entry again (and a repeat would be a no-op anyway: the core is idempotent per id).
Labelled entries are never passed over by a rollback's skip rules (an operator's correction is
not junk), so a replay relearns them. One the core refuses (a group retired or merged since
it was queued, the labelled limit reached) becomes a dead letter with the core's reason.

For a correction of a document already learned as an unlabelled one, the worker keeps in
``state.metadata`` a bounded record of its recent units (``state.corrections``): the stream id
of each unit's last document, its size, step size and ``log_forgetting`` after it, and the
warm-up's; the API reads it to say how much of the document's unlabelled weight remains.

Groups that change
------------------
A learning unit whose decisions changed the groups (``BatchReport.events``: births, merges,
retirements) is checkpointed at once, right after the unit, so each change is a version of its
own like any other checkpoint; the checkpoint carries the events, and the store writes the
pre-change snapshot and the event records in the same MULTI (``state.versions``). A crash
before that MULTI leaves nothing: the watermark did not move, the next worker learns the same
units and makes the same change. Drift is compared by group id: the weights of groups present
at both points, and each group's words against a reference (its word distribution, kept in the
worker's memory, ``state.group_drift``), both within the current line of versions (a
rollback reloads the worker, which starts both windows again from what it loaded).

The watermark is the last entry such that every entry up to it is handled. A checkpoint
(``ModelStore.commit_checkpoint``) writes state, version + 1, watermark, history row and
lineage record in one MULTI under WATCH of version and lease. When the WATCH fails (a
rollback, or the lease moved) the in-memory work is dropped and the worker reloads: the
watermark did not move, so the entries are read again.

Entries counter and gaps
------------------------
``state.metadata["entries_read"]`` counts the stream entries at or below the watermark that
this state's line has passed (learned, skipped, dead-lettered, or recorded as lost), so lag is
``entries-added - entries_read`` (``XINFO STREAM``, Redis >= 7). A state without the counter
(written before it existed, or whose watermark was moved by a rollback without replay) gets
it once at load: entries-added minus the entries after the watermark still in the stream.
At load and every ``checkpoint_seconds`` the worker notes the stream's (entries-added,
last id); once it has read past every entry present up to that id, entries-added minus its
own count up to that id is the number of entries removed before they were read (an XDEL or a
trim outside mixroute; ``max-deleted-entry-id`` past the watermark is the sign). A positive
difference is recorded as lost: an alert of kind ``stream-gap`` with the count, the count
added to ``entries_read`` and to ``metadata["entries_lost"]`` (the
``mixroute_stream_lost_entries_total`` metric), and the worker carries on. Before Redis 7 the
counters do not exist: the counter is then seeded from XLEN and gaps are not detected.

Why no consumer group
---------------------
A consumer group would give a pending-entries list and XINFO lag, at the price of three read
paths (XREADGROUP for new entries, an XRANGE to fill what a dead consumer or an aborted
checkpoint left behind, an XRANGE to replay after a rollback) and bookkeeping to keep tidy
(XACK in every checkpoint, XAUTOCLAIM of dead consumers, removing idle ones). None of it was
needed for correctness: the lease already makes one reader per model, and recovery always
depended only on the watermark, never on the pending list. Reading from the watermark
cursor with XREAD is one path for every case, and the lag comes from the entries counter.
"""

from __future__ import annotations

import contextlib
import gc
import logging
import os
import socket
import threading
import time
from collections import deque
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import redis

from mixture.errors import InputError
from mixture.labelled import LabelledItem
from mixture.online import BatchReport, OnlineLearner, warm_up_progress
from mixture.serialize import state_from_bytes
from state.connection import REDIS_TRANSIENT_ERRORS, redis_from_url
from state.corrections import record_unit, record_warm_up
from state.errors import ModelNotFoundError, VersionConflictError
from state.group_drift import (
    WordReference,
    compare_weights,
    content_divergence,
    group_ids_of,
    word_reference,
)
from state.label_words import LabelWatch
from state.options import ModelOptions
from state.reader import (
    PageReader,
    count_entries_after,
    count_through,
    last_id_of,
    stream_counts,
)
from state.records import CurrentState, WorkerStatus
from state.store import Checkpoint, ModelStore, default_worker_name
from state.stream import (
    ZERO_ID,
    Document,
    Labelled,
    SkipRanges,
    Undecodable,
    Withdrawal,
    decode_entry,
)

log = logging.getLogger(__name__)

_RETRYABLE = (*REDIS_TRANSIENT_ERRORS, OSError)


@dataclass
class _Pending:
    """Entries read after the watermark and not yet handled, in stream order.

    Two parallel lists: the stream ids as read, and per entry its text, an Undecodable, None
    (skipped by a replay), or a labelled entry (Labelled, Withdrawal). ``others`` counts the
    entries that are not texts, so the common case (texts only) cuts units by slicing.
    """

    ids: list[bytes] = field(default_factory=list)
    items: list[str | Undecodable | Labelled | Withdrawal | None] = field(default_factory=list)
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
        Lease name (default ``<host>:<pid>:<random>``).
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
        self.reader = PageReader(self.redis, self.store.keys.docs, self.options.read_count)
        self._dead: list[Undecodable] = []
        # entries passed up to the cursor (handled + pending + recorded lost); see _entries_read
        self._entries_seen = 0
        self._entries_lost = 0  # this state's line: entries recorded as lost in gaps
        self._gap_probe: tuple[int, str] | None = None  # (entries-added, last id) to check
        self._gap_alerts: list[dict[str, object]] = []
        self._last_gap_check = 0.0
        self._counts_known = True  # False before Redis 7 (no entries-added)
        self._report = BatchReport()
        self._documents_since_checkpoint = 0
        self._fit_to_serve = False  # a warm-up fit (provisional or final) not yet checkpointed
        self._last_checkpoint = time.monotonic()
        self._last_arrival = time.monotonic()
        self._last_lease = 0.0
        self._last_version_check = 0.0
        self._backlog = False  # the last page was full: more entries were waiting
        # (group ids, weights) of the last checkpoints on this line of versions
        self._recent_weights: deque[tuple[list[int], list[float]]] = deque(
            maxlen=self.options.drift_window
        )
        self._events: list[Any] = []  # group events learned since the last checkpoint
        # the older and the newer word reference (see _content_alerts)
        self._word_references: deque[WordReference] = deque(maxlen=2)
        self._word_reference_age = 0  # checkpoints since the newer was taken
        self._word_alarms: set[int] = set()  # groups whose word-drift alert is standing
        self._label_watch = LabelWatch(self.store)  # label-stale alerts, once per recorded words
        self._last_auto_snapshot_docs = 0
        self._last_auto_snapshot_time = time.time()
        self.holding = False
        self.checkpoints = 0
        self.conflicts = 0
        self.reconnects = 0
        self.errors = 0
        self.labelled_applied = 0  # corrections, examples and withdrawals applied (this run)
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
                # drop the uncommitted work (the watermark did not move) and start over
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
        elif self._version_check_due() and not self._same_version():
            self._drop_work()
            self._load()
        if self.deleted:
            return 0
        learned = self._read_page()
        if time.monotonic() - self._last_gap_check >= self.options.checkpoint_seconds:
            self._check_for_gap()
        if self._checkpoint_due():
            self.checkpoint()
        return learned

    def checkpoint(self) -> bool:
        """Commit what was handled since the last checkpoint. False if nothing to write."""
        if self.learner is None:
            return False
        if (
            self.handled == self._committed
            and not self._dead
            and not self._gap_alerts
            and not self._events
        ):
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
        alerts = self._drift_alerts(state) + self._content_alerts() + self._gap_alerts
        # labels whose group's words moved away from those they were given to (state.label_words)
        alerts += self._label_watch.alerts(
            state, self.version + 1, self.options.label_stale_threshold
        )
        snapshot_reason = self._snapshot_due(state)
        state.metadata["entries_read"] = self._entries_read()
        state.metadata["entries_read_watermark"] = self.handled
        state.metadata["entries_lost"] = self._entries_lost
        cp = Checkpoint(
            worker=self.name,
            expected_version=self.version,
            state=state,
            watermark=self.handled,
            dead_letters=list(self._dead),
            batch_documents=self._documents_since_checkpoint,
            log_likelihood_per_token=self._report.log_likelihood_per_token,
            no_evidence=self._report.no_evidence,
            snapshot_reason=snapshot_reason,
            alerts=alerts,
            events=list(self._events),
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
            self._recent_weights.append((group_ids_of(state), [float(w) for w in state.weights()]))
        if snapshot_reason:
            self._last_auto_snapshot_docs = state.documents_learned
            self._last_auto_snapshot_time = time.time()
        self._dead.clear()
        self._gap_alerts.clear()
        self._events.clear()
        self._report = BatchReport()
        self._documents_since_checkpoint = 0
        self._fit_to_serve = False
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

    def _version_check_due(self) -> bool:
        """Whether this step reads the version: always once caught up (a short page), and
        through a backlog of full pages once per ``read_block_ms``, so that a rollback or a
        delete is noticed within that time, busy or idle (an idle step waits that long for
        its page), without a round trip per page. Missing one meanwhile loses nothing: the
        checkpoint's WATCH of the version refuses work done on a replaced line."""
        if not self._backlog:
            return True
        return time.monotonic() - self._last_version_check >= self.options.read_block_ms / 1000

    def _same_version(self) -> bool:
        """True while the model's version is the one loaded (a rollback moves it)."""
        self._last_version_check = time.monotonic()
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
        self.reader.drop()
        self._dead.clear()
        self._gap_alerts.clear()
        self._events.clear()
        self._report = BatchReport()
        self._documents_since_checkpoint = 0
        self._load_counters(current)
        self._recent_weights.clear()
        self._word_references.clear()
        self._word_alarms.clear()
        # the drift window never reaches back across a rollback (the spoiled state's weights)
        rollbacks = [r.version for r in self.store.lineage(1000) if r.kind == "rollback"]
        since = max(rollbacks, default=0)
        for row in self.store.history(self.options.drift_window):
            if row.version >= since:
                self._recent_weights.append((row.ids(), row.weights))
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
        self._loaded = True
        log.info(
            "worker %s loaded model %r at version %d, watermark %s",
            self.name,
            self.model,
            self.version,
            self.cursor,
            extra=self._log_fields(),
        )
        self._check_for_gap()

    def _load_counters(self, current: CurrentState | None) -> None:
        """Set the entries counter (D2) and the lost count from the loaded state."""
        self._gap_probe = None
        if current is None or self.learner is None:
            self._entries_seen = 0
            self._entries_lost = 0
            return
        metadata = self.learner.state.metadata
        self._entries_lost = int(metadata.get("entries_lost", 0))
        summary = self.store.summary() or {}
        known = summary.get("entries_read")
        if summary.get("version") == current.version and isinstance(known, int):
            self._entries_seen = known  # the state layer's copy (also set by a rollback)
            return
        known = metadata.get("entries_read")
        if metadata.get("entries_read_watermark") == current.watermark and isinstance(known, int):
            self._entries_seen = known
            return
        # an older state, or a watermark moved without us (rollback without replay): count once
        counts = stream_counts(self.redis, self.store.keys.docs)
        added = counts.entries_added if counts.entries_added is not None else counts.length
        after = count_entries_after(
            self.redis, self.store.keys.docs, current.watermark, counts.last_generated_id
        )
        self._entries_seen = max(added - after, 0)
        log.info(
            "worker %s: model %r state has no entries counter at watermark %s; set to %d",
            self.name,
            self.model,
            current.watermark,
            self._entries_seen,
            extra=self._log_fields(),
        )

    def _entries_read(self) -> int:
        """Entries at or below the watermark to write (those read but pending are not)."""
        return self._entries_seen - len(self._pending.ids)

    def _drop_work(self) -> None:
        """Forget everything not checkpointed; the next step reloads from Redis."""
        self._loaded = False
        self.learner = None
        self.reader.drop()
        self._pending.clear()
        self._dead.clear()
        self._gap_alerts.clear()
        self._fit_to_serve = False
        self._events.clear()

    # -- reading -----------------------------------------------------------------------------
    def _read_page(self) -> int:
        """Read one page after the cursor, learn its full units."""
        opts = self.options
        block = opts.read_block_ms
        give_up = None
        if self._pending.documents and opts.flush_partial_seconds is not None:
            block = min(block, max(int(opts.flush_partial_seconds * 1000), 1))
            # wait no longer than until the partial unit is due (Redis' own BLOCK timeout
            # comes up to 1000/hz ms late: PageReader.read)
            since = time.monotonic() - self._last_arrival
            give_up = max(opts.flush_partial_seconds - since, 0.001)
        learned = 0
        # A page read ahead (through a backlog) is taken and queued with the cycle collector
        # paused, and every page is dropped before its units are learned: see
        # _no_cycle_collection. Not paused for a read that may wait (BLOCK): an idle worker
        # spends its time there, and the process's other threads need the collector.
        with _no_cycle_collection():
            taken = self._queue_page(self.reader.take_ahead(self.cursor))
        if not taken:
            taken = self._queue_page(self.reader.read(self.cursor, block, give_up))
        if taken:
            learned += self._learn_units(flush=False)
        elif self._gap_probe is not None:
            self._settle_gap(self._entries_seen)  # nothing after the cursor: all was read
        if (
            self._pending.documents
            and opts.flush_partial_seconds is not None
            and time.monotonic() - self._last_arrival >= opts.flush_partial_seconds
        ):
            learned += self._learn_units(flush=True)
        return learned

    def _queue_page(self, entries: list[Any]) -> bool:
        """Queue a page read (see :meth:`_take`); False when it was empty."""
        full = len(entries) == self.options.read_count
        self._backlog = full
        if full:
            # a full page: more is likely waiting; Redis answers the next read while this
            # page is learned (taken only if the cursor is then its last id, see PageReader)
            self.reader.send_ahead(last_id_of(entries))
        if not entries:
            return False
        self._take(entries, complete=not full)
        return True

    # -- gaps --------------------------------------------------------------------------------
    def _check_for_gap(self) -> None:
        """Note the stream's counters, to be compared with ours once we have read that far.

        Every entry ever added up to the stream's last id is either passed by this line
        (learned, skipped, dead-lettered) or was removed before it was read: once the cursor
        has passed every entry present up to that id, the difference between entries-added
        and our count is the number lost. Checked at load and every ``checkpoint_seconds``
        (one XINFO STREAM; Redis >= 7).
        """
        self._last_gap_check = time.monotonic()
        if not self._counts_known or self._gap_probe is not None:
            return
        # a page read ahead ran before this probe: a short one would wrongly count as holding
        # every entry up to the probe's id, so it is discarded (read again after the probe)
        if self.reader.ahead:
            self.reader.drop()
        counts = stream_counts(self.redis, self.store.keys.docs)
        if counts.entries_added is None:
            self._counts_known = False
            log.info(
                "worker %s: this Redis reports no entries-added (before 7.0); stream gaps "
                "cannot be detected",
                self.name,
                extra=self._log_fields(),
            )
            return
        self._gap_probe = (counts.entries_added, counts.last_generated_id)

    def _settle_gap(self, seen_through_probe: int) -> None:
        """Compare the entries passed up to the probe's id with those ever added up to it."""
        assert self._gap_probe is not None
        added, through = self._gap_probe
        self._gap_probe = None
        lost = added - seen_through_probe
        if lost < 0:  # our count was too high (a foreign state): trust the stream's
            log.warning(
                "worker %s: entries counter %d above entries-added %d at %s; corrected",
                self.name,
                seen_through_probe,
                added,
                through,
                extra=self._log_fields(),
            )
        elif lost == 0:
            return
        self._entries_seen += lost
        if lost < 0:
            return
        self._entries_lost += lost
        log.warning(
            "worker %s: model %r lost %d stream entries up to %s before they were learned "
            "(removed outside mixroute)",
            self.name,
            self.model,
            lost,
            through,
            extra=self._log_fields(),
        )
        self._gap_alerts.append(
            {
                "time": time.time(),
                "kind": "stream-gap",
                "reason": (
                    f"{lost} stream entries up to {through} were removed before they were "
                    f"learned (after watermark {self.handled})"
                ),
                "value": lost,
                "threshold": 0,
                "version": self.version + 1,
            }
        )

    def _take(self, entries: list[Any], complete: bool = False) -> None:
        """Queue a page's entries (all after the cursor); the caller learns the full units.

        ``complete``: the page holds every entry after the cursor that existed when the read
        ran (a short page; reads always follow the gap probe they are compared with).
        """
        if self._gap_probe is not None:
            through = count_through(entries, self._gap_probe[1])
            # an entry past the probe's last id was added after the probe: so was the read
            if through < len(entries) or complete:
                self._settle_gap(self._entries_seen + through)
        self._entries_seen += len(entries)
        self.cursor = last_id_of(entries)
        self._last_arrival = time.monotonic()
        skip = self.skip
        skipping = bool(skip)
        pending = self._pending
        if not skipping:
            texts = _plain_texts(entries)
            if texts is not None:  # the common case, in three list comprehensions
                pending.ids.extend([entry[0] for entry in entries])
                pending.items.extend(texts)
                pending.documents += len(texts)
                return
        add_id, add_item = pending.ids.append, pending.items.append
        documents = others = 0
        for raw_id, raw_fields in entries:
            fields = raw_fields
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
            raw_text = fields.get(b"text")
            raw_meta = fields.get(b"metadata")
            if (
                raw_text is not None
                and not skipping
                and (not raw_meta or raw_meta == b"{}")
                and b"kind" not in fields
            ):
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
            elif isinstance(item, Document):
                add_item(None)  # inside a rollback's skip rule
                others += 1
            else:  # undecodable, or labelled: never skipped (an operator's act is not junk)
                add_item(item)
                others += 1
        pending.documents += documents
        pending.others += others

    def _learn_units(self, flush: bool) -> int:
        """Learn whole units of batch_size documents (and the partial rest when flushing).

        Labelled entries with no document pending before them are applied first (at once);
        those among or right after a unit's documents are applied right after that unit.
        """
        assert self.learner is not None
        unit = self.config.batch_size
        pending = self._pending
        learned = 0
        if pending.others and not isinstance(pending.items[0], str):
            head = 0
            while head < len(pending.items) and not isinstance(pending.items[head], str):
                head += 1
            if not self._apply_labelled(head):
                return learned
            self._handle(head)
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
            state = self.learner.state
            warming = not state.warmed_up
            before = warm_up_progress(state).documents if warming else 0
            forgetting_before = float(state.log_forgetting)
            report = self.learner.learn(texts)  # type: ignore[arg-type]
            self.reader.pump()  # keep the page read ahead coming in (PageReader.pump)
            self._record_units(texts, cut, report, warming, before, forgetting_before)  # type: ignore[arg-type]
            if report.provisional_fits or (warming and report.warmed_up):
                self._fit_to_serve = True  # a provisional or the warm-up fit: serve it soon
            self._report = self._report.merge(report)
            self._documents_since_checkpoint += len(texts)
            learned += len(texts)
            pending.documents -= len(texts)
            if pending.others and not self._apply_labelled(cut):
                return learned  # the work was dropped (conflict, lease, delete)
            self._handle(cut)
            if report.events:  # a change of the groups: a version of its own, at once
                self._events.extend(report.events)
                if not self.checkpoint() and self.learner is None:
                    return learned  # the work was dropped (conflict, lease, delete)
        if not pending.documents and pending.ids:
            if pending.others and not self._apply_labelled(len(pending.ids)):
                return learned
            self._handle(len(pending.ids))
        return learned

    def _record_units(
        self,
        texts: list[str],
        cut: int,
        report: BatchReport,
        warming: bool,
        buffered_before: int,
        forgetting_before: float,
    ) -> None:
        """Note the unit's stepwise updates (and the warm-up, when it ended here) in the
        state's bounded record (``state.corrections``), by the stream id of their last text."""
        pending = self._pending
        if pending.others == 0:
            text_ids = pending.ids[: len(texts)]
        else:
            text_ids = [
                sid
                for sid, item in zip(pending.ids[:cut], pending.items[:cut], strict=True)
                if isinstance(item, str)
            ]
        state = self.learner.state if self.learner is not None else None
        if state is None or not text_ids:
            return
        metadata = state.metadata
        if warming and report.warmed_up:
            # texts[:k] ended the warm-up, the rest were one stepwise update of m documents
            # with tokens: walk back from the end over m texts with tokens (texts without any
            # have no weight, so where they fall does not matter)
            stepwise = sum(report.unit_documents)
            tokenizer = state.tokenizer
            k, seen = len(texts), 0
            while k > 0 and seen < stepwise:
                k -= 1
                seen += 1 if tokenizer.tokenize(texts[k]) else 0
            with_tokens = sum(1 for text in texts[:k] if tokenizer.tokenize(text))
            if k > 0:
                record_warm_up(
                    metadata,
                    text_ids[k - 1].decode(),
                    buffered_before + with_tokens,
                    forgetting_before,
                )
        last = text_ids[-1].decode()
        for eta, documents, forgetting in zip(
            report.unit_etas, report.unit_documents, report.unit_log_forgetting, strict=True
        ):
            if documents > 0:
                record_unit(metadata, last, documents, eta, forgetting)

    def _apply_labelled(self, cut: int) -> bool:
        """Apply the labelled entries among the first ``cut`` pending entries, in order.

        Runs of corrections go to ``learn_labelled`` together (it changes nothing when it
        refuses one, so a refused run is retried one by one and only the refused become
        dead letters), withdrawals to ``withdraw_labelled``. Returns False when the work was
        dropped (a group change checkpointed and failed).
        """
        assert self.learner is not None
        pending = self._pending
        run: list[Labelled] = []
        withdrawals: list[str] = []

        def flush_run() -> None:
            if run:
                self._learn_labelled(list(run))
                run.clear()
            if withdrawals:
                self.learner.withdraw_labelled(list(withdrawals))  # type: ignore[union-attr]
                self.labelled_applied += len(withdrawals)
                withdrawals.clear()

        for item in pending.items[:cut]:
            if isinstance(item, Labelled):
                if withdrawals:
                    flush_run()
                run.append(item)
            elif isinstance(item, Withdrawal):
                if run:
                    flush_run()
                withdrawals.append(item.target)
        flush_run()
        return self.learner is not None

    def _learn_labelled(self, items: list[Labelled]) -> None:
        """``learn_labelled`` for a run of corrections; refused ones become dead letters."""
        assert self.learner is not None
        try:
            report = self.learner.learn_labelled(
                [LabelledItem(e.target, e.text, e.group, e.source) for e in items]
            )
        except InputError as exc:
            if len(items) > 1:  # nothing was changed: find the refused, learn the rest in order
                for entry in items:
                    self._learn_labelled([entry])
                return
            entry = items[0]
            reason = f"correction of {entry.target!r} to group {entry.group} refused: {exc}"
            log.warning(
                "model %r: entry %s to dead letters: %s",
                self.model,
                entry.stream_id,
                reason,
                extra=self._log_fields(),
            )
            self._dead.append(Undecodable(entry.stream_id, reason, entry.fields()))
            return
        self.labelled_applied += len(items)
        if report.provisional_fits:
            self._fit_to_serve = True
        if report.events:
            self._events.extend(report.events)

    def _handle(self, cut: int) -> None:
        """Mark the first ``cut`` pending entries handled (dead letters set aside)."""
        pending = self._pending
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
        if (
            self.handled == self._committed
            and not self._dead
            and not self._gap_alerts
            and not self._events
        ):
            return False
        if self._events:
            return True
        if (
            self._fit_to_serve
            or self._documents_since_checkpoint >= self.options.checkpoint_documents
        ):
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
        ref_ids, ref_weights = self._recent_weights[0]
        now_ids = group_ids_of(learner_state)
        compared = compare_weights(
            [float(w) for w in learner_state.weights()], now_ids, ref_weights, ref_ids
        )
        value = compared.js_divergence
        threshold = self.options.drift_threshold
        alarmed = bool(learner_state.metadata.get("drift_alarm", False))
        alerts: list[dict[str, object]] = []
        if value > threshold and not alarmed:
            change = compared.now - compared.reference
            at = int(np.argmax(np.abs(change)))
            group = compared.common[at]
            alerts.append(
                {
                    "time": time.time(),
                    "kind": "weight_drift",
                    "reason": (
                        f"JS divergence of the mixture weights over the last "
                        f"{len(self._recent_weights)} checkpoints is {value:.4f} > {threshold} "
                        f"(the {len(compared.common)} groups present at both); largest change: "
                        f"group {group} {compared.reference[at]:.3f} -> {compared.now[at]:.3f}"
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

    def _content_alerts(self) -> list[dict[str, object]]:
        """Per-group word drift against the reference (``state.group_drift``).

        A reference is taken at the first checkpoint after a load and a new one every
        ``drift_window`` checkpoints; at each of those the words are compared with the older of
        the last two references, so the comparison spans two windows (one reference alone,
        renewed in a tumbling window, cut a burst in pieces and saw a third of it). Once per
        window, because the comparison is O(vocabulary x K), far more than a learning unit's
        O(words in the unit x K): checked at every checkpoint it cost the worker a tenth of its
        throughput (bench_worker). One alert per group when its divergence crosses
        ``word_drift_threshold`` (again only after it fell back below).
        """
        state = self.learner.state if self.learner is not None else None
        if state is None or not state.warmed_up:
            return []
        references = self._word_references
        if not references:
            references.append(word_reference(state, self.version))
            self._word_reference_age = 0
            return []
        self._word_reference_age += 1
        if self._word_reference_age < self.options.drift_window:
            return []
        reference = references[0]
        divergence = content_divergence(reference, state)
        references.append(word_reference(state, self.version))
        self._word_reference_age = 0
        threshold = self.options.word_drift_threshold
        alerts: list[dict[str, object]] = []
        for group, value in sorted(divergence.items()):
            if value > threshold and group not in self._word_alarms:
                alerts.append(
                    {
                        "time": time.time(),
                        "kind": "word_drift",
                        "reason": (
                            f"group {group}: JS divergence of its words since version "
                            f"{reference.version} is {value:.4f} > {threshold}"
                        ),
                        "value": value,
                        "threshold": threshold,
                        "version": self.version + 1,
                    }
                )
                self._word_alarms.add(group)
            elif value <= threshold:
                self._word_alarms.discard(group)
        self._word_alarms &= set(divergence)
        return alerts

    # -- shutdown --------------------------------------------------------------------------
    def _shutdown(self) -> None:
        """Finish: learn a partial unit when latency mode is on, checkpoint, release the lease."""
        self.reader.close()
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
                "worker %s could not checkpoint at shutdown (%s); the watermark did not "
                "move, so the next worker learns the entries",
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


@contextlib.contextmanager
def _no_cycle_collection() -> Iterator[None]:
    """Pause the cyclic garbage collector while a page read ahead is taken and queued.

    A page of 1,000 entries is some 2,000 new lists (an entry and its fields) made in one go.
    A young collection runs when the tracked objects made exceed those freed by its threshold
    (700), so building the page alone set off about three, and the page then lived on while
    its units were learned: those collections and the ones during learning moved it on, up
    to the oldest generation, whose growth sets off full collections. Each traverses every
    object of the process (~70,000 in a worker, about 45 ms on the bench machine), and one
    came every one or two 60,000-message runs of bench_worker. With the collector paused until
    the page is queued (its texts and ids are not objects the collector tracks) and the page
    dropped before learning, it is freed by reference counting before any collection sees
    it. The reply holds no cycles, so none is missed. Only for a page read ahead (asked
    without BLOCK, so taking it never waits for new entries): a read that may block is where
    an idle worker spends its time, and the other threads of its process (a pool's learners,
    an embedded service) need the collector meanwhile. Left alone when the collector is off.
    """
    if not gc.isenabled():
        yield
        return
    gc.disable()
    try:
        yield
    finally:
        gc.enable()


def _plain_texts(entries: list[Any]) -> list[str] | None:
    """The texts of raw entries in our enqueue's layout with no metadata, else None.

    None (take the per-entry path) when any entry has another layout, metadata to check, or
    text that is not UTF-8. One pass: the texts of the entries that match, then whether all did.
    """
    try:
        texts = [
            fields[3].decode("utf-8")
            for _, fields in entries
            if type(fields) is list
            and len(fields) == 8
            and fields[2] == b"text"
            and fields[4] == b"metadata"
            and fields[5] == b"{}"
        ]
    except UnicodeDecodeError:
        return None
    return texts if len(texts) == len(entries) else None


__all__ = ["Worker"]
