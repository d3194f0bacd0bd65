"""What one API process holds in memory: the latest parameters of every model, and Redis health.

Serving never reads model state from Redis per request. Every checkpoint and rollback
PUBLISHes its new version on the model's ``notify`` channel; one pub/sub connection of this
process subscribes to all of them (one pattern) and reloads the model named by a notice, so a
new version is served within milliseconds. A poller thread is the fallback for notices that
never arrive (a pub/sub connection being re-made, a Redis that drops them): every
``reload_poll_interval`` seconds (5 s by default), and at once after each (re)subscription, it
reads the version, the state's checksum, the label counter and the existence of every loaded
model in one pipelined round trip, and reloads the state bytes only when the version or the
checksum moved (a failover can lose a version the API had loaded; the worker then makes
another state under the same number). When Redis stops
answering, the poller marks the runtime *degraded*:
routing keeps answering from the parameters in memory and says so, while every call that must
reach Redis (queueing, snapshots, labels, ...) fails fast with :class:`RedisUnavailableError`, which
the app turns into a 503.

When routing answers ``review: true``
------------------------------------
``review_reasons`` lists every rule that fired:

* ``low_posterior``: the MAP posterior is under the model's threshold (0.6 by default);
* ``no_known_words``: no token of the document is in the vocabulary; the posterior is the prior;
* ``mostly_unknown_words``: more than ``review_unknown_share`` (half) of its tokens are unknown,
  so the answer rests on a few words (typical of spam and of a new topic);
* ``atypical``: the document is far less typical of its group than the group's recent
  documents, by the rule below;
* ``provisional_model``: the model is still in its warm-up and answered with the provisional
  fit of the documents buffered so far (refitted at every doubling, so a group's number may
  mean another topic after the next refit). The typicality rule is silent for such answers.
* ``label_stale``: the MAP group's label is stale: the group's words have moved further than
  ``label_stale_threshold`` from the words its label was given to (``state.label_words``;
  computed here at every load and label change, O(words recorded x K), not per request).

The "far less typical" review rule
----------------------------------
Each group keeps an exponentially weighted mean m_k and variance s_k^2 of the log-likelihood per
token (log p(d | k) divided by the known tokens) of the documents recently routed to it
(half-life ``typicality_half_life`` documents; West's 1979 weighted incremental update). A new
document routed to k is flagged ``atypical`` when k already has at least
``typicality_min_documents`` effective documents and its value is below m_k - z * s_k with
z = ``review_typicality_z`` (3 by default: common practice for a one-sided outlier screen, no
source). The check uses the statistics as they were before the request (a batch does not judge
itself), and every document with evidence is added afterwards, so a lasting shift is absorbed
after about one half-life instead of being flagged for ever. The statistics live in this
process (each API replica keeps its own) and restart empty, so the rule is silent for a group's
first documents after a restart.
"""

from __future__ import annotations

import contextlib
import logging
import math
import sys
import threading
import time
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, TypeVar

import numpy as np
import redis

from mixture.online import warm_up_progress
from mixture.routing import Routing, route_texts
from mixture.serialize import state_from_bytes
from mixture.stats import MixtureState
from service.settings import Settings
from state.connection import REDIS_TRANSIENT_ERRORS
from state.errors import ModelNotFoundError
from state.group_drift import group_ids_of
from state.keys import NOTIFY_PATTERN, ModelKeys, model_of_notify_channel
from state.label_words import WordSketch, label_divergences, sketch_group
from state.registry import ModelInfo, Registry
from state.store import ModelStore

log = logging.getLogger(__name__)

T = TypeVar("T")

# Redis down or its cluster changing hands (the request was refused whole), and the OS's own
REDIS_DOWN_ERRORS: tuple[type[BaseException], ...] = (*REDIS_TRANSIENT_ERRORS, ConnectionError)


class RedisUnavailableError(Exception):
    """Redis cannot be reached; the request needs it (answered with 503)."""


class ModelNotReadyError(Exception):
    """The model exists but cannot route yet (too few warm-up documents for a provisional fit)."""


class GroupNotFoundError(LookupError):
    """A group id that no current group has."""


