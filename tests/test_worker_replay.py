"""A replay after a rollback that lasts many lease periods, with a standby and live traffic.

Reference: mixture/ fed the same distinct documents directly, in stream order, in units of
batch_size (``reference_state``); the exactly-once effect means the states are equal.
"""

from __future__ import annotations

import logging
import threading
import time

import pytest
import redis

from mixture.online import OnlineLearner
from state.connection import redis_from_url
from state.store import ModelStore
from state.stream import parse_stream_id
from tests.worker_support import (
    WorkerThread,
    assert_same_state,
    create_model,
    fast_options,
    ferry_texts,
    learned_all,
    reference_state,
    small_config,
    wait_for,
)
from worker.learner import Worker

pytestmark = pytest.mark.redis

LEASE_SECONDS = 0.4


def _id(stream_id: str) -> tuple[int, int]:
    return parse_stream_id(stream_id)


UNIT_PAUSE_SECONDS = 0.005  # per unit of 50: 24,000 entries take >= 2.4 s, 6 leases


def test_a_replay_longer_than_the_lease_completes_under_live_traffic_with_a_standby(
    redis_url: str,
    redis_client: redis.Redis,
    model_name: str,
    monkeypatch: pytest.MonkeyPatch,
    caplog: pytest.LogCaptureFixture,
) -> None:
    # Before: the replay after a rollback ran as one XRANGE loop that never renewed the lease;
    # a replay longer than the lease was taken over by the standby and the work done so far
    # thrown away ("lost the lease before its checkpoint"). Now each page renews the lease
    # and checkpoints are taken page after page: the holder keeps the model through the
    # replay, which completes with every entry learned exactly once.
    caplog.set_level(logging.INFO, logger="worker.learner")
    # Each unit pauses a little, so the replay lasts several lease periods on any machine.
    slow_learn = OnlineLearner.learn

    def learn(self: OnlineLearner, texts: list[str]):  # type: ignore[no-untyped-def]
        time.sleep(UNIT_PAUSE_SECONDS)
        return slow_learn(self, texts)

    monkeypatch.setattr(OnlineLearner, "learn", learn)
    config = small_config()
    options = fast_options(
        lease_seconds=LEASE_SECONDS,
        read_count=500,
        checkpoint_documents=2000,
        checkpoint_seconds=0.2,
    )
    store = create_model(redis_client, model_name, config, options)
    warm = ferry_texts(200, seed=21)
    bulk = ferry_texts(24_000, seed=22)
    first = Worker(redis_client, model_name, name="first")
    standby = Worker(redis_from_url(redis_url), model_name, name="standby")
    with WorkerThread(first):
        store.enqueue(warm)
        wait_for(learned_all(store, len(warm)), what="the warm-up learned")
        snapshot = store.create_snapshot("before the bulk")
        for i in range(0, len(bulk), 5000):
            store.enqueue(bulk[i : i + 5000])
        wait_for(learned_all(store, len(warm) + len(bulk)), timeout=120, what="bulk learned")
        with WorkerThread(standby):
            stop = threading.Event()
            live: list[str] = []

            def produce() -> None:  # live traffic for as long as the replay runs
                client_store = ModelStore(redis_from_url(redis_url), model_name)
                chunk = 0
                while not stop.is_set():
                    texts = ferry_texts(50, seed=1000 + chunk)
                    client_store.enqueue(texts)
                    live.extend(texts)
                    chunk += 1
                    time.sleep(0.02)

            producer = threading.Thread(target=produce, daemon=True)
            producer.start()
            rollback = store.rollback(snapshot.id, replay=True)
            until = _id(rollback.until)

            holders: set[str | None] = set()

            def replayed() -> bool:
                holders.add(store.lease_holder())
                summary = store.summary() or {}
                return summary.get("version", 0) > rollback.version and (
                    _id(summary["watermark"]) >= until
                )

            # the timeout guards against a hang (the old code never got past the rollback's
            # last id while traffic kept coming); no test asserts on how long anything took
            wait_for(replayed, timeout=120, what="the replay passes the rollback point")
            stop.set()
            producer.join(30)
            total = len(warm) + len(bulk) + len(live)
            wait_for(learned_all(store, total), timeout=60, what="the live traffic learned")
    monkeypatch.undo()
    # the lease never moved: the standby waited, nothing was thrown away
    assert holders == {"first"}
    assert first.conflicts == 0 and standby.checkpoints == 0
    assert not [r for r in caplog.records if "lost the lease" in r.getMessage()]
    state = store.load_state()
    assert state.documents_learned == total
    assert_same_state(state, reference_state(warm + bulk + live, config))
    assert state.metadata["entries_read"] == total
    # the replay committed its progress page after page, not in one piece at the end
    after = [r for r in store.lineage(10_000) if r.version > rollback.version]
    assert all(r.kind == "checkpoint" for r in after)
    assert len(after) >= 5
    watermarks = [_id(r.watermark) for r in after]
    assert watermarks == sorted(watermarks) and len(set(watermarks)) == len(watermarks)
