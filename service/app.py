"""The FastAPI application: factory, lifespan, error mapping and request limits.

``create_app(settings)`` builds the app; the lifespan connects to Redis (the given client, or
``settings.redis_url``), starts the :class:`~service.runtime.ServiceRuntime` poller and any
extra background services, and stops them on shutdown. Later layers (metrics, auth, the
dashboard) plug in through ``extra_routers``, ``middleware`` and ``background`` without
editing this module.
"""

from __future__ import annotations

import contextlib
import logging
import re
from collections.abc import AsyncIterator, Awaitable, Callable, Iterable, Mapping, Sequence
from typing import Any, Protocol

import redis
from fastapi import APIRouter, FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from mixture.errors import ConfigError, InputError
from service.errors import InvalidFieldError, PayloadTooLargeError, clip, clip_echoes
from service.runtime import (
    GroupNotFoundError,
    ModelNotReadyError,
    RedisUnavailableError,
    ServiceRuntime,
)
from service.settings import Settings
from state.errors import (
    CorruptSnapshotError,
    ModelExistsError,
    ModelNotFoundError,
    OptionsError,
    ReplicasUnconfirmedError,
    SnapshotNotFoundError,
    StreamFullError,
    VersionConflictError,
)

log = logging.getLogger(__name__)

DEGRADED_HEADER = "X-Mixroute-Degraded"


class Background(Protocol):
    """Anything the lifespan starts after the runtime and stops before it (e.g. a worker)."""

    def start(self) -> None: ...
    def stop(self) -> None: ...


class BodyGuard:
    """Pure ASGI middleware: refuse bodies over ``max_bytes`` (413) and invalid UTF-8 (422).

    Both are answered before FastAPI parses the body, so nothing downstream ever sees them.
    """

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] not in ("POST", "PUT", "PATCH"):
            await self.app(scope, receive, send)
            return
        for name, value in scope.get("headers", ()):
            if name == b"content-length" and value.isdigit() and int(value) > self.max_bytes:
                await _problem(send, 413, f"request body over {self.max_bytes} bytes")
                return
        chunks: list[bytes] = []
        size = 0
        more = True
        while more:
            message = await receive()
            if message["type"] == "http.disconnect":
                return
            chunk = message.get("body", b"")
            size += len(chunk)
            if size > self.max_bytes:
                await _problem(send, 413, f"request body over {self.max_bytes} bytes")
                return
            chunks.append(chunk)
            more = message.get("more_body", False)
        body = b"".join(chunks)
        try:
            body.decode("utf-8")
        except UnicodeDecodeError as exc:
            await _problem(send, 422, f"request body is not valid UTF-8 (byte {exc.start})")
            return
        sent = False

        async def replay() -> Message:
            nonlocal sent
            if sent:
                return await receive()
            sent = True
            return {"type": "http.request", "body": body, "more_body": False}

        await self.app(scope, replay, send)


async def _problem(send: Send, status: int, detail: str) -> None:
    import json

    payload = json.dumps({"detail": detail, "field": None}).encode()
    await send(
        {
            "type": "http.response.start",
            "status": status,
            "headers": [
                (b"content-type", b"application/json"),
                (b"content-length", str(len(payload)).encode()),
            ],
        }
    )
    await send({"type": "http.response.body", "body": payload})


_FIELD_AT_START = re.compile(r"^([a-z_][a-z0-9_]*) ")


def _field_of(message: str) -> str | None:
    """The field a ConfigError/OptionsError names first (their messages start with it)."""
    match = _FIELD_AT_START.match(message)
    return match.group(1) if match else None


def _json_problem(
    status: int,
    detail: str,
    field: str | None = None,
    headers: Mapping[str, str] | None = None,
    written: bool | None = None,
) -> JSONResponse:
    """Every error answer: ``{"detail", "field"}``, neither repeating much of the request;
    ``"written": true`` added when the write was done all the same (replicas unconfirmed)."""
    content: dict[str, object] = {
        "detail": clip_echoes(detail),
        "field": None if field is None else clip(field, FIELD_LIMIT),
    }
    if written is not None:
        content["written"] = written
    return JSONResponse(status_code=status, content=content, headers=headers)


# A field path names at most this many characters (it may hold a client's unknown key).
FIELD_LIMIT = 60
# Validation answers list this many errors; the rest are counted (a body of 1,000 bad
# documents would otherwise be described, and its keys repeated, 1,000 times).
ERRORS_LISTED = 3


