"""The model registry: which models exist, with their configuration and options."""

from __future__ import annotations

import json
import threading
import time
import weakref
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import redis
import redis.exceptions as redis_errors

from mixture.config import MixtureConfig
from state.connection import is_cluster
from state.errors import ModelExistsError, ModelNotFoundError, OptionsError, StateError
from state.keys import (
    GENERATION_KEY,
    GLOBAL_REPLICA_FENCE_KEY,
    LEGACY_GLOBAL_KEYS,
    REGISTRY_KEY,
    ModelKeys,
    validate_model_name,
)
from state.options import ModelOptions
from state.records import GroupLabel, dumps
from state.replicas import confirm_replicas, replica_requirement
from state.stream import LABELLED_QUEUE_LUA, correction_fields, example_id

MAX_LABEL_LENGTH = 200  # as state.labels refuses longer labels and destinations


@dataclass(frozen=True)
class Seed:
    """A group the model starts from: its label, destination and example texts.

    Seed i of a model's seeds is group id i. Its examples are queued as labelled entries
    (source ``"example"``) in the same transaction that creates the model, so they are the
    stream's first entries, before any document.
    """

    label: str | None
    destination: str | None
    examples: tuple[str, ...]


@dataclass(frozen=True)
class ModelInfo:
    """A registered model."""

    name: str
    config: MixtureConfig
    options: ModelOptions
    created: float
    generation: int = 0  # 0: created before generations were counted

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "config": self.config.to_dict(),
            "options": self.options.to_dict(),
            "created": self.created,
            "generation": self.generation,
        }


# Sweep of a deleted model's per-id keys, one batch at a time. KEYS[1]: config; the rest: keys
# to unlink. Stops (-1) once the name is registered again, so a re-created model keeps its keys.
_SWEEP_LUA = """
if redis.call('EXISTS', KEYS[1]) == 1 then
  return -1
end
return redis.call('UNLINK', unpack(KEYS, 2))
"""


# Moves the registry set and the generation counter of a single server from their old names
# to the ones sharing the {_global} slot. KEYS: old registry, old counter, new registry, new
# counter. Members are merged and the counter keeps the larger value, so a writer that still
# used an old name meanwhile loses nothing. Returns 1 when something was moved.
_ADOPT_LUA = """
local moved = 0
if redis.call('EXISTS', KEYS[1]) == 1 then
  redis.call('SUNIONSTORE', KEYS[3], KEYS[3], KEYS[1])
  redis.call('DEL', KEYS[1])
  moved = 1
end
local old = tonumber(redis.call('GET', KEYS[2]) or '0')
if old > 0 then
  local new = tonumber(redis.call('GET', KEYS[4]) or '0')
  if old > new then redis.call('SET', KEYS[4], old) end
  redis.call('DEL', KEYS[2])
  moved = 1
end
return moved
"""

# KEYS: config, docs, labels, labels_version, entries_added, labelled_queue. ARGV: config JSON,
# the number L of labels, L pairs (group, label JSON), then per example entry its number of
# fields and the fields. Returns 0 when the name is taken (nothing written), else 1.
_CREATE_SEEDED_LUA = (
    LABELLED_QUEUE_LUA
    + """
if not redis.call('SET', KEYS[1], ARGV[1], 'NX') then
  return 0
end
local n_labels = tonumber(ARGV[2])
local i = 3
for _ = 1, n_labels do
  redis.call('HSET', KEYS[3], ARGV[i], ARGV[i + 1])
  i = i + 2
end
if n_labels > 0 then
  redis.call('INCR', KEYS[4])
end
local added = 0
while i <= #ARGV do
  local n = tonumber(ARGV[i])
  local sid = redis.call('XADD', KEYS[2], '*', unpack(ARGV, i + 1, i + n))
  note_labelled(KEYS[6], KEYS[2], sid)
  added = added + 1
  i = i + n + 1
end
if added > 0 then
  redis.call('INCRBY', KEYS[5], added)
end
return 1
"""
)

_adopted: weakref.WeakSet[Any] = weakref.WeakSet()  # clients already checked in this process
_adopted_lock = threading.Lock()