class Typicality:
    """Exponentially weighted mean and variance of log-likelihood per token, per group.

    Parameters
    ----------
    n_groups : int
    half_life : float
        Documents after which a document's weight in a group's statistics halves.
    min_documents : float
        Effective documents a group needs before it flags anything.
    """

    def __init__(
        self,
        n_groups: int,
        half_life: float,
        min_documents: float,
        group_ids: list[int] | None = None,
    ) -> None:
        self.decay = 0.5 ** (1.0 / half_life)
        self.half_life = half_life
        self.min_documents = min_documents
        # position -> group id, in the order of the state's groups (the arrays' order)
        self.group_ids = list(range(n_groups)) if group_ids is None else list(group_ids)
        self.weight = np.zeros(n_groups)
        self.mean = np.zeros(n_groups)
        self.square_sum = np.zeros(n_groups)  # weighted sum of squared deviations
        self._lock = threading.Lock()

    def resized(self, group_ids: list[int]) -> Typicality:
        """This typicality for a state whose groups are ``group_ids`` (position order): the
        groups present in both keep their statistics, matched by id; a newborn group starts
        empty; a group gone is dropped. ``self`` when the ids are the same."""
        if group_ids == self.group_ids:
            return self
        out = Typicality(len(group_ids), self.half_life, self.min_documents, group_ids)
        old = {g: p for p, g in enumerate(self.group_ids)}
        with self._lock:
            for position, group in enumerate(group_ids):
                if group in old:
                    out.weight[position] = self.weight[old[group]]
                    out.mean[position] = self.mean[old[group]]
                    out.square_sum[position] = self.square_sum[old[group]]
        return out

    @property
    def n_groups(self) -> int:
        return int(self.weight.shape[0])

    def std(self) -> np.ndarray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.sqrt(np.where(self.weight > 0, self.square_sum / self.weight, 0.0))

    def check_and_update(
        self, groups: np.ndarray, values: np.ndarray, evidence: np.ndarray, z: float
    ) -> np.ndarray:
        """Flag documents far below their group's recent mean, then learn from them.

        Parameters
        ----------
        groups : ndarray of int, shape (n,)
            MAP group of each document.
        values : ndarray of float, shape (n,)
            Log-likelihood per token under that group (nan without evidence).
        evidence : ndarray of bool, shape (n,)
            Documents with at least one known token; the others are neither checked nor added.
        z : float
            Standard deviations below the mean that count as atypical.

        Returns
        -------
        ndarray of bool, shape (n,)
        """
        if groups.shape[0] == 1:
            return self._check_and_update_one(
                int(groups[0]), float(values[0]), bool(evidence[0]), z
            )
        groups = np.asarray(groups, dtype=np.int64)
        values = np.asarray(values, dtype=np.float64)
        with np.errstate(invalid="ignore"):
            usable = np.asarray(evidence, dtype=bool) & np.isfinite(values)
        flagged = np.zeros(groups.shape[0], dtype=bool)
        with self._lock:
            # check every document against the statistics as they were before this batch
            weight = self.weight[groups]
            ready = usable & (weight >= self.min_documents)
            if ready.any():
                spread = np.sqrt(self.square_sum[groups[ready]] / weight[ready])
                limit = self.mean[groups[ready]] - z * np.maximum(spread, 1e-6)
                flagged[ready] = values[ready] < limit
            # then add them, group by group, in arrival order: the closed form of West's
            # update applied once per document (same numbers, no Python loop over documents)
            for k in np.unique(groups[usable]):
                x = values[usable & (groups == k)]
                n = x.size
                new_weights = self.decay ** np.arange(n - 1, -1, -1, dtype=np.float64)
                kept = self.decay**n
                old_weight, old_mean = self.weight[k], self.mean[k]
                total = kept * old_weight + new_weights.sum()
                mean = (kept * old_weight * old_mean + new_weights @ x) / total
                deviation = x - mean
                self.square_sum[k] = kept * (
                    self.square_sum[k] + old_weight * (old_mean - mean) ** 2
                ) + new_weights @ (deviation * deviation)
                self.mean[k] = mean
                self.weight[k] = total
        return flagged

    def _check_and_update_one(self, k: int, x: float, evidence: bool, z: float) -> np.ndarray:
        """The same rule for a single document, without array overhead."""
        flagged = False
        if evidence and math.isfinite(x):
            with self._lock:
                w = float(self.weight[k])
                if w >= self.min_documents:
                    spread = math.sqrt(float(self.square_sum[k]) / w)
                    flagged = x < float(self.mean[k]) - z * max(spread, 1e-6)
                new_weight = self.decay * w + 1.0
                old_mean = float(self.mean[k])
                mean = old_mean + (x - old_mean) / new_weight
                self.square_sum[k] = self.decay * self.square_sum[k] + (x - old_mean) * (x - mean)
                self.mean[k] = mean
                self.weight[k] = new_weight
        return np.array([flagged])

    def to_dict(self) -> dict[str, list[float]]:
        with self._lock:
            return {
                "effective_documents": self.weight.tolist(),
                "mean": self.mean.tolist(),
                "std": self.std().tolist(),
            }


