"""API keys never reach a log line, in any field (issue 10, item 9).

A client can put a key where it does not belong: as its X-Request-ID, pasted into the URL path
(so it also looks like a model name), or into a query string. The service must keep it out of
every field of every line it writes: message, request_id, path, model, any extra field and
exception text. The check is a plain substring search of everything logged (the key is an
invented test key); request ids must be at most 64 characters of [A-Za-z0-9._:-] (a limit of
ours, common practice for correlation ids, no source).
"""

from __future__ import annotations

import io
import json
import logging
import warnings
from collections.abc import Iterator

import pytest

from service import auth
from service.app import create_app
from service.logs import (
    JsonFormatter,
    SecretRedactor,
    configure_logging,
    model_var,
    request_id_var,
    valid_request_id,
)
from tests.ops_support import ADMIN, ADMIN_KEY, READ, READ_KEY, keyed_settings

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

KEYS = (ADMIN_KEY, READ_KEY)


class ServerSide(logging.Filter):
    """Drop the test client's own lines (httpx logs the URLs it requests)."""

    def filter(self, record: logging.LogRecord) -> bool:
        return not record.name.startswith(("httpx", "httpcore"))


@pytest.fixture
def logged(root_logging: logging.Logger) -> Iterator[io.StringIO]:
    """Everything the process logs, as JSON lines, with NO redactor: the code must not log
    keys in the first place."""
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(JsonFormatter())
    handler.addFilter(ServerSide())
    root_logging.addHandler(handler)
    root_logging.setLevel(logging.DEBUG)
    yield stream
    root_logging.removeHandler(handler)


@pytest.mark.redis
def test_a_key_sent_as_request_id_in_a_path_or_a_query_is_never_logged(
    redis_url: str, logged: io.StringIO
) -> None:
    with TestClient(create_app(keyed_settings(redis_url))) as client:
        as_id = client.get("/models", headers={**ADMIN, "X-Request-ID": ADMIN_KEY})
        assert as_id.status_code == 200
        assert as_id.headers["x-request-id"] != ADMIN_KEY  # not adopted, so not echoed either
        inside_id = client.get("/models", headers={**READ, "X-Request-ID": f"x.{READ_KEY}.y"})
        assert READ_KEY not in inside_id.headers["x-request-id"]
        in_path = [
            client.get(f"/models/{READ_KEY}/groups", headers=ADMIN),
            client.post(f"/models/{ADMIN_KEY}/route", json={"text": "ferry"}, headers=READ),
            client.get(f"/models/{ADMIN_KEY}"),  # no key header: refused 401
            client.delete(f"/models/{READ_KEY}", headers=READ),  # wrong role: 403
        ]
        assert [r.status_code for r in in_path] == [404, 404, 401, 403]
        in_query = client.get(f"/models?api_key={ADMIN_KEY}", headers=READ)
        assert in_query.status_code == 200
    text = logged.getvalue()
    for key in KEYS:
        assert key not in text
    access = [json.loads(line) for line in text.splitlines() if '"event": "request"' in line]
    assert len(access) >= 7
    assert sum("[redacted]" in line["path"] for line in access) == 4
    assert all(line.get("model") is None for line in access if "[redacted]" in line["path"])


def test_request_ids_are_short_safe_and_never_a_key() -> None:
    assert valid_request_id("a" * 64) == "a" * 64
    for bad in ("a" * 65, "tab\there", "semi;colon", "slash/y"):
        assert valid_request_id(bad) != bad
    assert valid_request_id(ADMIN_KEY) == ADMIN_KEY  # looks fine when no key is configured
    assert valid_request_id(ADMIN_KEY, KEYS) != ADMIN_KEY
    assert valid_request_id(f"r-{READ_KEY}", KEYS) != f"r-{READ_KEY}"
    assert valid_request_id("req-77", KEYS) == "req-77"


def test_the_redactor_cleans_every_field_of_a_record(root_logging: logging.Logger) -> None:
    stream = io.StringIO()
    configure_logging("debug", "json", secrets=KEYS, stream=stream)
    log = logging.getLogger("mixroute.test.secrets")
    rid, model = request_id_var.set(f"id-{ADMIN_KEY}"), model_var.set(READ_KEY)
    try:
        log.info(
            "plain message",
            extra={"path": f"/models/{ADMIN_KEY}/x", "nested": {"k": [READ_KEY]}, "n": 3},
        )
        try:
            raise RuntimeError(f"while reading {ADMIN_KEY}")
        except RuntimeError:
            log.exception("failed")
    finally:
        request_id_var.reset(rid)
        model_var.reset(model)
    text = stream.getvalue()
    assert ADMIN_KEY not in text and READ_KEY not in text
    first, second = (json.loads(line) for line in text.splitlines())
    assert first["request_id"] == "id-[redacted]" and first["model"] == "[redacted]"
    assert first["path"] == "/models/[redacted]/x" and first["nested"] == {"k": ["[redacted]"]}
    assert first["n"] == 3
    assert "while reading [redacted]" in second["exception"]
    # the filter alone, for a handler of another format
    record = logging.LogRecord("x", logging.INFO, "", 0, "%s", ("ok",), None)
    record.worker = ADMIN_KEY
    SecretRedactor(KEYS).filter(record)
    assert record.worker == "[redacted]"


def test_keys_are_configured_for_the_request_context(redis_url: str) -> None:
    """install_operations hands the keys to the request-id middleware (the redactor's keys
    come from the same function)."""
    app = create_app(keyed_settings(redis_url))
    contexts = [m for m in app.user_middleware if m.cls.__name__ == "RequestContext"]
    assert len(contexts) == 1
    assert sorted(contexts[0].kwargs["secrets"]) == sorted(
        auth.secrets_of(keyed_settings(redis_url))
    )
