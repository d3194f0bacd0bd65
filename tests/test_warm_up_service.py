"""Routing from the first minutes: provisional answers through the HTTP API with a real worker,
and the provisional fits exactly-once under worker SIGKILLs.

Invented data (the island ferry cooperative's messages, tests/worker_support.ferry_texts).
Reference for the states: mixture/ fed the same documents directly in units of batch_size
(tests/worker_support.reference_state), as in tests/test_worker_crash.py.
"""

from __future__ import annotations

import random
import threading
import time
import warnings
from collections.abc import Iterator
from pathlib import Path

import pytest
import redis

from service.app import create_app
from service.cli import build_parser, cmd_models
from service.settings import Settings
from service.testing import QUICK_OPTIONS, wait_until
from state.connection import redis_from_url
from state.keys import ModelKeys
from tests.worker_support import (
    WorkerThread,
    assert_same_state,
    create_model,
    fast_options,
    ferry_texts,
    kill_workers_mid_stream,
    learned_all,
    reference_state,
    small_config,
    start_worker_process,
    stop_worker,
    wait_for,
)
from worker.learner import Worker

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture
def api(redis_url: str) -> Iterator[TestClient]:
    settings = Settings(redis_url=redis_url, reload_poll_interval=0.05)
    with TestClient(create_app(settings)) as client:
        yield client


def _learn(api: TestClient, model: str, texts: list[str], offset: int) -> None:
    for start in range(0, len(texts), 50):
        chunk = texts[start : start + 50]
        documents = [{"id": f"m-{offset + start + i}", "text": t} for i, t in enumerate(chunk)]
        answer = api.post(f"/models/{model}/route", json={"documents": documents, "learn": True})
        assert answer.status_code in (200, 409), answer.text


def _model(api: TestClient, model: str) -> dict:
    got = api.get(f"/models/{model}")
    assert got.status_code == 200, got.text
    return got.json()


def test_the_api_answers_provisionally_from_the_hundredth_message(
    api: TestClient,
    redis_client: redis.Redis,
    redis_url: str,
    model_name: str,
    capsys: pytest.CaptureFixture[str],
) -> None:
    config = {
        "n_groups": 3,
        "batch_size": 50,
        "n_restarts": 1,
        "warmup_documents": 400,
        "provisional_documents": 100,
    }
    options = {**QUICK_OPTIONS, "flush_partial_seconds": 0.05}
    made = api.post("/models", json={"name": model_name, "config": config, "options": options})
    assert made.status_code == 201, made.text
    texts = ferry_texts(500, seed=8)
    probe = {"documents": [{"text": t} for t in texts[:5]]}
    tokens = sum(len(t.split()) for t in texts[:99])  # the invented words: one token each
    with WorkerThread(Worker(redis_url, model_name)):
        _learn(api, model_name, texts[:99], 0)
        wait_until(lambda: _model(api, model_name)["documents_learned"] == 99, what="99 learned")
        refused = api.post(f"/models/{model_name}/route", json=probe)
        assert refused.status_code == 409
        assert "1 more needed" in refused.json()["detail"], refused.json()
        described = _model(api, model_name)
        assert not described["warmed_up"] and not described["provisional"]
        assert described["status"].startswith(f"warming up: {tokens} of 40000 tokens buffered")

        # the CLI's list says the same, not "99 documents learned"
        from service import cli

        class Client:
            def __init__(self, url: str) -> None:
                del url

            def get(self, path: str) -> dict:
                return api.get(path).json()

        original = cli.ApiClient
        cli.ApiClient = Client  # type: ignore[assignment,misc]
        try:
            assert (
                cmd_models(build_parser().parse_args(["models", "list", "--api", "http://t"])) == 0
            )
        finally:
            cli.ApiClient = original  # type: ignore[misc]
        line = next(x for x in capsys.readouterr().out.splitlines() if x.startswith(model_name))
        assert f"warming up: {tokens} of 40000 tokens buffered" in line
        assert "documents learned" not in line

        _learn(api, model_name, texts[99:100], 99)
        wait_until(lambda: _model(api, model_name)["provisional"], what="a provisional fit")
        described = _model(api, model_name)
        assert not described["warmed_up"] and "provisional fit" in described["status"]
        answer = api.post(f"/models/{model_name}/route", json=probe)
        assert answer.status_code == 200, answer.text
        results = answer.json()["results"]
        assert all(r["review"] and "provisional_model" in r["review_reasons"] for r in results)
        health = api.get("/ready").json()
        assert any(m["name"] == model_name and m["routable"] for m in health["models"])

        _learn(api, model_name, texts[100:450], 100)
        wait_until(lambda: _model(api, model_name)["warmed_up"], what="the warm-up fit")
        described = _model(api, model_name)
        assert not described["provisional"] and described["status"] == "warmed up"
        answer = api.post(f"/models/{model_name}/route", json=probe)
        assert answer.status_code == 200
        assert not any("provisional_model" in r["review_reasons"] for r in answer.json()["results"])


