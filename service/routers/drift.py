"""Drift: weight history, divergence against a window or a snapshot, and alerts."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Query

from service.routers import COMMON_RESPONSES, Runtime
from service.schemas import AlertList, DriftOut, HistoryOut, Problem

router = APIRouter(tags=["drift"], responses=COMMON_RESPONSES)

NOT_FOUND = {404: {"model": Problem, "description": "Unknown model or snapshot"}}


@router.get(
    "/models/{model}/drift", response_model=DriftOut, responses=NOT_FOUND, summary="Divergence"
)
def drift(
    model: str,
    runtime: Runtime,
    reference: Annotated[str | None, Query(description="A snapshot id (default: window)")] = None,
    window: Annotated[int | None, Query(ge=1, le=100_000, description="Checkpoints back")] = None,
) -> dict[str, Any]:
    """Jensen-Shannon divergence (base 2) of the weights now against a reference.

    The reference is the checkpoint ``window`` checkpoints back (the model's ``drift_window``
    by default) or a snapshot, in which case each group's word divergence is given too.
    """
    loaded = runtime.model(model)
    report = runtime.call(lambda: loaded.store.drift(reference=reference, window=window))
    data = report.to_dict()
    data.pop("series", None)
    if data.get("word_divergence") is not None:  # nan (a group gone) is not JSON
        data["word_divergence"] = [v if v == v else None for v in data["word_divergence"]]
    data["model"] = model
    return data


@router.get(
    "/models/{model}/drift/history",
    response_model=HistoryOut,
    responses=NOT_FOUND,
    summary="Weights at every checkpoint",
)
def history(
    model: str,
    runtime: Runtime,
    limit: Annotated[int, Query(ge=1, le=100_000, description="Newest rows kept")] = 1000,
) -> dict[str, Any]:
    loaded = runtime.model(model)
    rows = runtime.call(lambda: loaded.store.history(limit=limit))
    return {"model": model, "rows": [row.to_dict() for row in rows]}


@router.get(
    "/models/{model}/drift/alerts", response_model=AlertList, responses=NOT_FOUND, summary="Alerts"
)
def alerts(
    model: str,
    runtime: Runtime,
    count: Annotated[int, Query(ge=1, le=10_000)] = 100,
) -> dict[str, Any]:
    """Drift alerts raised by the worker's checkpoints, newest last."""
    loaded = runtime.model(model)
    found = runtime.call(lambda: loaded.store.alerts(count=count))
    return {"model": model, "alerts": [alert.to_dict() for alert in found]}
