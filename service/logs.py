"""Structured logs: one JSON object a line, and a request id that follows each request.

The line format, the key redactor and ``configure_logging`` live in :mod:`state.logs` (every
mixroute process uses them, ``python -m worker`` too) and are re-exported here. Every log
record becomes one line of JSON on standard error with ``time`` (UTC, ISO 8601), ``level``,
``logger``, ``message`` and, where known, ``request_id``, ``model``, ``version`` and
``worker``. Those four come from the record's ``extra`` (``log.info("...", extra={"model": m})``)
or, inside an HTTP request, from the request context that :class:`RequestContext` sets.

The request id: a client may send ``X-Request-ID`` (at most 64 characters of letters, digits
and ``._:-``, and no configured API key inside it); otherwise one is generated. It is echoed
in the response header, written on the request's access line, and :func:`request_metadata`
gives the ``metadata`` objects that carry it into the stream entries a request queues
(``{"request_id": ...}``), so a document can be traced from the intake system's call to the
worker that learned it.

Keys never reach a log line, in any field: the access line holds method, path (without the
query string), status, duration and ids only; :class:`RequestContext` replaces a configured key
in the path (and so in the model name taken from it) and never adopts a request id holding one;
and :class:`SecretRedactor` replaces any configured key that still appears in the message, the
context fields, any ``extra`` field, or an exception's text (defence in depth: a key pasted
into a URL or a header is the client's mistake, not ours to spread).
"""

from __future__ import annotations

import logging
import re
import time
import uuid
from collections.abc import Iterable
from typing import Any

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from state.logs import (  # noqa: F401  (re-exported: the API's logging is configured here)
    CONTEXT_FIELDS,
    REDACTED,
    WORKER_THREAD_PREFIX,
    JsonFormatter,
    SecretRedactor,
    StandardErrorHandler,
    configure_logging,
    context_value,
    model_var,
    redact,
    request_id_var,
)

REQUEST_ID_HEADER = "X-Request-ID"
# short and of a safe character set: it is echoed in a header and stored with each queued entry
REQUEST_ID_MAX_LENGTH = 64
_REQUEST_ID_OK = re.compile(rf"^[A-Za-z0-9._:-]{{1,{REQUEST_ID_MAX_LENGTH}}}$")
_MODEL_IN_PATH = re.compile(r"^/models/([A-Za-z0-9][A-Za-z0-9_.-]{0,63})(?:/|$)")

access_log = logging.getLogger("mixroute.access")


def current_request_id() -> str | None:
    """The id of the HTTP request being handled in this context, or None."""
    return request_id_var.get()


def request_metadata(n: int) -> list[dict[str, Any]] | None:
    """Stream metadata for ``n`` documents queued by the current request.

    Parameters
    ----------
    n : int
        Number of documents.

    Returns
    -------
    list of dict or None
        ``[{"request_id": id}] * n`` inside a request, None outside one (no metadata then).
    """
    request_id = request_id_var.get()
    if request_id is None:
        return None
    return [{"request_id": request_id} for _ in range(n)]


def valid_request_id(value: str | None, secrets: Iterable[str] = ()) -> str:
    """The client's request id when acceptable, else a new random one (32 hex digits).

    Parameters
    ----------
    value : str or None
        The ``X-Request-ID`` header as sent.
    secrets : iterable of str
        The configured API keys: an id holding one is never adopted (it would be logged,
        echoed and stored with every queued document).
    """
    if value and _REQUEST_ID_OK.match(value) and not any(s and s in value for s in secrets):
        return value
    return uuid.uuid4().hex


class RequestContext:
    """Pure ASGI middleware: request id in and out, request context, one access line each.

    Parameters
    ----------
    app : ASGI app
    secrets : iterable of str
        The configured API keys: never adopted as a request id, replaced in the logged path
        and model name.
    """

    def __init__(self, app: ASGIApp, secrets: Iterable[str] = ()) -> None:
        self.app = app
        self.secrets = sorted({s for s in secrets if s}, key=len, reverse=True)

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        given = None
        for name, value in scope.get("headers", ()):
            if name == b"x-request-id":
                given = value.decode("latin-1")
                break
        request_id = valid_request_id(given, self.secrets)
        path: str = redact(scope.get("path", ""), self.secrets)
        match = _MODEL_IN_PATH.match(path)
        model = match.group(1) if match else None
        id_token = request_id_var.set(request_id)
        model_token = model_var.set(model)
        started = time.perf_counter()
        status = 500
        header = (REQUEST_ID_HEADER.lower().encode(), request_id.encode())

        async def send_with_id(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = int(message["status"])
                message["headers"] = [*message.get("headers", []), header]
            await send(message)

        try:
            await self.app(scope, receive, send_with_id)
        finally:
            if access_log.isEnabledFor(logging.INFO):
                extra: dict[str, Any] = {
                    "event": "request",
                    "method": scope.get("method", ""),
                    "path": path,
                    "status": status,
                    "duration_ms": round((time.perf_counter() - started) * 1000.0, 3),
                }
                version = _served_version(scope, model)
                if version is not None:
                    extra["version"] = version
                access_log.info("%s %s %d", extra["method"], path, status, extra=extra)
            request_id_var.reset(id_token)
            model_var.reset(model_token)


def _served_version(scope: Scope, model: str | None) -> int | None:
    """The version of ``model`` this process serves now (None when it is not loaded)."""
    if model is None:
        return None
    runtime = getattr(getattr(scope.get("app"), "state", None), "runtime", None)
    loaded = getattr(runtime, "models", {}).get(model) if runtime is not None else None
    return None if loaded is None else int(loaded.version)