@dataclass
class LoadedModel:
    """One model as served from memory."""

    name: str
    info: ModelInfo
    store: ModelStore
    version: int
    state: MixtureState | None
    checksum: str | None
    labels: dict[int, dict[str, Any]]
    labels_version: int
    typicality: Typicality
    review_threshold: float
    review_unknown_share: float = 0.5
    loaded_at: float = field(default_factory=time.time)
    nbytes: int = 0  # memory of the loaded state and its derived parameters (the cache's cost)
    # the words each label was given to, and how far each labelled group has moved from them
    label_words: dict[int, WordSketch] = field(default_factory=dict)
    label_divergence: dict[int, float] = field(default_factory=dict)

    @property
    def label_stale_threshold(self) -> float:
        return float(self.info.options.label_stale_threshold)

    def label_stale(self, group: int) -> bool:
        """True when the group's label is stale (its words moved past the threshold)."""
        value = self.label_divergence.get(group)
        return value is not None and value > self.label_stale_threshold

    @property
    def routing_state(self) -> MixtureState | None:
        """The state routing answers with (the provisional fit while warming up), or None."""
        state = self.state
        if state is None:
            return None
        return state if state.warmed_up else state.provisional

    def measure_labels(self) -> None:
        """Recompute every labelled group's divergence from its recorded words."""
        self.label_divergence = label_divergences(self.label_words, self.routing_state)

    @property
    def n_groups(self) -> int:
        """The current number of groups (the starting count before the first checkpoint)."""
        return len(self.group_ids)

    @property
    def group_ids(self) -> list[int]:
        """Group id of each position of the state (0..K-1 before the first checkpoint)."""
        if self.state is None:
            return list(range(self.info.config.n_groups))
        return group_ids_of(self.state)

    @property
    def starting_groups(self) -> int:
        """Ids below this were given at creation; the others were born since."""
        return self.info.config.n_groups

    @property
    def provisional(self) -> bool:
        """True while the answers come from the warm-up's provisional fit."""
        state = self.state
        return state is not None and not state.warmed_up and state.provisional is not None

    def position_of(self, group: int) -> int:
        """Array position of a current group id (:class:`GroupNotFoundError` otherwise)."""
        try:
            return self.group_ids.index(group)
        except ValueError:
            raise GroupNotFoundError(
                f"model {self.name!r} has groups {self.group_ids}; there is no group {group}"
            ) from None

    def require_state(self) -> MixtureState:
        """The state to route with (the provisional fit while warming up), or
        :class:`ModelNotReadyError` saying how many more documents are needed."""
        state = self.state
        if state is not None and state.warmed_up:
            return state
        if state is not None and state.provisional is not None:
            return state.provisional
        config = self.info.config
        if state is None:
            buffered = "is in its warm-up with no checkpoint yet"
            have = 0
        else:
            progress = warm_up_progress(state)
            buffered = f"is in its warm-up ({progress.describe()})"
            have = progress.documents
        if config.provisional_documents:
            need = max(config.provisional_documents, config.n_groups)
            more = (
                f"it answers with a provisional fit once {need} documents are learned: "
                f"{max(need - have, 1)} more needed"
            )
        else:
            more = "provisional answers are off (provisional_documents = 0)"
        raise ModelNotReadyError(f"model {self.name!r} {buffered}; {more}")

    def check_group(self, group: int) -> None:
        """:class:`GroupNotFoundError` unless ``group`` is the id of a current group."""
        self.position_of(group)