def _validation_message(exc: RequestValidationError) -> tuple[str, str | None]:
    parts: list[str] = []
    first_field: str | None = None
    errors = exc.errors()
    for error in errors[:ERRORS_LISTED]:
        loc = [str(p) for p in error.get("loc", ()) if p not in ("body",)]
        where = clip(".".join(loc), FIELD_LIMIT)
        if error.get("type") == "json_invalid":
            reason = (error.get("ctx") or {}).get("error", "invalid JSON")
            return f"request body is not valid JSON: {clip(str(reason))}", None
        if error.get("type") == "missing" and not loc:
            return "request body is required", None
        if first_field is None and where:
            first_field = where
        message = str(error.get("msg", "invalid")).removeprefix("Value error, ")
        parts.append(f"{where}: {message}" if where else message)
    if len(errors) > ERRORS_LISTED:
        parts.append(f"and {len(errors) - ERRORS_LISTED} more")
    return "; ".join(parts) or "invalid request", first_field


def install_error_handlers(app: FastAPI) -> None:
    """Map every error type of ours to its HTTP status with a ``{detail, field}`` body."""

    async def validation(_: Request, exc: RequestValidationError) -> JSONResponse:
        detail, field = _validation_message(exc)
        return _json_problem(422, detail, field)

    def simple(status: int, with_field: bool = False) -> Callable[..., Awaitable[JSONResponse]]:
        async def handler(_: Request, exc: Exception) -> JSONResponse:
            message = str(exc)
            return _json_problem(status, message, _field_of(message) if with_field else None)

        return handler

    async def too_large(_: Request, exc: PayloadTooLargeError) -> JSONResponse:
        return _json_problem(413, str(exc), exc.field)

    async def invalid_field(_: Request, exc: InvalidFieldError) -> JSONResponse:
        return _json_problem(422, str(exc), exc.field)

    async def http_error(_: Request, exc: StarletteHTTPException) -> JSONResponse:
        # 404 for an unknown path, 405, body-reading errors: the same shape as ours
        field = getattr(exc, "field", None)
        return _json_problem(exc.status_code, str(exc.detail), field, exc.headers)

    async def internal(_: Request, exc: Exception) -> JSONResponse:
        # logged with its traceback by the server (the exception propagates after this)
        return _json_problem(500, "internal error; the server log has the details")

    async def unavailable(_: Request, exc: RedisUnavailableError) -> JSONResponse:
        response = _json_problem(503, str(exc))
        response.headers[DEGRADED_HEADER] = "redis-unreachable"
        response.headers["Retry-After"] = "1"
        return response

    async def stream_full(_: Request, exc: StreamFullError) -> JSONResponse:
        response = _json_problem(503, str(exc))  # backpressure: nothing was queued
        response.headers["Retry-After"] = str(exc.retry_after_seconds)
        return response

    async def unconfirmed(_: Request, exc: ReplicasUnconfirmedError) -> JSONResponse:
        # on the primary but not on enough replicas (MIXROUTE_REDIS_WAIT_REPLICAS): retry
        # the write is done on the primary: clients must not take the 503 for a failure, and
        # get no Retry-After when a repeat would be a second write (snapshot, rollback)
        response = _json_problem(503, str(exc), written=True)
        if exc.retry_after_seconds is not None:
            response.headers["Retry-After"] = str(exc.retry_after_seconds)
        return response

    app.add_exception_handler(RequestValidationError, validation)  # type: ignore[arg-type]
    app.add_exception_handler(StarletteHTTPException, http_error)  # type: ignore[arg-type]
    app.add_exception_handler(Exception, internal)
    app.add_exception_handler(PayloadTooLargeError, too_large)  # type: ignore[arg-type]
    app.add_exception_handler(RedisUnavailableError, unavailable)  # type: ignore[arg-type]
    app.add_exception_handler(InvalidFieldError, invalid_field)  # type: ignore[arg-type]
    app.add_exception_handler(StreamFullError, stream_full)  # type: ignore[arg-type]
    app.add_exception_handler(ReplicasUnconfirmedError, unconfirmed)  # type: ignore[arg-type]
    app.add_exception_handler(ConfigError, simple(422, with_field=True))
    app.add_exception_handler(OptionsError, simple(422, with_field=True))
    app.add_exception_handler(InputError, simple(422))
    app.add_exception_handler(ModelNotFoundError, simple(404))
    app.add_exception_handler(SnapshotNotFoundError, simple(404))
    app.add_exception_handler(GroupNotFoundError, simple(404))
    app.add_exception_handler(ModelExistsError, simple(409))
    app.add_exception_handler(ModelNotReadyError, simple(409))
    app.add_exception_handler(CorruptSnapshotError, simple(409))
    app.add_exception_handler(VersionConflictError, simple(409))


