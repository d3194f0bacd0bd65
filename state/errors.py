"""Exceptions of the state layer; every message names what went wrong and where."""

from __future__ import annotations

from mixture.errors import MixrouteError


class StateError(MixrouteError):
    """Base class of the errors raised by ``state/``."""


class ModelExistsError(StateError):
    """A model of that name is already registered."""


class ModelNotFoundError(StateError, KeyError):
    """No model of that name is registered."""

    def __str__(self) -> str:  # KeyError would quote the message
        return str(self.args[0]) if self.args else "model not found"


class SnapshotNotFoundError(StateError, KeyError):
    """No snapshot of that id exists for the model."""

    def __str__(self) -> str:
        return str(self.args[0]) if self.args else "snapshot not found"


class CorruptSnapshotError(StateError):
    """A snapshot's bytes do not match its recorded checksum or cannot be decoded."""


class OptionsError(StateError, ValueError):
    """A model option or name is out of range or unknown; the message names the field."""


class VersionConflictError(StateError):
    """A checkpoint lost its WATCH: the version (rollback) or the lease changed under it."""


class StreamFullError(StateError):
    """The model's unlearned backlog is at its cap (``stream_max_length``): nothing was queued.

    Backpressure instead of trimming: the documents are refused, never silently dropped.
    ``retry_after_seconds`` is how long a client should wait before trying again.
    """

    def __init__(self, message: str, retry_after_seconds: int) -> None:
        super().__init__(message)
        self.retry_after_seconds = int(retry_after_seconds)


class ReplicasUnconfirmedError(StateError):
    """A write reached the primary but fewer replicas than required confirmed it in time
    (``MIXROUTE_REDIS_WAIT_REPLICAS``): a failover could still lose it (:mod:`state.replicas`).

    ``retry_after_seconds`` is how long a client should wait before repeating the request,
    or None when the request must not be repeated (a repeated snapshot takes another, a
    repeated rollback rolls back again): the API then sends no Retry-After.
    ``acknowledged`` is how many replicas did confirm.
    """

    def __init__(
        self, message: str, retry_after_seconds: int | None, acknowledged: int = 0
    ) -> None:
        super().__init__(message)
        self.retry_after_seconds = None if retry_after_seconds is None else int(retry_after_seconds)
        self.acknowledged = int(acknowledged)