class ServiceRuntime:
    """Loaded models, the version poller and Redis health for one API process.

    Parameters
    ----------
    settings : Settings
    redis_client : redis.Redis
        Client with ``decode_responses=False`` (ideally with a short socket timeout).
    """

    def __init__(self, settings: Settings, redis_client: redis.Redis) -> None:
        self.settings = settings
        self.redis = redis_client
        self.registry = Registry(redis_client)
        # least recently used first; under a memory budget the head is evicted first
        self.models: OrderedDict[str, LoadedModel] = OrderedDict()
        budget = settings.model_memory_mb
        self.memory_budget: int | None = None if budget is None else int(budget * 1024 * 1024)
        self.evictions = 0  # models dropped from memory to stay within the budget
        self.redis_ok = True
        self.redis_error: str | None = None
        self.degraded_since: float | None = None
        self.last_poll: float | None = None
        self.notices = 0  # notices that named a loaded model (tests and /metrics read it)
        self.subscribed = False  # True while the notice subscription is live
        self._lock = threading.RLock()
        self._stop = threading.Event()
        self._poll_now = threading.Event()
        self._thread: threading.Thread | None = None
        self._listener: threading.Thread | None = None
        self._pubsub: Any = None

    # -- Redis health ------------------------------------------------------------------------
    def _mark_down(self, exc: BaseException) -> None:
        if self.redis_ok:
            log.warning("Redis unreachable, serving from memory: %s", exc)
            self.degraded_since = time.time()
        self.redis_ok = False
        self.redis_error = f"{exc.__class__.__name__}: {exc}"

    def _mark_up(self) -> None:
        if not self.redis_ok:
            log.info("Redis reachable again")
        self.redis_ok = True
        self.redis_error = None
        self.degraded_since = None

    def call(self, fn: Callable[[], T]) -> T:
        """Run a Redis operation; connection failures become :class:`RedisUnavailableError`."""
        try:
            result = fn()
        except REDIS_DOWN_ERRORS as exc:
            self._mark_down(exc)
            raise RedisUnavailableError(
                f"Redis is unreachable ({exc.__class__.__name__}); nothing was changed, retry later"
            ) from exc
        self._mark_up()
        return result

    def ping(self) -> bool:
        """True when Redis answers PING (updates the health flags)."""
        try:
            self.call(self.redis.ping)
        except RedisUnavailableError:
            return False
        return True

    # -- loading -----------------------------------------------------------------------------
    def model(self, name: str) -> LoadedModel:
        """The loaded model ``name``, loading it on first use.

        Raises
        ------
        ModelNotFoundError
            Unknown model (or an invalid name).
        RedisUnavailableError
            Not in memory and Redis cannot be reached.
        """
        loaded = self.models.get(name)
        if loaded is not None:
            if self.memory_budget is not None:
                with self._lock:  # most recently used now
                    if name in self.models:
                        self.models.move_to_end(name)
            return loaded
        with self._lock:
            loaded = self.models.get(name)
            if loaded is None:
                loaded = self.call(lambda: self._load(name))
                self._keep(name, loaded)
        return loaded

    def memory_in_use(self) -> int:
        """Bytes of every loaded model's state (what the budget counts)."""
        return sum(loaded.nbytes for loaded in list(self.models.values()))

    def _keep(self, name: str, loaded: LoadedModel) -> None:
        """Hold ``loaded`` as the most recently used model, then evict to fit the budget.

        The least recently used models go first; the one just loaded always stays (a model
        larger than the whole budget is still served, alone). An evicted model is read again
        from Redis on its next request. Called with the lock held.
        """
        self.models[name] = loaded
        self.models.move_to_end(name)
        if self.memory_budget is None:
            return
        while len(self.models) > 1 and self.memory_in_use() > self.memory_budget:
            evicted, _ = self.models.popitem(last=False)
            self.evictions += 1
            log.debug("model %r evicted from memory (budget %d bytes)", evicted, self.memory_budget)

    def _load(self, name: str, previous: LoadedModel | None = None) -> LoadedModel:
        store = previous.store if previous is not None else ModelStore(self.redis, name)
        info = store.info
        current = store.current()
        state: MixtureState | None
        if current is None:
            version, state, digest = 0, None, None
        elif previous is not None and previous.checksum == current.checksum:
            version, state, digest = current.version, previous.state, previous.checksum
        else:
            state = state_from_bytes(current.data)
            if state.warmed_up:
                state.parameters()  # derive once here, not inside the first request
            elif state.provisional is not None:
                state.provisional.parameters()
            version, digest = current.version, current.checksum
        ids = group_ids_of(state) if state is not None else list(range(info.config.n_groups))
        if previous is not None:  # groups born, merged or retired: matched by id
            typicality = previous.typicality.resized(ids)
        else:
            typicality = Typicality(
                len(ids),
                self.settings.typicality_half_life,
                self.settings.typicality_min_documents,
                ids,
            )
        labels_version = _labels_version(store)
        if previous is not None and previous.labels_version == labels_version:
            sketches = previous.label_words  # unchanged labels: the words they were given to too
        else:
            sketches = store.label_sketches()
        loaded = LoadedModel(
            name=name,
            info=info,
            store=store,
            version=version,
            state=state,
            checksum=digest,
            labels_version=labels_version,
            labels=self._read_labels(name, store),
            typicality=typicality,
            review_threshold=float(info.options.review_threshold),
            review_unknown_share=self.settings.review_unknown_share,
            nbytes=state_memory(state),
            label_words=sketches,
        )
        loaded.measure_labels()
        return loaded

    def reload(self, name: str) -> LoadedModel:
        """Re-read one model now (after a rollback or a label change made by this process)."""
        with self._lock:
            previous = self.models.get(name)
            loaded = self.call(lambda: self._load(name, previous))
            self._keep(name, loaded)
            return loaded

    def forget(self, name: str) -> None:
        """Drop a model from memory (after it was deleted)."""
        with self._lock:
            self.models.pop(name, None)

    def load_all(self) -> None:
        """Load every registered model (at start-up), so all of them survive a Redis outage.

        Under a memory budget only while they fit: nothing is evicted for them (the others
        load on their first request), so a listing or a readiness probe never churns the cache.
        """
        for name in self.call(self.registry.list):
            if name in self.models:
                continue
            if self.memory_budget is not None and self.memory_in_use() >= self.memory_budget:
                return
            with contextlib.suppress(ModelNotFoundError):
                loaded = self.call(lambda name=name: self._load(name))
                with self._lock:
                    if name in self.models:
                        continue
                    if (
                        self.memory_budget is not None
                        and self.memory_in_use() + loaded.nbytes > self.memory_budget
                    ):
                        return
                    self.models[name] = loaded

    def poll_once(self) -> None:
        """Reload every loaded model whose version or labels changed; track Redis health.

        One pipelined round trip reads, for every loaded model, whether it still exists, its
        version and its label counter; only the models that moved are read further.
        """
        try:
            self._refresh(list(self.models))
        except REDIS_DOWN_ERRORS as exc:
            self._mark_down(exc)
        else:
            self._mark_up()
        self.last_poll = time.time()

    def _refresh(self, names: list[str]) -> None:
        """Check ``names`` in one round trip and reload those that changed (Redis errors rise)."""
        if not names:
            self.redis.ping()
            return
        pipe = self.redis.pipeline(transaction=False)
        for name in names:
            keys = ModelKeys(name)
            pipe.exists(keys.config)
            pipe.get(keys.version)
            pipe.get(keys.state_checksum)
            pipe.get(keys.labels_version)
        replies = pipe.execute()
        for index, name in enumerate(names):
            exists, raw_version, raw_checksum, raw_labels_version = replies[
                4 * index : 4 * index + 4
            ]
            loaded = self.models.get(name)
            if loaded is None:
                continue
            if not exists:  # deleted, maybe by another replica
                self.forget(name)
                continue
            version = int(raw_version) if raw_version else 0
            labels_version = int(raw_labels_version) if raw_labels_version else 0
            # a version written before the checksum key existed has none: compare numbers only
            remade = raw_checksum is not None and raw_checksum.decode() != loaded.checksum
            try:
                if (
                    version != loaded.version
                    or (loaded.state is None and version > 0)
                    or (version > 0 and remade)
                ):
                    with self._lock:
                        if name in self.models:  # not evicted meanwhile
                            self._keep(name, self._load(name, loaded))
                elif labels_version != loaded.labels_version:
                    loaded.labels = self._read_labels(name, loaded.store)
                    loaded.label_words = loaded.store.label_sketches()
                    loaded.measure_labels()
                    loaded.labels_version = labels_version
            except ModelNotFoundError:
                self.forget(name)

    def _poll_forever(self) -> None:
        while not self._stop.is_set():
            self._poll_now.wait(self.settings.reload_poll_interval)
            self._poll_now.clear()
            if self._stop.is_set():
                return
            try:
                self.poll_once()
            except Exception:  # a poller must not die; the next poll retries
                log.exception("version poll failed")

    def on_notice(self, channel: str | bytes, data: bytes | str | None) -> None:
        """Handle one checkpoint notice: reload the model it names if its version moved."""
        name = model_of_notify_channel(channel)
        loaded = self.models.get(name) if name is not None else None
        if name is None or loaded is None:
            return  # not loaded here: it is read fresh on first use
        self.notices += 1
        if data is not None and _notice_matches(data, loaded):
            return  # already loaded (this process made the change)
        try:
            self._refresh([name])
        except REDIS_DOWN_ERRORS as exc:
            self._mark_down(exc)

    def _listen_forever(self) -> None:
        """Keep one pattern subscription to every model's notices; re-make it when it drops."""
        pause = 0.1
        while not self._stop.is_set():
            pubsub = self.redis.pubsub()
            self._pubsub = pubsub
            try:
                pubsub.psubscribe(NOTIFY_PATTERN)
                while not self._stop.is_set():
                    message = pubsub.get_message(timeout=1.0)
                    if message is None:
                        continue
                    if message["type"] == "psubscribe":
                        # (re)subscribed: notices sent while unsubscribed were missed; poll now
                        self.subscribed = True
                        self._poll_now.set()
                        pause = 0.1
                    elif message["type"] == "pmessage":
                        self.on_notice(message["channel"], message["data"])
            except Exception as exc:  # the poll keeps serving; try again after a pause
                self.subscribed = False
                if not self._stop.is_set():
                    log.debug("checkpoint notices lost (%s); resubscribing", exc)
                    self._stop.wait(pause)
                    pause = min(pause * 2, self.settings.reload_poll_interval)
            finally:
                self.subscribed = False
                self._pubsub = None
                with contextlib.suppress(Exception):
                    pubsub.close()

    def start(self) -> None:
        """Load the registered models (if Redis answers), subscribe to the checkpoint notices
        and start the fallback version poller."""
        with contextlib.suppress(RedisUnavailableError):
            self.load_all()
        self._stop.clear()
        if self._listener is None and self.settings.reload_notifications:
            self._listener = threading.Thread(
                target=self._listen_forever, name="mixroute-notice-listener", daemon=True
            )
            self._listener.start()
        if self._thread is None:
            self._thread = threading.Thread(
                target=self._poll_forever, name="mixroute-version-poller", daemon=True
            )
            self._thread.start()

    def stop(self) -> None:
        """Stop the poller and the notice listener."""
        self._stop.set()
        self._poll_now.set()
        pubsub = self._pubsub
        if pubsub is not None and pubsub.connection is not None:
            with contextlib.suppress(Exception):  # wakes the listener's blocking read
                pubsub.connection.disconnect()
        for thread in (self._thread, self._listener):
            if thread is not None:
                thread.join(timeout=5)
        self._thread = None
        self._listener = None

    # -- labels ------------------------------------------------------------------------------
    def _read_labels(self, name: str, store: ModelStore) -> dict[int, dict[str, Any]]:
        del name
        return {int(k): _label_dict(v) for k, v in store.group_labels().items()}

    def set_label(
        self, name: str, group: int, label: str | None, destination: str | None
    ) -> dict[str, Any]:
        """Replace an operator's label and destination for one group (both None: clear),
        recording the group's words now as what the label is given to."""
        # under the lock a reload cannot slip in between the write and its copy in memory
        # (it would read the labels before the write and replace the model this updates)
        with self._lock:
            loaded = self.model(name)
            loaded.check_group(group)
            sketch = self._sketch(loaded, group)
            record = self.call(
                lambda: loaded.store.set_group_label(group, label, destination, sketch)
            )
            return self._after_label_write(loaded, group, record, sketch, replace=True)

    def patch_label(
        self, name: str, group: int, changes: dict[str, str | None], refresh: bool = False
    ) -> dict[str, Any]:
        """Change only the given fields of one group's label. The group's words are recorded
        anew when ``changes`` gives the label a text or ``refresh`` is true; otherwise the
        words recorded before stay (a new destination says nothing about the content)."""
        with self._lock:  # as in set_label
            loaded = self.model(name)
            loaded.check_group(group)
            renew = refresh or changes.get("label") is not None
            sketch = self._sketch(loaded, group) if renew else None
            record = self.call(lambda: loaded.store.patch_group_label(group, changes, sketch))
            return self._after_label_write(loaded, group, record, sketch, replace=False)

    def _sketch(self, loaded: LoadedModel, group: int) -> WordSketch | None:
        state = loaded.routing_state
        if state is None:
            return None
        return sketch_group(state, group, loaded.version, time.time())

    def _after_label_write(
        self,
        loaded: LoadedModel,
        group: int,
        record: Any,
        sketch: WordSketch | None,
        *,
        replace: bool,
    ) -> dict[str, Any]:
        """Apply a label write of this process to the model in memory at once (other
        replicas see it at their next poll: the label counter moved)."""
        out = _label_dict(record)
        labels = {k: v for k, v in loaded.labels.items() if k != group}
        cleared = out["label"] is None and out["destination"] is None
        if not cleared or out.get("merged_labels"):
            labels[group] = out
        words = dict(loaded.label_words)
        if cleared or (replace and sketch is None):
            words.pop(group, None)
        elif sketch is not None:
            words[group] = sketch
        loaded.labels = labels
        loaded.label_words = words
        loaded.measure_labels()
        return out

    # -- routing -----------------------------------------------------------------------------
    def route(self, loaded: LoadedModel, texts: list[str]) -> tuple[Routing, np.ndarray]:
        """Route with the model's in-memory state; also return the atypical flags."""
        state = loaded.require_state()
        routing = route_texts(state, texts)
        if loaded.provisional:  # groups of a provisional fit: no typicality to judge or keep
            return routing, np.zeros(routing.group.shape[0], dtype=bool)
        atypical = loaded.typicality.check_and_update(
            routing.group,
            routing.log_likelihood_per_token,
            ~routing.no_evidence,
            self.settings.review_typicality_z,
        )
        return routing, atypical


