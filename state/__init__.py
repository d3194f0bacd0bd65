"""Everything mixroute keeps in Redis: keys, connection, registry, stream, checkpoints,
snapshots, rollback and drift history. See DEVELOPERS.md ("state/ API", "Redis protocol")."""

from state.connection import REDIS_TRANSIENT_ERRORS, EmbeddedRedis, connect, redis_from_url
from state.errors import (
    CorruptSnapshotError,
    ModelExistsError,
    ModelNotFoundError,
    OptionsError,
    ReplicasUnconfirmedError,
    SnapshotNotFoundError,
    StateError,
    StreamFullError,
    VersionConflictError,
)
from state.keys import GENERATION_KEY, REGISTRY_KEY, ModelKeys, validate_model_name
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
)
from state.registry import ModelInfo, Registry
from state.store import ModelStore
from state.stream import SkipRanges, SkipRule
from state.versions import Checkpoint

__all__ = [
    "GENERATION_KEY",
    "REDIS_TRANSIENT_ERRORS",
    "REGISTRY_KEY",
    "Alert",
    "Checkpoint",
    "CorruptSnapshotError",
    "CurrentState",
    "DriftReport",
    "EmbeddedRedis",
    "EnqueueResult",
    "GroupLabel",
    "HistoryRow",
    "ModelExistsError",
    "ModelInfo",
    "ModelKeys",
    "ModelNotFoundError",
    "ModelOptions",
    "ModelStore",
    "OptionsError",
    "Registry",
    "ReplicasUnconfirmedError",
    "RollbackResult",
    "SkipRanges",
    "SkipRule",
    "SnapshotInfo",
    "SnapshotNotFoundError",
    "StateError",
    "StreamFullError",
    "VersionConflictError",
    "VersionRecord",
    "WorkerStatus",
    "connect",
    "redis_from_url",
    "validate_model_name",
]
