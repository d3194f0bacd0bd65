"""Corrections and examples: messages an operator labels, learned as labelled documents.

A correction (``POST .../corrections``) or an example (``POST .../groups/{group}/examples``)
is queued on the model's stream like every input (``state.stream``: an entry of kind
``correction``) and learned by the worker in stream order with the model core's
``learn_labelled``: its responsibility is fixed to the group given (semi-supervised EM, Nigam,
McCallum, Thrun and Mitchell 2000). A withdrawal (``DELETE .../corrections/{id}``) is an entry
of kind ``withdraw``. ``GET .../corrections`` lists the labelled documents the loaded state
holds. Every route here but the GET is admin (``service.auth``): a correction moves the
model's parameters at once and is never forgotten, so it is an operator's act, not an intake
system's.

The text of a correction may be left out: it is looked up by the message id, first in the
stream (the client-id key holds the stream id of the document queued under that id, within
the model's idempotency window), then among the messages this API process flagged for review
(``GET .../flagged``, which holds each text up to ``MIXROUTE_FLAGGED_TEXT_CHARS``).
"""

from __future__ import annotations

import time
from typing import Any

from fastapi import APIRouter, Query, Request, status

from service.errors import InvalidFieldError, PayloadTooLargeError
from service.routers import COMMON_RESPONSES, Runtime, StrictJsonRoute
from service.runtime import LoadedModel
from service.schemas import (
    CorrectionList,
    CorrectionsIn,
    CorrectionsOut,
    ExamplesIn,
    ExamplesOut,
    Problem,
    WithdrawOut,
)
from service.settings import Settings
from state.corrections import remaining_of
from state.stream import correction_fields, example_id, parse_stream_id, withdraw_fields

router = APIRouter(tags=["corrections"], responses=COMMON_RESPONSES, route_class=StrictJsonRoute)

NOT_FOUND = {404: {"model": Problem, "description": "Unknown model"}}
QUEUED_RESPONSES = {
    **NOT_FOUND,
    503: {"model": Problem, "description": "Redis unreachable or the stream full: not queued"},
}


def _check_text(text: str, where: str, settings: Settings) -> None:
    """422 for an empty text, 413 for one over ``max_text_bytes``, naming ``where``."""
    if not text.strip():
        raise InvalidFieldError(f"{where} is empty: give the message text", where)
    limit = settings.max_text_bytes
    if len(text) * 4 > limit and len(text.encode("utf-8")) > limit:
        raise PayloadTooLargeError(
            f"{where} is over {limit} bytes (MIXROUTE_MAX_TEXT_BYTES)", field=where
        )


def _check_count(n: int, where: str, settings: Settings) -> None:
    if n > settings.max_documents_per_request:
        raise PayloadTooLargeError(
            f"{n} {where} in one request; the limit is {settings.max_documents_per_request} "
            "(MIXROUTE_MAX_DOCUMENTS_PER_REQUEST)",
            field=where,
        )


def _flagged_text(request: Request, model: str, doc_id: str) -> str | None:
    """The whole text (up to ``flagged_text_chars``) of a message this process flagged for
    review, by id (the newest; None when not held): ``FlaggedDocuments.text_for``."""
    flagged = getattr(request.app.state, "flagged", None)
    return None if flagged is None else flagged.text_for(model, doc_id)


def learned_weight(loaded: LoadedModel, stream_id: str | None) -> tuple[bool, float | None]:
    """Whether the document of ``stream_id`` was learned by the loaded state (at or below its
    watermark) and, when its unit is in the state's record, how much weight it still holds."""
    state = loaded.state
    if state is None or stream_id is None or not state.watermark:
        return False, None
    if parse_stream_id(stream_id) > parse_stream_id(state.watermark):
        return False, None
    forgetting = getattr(state, "log_forgetting", None)
    if forgetting is None:
        return True, None
    return True, remaining_of(state.metadata, float(forgetting), stream_id)


@router.post(
    "/models/{model}/corrections",
    status_code=status.HTTP_202_ACCEPTED,
    response_model=CorrectionsOut,
    summary="Label messages: learn each as a document of the group given",
    responses=QUEUED_RESPONSES,
)
def queue_corrections(
    model: str, body: CorrectionsIn, runtime: Runtime, request: Request
) -> dict[str, Any]:
    """Queue corrections; the worker learns each as a labelled document of its group.

    Idempotent per id: the same id and group again changes nothing, another group moves it,
    the text given last wins. Confirming a routing is a correction to the group it was routed
    to. ``text`` may be left out while the message is still in the stream (its idempotency
    window) or among the messages this process flagged; otherwise 422 naming
    ``documents.<i>.text``. A group that is not a current group is 422 naming
    ``documents.<i>.group``.
    """
    settings = runtime.settings
    documents = body.documents
    _check_count(len(documents), "documents", settings)
    loaded = runtime.model(model)
    groups = loaded.group_ids
    seen: dict[str, int] = {}
    for i, doc in enumerate(documents):
        if doc.group not in groups:
            raise InvalidFieldError(
                f"documents.{i}.group: model {model!r} has groups {groups}; there is no "
                f"group {doc.group}",
                f"documents.{i}.group",
            )
        if doc.id in seen:
            raise InvalidFieldError(
                f"documents.{i}.id: {doc.id!r} is also documents.{seen[doc.id]}: give each "
                "message once",
                f"documents.{i}.id",
            )
        seen[doc.id] = i
        if doc.text is not None:
            _check_text(doc.text, f"documents.{i}.text", settings)
    found = runtime.call(lambda: loaded.store.texts_of([doc.id for doc in documents]))
    entries: list[list[str | bytes]] = []
    answers: list[dict[str, Any]] = []
    now = time.time()
    for i, (doc, (stream_id, stream_text)) in enumerate(zip(documents, found, strict=True)):
        text, source = doc.text, "request"
        if text is None and stream_text is not None:
            text, source = stream_text, "stream"
        if text is None:
            held = _flagged_text(request, model, doc.id)
            if held is not None:
                text, source = held, "flagged"
        if text is None or not text.strip():
            where = "gone from the stream (retention)" if stream_id else "not in the stream"
            raise InvalidFieldError(
                f"documents.{i}.text: no text given, and message {doc.id!r} is {where} (or "
                "queued past the idempotency window) nor among the flagged messages this "
                "process holds whole: send its text",
                f"documents.{i}.text",
            )
        learned, remaining = learned_weight(loaded, stream_id)
        entries.append(correction_fields(doc.id, doc.group, text, "correction", now))
        answers.append(
            {
                "id": doc.id,
                "group": doc.group,
                "text_from": source,
                "learned_as_document": learned,
                "unlabelled_weight_remaining": remaining,
            }
        )
    stream_ids = runtime.call(lambda: loaded.store.enqueue_labelled(entries))
    for answer, stream_id in zip(answers, stream_ids, strict=True):
        answer["stream_id"] = stream_id
    return {"model": model, "queued": len(stream_ids), "corrections": answers}


