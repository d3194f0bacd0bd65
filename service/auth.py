"""Access control: API keys with a read role and an admin role.

Keys come from the settings ``MIXROUTE_API_KEYS_READ`` and ``MIXROUTE_API_KEYS_ADMIN``
(comma-separated). A client sends one as ``Authorization: Bearer KEY`` or ``X-API-Key: KEY``.

Which role a route needs is decided from the route itself, for every route of the app
(:func:`required_role`), so a route added later is covered without a list to keep in step:

* public: liveness, readiness, the OpenAPI pages, the dashboard's page and static files, and
  ``GET /auth`` (what role a key has; the dashboard's login);
* read: every ``GET``, plus the two calls an intake system makes (``POST .../route`` and
  ``POST .../documents``);
* admin: every other method (create or delete models, label groups, snapshots, restore).

No key gives 401, a key of the wrong role 403. Keys are compared as SHA-256 digests with
:func:`hmac.compare_digest` against every configured key without stopping at the first match,
so the time taken does not depend on which key (or how much of one) matched. Keys are never
logged (see :mod:`service.logs`).

With no key configured access control is off: the service then refuses to listen anywhere but
on loopback (:func:`check_bind`) and says so at start-up.
"""

from __future__ import annotations

import enum
import hashlib
import hmac
import ipaddress
import json
import logging
import re
from collections.abc import Iterable
from typing import Any

from fastapi import APIRouter, FastAPI, Request
from starlette.routing import Mount, compile_path
from starlette.types import ASGIApp, Receive, Scope, Send

from mixture.errors import ConfigError
from service.settings import Settings

log = logging.getLogger(__name__)

MIN_KEY_LENGTH = 16  # common practice, no source: long enough that guessing is hopeless

PUBLIC_PATHS = frozenset(
    {
        "/health",
        "/ready",
        "/docs",
        "/docs/oauth2-redirect",
        "/redoc",
        "/openapi.json",
        "/auth",
        "/dashboard",
        "/dashboard/static",
    }
)
READ_WRITES = frozenset({("POST", "/models/{model}/route"), ("POST", "/models/{model}/documents")})
SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})


class Role(enum.IntEnum):
    """What a caller may do; a higher role may do everything a lower one may."""

    PUBLIC = 0
    READ = 1
    ADMIN = 2


class AccessConfigError(ConfigError):
    """Unusable access settings (a short key, or an open address without keys)."""


def parse_keys(raw: str, setting: str) -> list[str]:
    """The keys of one comma-separated setting.

    Raises
    ------
    AccessConfigError
        A key shorter than :data:`MIN_KEY_LENGTH` or containing white space (the message
        names the setting and the key's position, never the key).
    """
    keys = []
    for position, part in enumerate(raw.split(","), start=1):
        key = part.strip()
        if not key:
            continue
        if len(key) < MIN_KEY_LENGTH or any(c.isspace() for c in key):
            raise AccessConfigError(
                f"{setting}: key {position} must be at least {MIN_KEY_LENGTH} characters "
                "without spaces"
            )
        keys.append(key)
    return keys


def _digest(key: str) -> bytes:
    return hashlib.sha256(key.encode("utf-8")).digest()


class KeyRing:
    """The configured keys of both roles, held as digests.

    Parameters
    ----------
    read_keys, admin_keys : iterable of str
    """

    def __init__(self, read_keys: Iterable[str], admin_keys: Iterable[str]) -> None:
        self._read = [_digest(k) for k in read_keys]
        self._admin = [_digest(k) for k in admin_keys]

    @classmethod
    def from_settings(cls, settings: Settings) -> KeyRing:
        read = parse_keys(settings.api_keys_read.get_secret_value(), "MIXROUTE_API_KEYS_READ")
        admin = parse_keys(settings.api_keys_admin.get_secret_value(), "MIXROUTE_API_KEYS_ADMIN")
        return cls(read, admin)

    @property
    def enabled(self) -> bool:
        """True when at least one key is configured (access control on)."""
        return bool(self._read or self._admin)

    def role_of(self, presented: str | None) -> Role | None:
        """The role of a presented key, or None when it matches no configured key."""
        if not presented:
            return None
        digest = _digest(presented)
        admin = False
        read = False
        for known in self._admin:  # no early exit: the time does not say which key matched
            admin |= hmac.compare_digest(digest, known)
        for known in self._read:
            read |= hmac.compare_digest(digest, known)
        if admin:
            return Role.ADMIN
        if read:
            return Role.READ
        return None