def test_route_with_learn_queues_its_documents_before_the_model_can_answer(
    api: TestClient, redis_client: redis.Redis, model_name: str
) -> None:
    # An intake system that only calls route with learn: true must still warm a model up.
    config = {"n_groups": 3, "warmup_documents": 60, "n_restarts": 1}
    made = api.post("/models", json={"name": model_name, "config": config})
    assert made.status_code == 201, made.text
    documents = [{"id": f"early-{i}", "text": t} for i, t in enumerate(ferry_texts(5, seed=3))]
    early = api.post(f"/models/{model_name}/route", json={"documents": documents, "learn": True})
    assert early.status_code == 409
    assert "5 documents queued" in early.json()["detail"], early.json()
    assert redis_client.xlen(ModelKeys(model_name).docs) == 5
    again = api.post(f"/models/{model_name}/route", json={"documents": documents, "learn": True})
    assert again.status_code == 409 and "0 documents queued" in again.json()["detail"]
    assert redis_client.xlen(ModelKeys(model_name).docs) == 5  # the ids were queued already


def test_sigkill_during_the_warm_up_gives_the_same_provisional_and_final_state(
    redis_url: str, redis_client: redis.Redis, model_name: str
) -> None:
    # A long warm-up (3,000 documents) with provisional fits at 100, 200, ..., 1600, learned
    # in units of 50 (flush_partial_seconds None: the state is a function of the stream).
    config = small_config(warmup_documents=3000, provisional_documents=100, warmup_tokens=0)
    store = create_model(
        redis_client, model_name, config, fast_options(checkpoint_documents=100, read_count=150)
    )
    during = 2900
    texts = ferry_texts(3500, seed=12)
    rng = random.Random(9)
    sent = threading.Event()

    def produce() -> None:
        client = redis_from_url(redis_url)
        position = 0
        while position < during:
            size = rng.randint(100, 300)
            chunk = slice(position, min(position + size, during))
            type(store)(client, model_name).enqueue(texts[chunk])
            position = chunk.stop
            time.sleep(0.03)
        client.close()
        sent.set()

    producer = threading.Thread(target=produce, daemon=True)
    producer.start()
    learned_at_kill = kill_workers_mid_stream(redis_url, store, "warm", sent, rng, max_delay=0.3)
    final = start_worker_process(redis_url, model_name, "warm-final")
    try:
        sent.wait(60)
        producer.join(60)
        wait_for(learned_all(store, during), timeout=120, what="the warm-up documents learned")
        state = store.load_state()
        summary = store.summary()
        assert summary is not None and summary["provisional"] and not summary["warmed_up"]
        expected = reference_state(texts[:during], config)
        assert not state.warmed_up and state.provisional is not None
        assert expected.provisional is not None
        assert state.provisional.documents_learned == 1600
        assert_same_state(state.provisional, expected.provisional)
        assert_same_state(state, expected)
        assert state.pending is not None and expected.pending is not None
        assert (state.pending != expected.pending).nnz == 0

        store.enqueue(texts[during:])
        wait_for(learned_all(store, len(texts)), timeout=120, what="all documents learned")
    finally:
        code, err = stop_worker(final)
    assert code == 0, err
    assert min(learned_at_kill) < during  # at least one kill fell inside the warm-up
    state = store.load_state()
    assert state.warmed_up and state.provisional is None
    assert_same_state(state, reference_state(texts, config))
