"""Access control on a live app: every admin route refuses a read key, a wrong key and no key;
read routes need a key; keys never reach the logs; request ids go in and out."""

from __future__ import annotations

import io
import json
import logging
import re
import uuid
import warnings
from collections.abc import Iterator
from typing import Any

import pytest

from service import auth
from service.app import create_app
from service.logs import JsonFormatter, configure_logging
from service.settings import Settings
from state.connection import redis_from_url
from state.keys import REGISTRY_KEY, ModelKeys
from tests.ops_support import ADMIN, ADMIN_KEY, READ, READ_KEY, WithKey, make_app, train

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis

WRONG_KEY = "wrong-5c1d9e7a3b2f48d6e0a9"
WRONG = {"Authorization": f"Bearer {WRONG_KEY}"}
# The operations issue 5 names as admin-only; they must be among the routes found below.
NAMED_ADMIN = {
    ("POST", "/models"),
    ("DELETE", "/models/{model}"),
    ("PUT", "/models/{model}/groups/{group}/label"),
    ("POST", "/models/{model}/snapshots"),
    ("DELETE", "/models/{model}/snapshots/{snapshot_id}"),
    ("POST", "/models/{model}/snapshots/{snapshot_id}/restore"),
}
INTAKE_WRITES = {("POST", "/models/{model}/route"), ("POST", "/models/{model}/documents")}


class Live:
    def __init__(self, client: TestClient, model: str, snapshot: str, log: io.StringIO) -> None:
        self.client = client
        self.model = model
        self.snapshot = snapshot
        self.log = log

    def url(self, template: str) -> str:
        return (
            template.replace("{model}", self.model)
            .replace("{group}", "0")
            .replace("{snapshot_id}", self.snapshot)
        )


@pytest.fixture(scope="module")
def live(redis_url: str) -> Iterator[Live]:
    model = f"t-auth-{uuid.uuid4().hex[:10]}"
    captured = io.StringIO()
    handler = logging.StreamHandler(captured)
    handler.setFormatter(JsonFormatter())  # no redactor: the code itself must not log keys
    root = logging.getLogger()
    old_level = root.level
    root.addHandler(handler)
    root.setLevel(logging.DEBUG)
    try:
        app = make_app(redis_url, model)
        with TestClient(app) as client:
            admin = WithKey(client, ADMIN)
            train(admin, model, days=2, snapshot_after=1)
            snapshot = admin.get(f"/models/{model}/snapshots").json()["snapshots"][0]["id"]
            yield Live(client, model, snapshot, captured)
    finally:
        root.removeHandler(handler)
        root.setLevel(old_level)
        client_ = redis_from_url(redis_url)
        keys = list(client_.scan_iter(match=ModelKeys(model).pattern(), count=1000))
        if keys:
            client_.delete(*keys)
        client_.srem(REGISTRY_KEY, model)
        client_.close()


def schema_operations(client: TestClient) -> list[tuple[str, str]]:
    """Every operation of the app's own OpenAPI document (independent of service.auth)."""
    paths = client.get("/openapi.json").json()["paths"]
    return sorted(
        (method.upper(), path)
        for path, item in paths.items()
        for method in item
        if method in ("get", "post", "put", "patch", "delete")
    )


def expected_role(method: str, path: str) -> str:
    """The rule written out once more, here, from the issue: reads and the intake system's two
    calls need the read role; every other change needs admin; liveness, readiness, the schema
    and the key check are open."""
    if path in ("/health", "/ready", "/openapi.json", "/auth"):
        return "public"
    if method == "GET" or (method, path) in INTAKE_WRITES:
        return "read"
    return "admin"


def state_of(live: Live) -> tuple[Any, ...]:
    admin = WithKey(live.client, ADMIN)
    model = admin.get(f"/models/{live.model}").json()
    snaps = admin.get(f"/models/{live.model}/snapshots").json()["snapshots"]
    groups = admin.get(f"/models/{live.model}/groups").json()["groups"]
    return (
        model["version"],
        model["documents_learned"],
        model["stream"]["length"],
        [s["id"] for s in snaps],
        [(g["label"], g["destination"]) for g in groups],
    )


