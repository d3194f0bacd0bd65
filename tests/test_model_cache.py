"""One API process fronting more models than it keeps: lazy loads, eviction under a budget.

The budget counts :func:`service.runtime.state_memory`, checked here against what Python's
own allocator tracer (:mod:`tracemalloc`, standard library) sees a state load allocate.
"""

from __future__ import annotations

import gc
import random
import tracemalloc
import uuid
import warnings
from collections.abc import Iterator

import numpy as np
import pytest

from mixture.config import MixtureConfig
from mixture.online import OnlineLearner
from mixture.routing import route_texts
from mixture.serialize import state_from_bytes, state_to_bytes
from service.app import create_app
from service.runtime import state_memory
from service.settings import Settings
from service.testing import first_checkpoint
from state.connection import redis_from_url
from state.registry import Registry
from state.store import ModelStore

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient


def test_state_memory_matches_the_allocations_of_a_load() -> None:
    rng = random.Random(3)
    words = [f"w{i:05d}" for i in range(20_000)]
    learner = OnlineLearner(MixtureConfig(n_groups=8, warmup_documents=200, n_restarts=1), 0)
    learner.learn([" ".join(rng.choice(words) for _ in range(30)) for _ in range(3_000)])
    data = state_to_bytes(learner.state)
    gc.collect()
    tracemalloc.start()
    try:
        state = state_from_bytes(data)
        state.parameters()
        allocated, _ = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    # tracemalloc, Python standard library: the bytes a load leaves allocated; within 20 %
    # (the tolerance is common practice, no source: small objects are not all counted)
    assert 0.8 * allocated <= state_memory(state) <= 1.2 * allocated


@pytest.fixture
def three_models(redis_url: str) -> Iterator[list[str]]:
    names = [f"t-{uuid.uuid4().hex[:10]}-{tag}" for tag in "abc"]
    yield names
    client = redis_from_url(redis_url)
    registry = Registry(client)
    for name in names:
        if registry.exists(name):
            registry.delete(name)
    client.close()


@pytest.mark.redis
def test_budget_for_two_of_three_models_evicts_the_least_recently_used(
    redis_url: str, redis_client: object, three_models: list[str]
) -> None:
    sizes: dict[str, int] = {}
    texts = {}
    with TestClient(create_app(Settings(redis_url=redis_url))) as http:
        runtime = http.app.state.runtime  # type: ignore[attr-defined]
        for seed, name in enumerate(three_models):
            _store, _worker, messages = first_checkpoint(
                http, redis_client, redis_url, name, 2 + seed, seed
            )
            texts[name] = [m.text for m in messages[:10]]
            sizes[name] = runtime.reload(name).nbytes
    total = sum(sizes.values())
    # any two fit (at most total - smallest), all three do not
    budget = total - min(sizes.values()) / 2
    settings = Settings(redis_url=redis_url, model_memory_mb=budget / 2**20)
    first, second, third = three_models
    with TestClient(create_app(settings)) as http:
        runtime = http.app.state.runtime  # type: ignore[attr-defined]

        def route(name: str) -> None:
            answer = http.post(
                f"/models/{name}/route", json={"documents": [{"text": t} for t in texts[name]]}
            )
            assert answer.status_code == 200, answer.text
            state = ModelStore(redis_client, name).load_state()
            reference = route_texts(state, texts[name])
            served = [r["group"] for r in answer.json()["results"]]
            np.testing.assert_array_equal(served, reference.group)
            assert runtime.memory_in_use() <= runtime.memory_budget

        route(first)
        route(second)
        assert set(runtime.models) >= {first, second}
        route(third)  # loads the third: the least recently used (the first) goes
        assert list(runtime.models) == [second, third]
        assert runtime.evictions >= 1
        route(first)  # read again from Redis; now the second is the oldest
        assert list(runtime.models) == [third, first]
        route(second)
        assert list(runtime.models) == [first, second]
