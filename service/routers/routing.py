"""Routing: the MAP group, full posterior and review flag for one or many documents."""

from __future__ import annotations

import math
import time
from typing import Any

import numpy as np
import orjson
from fastapi import APIRouter, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import Response
from pydantic import ValidationError
from starlette.concurrency import run_in_threadpool
from starlette.routing import Route as StarletteRoute

from mixture.routing import posterior_entries, review_reasons
from service.app import DEGRADED_HEADER
from service.logs import request_metadata
from service.routers import COMMON_RESPONSES, check_documents, get_runtime, loads_strict
from service.runtime import LoadedModel, ModelNotReadyError, RedisUnavailableError, ServiceRuntime
from service.schemas import DocumentIn, Problem, RouteIn, RouteOut

router = APIRouter(tags=["routing"], responses=COMMON_RESPONSES)

# Above this many documents (or when queueing) the work moves off the event loop.
INLINE_DOCUMENTS = 16


def build_results(
    loaded: LoadedModel,
    documents: list[DocumentIn],
    routing: Any,
    atypical: np.ndarray,
    top: int | None,
    stream_ids: list[str | None] | None,
) -> list[dict[str, Any]]:
    """Per-document answers as plain dicts (serialised without a second validation pass)."""
    ids = loaded.group_ids  # answers name groups by id, never by array position
    posteriors = posterior_entries(routing.posterior, top, ids)
    groups = routing.group.tolist()
    starting = loaded.starting_groups
    labels = loaded.labels

    def unnamed_newborn(group_id: int) -> bool:
        label = labels.get(group_id)
        return group_id >= starting and not (label and (label["label"] or label["destination"]))

    new_group = np.array([unnamed_newborn(ids[g]) for g in groups], dtype=bool)
    stale_ids = {g for g in loaded.label_divergence if loaded.label_stale(g)}
    stale = [ids[g] in stale_ids for g in groups]
    all_reasons = review_reasons(
        routing,
        loaded.review_threshold,
        loaded.review_unknown_share,
        atypical,
        provisional=loaded.provisional,
        new_group=new_group,
        label_stale=np.array(stale, dtype=bool) if stale_ids else None,
    )
    margins = routing.margin.tolist()
    llpt = routing.log_likelihood_per_token.tolist()
    known = routing.known_tokens.tolist()
    unknown = routing.unknown_tokens.tolist()
    results = []
    for i, doc in enumerate(documents):
        g = groups[i]
        group_id = ids[g]
        reasons = all_reasons[i]
        label = labels.get(group_id)
        value = llpt[i]
        stream_id = stream_ids[i] if stream_ids is not None else None
        results.append(
            {
                "id": doc.id,
                "group": group_id,
                "label": label["label"] if label else None,
                "destination": label["destination"] if label else None,
                "posterior": posteriors[i],
                "margin": margins[i],
                "log_likelihood_per_token": value if math.isfinite(value) else None,
                "known_tokens": known[i],
                "unknown_tokens": unknown[i],
                "review": bool(reasons),
                "review_reasons": reasons,
                "queued": stream_id is not None,
                "stream_id": stream_id,
                "label_stale": stale[i],
            }
        )
    return results


def route_now(runtime: ServiceRuntime, model: str, body: RouteIn) -> tuple[dict[str, Any], bool]:
    """Route (and optionally queue) the request's documents; the body and a degraded flag."""
    documents = body.as_documents()
    check_documents(documents, runtime.settings)
    loaded = runtime.model(model)
    texts = [doc.text for doc in documents]
    try:
        routing, atypical = runtime.route(loaded, texts)
    except ModelNotReadyError as exc:
        if not body.learn:
            raise
        # too early to answer, but the documents are what the warm-up waits for: queue them
        # (a client that only routes with learn: true would otherwise never warm a model up)
        queued_ids = _queue(runtime, loaded, documents)
        queued = sum(1 for s in queued_ids if s is not None)
        raise ModelNotReadyError(f"{exc}; {queued} documents queued for learning") from None
    stream_ids: list[str | None] | None = None
    notice: str | None = None
    if body.learn:
        try:
            stream_ids = _queue(runtime, loaded, documents)
        except RedisUnavailableError:
            notice = "Redis is unreachable: the documents were routed but NOT queued for learning"
    degraded = not runtime.redis_ok
    if degraded and notice is None:
        since = runtime.degraded_since or time.time()
        notice = (
            f"Redis unreachable for {time.time() - since:.0f} s; answered from version "
            f"{loaded.version} held in memory"
        )
    body_out = {
        "model": loaded.name,
        "version": loaded.version,
        "degraded": degraded,
        "notice": notice,
        "queued": stream_ids is not None and any(s is not None for s in stream_ids),
        "review_threshold": loaded.review_threshold,
        "results": build_results(loaded, documents, routing, atypical, body.top, stream_ids),
    }
    return body_out, degraded


