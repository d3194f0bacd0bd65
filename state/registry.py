"""The model registry: which models exist, with their configuration and options."""

from __future__ import annotations

import json
import time
from dataclasses import dataclass
from typing import Any

import redis

from mixture.config import MixtureConfig
from state.errors import ModelExistsError, ModelNotFoundError, StateError
from state.keys import CONSUMER_GROUP, REGISTRY_KEY, ModelKeys, validate_model_name
from state.options import ModelOptions
from state.records import dumps


@dataclass(frozen=True)
class ModelInfo:
    """A registered model."""

    name: str
    config: MixtureConfig
    options: ModelOptions
    created: float

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "config": self.config.to_dict(),
            "options": self.options.to_dict(),
            "created": self.created,
        }


class Registry:
    """Create, list, read and delete models.

    Parameters
    ----------
    redis : redis.Redis
        Client with ``decode_responses=False``.
    """

    def __init__(self, redis: redis.Redis) -> None:
        self.redis = redis

    def create(
        self, name: str, config: MixtureConfig, options: ModelOptions | None = None
    ) -> ModelInfo:
        """Register a model.

        Raises
        ------
        ModelExistsError
            When the name is taken (nothing is changed).
        OptionsError
            When the name is invalid.
        """
        keys = ModelKeys(validate_model_name(name))
        options = options or ModelOptions()
        info = ModelInfo(name=name, config=config, options=options, created=time.time())
        payload = dumps(info.to_dict())
        # SET NX makes creation atomic between two racing clients
        if not self.redis.set(keys.config, payload, nx=True):
            raise ModelExistsError(f"model {name!r} already exists")
        self.redis.sadd(REGISTRY_KEY, name)
        try:  # the group reads from the stream's start, so nothing sent early is missed
            self.redis.xgroup_create(keys.docs, CONSUMER_GROUP, id="0", mkstream=True)
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise
        return info

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
        """Remove every key of the model (SCAN of its hash-tagged prefix) and nothing else.

        Returns
        -------
        int
            Number of keys removed. Raises :class:`ModelNotFoundError` for an unknown model.
        """
        keys = ModelKeys(validate_model_name(name))
        if not self.redis.exists(keys.config) and not self.redis.sismember(REGISTRY_KEY, name):
            raise ModelNotFoundError(f"model {name!r} does not exist")
        # unregister first so no new writer treats it as live, then sweep its keys
        self.redis.srem(REGISTRY_KEY, name)
        removed = 0
        batch: list[bytes] = []
        for key in self.redis.scan_iter(match=keys.pattern(), count=1000):
            batch.append(key)
            if len(batch) >= 500:
                removed += int(self.redis.unlink(*batch))
                batch = []
        if batch:
            removed += int(self.redis.unlink(*batch))
        return removed


def parse_model_info(raw: bytes, name: str) -> ModelInfo:
    """Decode the JSON stored under a model's ``config`` key."""
    try:
        d = json.loads(raw)
        return ModelInfo(
            name=str(d["name"]),
            config=MixtureConfig.from_dict(d["config"]),
            options=ModelOptions.from_dict(d["options"]),
            created=float(d["created"]),
        )
    except (ValueError, KeyError, TypeError) as exc:
        raise StateError(f"stored configuration of model {name!r} is unreadable: {exc}") from exc
