"""Stream entries removed before the worker read them: counted, alerted, shown, survived.

Needs XINFO STREAM's counters (Redis >= 7): a private server from the machine's own
redis-server binary (``private_redis7``; skipped where there is none). Reference for the
learned state: mixture/ fed the surviving documents directly, in stream order.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import pytest

from service.app import create_app
from service.settings import Settings
from service.testing import wait_until
from state.connection import redis_from_url
from tests.worker_support import (
    WorkerThread,
    assert_same_state,
    create_model,
    fast_options,
    ferry_texts,
    learned_all,
    private_redis7,
    reference_state,
    small_config,
    wait_for,
)
from worker.learner import Worker

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis


def _scrape(client: TestClient, model: str) -> dict[str, float]:
    from prometheus_client.parser import text_string_to_metric_families

    out = {}
    # parsed by prometheus-client's own reader of the text format
    for family in text_string_to_metric_families(client.get("/metrics").text):
        for sample in family.samples:
            if sample.labels.get("model") == model:
                out[sample.name] = sample.value
    return out


def test_entries_deleted_behind_the_workers_back_are_counted_alerted_and_shown(
    tmp_path: Path,
) -> None:
    with private_redis7(tmp_path) as url:
        client = redis_from_url(url)
        config = small_config()
        store = create_model(client, "gap", config, fast_options(read_count=100))
        old = ferry_texts(500, seed=31)
        store.enqueue(old)
        with WorkerThread(Worker(client, "gap")):
            wait_for(learned_all(store, 500), what="the first 500 learned")
        # the worker is stopped; 1000 more arrive, then 150 unlearned ones are removed from
        # outside: the first 30 by a trim (which also drops the 500 learned ones: no loss)
        # and 120 in the middle by XDEL
        new = ferry_texts(1000, seed=32)
        new_ids = store.enqueue(new).stream_ids
        client.xtrim(store.keys.docs, minid=new_ids[30], approximate=False)
        assert client.xdel(store.keys.docs, *new_ids[400:520]) == 120
        survivors = new[30:400] + new[520:]
        assert len(survivors) == 850

        settings = Settings(redis_url=url, reload_poll_interval=0.05)
        with TestClient(create_app(settings)) as api:
            assert api.get("/models/gap").status_code == 200  # the API serves the model
            worker = Worker(client, "gap")
            with WorkerThread(worker):
                wait_for(learned_all(store, 1350), what="the survivors learned")
                gaps = [a for a in store.alerts() if a.kind == "stream-gap"]
                assert [a.value for a in gaps] == [150.0]
                # the worker carries on: new traffic is learned, no second alert
                more = ferry_texts(200, seed=33)
                store.enqueue(more)
                wait_for(learned_all(store, 1550), what="traffic after the gap learned")
            assert [a.value for a in store.alerts() if a.kind == "stream-gap"] == [150.0]
            state = store.load_state()
            assert state.metadata["entries_read"] == 500 + 1000 + 200  # the lost ones included
            assert state.metadata["entries_lost"] == 150
            assert_same_state(state, reference_state(old + survivors + more, config))

            def shown() -> bool:
                values = _scrape(api, "gap")
                return values.get("mixroute_stream_lost_entries_total") == 150.0

            wait_until(shown, 30, what="the lost entries in /metrics")
            values = _scrape(api, "gap")
            # XINFO STREAM entries-added (1700) minus the state's counter: nothing waits
            assert values["mixroute_stream_lag_entries"] == 0.0
        client.close()


def test_lag_in_entries_counts_what_the_worker_has_not_passed(tmp_path: Path) -> None:
    with private_redis7(tmp_path) as url:
        client = redis_from_url(url)
        store = create_model(client, "lagging", small_config(), fast_options())
        store.enqueue(ferry_texts(300, seed=34))
        with WorkerThread(Worker(client, "lagging")):
            wait_for(learned_all(store, 300), what="300 learned")
        store.enqueue(ferry_texts(70, seed=35))  # nobody learns these
        with TestClient(create_app(Settings(redis_url=url))) as api:
            assert api.get("/models/lagging").status_code == 200
            values = _scrape(api, "lagging")
            assert values["mixroute_stream_lag_entries"] == 70.0
            assert values["mixroute_stream_lost_entries_total"] == 0.0
        client.close()


def test_rollbacks_move_the_counter_with_the_watermark_and_raise_no_false_gap(
    tmp_path: Path,
) -> None:
    # After a rollback without replay the watermark jumps to the stream's end: the entries
    # in between are passed (dropped on purpose), not lost. With replay they are re-read.
    with private_redis7(tmp_path) as url:
        client = redis_from_url(url)
        config = small_config()
        store = create_model(client, "rolled", config, fast_options())
        first, second, third = (
            ferry_texts(n, seed=s) for n, s in ((300, 36), (200, 37), (100, 38))
        )
        with WorkerThread(Worker(client, "rolled")):
            store.enqueue(first)
            wait_for(learned_all(store, 300), what="300 learned")
            snapshot = store.create_snapshot("after the first 300")
            store.enqueue(second)
            wait_for(learned_all(store, 500), what="500 learned")
            store.rollback(snapshot.id, replay=False)
            store.enqueue(third)
            wait_for(learned_all(store, 400), what="the snapshot's 300 and the new 100")
            state = store.load_state()
            assert state.metadata["entries_read"] == 600  # XINFO STREAM entries-added
            assert_same_state(state, reference_state(first + third, config))
            store.rollback(snapshot.id, replay=True)
            wait_for(learned_all(store, 600), what="everything after the snapshot replayed")
            state = store.load_state()
            assert state.metadata["entries_read"] == 600
            assert_same_state(state, reference_state(first + second + third, config))
        assert [a for a in store.alerts() if a.kind == "stream-gap"] == []
        client.close()


def test_a_page_read_ahead_before_a_gap_probe_is_not_counted_against_it(
    tmp_path: Path,
) -> None:
    # A short page read ahead holds every entry that existed when it ran. If it were compared
    # with a probe of the stream's counters taken after it, the entries added in between
    # would count as lost. Nothing is removed here, so Redis's own entries-added
    # (XINFO STREAM) must equal the worker's count and no gap may be reported.
    with private_redis7(tmp_path) as url:
        client = redis_from_url(url)
        store = create_model(
            client, "ahead", small_config(), fast_options(read_count=100, checkpoint_seconds=60)
        )
        worker = Worker(client, "ahead")
        worker.run_once()  # loads on an empty stream: the load's probe settles at once
        assert worker._gap_probe is None
        store.enqueue(ferry_texts(150, seed=41))
        worker.run_once()  # a full page of 100: the read of the short rest is sent ahead
        assert worker.reader.ahead
        client.ping()  # Redis has answered the read ahead before these 50 arrive
        last = store.enqueue(ferry_texts(50, seed=42)).stream_ids[-1]  # 4 whole units in all
        worker._check_for_gap()  # a probe after the 50, as every checkpoint_seconds
        for _ in range(20):
            if worker.handled == last:
                break
            worker.run_once()
        assert worker.handled == last
        assert worker._entries_lost == 0 and not worker._gap_alerts
        assert worker._entries_seen == client.xinfo_stream(store.keys.docs)["entries-added"]
        worker.stop()
        worker.run()
        assert not [a for a in store.alerts() if a.kind == "stream-gap"]
        client.close()