def secrets_of(settings: Settings) -> list[str]:
    """Every configured key (for the log redactor)."""
    raw = (
        f"{settings.api_keys_read.get_secret_value()},{settings.api_keys_admin.get_secret_value()}"
    )
    return [part.strip() for part in raw.split(",") if part.strip()]


def is_loopback(host: str) -> bool:
    """True for ``localhost`` and loopback addresses (127.0.0.0/8, ::1)."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def check_bind(settings: Settings, keys: KeyRing) -> None:
    """Refuse a non-loopback address when no key is configured; say what is in force.

    Raises
    ------
    AccessConfigError
        ``settings.host`` is not a loopback address and no API key is configured.
    """
    if keys.enabled:
        log.info("access control on: API keys required (read and admin roles)")
        return
    if not is_loopback(settings.host):
        raise AccessConfigError(
            f"host {settings.host!r}: refusing to listen on a non-loopback address with no API "
            "keys configured (anyone could roll back or delete models). Set "
            "MIXROUTE_API_KEYS_ADMIN (and MIXROUTE_API_KEYS_READ for intake systems), or keep "
            "MIXROUTE_HOST=127.0.0.1"
        )
    log.warning(
        "no API keys configured: access control is off, so the API listens on loopback "
        "only (%s); set MIXROUTE_API_KEYS_ADMIN / MIXROUTE_API_KEYS_READ to serve others",
        settings.host,
    )


def required_role(method: str, path: str, public: frozenset[str] = PUBLIC_PATHS) -> Role:
    """The role a request needs, from its method and the route's path template.

    Parameters
    ----------
    method : str
        HTTP method.
    path : str
        The matched route's path template (``/models/{model}/route``), or the raw path when
        no route matched.
    public : frozenset of str
        Templates open to everyone (``PUBLIC_PATHS``, plus ``/metrics`` when configured so).
    """
    if path in public:
        return Role.PUBLIC
    if method in SAFE_METHODS or (method, path) in READ_WRITES:
        return Role.READ
    return Role.ADMIN


def app_routes(app: Any) -> list[tuple[str, frozenset[str] | None]]:
    """Every route of the app as ``(path template, methods)``; methods None for a mount.

    Walks included routers too (FastAPI keeps them as nested objects rather than copying their
    routes into the app), so the list is the one requests are dispatched over.
    """
    found: list[tuple[str, frozenset[str] | None]] = []
    for route in app.router.routes:
        if hasattr(route, "effective_route_contexts"):  # an included router
            for context in route.effective_route_contexts():
                inner = context.original_route
                path = getattr(context, "path_format", None) or getattr(inner, "path", "")
                found.append((str(path), frozenset(getattr(inner, "methods", None) or ())))
        elif isinstance(route, Mount):
            found.append((str(route.path), None))
        elif hasattr(route, "path"):
            found.append((str(route.path), frozenset(getattr(route, "methods", None) or ())))
    return found


class RouteTable:
    """Resolves a request to the path template of the route that will answer it."""

    def __init__(self, routes: list[tuple[str, frozenset[str] | None]]) -> None:
        self.entries = []
        for path, methods in routes:
            if methods is None:
                regex = re.compile("^" + re.escape(path) + "(/.*)?$")
            else:
                regex = compile_path(path)[0]
            self.entries.append((regex, path, methods))

    def template(self, method: str, path: str) -> str:
        """The matching template (with the method if possible), else the raw path."""
        partial: str | None = None
        for regex, template, methods in self.entries:
            if not regex.match(path):
                continue
            if methods is None or method in methods or (method == "HEAD" and "GET" in methods):
                return template
            if partial is None:
                partial = template  # the path exists with another method: 405 follows
        return partial or path


def presented_key(scope: Scope) -> str | None:
    """The key in ``Authorization: Bearer ...`` or ``X-API-Key``, if any."""
    for name, value in scope.get("headers", ()):
        if name == b"authorization":
            scheme, _, token = value.decode("latin-1").partition(" ")
            if scheme.lower() == "bearer" and token.strip():
                return token.strip()
        elif name == b"x-api-key" and value.strip():
            return value.decode("latin-1").strip()
    return None


class AccessControl:
    """Pure ASGI middleware enforcing :func:`required_role` on every HTTP request.

    Parameters
    ----------
    app : ASGI app
    keys : KeyRing
    """

    def __init__(self, app: ASGIApp, keys: KeyRing, public: frozenset[str] = PUBLIC_PATHS) -> None:
        self.app = app
        self.keys = keys
        self.public = public
        self._table: RouteTable | None = None

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or not self.keys.enabled:
            await self.app(scope, receive, send)
            return
        method = scope["method"]
        if self._table is None:  # built at the first request, when every route is in place
            self._table = RouteTable(app_routes(scope["app"]))
        template = self._table.template(method, scope.get("path", ""))
        needed = required_role(method, template, self.public)
        if needed is Role.PUBLIC:
            await self.app(scope, receive, send)
            return
        presented = presented_key(scope)
        role = self.keys.role_of(presented)
        if role is None:
            reason = "no API key given" if presented is None else "the API key is not valid"
            await _refuse(
                send,
                401,
                f"{reason}: send 'Authorization: Bearer KEY' (or 'X-API-Key: KEY') with a key "
                f"of the {needed.name.lower()} role",
                logged=f"{method} {template}: {reason}",
            )
            return
        if role < needed:
            has, wants = role.name.lower(), needed.name.lower()
            await _refuse(
                send,
                403,
                f"{method} {template} needs the {wants} role; this key has the {has} role",
                logged=f"{method} {template}: {has} role, {wants} needed",
            )
            return
        scope.setdefault("state", {})["role"] = role.name.lower()
        await self.app(scope, receive, send)


async def _refuse(send: Send, status: int, detail: str, logged: str) -> None:
    """Answer 401 or 403 with ``detail`` for the client; log ``logged`` (never the key)."""
    log.info("refused %s", logged, extra={"event": "auth_refused", "status": status})
    payload = json.dumps({"detail": detail, "field": None}).encode()
    headers = [
        (b"content-type", b"application/json"),
        (b"content-length", str(len(payload)).encode()),
    ]
    if status == 401:
        headers.append((b"www-authenticate", b'Bearer realm="mixroute"'))
    await send({"type": "http.response.start", "status": status, "headers": headers})
    await send({"type": "http.response.body", "body": payload})


router = APIRouter(tags=["access"])


@router.get("/auth", summary="Whether keys are required and the role of the key sent")
def whoami(request: Request) -> dict[str, Any]:
    """``keys_required`` and ``role`` (``admin``, ``read``, or null for no or a wrong key).

    With access control off every caller is treated as admin (loopback only).
    """
    keys: KeyRing = request.app.state.keys
    if not keys.enabled:
        return {"keys_required": False, "role": "admin"}
    role = keys.role_of(presented_key(request.scope))
    return {"keys_required": True, "role": None if role is None else role.name.lower()}


def document_security(app: FastAPI, public: frozenset[str]) -> None:
    """Describe the keys in the OpenAPI document: the two header schemes, which operations
    need one, and their 401/403 answers (added when access control is on)."""
    build = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is not None:
            return app.openapi_schema
        schema = build()
        components = schema.setdefault("components", {})
        components.setdefault("securitySchemes", {}).update(
            {
                "bearerKey": {"type": "http", "scheme": "bearer", "description": "API key"},
                "headerKey": {"type": "apiKey", "in": "header", "name": "X-API-Key"},
            }
        )
        problem = {"$ref": "#/components/schemas/Problem"}
        for path, item in schema.get("paths", {}).items():
            for method, operation in item.items():
                needed = required_role(method.upper(), path, public)
                if needed is Role.PUBLIC or not isinstance(operation, dict):
                    continue
                operation["security"] = [{"bearerKey": []}, {"headerKey": []}]
                responses = operation.setdefault("responses", {})
                content = {"application/json": {"schema": problem}}
                responses.setdefault("401", {"description": "No key or a wrong key"})
                responses["401"].setdefault("content", content)
                if needed is Role.ADMIN:
                    responses.setdefault("403", {"description": "Needs the admin role"})
                    responses["403"].setdefault("content", content)
                description = operation.get("description", "")
                operation["description"] = f"{description}\n\nRole: {needed.name.lower()}."
        app.openapi_schema = schema
        return schema

    app.openapi = openapi  # type: ignore[method-assign]


def install(app: FastAPI, settings: Settings) -> KeyRing:
    """Check the keys and the address, add ``GET /auth`` and the access-control middleware.

    Call after every other route is added and after the app's own middleware, so the check
    runs before any request body is read.
    """
    keys = KeyRing.from_settings(settings)
    check_bind(settings, keys)
    app.state.keys = keys
    app.include_router(router)
    public = frozenset(PUBLIC_PATHS | ({"/metrics"} if settings.metrics_public else set()))
    app.add_middleware(AccessControl, keys=keys, public=public)
    if keys.enabled:
        document_security(app, public)
    return keys
