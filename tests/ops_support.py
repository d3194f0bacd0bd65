"""Helpers of the deployment, access-control, metrics and dashboard tests: a trained model
behind the API with both kinds of key configured."""

from __future__ import annotations

import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from fastapi import FastAPI

from service.app import create_app
from service.demo_data import THEMES, default_days, fresh_examples, generate_day
from service.runner import WorkerPool
from service.settings import Settings
from service.testing import QUICK_OPTIONS, learned, wait_until

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

# Invented test keys (never used anywhere but these tests).
ADMIN_KEY = "adm-7f3c2e91b5d84a06c1e2"
READ_KEY = "rd-0b6e4d2a9c71f3e85a10"
ADMIN = {"Authorization": f"Bearer {ADMIN_KEY}"}
READ = {"X-API-Key": READ_KEY}

SCALE = 0.4  # 240 invented messages a day
K = len(THEMES)


def keyed_settings(redis_url: str, **overrides: Any) -> Settings:
    """Settings with one admin and one read key, on the test Redis."""
    values: dict[str, Any] = {
        "redis_url": redis_url,
        "reload_poll_interval": 0.05,
        "api_keys_admin": ADMIN_KEY,
        "api_keys_read": READ_KEY,
        "log_format": "json",
    }
    values.update(overrides)
    return Settings(**values)


def make_app(redis_url: str, model: str, **overrides: Any) -> FastAPI:
    """The API with keys and one in-process worker following ``model``."""
    settings = keyed_settings(redis_url, **overrides)
    pool = lambda _runtime: WorkerPool(redis_url, 0.1, models=[model])  # noqa: E731
    return create_app(settings, background_factories=[pool])


def train(client: Any, model: str, days: int = 4, snapshot_after: int = 2) -> dict[str, Any]:
    """Create ``model``, learn the first ``days`` invented demo days, snapshot after day
    ``snapshot_after``; the model's JSON once everything is learned.

    ``client`` is a TestClient or an httpx.Client that sends the admin key.
    """
    plans = default_days(SCALE)
    config = {"n_groups": K, "warmup_documents": plans[0].messages, "batch_size": 80}
    options = {**QUICK_OPTIONS, "drift_window": 2, "drift_threshold": 0.002}
    created = client.post("/models", json={"name": model, "config": config, "options": options})
    assert created.status_code == 201, created.text
    fed = 0
    for day, plan in enumerate(plans[:days], start=1):
        messages = generate_day(plan, seed=11)
        answer = client.post(
            f"/models/{model}/documents",
            json={"documents": [{"id": m.id, "text": m.text} for m in messages]},
        )
        assert answer.status_code == 202, answer.text
        fed += len(messages)
        wait_until(lambda f=fed: learned(client, model, f), 90, what=f"day {day} learned")
        if day == snapshot_after:
            snap = client.post(f"/models/{model}/snapshots", json={"reason": f"after day {day}"})
            assert snap.status_code == 201, snap.text
    return learned(client, model, fed) or {}


def route_examples(client: Any, model: str) -> dict[str, Any]:
    """Route the invented fresh examples plus two documents with no known word."""
    docs = [{"id": m.id, "text": m.text} for m in fresh_examples(seed=5)]
    docs += [
        {"id": "junk-1", "text": "qwxz vbnmk plorf"},
        {"id": "junk-2", "text": "zzyzx quuxle frobnic"},
    ]
    answer = client.post(f"/models/{model}/route", json={"documents": docs})
    assert answer.status_code == 200, answer.text
    return answer.json()  # type: ignore[no-any-return]


class WithKey:
    """A client wrapper that sends one key with every call (for helpers that take a client)."""

    def __init__(self, client: Any, headers: dict[str, str]) -> None:
        self.client = client
        self.headers = headers

    def request(self, method: str, url: str, **kwargs: Any) -> Any:
        kwargs["headers"] = {**self.headers, **(kwargs.get("headers") or {})}
        return self.client.request(method, url, **kwargs)

    def get(self, url: str, **kwargs: Any) -> Any:
        return self.request("GET", url, **kwargs)

    def post(self, url: str, **kwargs: Any) -> Any:
        return self.request("POST", url, **kwargs)

    def delete(self, url: str, **kwargs: Any) -> Any:
        return self.request("DELETE", url, **kwargs)


@contextmanager
def trained_client(redis_url: str, model: str, **overrides: Any) -> Iterator[TestClient]:
    """A TestClient (admin key by default) on a freshly trained model."""
    app = make_app(redis_url, model, **overrides)
    with TestClient(app, headers=ADMIN) as client:
        train(client, model)
        yield client