def default_routers() -> list[APIRouter]:
    """One router per resource (also their order in the OpenAPI document)."""
    from service.routers import (
        corrections,
        documents,
        drift,
        events,
        groups,
        health,
        models,
        routing,
        snapshots,
    )

    # routing and queueing first: a request is matched against the routes in order, and these
    # two carry nearly all the traffic
    return [
        routing.router,
        documents.router,
        health.router,
        models.router,
        groups.router,
        corrections.router,
        snapshots.router,
        drift.router,
        _routed_router(),
        events.router,
    ]


def _routed_router() -> APIRouter:
    from service.routers import routed

    return routed.router


def create_app(
    settings: Settings | None = None,
    *,
    redis_client: redis.Redis | None = None,
    extra_routers: Sequence[APIRouter] = (),
    middleware: Iterable[tuple[type, dict[str, Any]]] = (),
    background: Sequence[Background] = (),
    background_factories: Sequence[Callable[[ServiceRuntime], Background]] = (),
) -> FastAPI:
    """Build the mixroute API.

    Parameters
    ----------
    settings : Settings, optional
        Defaults to the environment (prefix ``MIXROUTE_``).
    redis_client : redis.Redis, optional
        Client to use; otherwise one is made from ``settings.redis_url`` at start-up.
    extra_routers : sequence of APIRouter
        Added after the resource routers (metrics, dashboard, ...).
    middleware : iterable of (class, options)
        ASGI middleware added outermost-last, e.g. ``[(AuthMiddleware, {"token": ...})]``.
    background : sequence of objects with start() and stop()
        Started after the runtime, stopped (in reverse order) before it.
    background_factories : sequence of callables
        Called with the runtime at start-up to build more background objects (a worker pool).

    Returns
    -------
    FastAPI
        ``app.state.runtime`` holds the :class:`ServiceRuntime` once the lifespan has started.
    """
    settings = settings or Settings()

    @contextlib.asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        client = redis_client
        if client is None:
            if not settings.redis_url:
                raise RuntimeError(
                    "no Redis configured: set MIXROUTE_REDIS_URL (or REDIS_URL), or start the "
                    "API with `mixroute serve`, which runs an embedded Redis"
                )
            from state.connection import redis_from_url

            client = redis_from_url(
                settings.redis_url,
                cluster=settings.redis_cluster,
                socket_timeout=settings.redis_timeout,
                socket_connect_timeout=settings.redis_timeout,
            )
        from state.replicas import require_replicas

        # this process's enqueues, checkpoints and creations wait for the replicas
        require_replicas(settings.redis_wait_replicas, settings.redis_wait_timeout)
        if settings.model_threads is not None:
            from mixture.sweep import set_worker_threads

            set_worker_threads(settings.model_threads)
        runtime = ServiceRuntime(settings, client)
        app.state.runtime = runtime
        app.state.settings = settings
        runtime.start()
        started: list[Background] = []
        try:
            for item in [*background, *(f(runtime) for f in background_factories)]:
                item.start()
                started.append(item)
            yield
        finally:
            for item in reversed(started):
                try:
                    item.stop()
                except Exception:
                    log.exception("stopping %r failed", item)
            runtime.stop()

    app = FastAPI(
        title="mixroute",
        version="0.1.0",
        summary="Route unlabelled messages with an online mixture of unigram language models.",
        lifespan=lifespan,
    )
    app.state.settings = settings
    install_error_handlers(app)
    for router in [*default_routers(), *extra_routers]:
        app.include_router(router)
    for cls, options in middleware:
        app.add_middleware(cls, **options)
    app.add_middleware(BodyGuard, max_bytes=settings.max_request_bytes)
    install_operations(app, settings)
    return app


def install_operations(app: FastAPI, settings: Settings) -> None:
    """Metrics, the dashboard, access control and request ids (issue 5's modules).

    Added last so that, outermost first, a request meets: request id and access line
    (service.logs), the key check (service.auth, before any body is read), the routing meter
    (service.metrics), then the body guard and the routes.
    """
    from service import auth, logs, metrics
    from service.routers import dashboard

    metrics.install(app, settings)
    dashboard.install(app, settings)
    auth.install(app, settings)
    app.add_middleware(logs.RequestContext, secrets=auth.secrets_of(settings))