def adopt_legacy_keys(client: Any) -> bool:
    """Move a single server's registry and generation counter to their current names.

    A Redis Cluster was never supported under the old names, so only plain servers are
    checked (the old names are in different slots: one script could not touch both on a
    cluster). Each client is checked once per process.

    Returns
    -------
    bool
        True when old keys were found and moved.
    """
    with _adopted_lock:
        if client in _adopted:
            return False
        _adopted.add(client)
    if is_cluster(client):
        return False
    if not client.exists(*LEGACY_GLOBAL_KEYS):  # the common case: one cheap round trip
        return False
    keys = [*LEGACY_GLOBAL_KEYS, REGISTRY_KEY, GENERATION_KEY]
    return bool(client.eval(_ADOPT_LUA, len(keys), *keys))


class Registry:
    """Create, list, read and delete models.

    Parameters
    ----------
    redis : redis.Redis or redis.cluster.RedisCluster
        Client with ``decode_responses=False``.
    """

    def __init__(self, redis: Any) -> None:
        self.redis = redis
        try:
            adopt_legacy_keys(redis)
        except (redis_errors.ConnectionError, redis_errors.TimeoutError):
            _adopted.discard(redis)  # Redis is down: the next registry tries again

    def create(
        self,
        name: str,
        config: MixtureConfig,
        options: ModelOptions | None = None,
        seeds: Sequence[Seed] = (),
    ) -> ModelInfo:
        """Register a model, optionally with seeded groups.

        Parameters
        ----------
        name : str
        config : MixtureConfig
        options : ModelOptions, optional
        seeds : sequence of Seed, optional
            Seed i becomes group id i: its label and destination are set and its examples
            queued as labelled entries, in one MULTI with the ``config`` key (a document queued
            by another client can only follow them: queueing refuses a model without config).

        Raises
        ------
        ModelExistsError
            When the name is taken (nothing is changed).
        OptionsError
            When the name is invalid, or the seeds do not fit the configuration (more seeds
            than ``config.n_groups``, a label over 200 characters).
        """
        keys = ModelKeys(validate_model_name(name))
        options = options or ModelOptions()
        _check_seeds(seeds, config)
        if self.redis.exists(keys.config):  # spare a generation number in the common refusal
            raise ModelExistsError(f"model {name!r} already exists")
        generation = int(self.redis.incr(GENERATION_KEY))
        info = ModelInfo(
            name=name, config=config, options=options, created=time.time(), generation=generation
        )
        if not seeds:
            # SET NX makes creation atomic between two racing clients
            if not self.redis.set(keys.config, dumps(info.to_dict()), nx=True):
                raise ModelExistsError(f"model {name!r} already exists")
        else:
            self._create_seeded(keys, info, seeds)
        self.redis.sadd(REGISTRY_KEY, name)
        if replica_requirement().active:
            # the config and the registry live in two slots (two primaries in a cluster)
            what, hint = f"model {name!r}", "it exists: a repeated create answers that"
            confirm_replicas(
                self.redis, keys.replica_fence, keys.config, "exists", what=what, retry_hint=hint
            )
            confirm_replicas(
                self.redis,
                GLOBAL_REPLICA_FENCE_KEY,
                REGISTRY_KEY,
                "member",
                [name],
                what=what,
                retry_hint=hint,
            )
        return info

    def _create_seeded(self, keys: ModelKeys, info: ModelInfo, seeds: Sequence[Seed]) -> None:
        """config (SET NX), the seeds' labels and their examples in one script (one slot): a
        racing creation of the same name writes nothing, and no document can precede the
        examples (queueing refuses a model without config)."""
        args: list[str | bytes] = [dumps(info.to_dict())]
        labels = [
            (group, GroupLabel(group, seed.label, seed.destination, info.created))
            for group, seed in enumerate(seeds)
            if seed.label is not None or seed.destination is not None
        ]
        args.append(str(len(labels)))
        for group, record in labels:
            args += [str(group), dumps(record.to_dict())]
        for group, seed in enumerate(seeds):
            for text in seed.examples:
                fields = correction_fields(
                    example_id(group, text), group, text, "example", info.created
                )
                args += [str(len(fields)), *fields]
        created = self.redis.eval(
            _CREATE_SEEDED_LUA,
            6,
            keys.config,
            keys.docs,
            keys.labels,
            keys.labels_version,
            keys.entries_added,
            keys.labelled_queue,
            *args,
        )
        if not created:
            raise ModelExistsError(f"model {info.name!r} already exists")

    def list(self) -> list[str]:
        """Names of every registered model, sorted."""
        return sorted(m.decode() for m in self.redis.smembers(REGISTRY_KEY))

    def exists(self, name: str) -> bool:
        """True when ``name`` is registered."""
        return bool(self.redis.exists(ModelKeys(validate_model_name(name)).config))

    def get(self, name: str) -> ModelInfo:
        """The model's configuration and options.

        Raises
        ------
        ModelNotFoundError
            When no model of that name exists.
        """
        keys = ModelKeys(validate_model_name(name))
        raw = self.redis.get(keys.config)
        if raw is None:
            raise ModelNotFoundError(f"model {name!r} does not exist")
        return parse_model_info(raw, name)

    def delete(self, name: str) -> int:
        """Remove every key of the model and nothing else, atomically against checkpoints.

        First one MULTI unlinks the model's fixed keys and its snapshots (one hash slot). A
        checkpoint, rollback or snapshot WATCHes ``config``, so one racing the delete either
        lands before it (and is removed with the rest) or fails and writes nothing; stale
        writers of a deleted model also fail the generation check once the name is reused.
        Then a SCAN sweeps the per-id keys left (client ids), stopping if the name is
        registered again meanwhile.

        Returns
        -------
        int
            Number of keys removed. Raises :class:`ModelNotFoundError` for an unknown model.
        """
        keys = ModelKeys(validate_model_name(name))
        if not self.redis.exists(keys.config) and not self.redis.sismember(REGISTRY_KEY, name):
            raise ModelNotFoundError(f"model {name!r} does not exist")
        # unregister first so no new writer treats it as live
        self.redis.srem(REGISTRY_KEY, name)
        return self._unlink_fixed(keys) + self._sweep(keys)

    def _unlink_fixed(self, keys: ModelKeys) -> int:
        """One MULTI: every fixed key and every snapshot listed in the index."""
        while True:
            with self.redis.pipeline(transaction=True) as pipe:
                try:
                    pipe.watch(keys.snapshots)  # a snapshot added meanwhile is listed too
                    ids = [m.decode() for m in pipe.zrange(keys.snapshots, 0, -1)]
                    pipe.multi()
                    pipe.unlink(*keys.fixed(), *(keys.snapshot(i) for i in ids))
                    return int(pipe.execute()[0])
                except redis.WatchError:
                    continue

    def _sweep(self, keys: ModelKeys) -> int:
        """Unlink what the fixed-key step cannot name (client-id keys, orphans)."""
        sweep = self.redis.register_script(_SWEEP_LUA)
        removed = 0
        batch: list[bytes] = []
        for key in self.redis.scan_iter(match=keys.pattern(), count=1000):
            batch.append(key)
            if len(batch) >= 500:
                done = int(sweep(keys=[keys.config, *batch]))
                if done < 0:
                    return removed
                removed += done
                batch = []
        if batch:
            removed += max(int(sweep(keys=[keys.config, *batch])), 0)
        return removed


