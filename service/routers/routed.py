"""Routed mail: what the intake doors (IMAP, SMTP) routed, for export and daily counts."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Query
from pydantic import BaseModel, Field

from service.routers import COMMON_RESPONSES, Runtime
from service.schemas import Problem
from state.routed_log import RoutedLog

router = APIRouter(tags=["routed"], responses=COMMON_RESPONSES)

NOT_FOUND = {404: {"model": Problem, "description": "Unknown model"}}


class RoutedOut(BaseModel):
    id: str
    time: float = Field(description="The message's Date (unix seconds), else when it was routed.")
    group: int
    label: str | None
    posterior: float = Field(description="Posterior of the MAP group.")
    review: bool
    filed_to: str | None = Field(description="Folder, keyword or address it was filed to.")
    stream_id: str | None = Field(description="Cursor: pass as `after` for the next page.")


class RoutedPage(BaseModel):
    model: str
    records: list[RoutedOut]


class DailyOut(BaseModel):
    model: str
    days: dict[str, dict[str, int]] = Field(
        description="UTC day -> group id -> messages routed that day (oldest day first)."
    )


@router.get(
    "/models/{model}/routed",
    response_model=RoutedPage,
    responses=NOT_FOUND,
    summary="Messages the intake routed",
)
def routed(
    model: str,
    runtime: Runtime,
    after: Annotated[
        str, Query(max_length=40, pattern=r"^(-|\d+-\d+)$", description="Stream id cursor")
    ] = "-",
    limit: Annotated[int, Query(ge=1, le=10_000)] = 1000,
) -> dict[str, Any]:
    """Routed messages oldest first (id, time, group, label, posterior, review; no text)."""
    loaded = runtime.model(model)
    log = RoutedLog(loaded.store.redis, model)
    records = runtime.call(lambda: log.read(after=after, count=limit))
    return {"model": model, "records": [r.to_dict() for r in records]}


@router.get(
    "/models/{model}/routed/daily",
    response_model=DailyOut,
    responses=NOT_FOUND,
    summary="Messages routed per group per day",
)
def routed_daily(
    model: str,
    runtime: Runtime,
    days: Annotated[int, Query(ge=1, le=400, description="UTC days back, today included")] = 30,
) -> dict[str, Any]:
    loaded = runtime.model(model)
    log = RoutedLog(loaded.store.redis, model)
    counts = runtime.call(lambda: log.daily(days))
    return {
        "model": model,
        "days": {day: {str(g): n for g, n in groups.items()} for day, groups in counts.items()},
    }
