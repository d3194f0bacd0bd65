"""Property-based API testing with schemathesis against our own OpenAPI document: generated
requests (valid and invalid) never get a 5xx, and every response matches the documented status
codes, content type and body schema.

Source of the checks: schemathesis (not_a_server_error, status_code_conformance,
content_type_conformance, response_schema_conformance), which validates responses against the
OpenAPI 3 document with a JSON Schema validator. The number of examples is bounded so the test
stays within seconds.
"""

from __future__ import annotations

import random
from collections.abc import Iterator

import httpx
import pytest
import schemathesis
from hypothesis import HealthCheck, settings
from schemathesis import checks

from service.app import create_app
from service.settings import Settings
from service.testing import first_checkpoint, uvicorn_thread, wait_until
from state.keys import REGISTRY_KEY
from state.registry import Registry

pytestmark = pytest.mark.redis

SCHEMA = schemathesis.openapi.from_dict(create_app(Settings(redis_url="unused")).openapi())
CHECKS = [
    checks.not_a_server_error,
    checks.status_code_conformance,
    checks.content_type_conformance,
    checks.response_schema_conformance,
]
SCHEMA_MODEL = "schema-inbox"


@pytest.fixture(scope="module")
def live(redis_url: str) -> Iterator[str]:
    """A uvicorn server on loopback with one warm model; models created by generated requests
    are removed afterwards."""
    from state.connection import redis_from_url

    client = redis_from_url(redis_url)
    before = set(client.smembers(REGISTRY_KEY))
    registry = Registry(client)
    if registry.exists(SCHEMA_MODEL):
        registry.delete(SCHEMA_MODEL)
    app = create_app(Settings(redis_url=redis_url, max_documents_per_request=50))
    with uvicorn_thread(app) as base_url:
        http = httpx.Client(base_url=base_url)
        _, worker, _ = first_checkpoint(http, client, redis_url, SCHEMA_MODEL, 3, seed=4)
        worker.stop()
        wait_until(lambda: http.get(f"/models/{SCHEMA_MODEL}").json()["version"] > 0)
        http.post(f"/models/{SCHEMA_MODEL}/snapshots", json={"reason": "schema test"})
        http.close()
        yield base_url
    for name in set(client.smembers(REGISTRY_KEY)) - before:
        registry.delete(name.decode())
    client.close()


@SCHEMA.parametrize()
@settings(
    max_examples=6,
    deadline=None,
    derandomize=True,
    suppress_health_check=list(HealthCheck),
)
def test_api_conforms_to_its_schema(case: schemathesis.Case, live: str) -> None:
    # aim most generated requests at the real model so they reach the routing, groups,
    # snapshot and drift code, not only the unknown-model branch; never delete it
    params = case.path_parameters or {}
    aim = random.Random(repr(case.body) + repr(params)).random() < 0.8
    if "model" in params and case.method.upper() != "DELETE" and aim:
        params["model"] = SCHEMA_MODEL
    if "snapshot_id" in params and case.method.upper() == "DELETE":
        params["model"] = "not-" + SCHEMA_MODEL
    case.call_and_validate(base_url=live, checks=CHECKS)


def test_live_model_survived(live: str) -> None:
    """The generated traffic left the warm model in place and routable."""
    response = httpx.post(f"{live}/models/{SCHEMA_MODEL}/route", json={"text": "ferry delayed"})
    assert response.status_code == 200, response.text
