"""The keyed app against its own OpenAPI document, with schemathesis: requests without a key
get the documented 401 (Problem body) on every protected operation, never a 5xx.

Source of the checks: schemathesis (not_a_server_error, status_code_conformance,
content_type_conformance, response_schema_conformance), which validates each response against
the OpenAPI 3 document. Examples are bounded so the test takes seconds.
"""

from __future__ import annotations

from collections.abc import Iterator

import pytest
import schemathesis
from hypothesis import HealthCheck, settings
from schemathesis import checks

from service.app import create_app
from service.auth import PUBLIC_PATHS
from service.testing import uvicorn_thread
from tests.ops_support import keyed_settings

pytestmark = pytest.mark.redis

SCHEMA = schemathesis.openapi.from_dict(create_app(keyed_settings("unused")).openapi())
CHECKS = [
    checks.not_a_server_error,
    checks.status_code_conformance,
    checks.content_type_conformance,
    checks.response_schema_conformance,
]


@pytest.fixture(scope="module")
def live(redis_url: str) -> Iterator[str]:
    with uvicorn_thread(create_app(keyed_settings(redis_url))) as base_url:
        yield base_url


@SCHEMA.parametrize()
@settings(max_examples=3, deadline=None, derandomize=True, suppress_health_check=list(HealthCheck))
def test_without_a_key_every_protected_operation_answers_401(
    case: schemathesis.Case, live: str
) -> None:
    case.headers = {k: v for k, v in (case.headers or {}).items() if k.lower() != "authorization"}
    response = case.call_and_validate(base_url=live, checks=CHECKS)
    if case.operation.path not in PUBLIC_PATHS:
        assert response.status_code == 401, (case.operation.path, response.text)
