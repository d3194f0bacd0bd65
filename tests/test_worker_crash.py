"""Crash recovery and Redis restarts, with worker processes and a real redis-server.

Reference for the final state: mixture/ fed the same distinct documents directly, in stream
order, in units of batch_size (``reference_state``). Exactly-once effect means equal states.
"""

from __future__ import annotations

import logging
import random
import threading
import time
from pathlib import Path

import pytest
import redis

from mixture.routing import route_texts
from state.connection import EmbeddedRedis, redis_from_url
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

pytestmark = pytest.mark.redis

ROOT = Path(__file__).resolve().parent.parent


def test_sigkill_at_random_points_loses_nothing_and_learns_nothing_twice(
    redis_url: str, redis_client: redis.Redis, model_name: str
) -> None:
    config = small_config()
    store = create_model(
        redis_client, model_name, config, fast_options(checkpoint_documents=400, read_count=150)
    )
    total = 20_000
    texts = ferry_texts(total, seed=11)
    ids = [f"doc-{i}" for i in range(total)]
    rng = random.Random(7)
    sent = threading.Event()
    bad_sent: list[str] = []

    def produce() -> None:
        client = redis_from_url(redis_url)
        position = 0
        while position < total:
            size = rng.randint(100, 400)
            chunk = slice(position, min(position + size, total))
            client_store = type(store)(client, model_name)
            client_store.enqueue(texts[chunk], ids=ids[chunk])
            if rng.random() < 0.1:  # an undecodable entry from a foreign producer
                client.xadd(store.keys.docs, {"id": f"bad-{position}", "text": b"\xff\xfe"})
                bad_sent.append(f"bad-{position}")
            if rng.random() < 0.2:  # a producer retry: the same ids again, dropped as duplicates
                client_store.enqueue(texts[chunk], ids=ids[chunk])
            position = chunk.stop
            time.sleep(0.01)
        client.close()
        sent.set()

    producer = threading.Thread(target=produce, daemon=True)
    producer.start()
    # each kill after the worker learned something (so it falls mid-stream), at a random delay
    learned_at_kill = kill_workers_mid_stream(redis_url, store, "crash", sent, rng, max_delay=0.4)
    assert len(learned_at_kill) == 3
    final = start_worker_process(redis_url, model_name, "final")
    try:
        sent.wait(60)
        producer.join(60)
        # every duplicate was dropped
        assert redis_client.xlen(store.keys.docs) == total + len(bad_sent)
        wait_for(learned_all(store, total), timeout=120, what="all documents learned")
    finally:
        code, err = stop_worker(final)
    assert code == 0, err
    state = store.load_state()
    assert state.documents_learned == total
    assert state.watermark == store.last_stream_id()
    assert_same_state(state, reference_state(texts, config))
    # documents_learned counts exactly; the expected-documents total (and every other
    # statistic) is compared with the reference inside assert_same_state
    assert min(learned_at_kill) < total  # at least one kill fell in the middle of the stream
    # every entry passed once: documents, undecodable entries (the duplicates never entered)
    assert state.metadata["entries_read"] == total + len(bad_sent)
    # dead letters are written in the checkpoint's MULTI: exactly once each despite the kills
    letters = store.dead_letters(count=10_000)
    assert sorted(d["fields"]["id"] for d in letters) == sorted(bad_sent) and bad_sent
    routing = route_texts(state, texts[:5])
    assert routing.group.shape == (5,)
    versions = [r.version for r in store.lineage(10_000)]
    assert versions == list(range(1, len(versions) + 1))


def test_redis_restart_with_append_only_file_keeps_everything_acknowledged(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.WARNING, logger="worker.learner")
    config = small_config()
    server = EmbeddedRedis(tmp_path / "data", appendonly=True, appendfsync="everysec").start()
    try:
        client = server.client(socket_timeout=5)
        store = create_model(client, "restart", config, fast_options())
        texts = ferry_texts(3000, seed=12)
        store.enqueue(texts[:1500], ids=[f"r{i}" for i in range(1500)])
        worker = Worker(server.client(socket_timeout=5), "restart")
        with WorkerThread(worker):
            wait_for(learned_all(store, 1500), what="1500 learned before the restart")
            acked_version = store.version()
            server.stop()  # SHUTDOWN: the worker loses its connection and retries
            time.sleep(0.3)
            server.start()
            client = server.client(socket_timeout=5)
            store = type(store)(client, "restart")
            summary = store.summary()
            assert summary["documents_learned"] == 1500
            assert store.version() == acked_version
            # the client ids survived too: re-sending them adds nothing
            assert (
                store.enqueue(texts[:1500], ids=[f"r{i}" for i in range(1500)]).duplicates == 1500
            )
            store.enqueue(texts[1500:], ids=[f"r{i}" for i in range(1500, 3000)])
            wait_for(learned_all(store, 3000), what="3000 learned after the restart")
        assert worker.reconnects >= 1
        assert any("lost Redis" in r.getMessage() for r in caplog.records)  # and it says so
        assert_same_state(store.load_state(), reference_state(texts, config))
    finally:
        server.stop()
    assert (tmp_path / "data" / "appendonly.aof").stat().st_size > 0