@router.delete(
    "/models/{model}/corrections/{document}",
    status_code=status.HTTP_202_ACCEPTED,
    response_model=WithdrawOut,
    summary="Withdraw a correction or an example",
    responses=QUEUED_RESPONSES,
)
def withdraw_correction(model: str, document: str, runtime: Runtime) -> dict[str, Any]:
    """Queue a withdrawal: the worker removes the labelled document of that id (an id it
    does not hold is ignored). The message itself stays learned as whatever it was before."""
    if not document or len(document) > 200:
        raise InvalidFieldError("the id must be 1-200 characters", "document")
    loaded = runtime.model(model)
    stream_ids = runtime.call(
        lambda: loaded.store.enqueue_labelled([withdraw_fields(document, time.time())])
    )
    state = loaded.state
    held = state is not None and document in set(state.labelled.ids())
    return {"model": model, "id": document, "stream_id": stream_ids[0], "held": held}


@router.get(
    "/models/{model}/corrections",
    response_model=CorrectionList,
    summary="The labelled documents (corrections and examples) the model holds",
    responses=NOT_FOUND,
)
def list_corrections(
    model: str,
    runtime: Runtime,
    group: int | None = Query(default=None, description="Only this group's documents."),
    count: int = Query(default=1000, ge=0, le=100_000, description="Most documents listed."),
    ids: list[str] | None = Query(  # noqa: B008 - FastAPI reads the declaration, never calls it
        default=None, max_length=100, description="Only these document ids (repeat the key)."
    ),
) -> dict[str, Any]:
    """Labelled documents of the loaded state, counts per group and per source, and how many
    corrections, examples and withdrawals are queued but not learned yet. The counts are of
    the whole state whatever ``group`` and ``ids`` select (the dashboard asks for the flagged
    messages' ids, to show after a reload which of them were corrected)."""
    loaded = runtime.model(model)
    state = loaded.state
    documents: list[dict[str, Any]] = []
    groups: dict[str, int] = {}
    if state is not None:
        documents = state.labelled.documents()
        groups = {str(g): int(n) for g, n in state.labelled.group_counts().items()}
    sources: dict[str, int] = {}
    for doc in documents:
        sources[doc["source"]] = sources.get(doc["source"], 0) + 1
    if group is not None:
        documents = [doc for doc in documents if doc["group"] == group]
    if ids is not None:
        wanted = set(ids)
        documents = [doc for doc in documents if doc["id"] in wanted]
    queued = runtime.call(loaded.store.labelled_queued)
    return {
        "model": model,
        "version": loaded.version,
        "documents": documents[:count],
        "groups": groups,
        "sources": sources,
        "queued": queued,
        "limit": int(getattr(loaded.info.config, "labelled_limit", 0)),
    }


@router.post(
    "/models/{model}/groups/{group}/examples",
    status_code=status.HTTP_202_ACCEPTED,
    response_model=ExamplesOut,
    tags=["groups"],
    summary="Add example messages to a group",
    responses={404: {"model": Problem, "description": "Unknown model or group"}},
)
def queue_examples(model: str, group: int, body: ExamplesIn, runtime: Runtime) -> dict[str, Any]:
    """Queue example texts of a group, learned as labelled documents (source ``example``).

    Each example's id comes from its text (``example-<group>-<digest>``), so the same example
    given twice is one labelled document; withdraw one with ``DELETE .../corrections/{id}``.
    """
    settings = runtime.settings
    _check_count(len(body.examples), "examples", settings)
    loaded = runtime.model(model)
    loaded.check_group(group)
    now = time.time()
    ids: list[str] = []
    entries: list[list[str | bytes]] = []
    for i, text in enumerate(body.examples):
        _check_text(text, f"examples.{i}", settings)
        ids.append(example_id(group, text))
        entries.append(correction_fields(ids[-1], group, text, "example", now))
    stream_ids = runtime.call(lambda: loaded.store.enqueue_labelled(entries))
    return {
        "model": model,
        "group": group,
        "queued": len(stream_ids),
        "examples": [{"id": i, "stream_id": s} for i, s in zip(ids, stream_ids, strict=True)],
    }
