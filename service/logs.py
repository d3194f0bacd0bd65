"""Structured logs: one JSON object a line, and a request id that follows each request.

Every log record becomes one line of JSON on standard error with ``time`` (UTC, ISO 8601),
``level``, ``logger``, ``message`` and, where known, ``request_id``, ``model``, ``version`` and
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

import contextvars
import json
import logging
import re
import sys
import time
import uuid
from collections.abc import Iterable, Mapping
from datetime import UTC, datetime
from typing import IO, Any

from starlette.types import ASGIApp, Message, Receive, Scope, Send

REQUEST_ID_HEADER = "X-Request-ID"
# short and of a safe character set: it is echoed in a header and stored with each queued entry
REQUEST_ID_MAX_LENGTH = 64
_REQUEST_ID_OK = re.compile(rf"^[A-Za-z0-9._:-]{{1,{REQUEST_ID_MAX_LENGTH}}}$")
REDACTED = "[redacted]"
_MODEL_IN_PATH = re.compile(r"^/models/([A-Za-z0-9][A-Za-z0-9_.-]{0,63})(?:/|$)")

request_id_var: contextvars.ContextVar[str | None] = contextvars.ContextVar(
    "mixroute_request_id", default=None
)
model_var: contextvars.ContextVar[str | None] = contextvars.ContextVar(
    "mixroute_model", default=None
)

# Attributes every LogRecord has; anything else on a record came from ``extra``.
_STANDARD_ATTRS = frozenset(
    vars(logging.LogRecord("", logging.INFO, "", 0, "", None, None)).keys()
    | {"message", "asctime", "taskName", "color_message"}  # uvicorn's terminal copy
)
CONTEXT_FIELDS = ("request_id", "model", "version", "worker")
WORKER_THREAD_PREFIX = "mixroute-worker-"

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


def redact(text: str, secrets: Iterable[str]) -> str:
    """``text`` with every one of ``secrets`` replaced by ``[redacted]``."""
    for secret in secrets:
        if secret and secret in text:
            text = text.replace(secret, REDACTED)
    return text


def context_value(record: logging.LogRecord, name: str) -> Any:
    """A context field of a record: its own ``extra`` value, else the request context (and
    for ``model`` the worker thread's name)."""
    value = getattr(record, name, None)
    if value is not None:
        return value
    if name == "request_id":
        return request_id_var.get()
    if name == "model":
        model = model_var.get()
        if (
            model is None
            and record.threadName
            and record.threadName.startswith(WORKER_THREAD_PREFIX)
        ):
            # service.runner names each worker thread after its model
            model = record.threadName.removeprefix(WORKER_THREAD_PREFIX)
        return model
    return None


class JsonFormatter(logging.Formatter):
    """Format a record as one line of JSON (see the module docstring for the fields)."""

    def format(self, record: logging.LogRecord) -> str:
        data: dict[str, Any] = {
            "time": datetime.fromtimestamp(record.created, UTC).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        for name in CONTEXT_FIELDS:
            value = context_value(record, name)
            if value is not None:
                data[name] = value
        for name, value in vars(record).items():
            if name not in _STANDARD_ATTRS and name not in data and not name.startswith("_"):
                data[name] = _jsonable(value)
        if record.exc_text:  # formatted (and redacted) by SecretRedactor
            data["exception"] = record.exc_text
        elif record.exc_info:
            data["exception"] = self.formatException(record.exc_info)
        if record.stack_info:
            data["stack"] = self.formatStack(record.stack_info)
        return json.dumps(data, ensure_ascii=False, default=str)


def _jsonable(value: Any) -> Any:
    if value is None or isinstance(value, str | int | float | bool):
        return value
    if isinstance(value, Mapping):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_jsonable(v) for v in value]
    return str(value)


class SecretRedactor(logging.Filter):
    """Replace every configured secret by ``[redacted]`` in every field a record prints.

    That is the message (with its arguments), the context fields (``request_id``, ``model``,
    ... including those the formatter would take from the request context: they are set on
    the record here, cleaned), every ``extra`` field (strings inside lists and dicts too), and
    the text of an exception or stack.

    Parameters
    ----------
    secrets : iterable of str
        The API keys. Empty strings are ignored.
    """

    def __init__(self, secrets: Iterable[str]) -> None:
        super().__init__()
        self.secrets = sorted({s for s in secrets if s}, key=len, reverse=True)

    def _clean(self, value: Any) -> Any:
        if isinstance(value, str):
            return redact(value, self.secrets)
        if isinstance(value, Mapping):
            return {self._clean(str(k)): self._clean(v) for k, v in value.items()}
        if isinstance(value, list | tuple):
            return [self._clean(v) for v in value]
        if value is None or isinstance(value, int | float | bool):
            return value
        return redact(str(value), self.secrets)

    def filter(self, record: logging.LogRecord) -> bool:
        if not self.secrets:
            return True
        message = record.getMessage()
        cleaned = self._clean(message)
        if cleaned != message:
            record.msg, record.args = cleaned, None
        for name in CONTEXT_FIELDS:
            value = context_value(record, name)
            if value is not None:
                setattr(record, name, value)
        for name, value in list(vars(record).items()):
            if name not in _STANDARD_ATTRS and not name.startswith("_"):
                setattr(record, name, self._clean(value))
        if record.exc_info and not record.exc_text:
            record.exc_text = logging.Formatter().formatException(record.exc_info)
        if record.exc_text:
            record.exc_text = self._clean(record.exc_text)
        if record.stack_info:
            record.stack_info = self._clean(record.stack_info)
        return True


class StandardErrorHandler(logging.StreamHandler):  # type: ignore[type-arg]
    """Writes to whatever ``sys.stderr`` is when each record is emitted, so a replaced (and
    later closed) standard error, as under a test runner's capture, is never written to."""

    def __init__(self) -> None:
        super().__init__()

    @property  # type: ignore[override]
    def stream(self) -> IO[str]:
        return sys.stderr

    @stream.setter
    def stream(self, value: IO[str]) -> None:
        pass


def configure_logging(
    level: str = "info",
    fmt: str = "json",
    secrets: Iterable[str] = (),
    stream: IO[str] | None = None,
) -> logging.Handler:
    """Send every log record of the process to ``stream`` as JSON lines (or plain text).

    Replaces the root logger's console handlers (those writing to standard output or error)
    and leaves any other handler alone (a test's log capture, a file handler). Uvicorn's own
    loggers are made to propagate to the root, so their lines come out in the same format.

    Parameters
    ----------
    level : str
        Level name (``info``, ``debug``, ...).
    fmt : {"json", "text"}
    secrets : iterable of str
        Strings never to print (the API keys).
    stream : file, optional
        Default standard error.

    Returns
    -------
    logging.Handler
        The handler installed.
    """
    root = logging.getLogger()
    for handler in list(root.handlers):
        if isinstance(handler, StandardErrorHandler) or (
            isinstance(handler, logging.StreamHandler)
            and getattr(handler, "stream", None) in (sys.stderr, sys.stdout)
        ):
            root.removeHandler(handler)
    handler = StandardErrorHandler() if stream is None else logging.StreamHandler(stream)
    if fmt == "json":
        handler.setFormatter(JsonFormatter())
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    handler.addFilter(SecretRedactor(secrets))
    root.addHandler(handler)
    root.setLevel(level.upper())
    for name in ("uvicorn", "uvicorn.error", "uvicorn.access"):
        logger = logging.getLogger(name)
        logger.handlers.clear()
        logger.propagate = True
    # our access line replaces uvicorn's (which would print the query string)
    logging.getLogger("uvicorn.access").setLevel(logging.WARNING)
    return handler


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
