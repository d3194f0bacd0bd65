"""Documents: queue for learning only."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request, status

from service.logs import request_metadata
from service.routers import COMMON_RESPONSES, Runtime, StrictJsonRoute, check_documents
from service.schemas import DocumentsIn, Problem, QueuedOut

router = APIRouter(tags=["documents"], responses=COMMON_RESPONSES, route_class=StrictJsonRoute)


@router.post(
    "/models/{model}/documents",
    status_code=status.HTTP_202_ACCEPTED,
    response_model=QueuedOut,
    summary="Queue documents for learning",
    responses={
        404: {"model": Problem, "description": "Unknown model"},
        413: {"model": Problem, "description": "Too many documents or a text too long"},
        503: {"model": Problem, "description": "Redis unreachable: nothing was queued"},
    },
)
def queue_documents(
    model: str, body: DocumentsIn, runtime: Runtime, request: Request
) -> dict[str, Any]:
    """Append the documents to the model's stream; the worker learns them.

    The body is ``{"text": ..., "id": ...}`` for one document or ``{"documents": [...]}`` for
    many, as for routing.

    A document whose ``id`` was queued within the model's idempotency window is not added again
    (its stream id is null and it counts as a duplicate), so retrying a failed request with
    the same ids never queues a document twice.
    """
    documents = body.as_documents()
    check_documents(documents, runtime.settings)
    loaded = runtime.model(model)
    texts = [doc.text for doc in documents]
    ids = [doc.id for doc in documents]
    metadata = request_metadata(len(texts))  # the request id travels with each entry
    result = runtime.call(lambda: loaded.store.enqueue(texts, ids=ids, metadata=metadata))
    stream_ids = list(result.stream_ids)
    request.scope["mixroute.queued"] = sum(1 for s in stream_ids if s is not None)
    return {
        "model": model,
        "queued": sum(1 for s in stream_ids if s is not None),
        "duplicates": int(result.duplicates),
        "stream_ids": stream_ids,
    }
