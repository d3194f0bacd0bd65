"""Every bad input gets its status and a message naming the problem, and changes nothing:
the stream length, the model version, the registry and the labels stay as they were."""

from __future__ import annotations

import json
import warnings
from collections.abc import Iterator
from typing import Any

import pytest
import redis

from service.app import create_app
from service.settings import Settings
from service.testing import first_checkpoint, wait_until
from state.keys import REGISTRY_KEY, ModelKeys

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis

MAX_TEXT_BYTES = 2_000
MAX_DOCUMENTS = 5


class ScopeRecorder:
    """Outer ASGI middleware keeping the last HTTP scope it passed on (after the answer)."""

    last: dict[str, Any] | None = None

    def __init__(self, app: Any) -> None:
        self.app = app

    async def __call__(self, scope: dict, receive: Any, send: Any) -> None:
        await self.app(scope, receive, send)
        if scope["type"] == "http":
            ScopeRecorder.last = scope


@pytest.fixture
def warm(redis_url: str, redis_client: redis.Redis, model_name: str) -> Iterator[TestClient]:
    """A client of an app whose model has one checkpoint (learned by a worker, then idle)."""
    settings = Settings(
        redis_url=redis_url,
        max_text_bytes=MAX_TEXT_BYTES,
        max_documents_per_request=MAX_DOCUMENTS,
        reload_poll_interval=0.05,
    )
    app = create_app(settings, middleware=[(ScopeRecorder, {})])
    with TestClient(app) as client:
        _, worker, _ = first_checkpoint(client, redis_client, redis_url, model_name, 3, seed=1)
        worker.checkpoint()
        wait_until(lambda: client.get(f"/models/{model_name}").json()["version"] > 0)
        yield client


def snapshot_of_redis(client: redis.Redis, model: str) -> dict[str, Any]:
    keys = ModelKeys(model)
    return {
        "stream": client.xlen(keys.docs),
        "version": client.get(keys.version),
        "registry": sorted(client.smembers(REGISTRY_KEY)),
        "snapshots": client.zcard(keys.snapshots),
    }


def cases(model: str) -> list[tuple[str, str, str, bytes | dict | None, int, str]]:
    """(name, method, path, body, status, message fragment)."""
    big = "x " * MAX_TEXT_BYTES
    many = {"documents": [{"text": f"ferry {i}"} for i in range(MAX_DOCUMENTS + 1)]}
    route = f"/models/{model}/route"
    docs = f"/models/{model}/documents"
    return [
        ("route: missing text", "POST", route, {}, 422, 'give either "text"'),
        ("route: empty text", "POST", route, {"text": ""}, 422, "text is empty"),
        ("route: blank text", "POST", route, {"text": "  \n "}, 422, "text is empty"),
        ("route: text not a string", "POST", route, {"text": 5}, 422, "text"),
        ("route: text too long", "POST", route, {"text": big}, 413, "bytes"),
        ("route: too many documents", "POST", route, many, 413, "limit is 5"),
        ("route: no documents", "POST", route, {"documents": []}, 422, "no documents"),
        ("route: invalid JSON", "POST", route, b'{"text": "late', 422, "not valid JSON"),
        ("route: invalid UTF-8", "POST", route, b'{"text": "caf\xe9"}', 422, "not valid UTF-8"),
        ("route: top out of range", "POST", route, {"text": "ferry", "top": 0}, 422, "top"),
        ("route: unknown model", "POST", "/models/nope-x1/route", {"text": "a"}, 404, "nope-x1"),
        ("queue: empty text", "POST", docs, {"documents": [{"text": ""}]}, 422, "text is empty"),
        ("queue: second text empty", "POST", docs,
         {"documents": [{"text": "fine ferry"}, {"text": " "}]}, 422, "documents.1.text"),
        ("queue: too many documents", "POST", docs, many, 413, "limit is 5"),
        ("queue: text too long", "POST", docs, {"documents": [{"text": big}]}, 413, "bytes"),
        ("queue: invalid UTF-8", "POST", docs, b'{"documents": [{"text": "\xff"}]}', 422,
         "UTF-8"),
        ("queue: invalid JSON", "POST", docs, b"[", 422, "not valid JSON"),
        ("queue: unknown field", "POST", docs, {"documents": [{"text": "a", "when": 1}]}, 422,
         "when"),
        ("queue: unknown model", "POST", "/models/nope-x1/documents",
         {"documents": [{"text": "a"}]}, 404, "nope-x1"),
        ("group: unknown", "GET", f"/models/{model}/groups/7", None, 404, "no group 7"),
        ("label: unknown group", "PUT", f"/models/{model}/groups/3/label", {"label": "x"}, 404,
         "no group 3"),
        ("snapshot: unknown", "GET", f"/models/{model}/snapshots/snap-999999", None, 404,
         "snap-999999"),
        ("restore: unknown", "POST", f"/models/{model}/snapshots/snap-999999/restore",
         {"replay": False}, 404,
         "snap-999999"),
        ("model: unknown", "GET", "/models/nope-x1", None, 404, "nope-x1"),
        ("create: taken name", "POST", "/models", {"name": model}, 409, "already exists"),
        ("create: bad name", "POST", "/models", {"name": "a b{c}"}, 422, "name"),
        ("create: n_groups 0", "POST", "/models", {"name": "bad-k", "config": {"n_groups": 0}},
         422, "n_groups"),
        ("create: step_exponent 0.3", "POST", "/models",
         {"name": "bad-alpha", "config": {"step_exponent": 0.3}}, 422, "step_exponent"),
        ("create: unknown config field", "POST", "/models",
         {"name": "bad-field", "config": {"groups": 3}}, 422, "groups"),
        ("create: option out of range", "POST", "/models",
         {"name": "bad-opt", "options": {"checkpoint_documents": 0}}, 422, "checkpoint_documents"),
        ("create: half-life under batch", "POST", "/models",
         {"name": "bad-hl", "config": {"half_life_documents": 10, "batch_size": 100}}, 422,
         "half_life_documents"),
    ]  # fmt: skip


