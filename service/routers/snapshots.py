"""Snapshots: create, list, get, delete, and restore (rollback, optionally with replay)."""

from __future__ import annotations

import contextlib
from typing import Any

from fastapi import APIRouter, Response, status

from service.routers import COMMON_RESPONSES, Runtime, StrictJsonRoute
from service.runtime import RedisUnavailableError
from service.schemas import Problem, RestoreIn, RestoreOut, SnapshotIn, SnapshotList, SnapshotOut
from state.errors import ReplicasUnconfirmedError

router = APIRouter(tags=["snapshots"], responses=COMMON_RESPONSES, route_class=StrictJsonRoute)

NOT_FOUND = {404: {"model": Problem, "description": "Unknown model or snapshot"}}
UNCONFIRMED = {
    503: {
        "model": Problem,
        "description": "Redis unreachable (nothing was changed), or the replicas that "
        "MIXROUTE_REDIS_WAIT_REPLICAS requires did not confirm the write (it is done: the "
        "message says what to check)",
    }
}


@router.post(
    "/models/{model}/snapshots",
    status_code=status.HTTP_201_CREATED,
    response_model=SnapshotOut,
    responses={
        **NOT_FOUND,
        409: {"model": Problem, "description": "No checkpoint yet"},
        **UNCONFIRMED,
    },
    summary="Snapshot the current state",
)
def create_snapshot(model: str, runtime: Runtime, body: SnapshotIn | None = None) -> dict[str, Any]:
    """An immutable copy of the current checkpoint, kept until deleted.

    With ``MIXROUTE_REDIS_WAIT_REPLICAS`` set, a snapshot the replicas do not confirm in time
    answers 503 (no Retry-After: a repeat takes a second snapshot): it is written all the same;
    the message says what to check.
    """
    loaded = runtime.model(model)
    reason = body.reason if body is not None else "requested"
    return runtime.call(lambda: loaded.store.create_snapshot(reason)).to_dict()


@router.get(
    "/models/{model}/snapshots", response_model=SnapshotList, responses=NOT_FOUND, summary="List"
)
def list_snapshots(model: str, runtime: Runtime) -> dict[str, Any]:
    loaded = runtime.model(model)
    snaps = runtime.call(loaded.store.list_snapshots)
    return {"model": model, "snapshots": [s.to_dict() for s in snaps]}


@router.get(
    "/models/{model}/snapshots/{snapshot_id}",
    response_model=SnapshotOut,
    responses=NOT_FOUND,
    summary="Get one",
)
def get_snapshot(model: str, snapshot_id: str, runtime: Runtime) -> dict[str, Any]:
    loaded = runtime.model(model)
    return runtime.call(lambda: loaded.store.get_snapshot(snapshot_id)).to_dict()


@router.delete(
    "/models/{model}/snapshots/{snapshot_id}",
    status_code=status.HTTP_204_NO_CONTENT,
    responses=NOT_FOUND,
    summary="Delete one",
)
def delete_snapshot(model: str, snapshot_id: str, runtime: Runtime) -> Response:
    loaded = runtime.model(model)
    runtime.call(lambda: loaded.store.delete_snapshot(snapshot_id))
    return Response(status_code=status.HTTP_204_NO_CONTENT)


@router.post(
    "/models/{model}/snapshots/{snapshot_id}/restore",
    response_model=RestoreOut,
    responses={
        **NOT_FOUND,
        409: {"model": Problem, "description": "Corrupt snapshot"},
        **UNCONFIRMED,
    },
    summary="Roll back to a snapshot",
)
def restore_snapshot(
    model: str,
    runtime: Runtime,
    snapshot_id: str,
    body: RestoreIn,
) -> dict[str, Any]:
    """Make the snapshot the current state under a new version.

    The state it replaces is snapshotted first. With ``replay`` the worker learns the stream
    again from the snapshot's watermark, skipping entries whose id (``skip_ids``) or receive time
    (``skip_received``) falls in one of the given inclusive ranges; without it, the traffic
    after the snapshot is dropped from the model (but stays in the stream until trimmed).
    This process serves the restored version as soon as the call returns. The body is
    required and must say ``replay``: a rollback without replay drops everything learned
    after the snapshot, so it is never a default. The labels (and the words each was given
    to, for the stale-label check) become the snapshot's; ``labels_restored`` and
    ``label_words_restored`` are false for a snapshot written before snapshots kept them.
    With ``MIXROUTE_REDIS_WAIT_REPLICAS`` set, a rollback the replicas do not confirm in time
    answers 503 (no Retry-After: a repeat rolls back again): it is done (and served) all the
    same; the message says what to check.
    """
    loaded = runtime.model(model)
    try:
        result = runtime.call(
            lambda: loaded.store.rollback(
                snapshot_id,
                replay=body.replay,
                skip_ids=[(r[0], r[1]) for r in body.skip_ids],
                skip_received=[(r[0], r[1]) for r in body.skip_received],
            )
        )
    except ReplicasUnconfirmedError:
        # done on the primary though not confirmed: serve it, and answer the 503 that says so
        # (not a "nothing was changed" one, should the primary have gone meanwhile)
        with contextlib.suppress(RedisUnavailableError):
            runtime.reload(model)
        raise
    runtime.reload(model)
    return result.to_dict()
