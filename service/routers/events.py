"""Group events: the births, merges and retirements of a model's groups, newest first."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Query

from service.routers import COMMON_RESPONSES, Runtime
from service.schemas import EventList, Problem

router = APIRouter(tags=["events"], responses=COMMON_RESPONSES)

NOT_FOUND = {404: {"model": Problem, "description": "Unknown model"}}


@router.get(
    "/models/{model}/events",
    response_model=EventList,
    responses=NOT_FOUND,
    summary="Births, merges and retirements",
)
def list_events(
    model: str,
    runtime: Runtime,
    limit: Annotated[int, Query(ge=1, le=10_000, description="Newest events returned")] = 100,
) -> dict[str, Any]:
    """Each change of the groups with its version, reason and pre-change snapshot; an event
    whose version a rollback left behind is marked ``undone``."""
    loaded = runtime.model(model)
    records = runtime.call(lambda: loaded.store.events(limit))
    return {"model": model, "events": [record.to_dict() for record in records]}