def test_every_bad_input_is_refused_and_changes_nothing(
    warm: TestClient, redis_client: redis.Redis, model_name: str
) -> None:
    before = snapshot_of_redis(redis_client, model_name)
    labels_before = warm.get(f"/models/{model_name}/groups").json()
    fields_seen = {}
    for name, method, path, body, status, fragment in cases(model_name):
        if isinstance(body, bytes):
            response = warm.request(
                method, path, content=body, headers={"content-type": "application/json"}
            )
        elif body is None:
            response = warm.request(method, path)
        else:
            response = warm.request(method, path, json=body)
        assert response.status_code == status, f"{name}: {response.status_code} {response.text}"
        payload = response.json()
        assert isinstance(payload["detail"], str), name
        assert fragment in payload["detail"] or fragment == payload.get("field"), (
            f"{name}: {payload}"
        )
        fields_seen[name] = payload.get("field")
        after = snapshot_of_redis(redis_client, model_name)
        assert after == before, f"{name} changed Redis: {before} -> {after}"
    # 422s for configuration name the field in "field" too
    assert fields_seen["create: n_groups 0"] == "n_groups"
    assert fields_seen["create: option out of range"] == "checkpoint_documents"
    assert fields_seen["route: too many documents"] == "documents"
    assert warm.get(f"/models/{model_name}/groups").json() == labels_before


def test_body_over_request_limit_is_413(redis_url: str) -> None:
    settings = Settings(redis_url=redis_url, max_request_bytes=10_000)
    with TestClient(create_app(settings)) as client:
        body = json.dumps({"text": "y" * 20_000})
        response = client.post(
            "/models/anything/route", content=body, headers={"content-type": "application/json"}
        )
        assert response.status_code == 413
        assert "10000 bytes" in response.json()["detail"]


def test_answer_is_handed_to_outer_middleware(warm: TestClient, model_name: str) -> None:
    texts = ["is the ferry late", "I left my bag on the deck"]
    answer = warm.post(
        f"/models/{model_name}/route", json={"documents": [{"text": t} for t in texts]}
    ).json()
    assert ScopeRecorder.last is not None
    assert ScopeRecorder.last["mixroute.answer"] == answer
    assert ScopeRecorder.last["mixroute.texts"] == texts
    queued = warm.post(
        f"/models/{model_name}/documents", json={"documents": [{"text": "a ferry question"}]}
    )
    assert queued.status_code == 202 and ScopeRecorder.last["mixroute.queued"] == 1


def test_model_deleted_elsewhere_is_forgotten(
    warm: TestClient, redis_client: redis.Redis, model_name: str
) -> None:
    from state.registry import Registry

    assert warm.get(f"/models/{model_name}").status_code == 200
    Registry(redis_client).delete(model_name)  # as another API replica would
    warm.app.state.runtime.poll_once()
    gone = warm.post(f"/models/{model_name}/route", json={"text": "ferry"})
    assert gone.status_code == 404 and model_name in gone.json()["detail"]
