"""Liveness (``/health``) and readiness (``/ready``)."""

from __future__ import annotations

import time

from fastapi import APIRouter
from fastapi.responses import JSONResponse

from service.routers import COMMON_RESPONSES, Runtime
from service.runtime import RedisUnavailableError
from service.schemas import HealthOut, ReadinessOut

router = APIRouter(tags=["health"], responses=COMMON_RESPONSES)


@router.get("/health", response_model=HealthOut, summary="Liveness: the process answers")
async def health() -> dict[str, str]:
    """Always ``ok`` while the process serves requests; also the benchmark's trivial endpoint."""
    return {"status": "ok"}


@router.get(
    "/ready",
    response_model=ReadinessOut,
    summary="Readiness: Redis, loaded models, worker heartbeats",
    responses={503: {"model": ReadinessOut, "description": "Nothing can be served"}},
)
def ready(runtime: Runtime) -> JSONResponse:
    """``ready``, ``degraded`` (serving from memory, or no model / no live worker) or
    ``unavailable`` (503: Redis unreachable and no model in memory)."""
    reachable = runtime.ping()
    reasons: list[str] = []
    models = []
    stale = runtime.settings.heartbeat_stale_seconds
    if reachable:
        try:
            runtime.load_all()
        except RedisUnavailableError:
            reachable = False
    now = time.time()
    for name, loaded in sorted(runtime.models.items()):
        age: float | None = None
        if reachable:
            try:
                status = runtime.call(loaded.store.worker_status)
            except RedisUnavailableError:
                reachable = False
                status = None
            if status is not None:
                age = max(0.0, now - status.time)
        routable = loaded.state is not None and (loaded.state.warmed_up or loaded.provisional)
        models.append(
            {
                "name": name,
                "version": loaded.version,
                "routable": routable,
                "worker_heartbeat_age_seconds": age,
            }
        )
        if reachable and (age is None or age > stale):
            reasons.append(f"model {name!r}: no worker heartbeat in the last {stale:g} s")
    loaded_count = sum(1 for m in models if m["routable"])
    if not reachable:
        reasons.insert(0, f"Redis unreachable ({runtime.redis_error}); routing from memory")
    if loaded_count == 0:
        reasons.append("no model has a checkpoint to route with")
    if not reachable and loaded_count == 0:
        status_text, code = "unavailable", 503
    elif reasons:
        status_text, code = "degraded", 200
    else:
        status_text, code = "ready", 200
    body = {
        "status": status_text,
        "redis": "reachable" if reachable else "unreachable",
        "redis_error": None if reachable else runtime.redis_error,
        "models_loaded": loaded_count,
        "models": models,
        "reasons": reasons,
    }
    return JSONResponse(status_code=code, content=body)