def state_memory(state: MixtureState | None) -> int:
    """Bytes a loaded state holds: its arrays, the vocabulary's words and their index, and
    the derived parameters (what the model cache's budget counts).

    Every object reachable from the state's attributes is counted once (numpy arrays by
    their buffers, containers and strings by :func:`sys.getsizeof`), a few levels deep; the
    test compares the figure with what :mod:`tracemalloc` sees a load allocate.
    """
    if state is None:
        return 0
    seen: set[int] = set()

    def size_of(value: Any, depth: int) -> int:
        if value is None or isinstance(value, (bool, float)) or id(value) in seen:
            return 0
        seen.add(id(value))
        if isinstance(value, np.ndarray):
            base = value.base
            own = 0 if isinstance(base, np.ndarray) else int(value.nbytes)
            return own + (size_of(base, depth) if isinstance(base, np.ndarray) else 0)
        if isinstance(value, (str, bytes, int)):
            return sys.getsizeof(value)
        if depth <= 0:
            return 0
        if isinstance(value, dict):
            return sys.getsizeof(value) + sum(
                size_of(k, depth - 1) + size_of(v, depth - 1) for k, v in value.items()
            )
        if isinstance(value, (list, tuple)):
            return sys.getsizeof(value) + sum(size_of(v, depth - 1) for v in value)
        attributes = getattr(value, "__dict__", None)
        if attributes is None:
            slots = getattr(type(value), "__slots__", ())
            attributes = {k: getattr(value, k, None) for k in slots}
        return sum(size_of(v, depth - 1) for v in attributes.values())

    return size_of(state, 5)


def _notice_matches(data: bytes | str, loaded: LoadedModel) -> bool:
    """Whether a notice (``"<version> <checksum>"``, or an older ``"<version>"``) names the
    state already loaded: the same number and, when the notice carries one, the same checksum.
    """
    text = data.decode() if isinstance(data, bytes) else data
    parts = text.split()
    try:
        version = int(parts[0]) if parts else -1
    except ValueError:
        return False
    if version != loaded.version:
        return False
    return len(parts) < 2 or parts[1] == loaded.checksum


def _labels_version(store: ModelStore) -> int:
    """The store's label-change counter (labels are re-read only when it moves)."""
    return int(store.labels_version())


def _label_dict(value: Any) -> dict[str, Any]:
    data = value.to_dict() if hasattr(value, "to_dict") else dict(value)
    return {
        "label": data.get("label"),
        "destination": data.get("destination"),
        "updated": data.get("updated"),
        "merged_labels": data.get("merged_labels"),
    }