def _check_seeds(seeds: Sequence[Seed], config: MixtureConfig) -> None:
    """:class:`OptionsError` naming the first seed that cannot be created."""
    if len(seeds) > config.n_groups:
        raise OptionsError(
            f"{len(seeds)} seeds for a model of {config.n_groups} groups: give n_groups >= "
            f"{len(seeds)} (each seed is one starting group)"
        )
    for i, seed in enumerate(seeds):
        for field_name, value in (("label", seed.label), ("destination", seed.destination)):
            if value is not None and (not value.strip() or len(value) > MAX_LABEL_LENGTH):
                raise OptionsError(
                    f"seeds[{i}].{field_name} must be 1-{MAX_LABEL_LENGTH} characters or null"
                )
        for j, text in enumerate(seed.examples):
            if not isinstance(text, str) or not text.strip():
                raise OptionsError(f"seeds[{i}].examples[{j}] is empty")


def parse_model_info(raw: bytes, name: str) -> ModelInfo:
    """Decode the JSON stored under a model's ``config`` key."""
    try:
        d = json.loads(raw)
        return ModelInfo(
            name=str(d["name"]),
            config=MixtureConfig.from_dict(d["config"]),
            options=ModelOptions.from_dict(d["options"]),
            created=float(d["created"]),
            generation=int(d.get("generation", 0)),
        )
    except (ValueError, KeyError, TypeError) as exc:
        raise StateError(f"stored configuration of model {name!r} is unreadable: {exc}") from exc
