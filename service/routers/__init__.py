"""One router per resource; shared dependencies, request checks and the body reader live here.

Request bodies are read by :func:`loads_strict` (jiter, the standalone build of pydantic-core's
own JSON parser): a JSON object naming a key twice is refused with a 422 naming the key (the
standard json module and pydantic keep the last value silently, so ``{"learn": false,
"learn": true}`` would mean whatever the last parser in a chain decides), and ``NaN`` or
``Infinity``, which are not JSON, are refused too. Routers whose operations take a body use
:class:`StrictJsonRoute` so FastAPI's own body reading goes through it.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Coroutine, Sequence
from typing import Annotated, Any

import jiter
from fastapi import Depends, HTTPException, Request, Response
from fastapi.routing import APIRoute

from service.errors import DuplicateKeyError, PayloadTooLargeError, clip
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


class InvalidJsonError(HTTPException):
    """The request body is not JSON (answered with 422)."""

    field: str | None = None

    def __init__(self, reason: str) -> None:
        super().__init__(status_code=422, detail=f"request body is not valid JSON: {reason}")


_DUPLICATE = re.compile(r'^Detected duplicate key "(.*)" at line \d+ column \d+$', re.DOTALL)


def loads_strict(raw: bytes) -> Any:
    """Parse a request body: JSON only, each key at most once per object.

    Raises
    ------
    DuplicateKeyError
        An object names a key twice (422, the key in ``field``).
    InvalidJsonError
        Not JSON, including ``NaN`` and ``Infinity`` (422).
    """
    try:
        # keys only in the string cache: document texts are seldom repeated
        return jiter.from_json(
            raw, allow_inf_nan=False, catch_duplicate_keys=True, cache_mode="keys"
        )
    except ValueError as exc:
        message = str(exc)
        duplicate = _DUPLICATE.match(message)
        if duplicate is not None:
            raise DuplicateKeyError(duplicate.group(1)) from None
        raise InvalidJsonError(clip(message)) from None


class StrictJsonRequest(Request):
    """A request whose ``json()`` is :func:`loads_strict`."""

    async def json(self) -> Any:
        if not hasattr(self, "_json"):
            self._json = loads_strict(await self.body())
        return self._json


class StrictJsonRoute(APIRoute):
    """An APIRoute that reads JSON bodies with :func:`loads_strict` (FastAPI's documented way
    to customise the request of a route class)."""

    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        handler = super().get_route_handler()

        async def strict_handler(request: Request) -> Response:
            return await handler(StrictJsonRequest(request.scope, request.receive))

        return strict_handler


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
