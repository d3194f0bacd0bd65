"""One router per resource; shared dependencies and request checks live here."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Annotated, Any

from fastapi import Depends, Request

from service.errors import PayloadTooLargeError
from service.runtime import ServiceRuntime
from service.schemas import DocumentIn, Problem
from service.settings import Settings

# Statuses any operation may answer besides its own: body checks (413, 422) and an
# unreachable Redis (503). Documented on every router so clients and schema checks know them.
COMMON_RESPONSES: dict[int | str, dict[str, Any]] = {
    413: {"model": Problem, "description": "Request body, text or document count over a limit"},
    422: {"model": Problem, "description": "Invalid input (names the field when one is)"},
    503: {"model": Problem, "description": "Redis unreachable; nothing was changed"},
}


def get_runtime(request: Request) -> ServiceRuntime:
    """The runtime the lifespan attached to the app."""
    return request.app.state.runtime  # type: ignore[no-any-return]


Runtime = Annotated[ServiceRuntime, Depends(get_runtime)]


def check_documents(documents: Sequence[DocumentIn], settings: Settings) -> None:
    """Refuse the whole request before anything happens when one document is unusable.

    Raises
    ------
    PayloadTooLargeError
        Too many documents, or a text over ``max_text_bytes`` (413).
    fastapi.exceptions.RequestValidationError
        No documents, or an empty text (422), naming the document.
    """
    from fastapi.exceptions import RequestValidationError

    if len(documents) > settings.max_documents_per_request:
        raise PayloadTooLargeError(
            f"{len(documents)} documents in one request; the limit is "
            f"{settings.max_documents_per_request} (MIXROUTE_MAX_DOCUMENTS_PER_REQUEST)",
            field="documents",
        )
    if not documents:
        raise RequestValidationError(
            [{"type": "too_short", "loc": ("body", "documents"), "msg": "no documents given"}]
        )
    limit = settings.max_text_bytes
    for i, doc in enumerate(documents):
        if not doc.text.strip():
            raise RequestValidationError(
                [
                    {
                        "type": "empty_text",
                        "loc": ("body", "documents", i, "text"),
                        "msg": "text is empty",
                    }
                ]
            )
        # the UTF-8 length is at most 4 bytes a character: skip encoding short texts
        if len(doc.text) * 4 > limit and len(doc.text.encode("utf-8")) > limit:
            raise PayloadTooLargeError(
                f"document {i} has a text over {limit} bytes (MIXROUTE_MAX_TEXT_BYTES)",
                field=f"documents.{i}.text",
            )