def test_every_admin_route_refuses_read_wrong_and_no_key(live: Live) -> None:
    operations = schema_operations(live.client)
    admin_ops = [(m, p) for m, p in operations if expected_role(m, p) == "admin"]
    assert set(admin_ops) >= NAMED_ADMIN, "an operation the issue names is missing"
    # the middleware's own route list agrees with the schema on every operation
    table = auth.RouteTable(auth.app_routes(live.client.app))
    for method, path in operations:
        needed = auth.required_role(method, table.template(method, live.url(path)))
        assert needed.name.lower() == expected_role(method, path), (method, path)

    # the OpenAPI document tells clients the same: a key scheme, 401 and (admin) 403
    paths = live.client.get("/openapi.json").json()["paths"]
    for method, path in operations:
        operation = paths[path][method.lower()]
        role = expected_role(method, path)
        assert ("security" in operation) == (role != "public"), (method, path)
        assert ("403" in operation["responses"]) == (role == "admin"), (method, path)

    before = state_of(live)
    for method, path in admin_ops:
        url = live.url(path)
        body = {"label": "hijacked"} if path.endswith("/label") else {}
        if path == "/models":
            body = {"name": "t-auth-intruder", "config": {"n_groups": 2}}
        none = live.client.request(method, url, json=body)
        assert none.status_code == 401, (method, path, none.text)
        assert none.headers["WWW-Authenticate"].startswith("Bearer")
        assert "API key" in none.json()["detail"]
        wrong = live.client.request(method, url, json=body, headers=WRONG)
        assert wrong.status_code == 401, (method, path, wrong.text)
        read = live.client.request(method, url, json=body, headers=READ)
        assert read.status_code == 403, (method, path, read.text)
        assert "admin role" in read.json()["detail"]
    # nothing refused changed anything
    assert state_of(live) == before
    assert live.client.get("/models/t-auth-intruder", headers=ADMIN).status_code == 404


def test_read_routes_need_a_key_and_accept_both_roles(live: Live) -> None:
    for method, path in schema_operations(live.client):
        role = expected_role(method, path)
        if role == "admin":
            continue
        url = live.url(path)
        body = {"text": "is the morning ferry late"} if method == "POST" else None
        if path.endswith("/documents"):
            continue  # queueing is checked below, once, so the stream grows by a known amount
        if role == "public":
            assert live.client.request(method, url, json=body).status_code != 401, path
            continue
        assert live.client.request(method, url, json=body).status_code == 401, path
        for headers in (READ, ADMIN):
            answer = live.client.request(method, url, json=body, headers=headers)
            assert answer.status_code not in (401, 403), (path, answer.text)
    queued = live.client.post(
        f"/models/{live.model}/documents",
        json={"documents": [{"text": "my bicycle was left on the quay"}]},
        headers=READ,
    )
    assert queued.status_code == 202, queued.text


def test_admin_key_may_snapshot_and_restore(live: Live) -> None:
    admin = WithKey(live.client, ADMIN)
    made = admin.post(f"/models/{live.model}/snapshots", json={"reason": "auth test"})
    assert made.status_code == 201, made.text
    version = admin.get(f"/models/{live.model}").json()["version"]
    restored = admin.post(
        f"/models/{live.model}/snapshots/{live.snapshot}/restore", json={"replay": False}
    )
    assert restored.status_code == 200, restored.text
    assert restored.json()["version"] > version
    assert live.client.get("/auth", headers=READ).json() == {"keys_required": True, "role": "read"}
    assert live.client.get("/auth", headers=ADMIN).json()["role"] == "admin"
    assert live.client.get("/auth", headers=WRONG).json()["role"] is None


def test_request_ids_in_and_out(live: Live) -> None:
    given = live.client.get("/health", headers={"X-Request-ID": "intake-7:42"})
    assert given.headers["X-Request-ID"] == "intake-7:42"
    fresh = live.client.get("/health")
    assert re.fullmatch(r"[0-9a-f]{32}", fresh.headers["X-Request-ID"])
    unsafe = live.client.get("/health", headers={"X-Request-ID": "two words/" + "x" * 200})
    assert re.fullmatch(r"[0-9a-f]{32}", unsafe.headers["X-Request-ID"])
    lines = [json.loads(line) for line in live.log.getvalue().splitlines() if line.strip()]
    access = [r for r in lines if r.get("event") == "request" and r["request_id"] == "intake-7:42"]
    assert access and access[0]["path"] == "/health" and access[0]["status"] == 200
    # a request about a model names the model and the version this process serves
    version = live.client.get(f"/models/{live.model}", headers=READ).json()["version"]
    lines = [json.loads(line) for line in live.log.getvalue().splitlines() if line.strip()]
    last = [r for r in lines if r.get("event") == "request" and r.get("model") == live.model][-1]
    assert last["version"] == version and last["path"] == f"/models/{live.model}"