def _queue(
    runtime: ServiceRuntime, loaded: LoadedModel, documents: list[DocumentIn]
) -> list[str | None]:
    """Queue documents for learning; their stream ids (None for an id queued before)."""
    texts = [doc.text for doc in documents]
    ids = [doc.id for doc in documents]
    metadata = request_metadata(len(texts))
    result = runtime.call(lambda: loaded.store.enqueue(texts, ids=ids, metadata=metadata))
    return list(result.stream_ids)


def _request_body_schema() -> dict[str, Any]:
    """RouteIn's JSON schema for the OpenAPI document (nested models are components)."""
    schema = RouteIn.model_json_schema(ref_template="#/components/schemas/{model}")
    schema.pop("$defs", None)  # DocumentIn is a component already (documents router)
    return {
        "required": True,
        "content": {"application/json": {"schema": schema}},
    }


async def parse_route_body(request: Request) -> RouteIn:
    """The request body as RouteIn: parsed by :func:`~service.routers.loads_strict` (jiter:
    duplicate keys and NaN refused) and validated strictly by pydantic-core.

    Declaring ``body: RouteIn`` would add FastAPI's dependency solving and response
    validation; on the single-document path those cost more than the routing itself, so the
    route reads the raw body. Errors are the same 422s as the other routes'.
    """
    content_type = request.headers.get("content-type", "application/json")
    if "json" not in content_type.split(";")[0].strip().lower():
        raise RequestValidationError(
            [{"type": "content_type", "loc": ("body",), "msg": "expected application/json"}]
        )
    raw = await request.body()
    if not raw:
        raise RequestValidationError(
            [{"type": "missing", "loc": ("body",), "msg": "request body is required"}]
        )
    try:
        return RouteIn.model_validate(loads_strict(raw))
    except ValidationError as exc:
        errors = [
            {**error, "loc": ("body", *error.get("loc", ()))}
            for error in exc.errors(include_url=False, include_input=False)
        ]
        raise RequestValidationError(errors) from None


@router.post(
    "/models/{model}/route",
    response_model=RouteOut,
    summary="Route documents to groups",
    openapi_extra={"requestBody": _request_body_schema()},
    responses={
        404: {"model": Problem, "description": "Unknown model"},
        409: {
            "model": Problem,
            "description": "Model in warm-up with too few documents for a provisional fit "
            "(with learn: true the documents are queued all the same)",
        },
        413: {"model": Problem, "description": "Too many documents or a text too long"},
        503: {"model": Problem, "description": "Redis unreachable and model not in memory"},
    },
)
async def route_documents(model: str, request: Request) -> Response:
    """MAP group, posterior, margin, typicality and ``review`` for each document.

    Answers from the parameters in memory; with ``learn: true`` the documents are also queued.
    While the model warms up, a provisional fit of the documents buffered so far answers,
    every result marked for review with ``provisional_model``. When Redis is unreachable the
    answer carries ``degraded: true`` and the header
    ``X-Mixroute-Degraded``; documents are then not queued (``queued: false``).
    """
    body = await parse_route_body(request)
    runtime = get_runtime(request)
    n_docs = 1 if body.documents is None else len(body.documents)
    inline = n_docs <= INLINE_DOCUMENTS and not body.learn and model in runtime.models
    if inline:
        content, degraded = route_now(runtime, model, body)
    else:
        content, degraded = await run_in_threadpool(route_now, runtime, model, body)
    # hand the answer to outer middleware (metrics, dashboard) so they need not parse JSON
    request.scope["mixroute.answer"] = content
    request.scope["mixroute.texts"] = [d.text for d in body.as_documents()]
    # orjson: the shortest repr that reads back to the same float, about 10x faster than json
    response = Response(orjson.dumps(content), media_type="application/json")
    if degraded:
        response.headers[DEGRADED_HEADER] = f"redis-unreachable; version={content['version']}"
    return response


async def serve_route(request: Request) -> Response:
    """``route_documents`` as a plain Starlette endpoint (see :data:`FAST_ROUTE`)."""
    return await route_documents(request.path_params["model"], request)


# The route carries nearly all the traffic, and it reads its own body, so FastAPI's request
# handler (dependency solving, per-request telemetry hooks) would be pure overhead on it: this
# Starlette route for the same path and method answers first, with the same function. The
# APIRoute above stays, for the OpenAPI document and the access-control table.
FAST_ROUTE = StarletteRoute(
    "/models/{model}/route", serve_route, methods=["POST"], include_in_schema=False
)
router.routes.insert(0, FAST_ROUTE)
