"""Log lines of every mixroute process: one JSON object a line (or plain text), keys redacted.

Used by the API (``service.logs`` adds the request id and the access line on top), by
``python -m worker`` and by any other process of the project, so that all of them follow
``MIXROUTE_LOG_FORMAT`` the same way. It sits in ``state/``, the lowest layer that runs as a
process (``mixture/`` configures no logging), so every layer above may import it.

Every record becomes one line of JSON on standard error with ``time`` (UTC, ISO 8601),
``level``, ``logger``, ``message`` and, where known, ``request_id``, ``model``, ``version`` and
``worker``. Those four come from the record's ``extra`` (``log.info("...", extra={"model": m})``)
or from the context variables below (the API's request context sets them). Any configured key
that appears in a message is replaced by :class:`SecretRedactor` (common practice, no source:
defence in depth).
"""

from __future__ import annotations

import contextvars
import json
import logging
import sys
from collections.abc import Iterable, Mapping
from datetime import UTC, datetime
from typing import IO, Any

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


REDACTED = "[redacted]"


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


__all__ = [
    "CONTEXT_FIELDS",
    "REDACTED",
    "WORKER_THREAD_PREFIX",
    "JsonFormatter",
    "SecretRedactor",
    "StandardErrorHandler",
    "configure_logging",
    "context_value",
    "model_var",
    "redact",
    "request_id_var",
]