def test_request_id_travels_into_the_stream_entry(live: Live, redis_url: str) -> None:
    answer = live.client.post(
        f"/models/{live.model}/documents",
        json={"documents": [{"text": "the lift on the car deck is broken"}]},
        headers={**READ, "X-Request-ID": "trace-stream-1"},
    )
    assert answer.status_code == 202
    stream_id = answer.json()["stream_ids"][0]
    client = redis_from_url(redis_url)
    entry = client.xrange(ModelKeys(live.model).docs, min=stream_id, max=stream_id)
    client.close()
    metadata = json.loads(entry[0][1][b"metadata"])
    assert metadata.get("request_id") == "trace-stream-1"
    # ... and from a routing call that also queues
    routed = live.client.post(
        f"/models/{live.model}/route",
        json={"documents": [{"text": "two bikes and a trailer"}], "learn": True},
        headers={**READ, "X-Request-ID": "trace-route-2"},
    )
    assert routed.status_code == 200, routed.text
    stream_id = routed.json()["results"][0]["stream_id"]
    client = redis_from_url(redis_url)
    entry = client.xrange(ModelKeys(live.model).docs, min=stream_id, max=stream_id)
    client.close()
    assert json.loads(entry[0][1][b"metadata"])["request_id"] == "trace-route-2"


def test_keys_never_reach_the_logs(live: Live) -> None:
    # runs after the others in this module: every refusal and success above was logged
    text = live.log.getvalue()
    assert '"event": "auth_refused"' in text and '"event": "request"' in text
    for secret in (ADMIN_KEY, READ_KEY, WRONG_KEY):
        assert secret not in text


def test_no_keys_means_loopback_only(caplog: pytest.LogCaptureFixture) -> None:
    with pytest.raises(auth.AccessConfigError, match="MIXROUTE_API_KEYS_ADMIN"):
        create_app(Settings(host="0.0.0.0"))
    create_app(Settings(host="0.0.0.0", api_keys_read=READ_KEY))  # keys given: allowed
    with caplog.at_level(logging.WARNING, logger="service.auth"):
        create_app(Settings(host="127.0.0.1"))
    assert "loopback only" in caplog.text
    assert auth.is_loopback("::1") and auth.is_loopback("localhost")
    assert not auth.is_loopback("192.0.2.7")


def test_short_keys_are_refused_without_showing_them() -> None:
    with pytest.raises(auth.AccessConfigError) as info:
        create_app(Settings(api_keys_admin=f"{ADMIN_KEY},short1"))
    assert "key 2" in str(info.value) and "short1" not in str(info.value)


def test_every_key_is_compared_in_constant_time(monkeypatch: pytest.MonkeyPatch) -> None:
    admin_keys = [ADMIN_KEY, ADMIN_KEY[::-1], "x" * 20]
    ring = auth.KeyRing([READ_KEY, READ_KEY[::-1]], admin_keys)
    calls: list[tuple[bytes, bytes]] = []
    real = auth.hmac.compare_digest

    def counting(a: bytes, b: bytes) -> bool:
        calls.append((a, b))
        return real(a, b)

    monkeypatch.setattr(auth.hmac, "compare_digest", counting)
    assert ring.role_of(ADMIN_KEY) is auth.Role.ADMIN
    # no early exit: all five keys compared, always as fixed-length digests
    assert len(calls) == 5 and {len(a) for a, _ in calls} == {32}
    calls.clear()
    assert ring.role_of("not-a-key-at-all-0000") is None and len(calls) == 5


def test_settings_and_redactor_hide_keys(root_logging: logging.Logger) -> None:
    settings = Settings(api_keys_admin=ADMIN_KEY, api_keys_read=READ_KEY)
    assert ADMIN_KEY not in repr(settings) and READ_KEY not in str(settings.model_dump())
    stream = io.StringIO()
    configure_logging("info", "json", secrets=auth.secrets_of(settings), stream=stream)
    logging.getLogger("mixroute.test").info("someone pasted %s here", ADMIN_KEY)
    line = json.loads(stream.getvalue().splitlines()[-1])
    assert line["message"] == "someone pasted [redacted] here"
