"""What every part of a model's Redis-side API shares: the client, the key names, the info."""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

import redis

from state.errors import ModelNotFoundError
from state.keys import ModelKeys
from state.options import ModelOptions
from state.registry import ModelInfo


@dataclass(frozen=True)
class ModelHandle:
    """One model as loaded by a store: its client, keys and registered info.

    ``info.generation`` is the generation this handle was loaded at; writers check it against
    the stored config so that a handle of a deleted model never writes into a model later
    created under the same name.
    """

    redis: redis.Redis
    keys: ModelKeys
    info: ModelInfo

    @property
    def model(self) -> str:
        return self.keys.model

    @property
    def options(self) -> ModelOptions:
        return self.info.options

    def check_alive(self, raw_config: bytes | None) -> None:
        """Raise :class:`ModelNotFoundError` unless ``raw_config`` (the stored ``config``
        value, read under WATCH) is this handle's generation of the model."""
        if raw_config is None:
            raise ModelNotFoundError(f"model {self.model!r} was deleted")
        try:
            generation = int(json.loads(raw_config).get("generation", 0))
        except (ValueError, TypeError, AttributeError):
            generation = -1
        if generation != self.info.generation:
            raise ModelNotFoundError(
                f"model {self.model!r} was deleted and created again (generation "
                f"{generation}, this handle has {self.info.generation})"
            )


def loads_or_none(raw: bytes | None) -> Any:
    """JSON-decode a Redis value, None for a missing key."""
    return None if raw is None else json.loads(raw)
