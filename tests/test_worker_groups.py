"""Groups that change, through the worker and the store: each birth, merge and retirement is a
version of its own, preceded by a pre-change snapshot, with an event record written exactly once
(in the checkpoint's MULTI), followed by the labels, undone by rollback.

Streams are invented (tests/lifecycle_streams.py draws them from known unigram topics). The
reference for every final state is mixture/ fed the same documents directly, in stream order,
in units of batch_size (``reference_state``): exactly-once effect means equal states.
"""

from __future__ import annotations

import random
import signal
import threading
import time
import warnings
from pathlib import Path

import numpy as np
import pytest
import redis

from mixture.config import MixtureConfig
from mixture.lifecycle_config import LifecycleConfig
from mixture.online import OnlineLearner
from mixture.routing import route_texts
from state.connection import redis_from_url
from state.store import ModelStore
from tests.lifecycle_streams import TopicStream
from tests.worker_support import (
    WorkerThread,
    assert_same_state,
    create_model,
    fast_options,
    learned_all,
    reference_state,
    start_worker_process,
    wait_for,
)
from worker.learner import Worker

pytestmark = pytest.mark.redis

ROOT = Path(__file__).resolve().parent.parent
LIFECYCLE_ON = LifecycleConfig(enabled=True)


def birth_stream() -> tuple[list[str], np.ndarray]:
    """Four topics, then a fifth from message 5,120 (the model core's birth scenario; whole
    units of 256, since the worker learns no partial unit with flush_partial_seconds None)."""
    stream = TopicStream(6, seed=0)
    old = [0, 1, 2, 3]
    labels = np.concatenate([stream.labels(5120, old), stream.labels(4096, [*old, 4])])
    return stream.messages(labels), labels


def merge_stream() -> list[str]:
    """Three topics learned by four groups: two of them merge."""
    stream = TopicStream(3, seed=2)
    return stream.messages(stream.labels(7168, [0, 1, 2]))


def expected_events(texts: list[str], config: MixtureConfig) -> list:
    learner = OnlineLearner(config, seed=0)
    events = []
    for i in range(0, len(texts), config.batch_size):
        events += learner.learn(texts[i : i + config.batch_size]).events
    return events


def learn_all(client: redis.Redis, store: ModelStore, texts: list[str]) -> None:
    store.enqueue(texts)
    with WorkerThread(Worker(client, store.model)):  # every entry is a document here
        wait_for(learned_all(store, store.entries_added()), timeout=120, what="all learned")


def test_a_birth_is_a_version_with_a_pre_change_snapshot_an_event_and_an_alert(
    redis_client: redis.Redis, model_name: str
) -> None:
    config = MixtureConfig(n_groups=4, lifecycle=LIFECYCLE_ON)
    texts, _ = birth_stream()
    events = expected_events(texts, config)
    assert [e.kind for e in events] == ["birth"]  # the model core's own scenario
    store = create_model(redis_client, model_name, config, fast_options(checkpoint_documents=2000))
    learn_all(redis_client, store, texts)
    assert_same_state(store.load_state(), reference_state(texts, config))
    records = store.events()
    assert [(r.kind, r.groups) for r in records] == [("birth", [4])]
    record = records[0]
    assert record.position == events[0].position
    assert record.documents == list(events[0].documents)
    # the version holds the change at the unit that made it, and nothing after it
    lineage = {r.version: r for r in store.lineage(1000)}
    assert lineage[record.version].documents_learned == record.position
    row = next(r for r in store.history() if r.version == record.version)
    assert row.ids() == [0, 1, 2, 3, 4]
    before = next(r for r in store.history() if r.version == record.version - 1)
    assert before.ids() == [0, 1, 2, 3]
    # preceded by a snapshot of the version it replaced
    snapshot = store.get_snapshot(record.snapshot_id)
    assert snapshot.kind == "pre-change" and snapshot.version == record.version - 1
    assert store.snapshot_state(snapshot.id).n_groups == 4
    alerts = [a for a in store.alerts() if a.kind == "group-birth"]
    assert [a.version for a in alerts] == [record.version]
    assert store.event_counts() == {"birth": 1}
    # drift against the pre-change snapshot: the newborn group is reported, not aligned
    report = store.drift(reference=snapshot.id)
    assert report.groups_born == [4] and report.groups_gone == []
    assert report.group_ids == [0, 1, 2, 3] and len(report.weights_now) == 4
    assert len(report.word_divergence) == 4 and all(v >= 0 for v in report.word_divergence)
    # a rollback to the pre-change snapshot undoes the birth (its version line) and the label
    # given to the newborn group since
    store.set_group_label(4, "new sailings", "desk-n")
    result = store.rollback(snapshot.id)
    assert store.load_state().n_groups == 4
    assert result.version == store.version()
    assert [r.undone for r in store.events()] == [True]
    assert result.labels_restored and 4 not in store.group_labels()
    assert [row["action"] for row in store.label_history(4)] == ["set", "rollback"]


def test_a_merge_keeps_both_labels_and_a_retired_label_stays(
    redis_client: redis.Redis, model_name: str
) -> None:
    config = MixtureConfig(n_groups=4, lifecycle=LIFECYCLE_ON)
    texts = merge_stream()
    events = expected_events(texts, config)
    assert [e.kind for e in events] == ["merge"]
    survivor, absorbed = events[0].groups
    store = create_model(redis_client, model_name, config, fast_options(checkpoint_documents=500))
    first = (events[0].position - 1000) // 256 * 256  # up to before the merge; label both
    store.enqueue(texts[:first])
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(learned_all(store, first), timeout=120, what="first part learned")
    store.set_group_label(survivor, "timetables", "desk-a")
    store.set_group_label(absorbed, "sailings", "desk-b")
    before_merge = store.group_labels()
    learn_all(redis_client, store, texts[first:])
    labels = store.group_labels()
    assert labels[survivor].label == "timetables"
    assert labels[survivor].merged_labels == [
        {"group": absorbed, "label": "sailings", "destination": "desk-b"}
    ]
    assert labels[absorbed].merged_into == survivor
    assert_same_state(store.load_state(), reference_state(texts, config))
    # the absorbed id is gone: no label can be set on it any more
    with pytest.raises(ValueError, match="current group"):
        store.set_group_label(absorbed, "x", None)
    # rolled back to the snapshot before the merge, both labels are as they were: no
    # merged_labels on the survivor, no merged_into on the absorbed group
    record = store.events()[0]
    result = store.rollback(record.snapshot_id)
    assert result.labels_restored
    after = store.group_labels()
    assert {g: r.to_dict() for g, r in after.items()} == {
        g: r.to_dict() for g, r in before_merge.items()
    }
    assert after[survivor].merged_labels is None and after[absorbed].merged_into is None
    store.set_group_label(absorbed, "sailings again", None)  # a current group again


def test_sigkill_around_a_birth_records_it_once_and_ends_in_the_uninterrupted_state(
    redis_url: str, redis_client: redis.Redis, model_name: str
) -> None:
    """Kills land while the worker learns the units around the birth (it checkpoints at the
    birth's unit and every 256 documents, so a kill between the birth and its MULTI, or inside
    it, is likely); the final state equals one uninterrupted run, with one birth record, one
    pre-change snapshot and consecutive versions."""
    config = MixtureConfig(n_groups=4, lifecycle=LIFECYCLE_ON)
    texts, _ = birth_stream()
    birth_at = expected_events(texts, config)[0].position
    store = create_model(
        redis_client,
        model_name,
        config,
        fast_options(checkpoint_documents=256, read_count=128),
    )
    rng = random.Random(3)

    def produce() -> None:  # live traffic, so that the worker is at the stream's edge
        client = redis_from_url(redis_url)
        producer_store = ModelStore(client, model_name)
        for start in range(0, len(texts), 128):
            producer_store.enqueue(texts[start : start + 128])
            time.sleep(0.03)
        client.close()

    producer = threading.Thread(target=produce, daemon=True)
    producer.start()
    learned_at_kill = []
    for attempt, target in enumerate([birth_at - 512, birth_at - 256, birth_at, birth_at + 256]):
        process = start_worker_process(redis_url, model_name, f"kill-{attempt}")
        wait_for(
            lambda t=target: (store.summary() or {}).get("documents_learned", 0) >= t,
            timeout=120,
            what="progress",
        )
        time.sleep(rng.uniform(0.0, 0.05))
        process.send_signal(signal.SIGKILL)
        process.wait()
        process.stderr.close()
        learned_at_kill.append((store.summary() or {}).get("documents_learned", 0))
    producer.join(60)
    final = start_worker_process(redis_url, model_name, "final")
    try:
        wait_for(learned_all(store, len(texts)), timeout=120, what="all learned")
        wait_for(lambda: store.lease_holder() == "final", timeout=30, what="final holds")
    finally:
        final.send_signal(signal.SIGTERM)
        code = final.wait(30)
        err = final.stderr.read().decode()
        final.stderr.close()
    assert code == 0, err
    assert_same_state(store.load_state(), reference_state(texts, config))
    records = store.events()
    assert [r.kind for r in records] == ["birth"]
    assert records[0].position == birth_at
    changes = [s for s in store.list_snapshots() if s.kind == "pre-change"]
    assert [s.id for s in changes] == [records[0].snapshot_id]
    versions = [r.version for r in store.lineage(10_000)]
    assert versions == list(range(1, len(versions) + 1))
    assert store.event_counts() == {"birth": 1}
    # Coverage, not correctness: kills on both sides of the birth's checkpoint are aimed at but
    # timing decides where they land (under load a backlog can carry the worker past several
    # targets at once); the state, event and snapshot checks above hold wherever they landed.
    if not min(learned_at_kill) <= birth_at <= max(learned_at_kill):
        warnings.warn(
            f"kills at {learned_at_kill} all on one side of the birth at {birth_at}", stacklevel=1
        )


def test_a_junk_burst_in_two_groups_raises_content_alerts_while_the_weights_stay(
    redis_client: redis.Redis, model_name: str
) -> None:
    """Issue 11's measurement, invented here: a burst that fills two groups' messages with
    junk words while the topic mix stays the same moves the weights little and the two groups'
    words a lot. The weights alone raise no alert; the content check names both groups."""
    stream = TopicStream(4, seed=5)
    labels = stream.labels(6144, [0, 1, 2, 3])
    texts = stream.messages(labels)
    rng = np.random.default_rng(9)
    junk = [f"junk{chr(97 + i)}{chr(97 + j)}" for i in range(10) for j in range(10)]
    for i in range(3072, 6144):  # the burst: half of each topic-0/1 message is junk
        if labels[i] in (0, 1):
            words = texts[i].split()
            words[: len(words) // 2 + 1] = rng.choice(junk, size=len(words) // 2 + 1).tolist()
            texts[i] = " ".join(words)
    # the stream was designed with a warm-up of 1,000 documents (the default before the token rule)
    config = MixtureConfig(n_groups=4, n_restarts=1, warmup_documents=1000, warmup_tokens=0)
    options = fast_options(checkpoint_documents=512, drift_window=4, drift_threshold=0.05)
    store = create_model(redis_client, model_name, config, options)
    learn_all(redis_client, store, texts)
    alerts = store.alerts()
    assert [a for a in alerts if a.kind == "weight_drift"] == []
    content = [a for a in alerts if a.kind == "word_drift"]
    state = store.load_state()
    routed = route_texts(state, texts[:3072]).group
    homes = {int(np.bincount(routed[labels[:3072] == t]).argmax()) for t in (0, 1)}
    alarmed = {int(a.reason.split(":")[0].removeprefix("group ")) for a in content}
    assert alarmed == homes, [(a.kind, a.reason) for a in alerts]
    assert all(a.value > options.word_drift_threshold for a in content)


def test_the_vectorised_js_agrees_with_scipy_column_by_column() -> None:
    """state.group_drift.js_divergence_columns against mixture.kernels.js_divergence (scipy's
    jensenshannon, base 2, squared), zeros included."""
    from mixture.kernels import js_divergence
    from state.group_drift import js_divergence_columns

    rng = np.random.default_rng(4)
    p = rng.dirichlet(np.full(300, 0.2), size=5).T
    q = rng.dirichlet(np.full(300, 0.2), size=5).T
    p[:40, 0] = 0.0
    values = js_divergence_columns(p, q)
    expected = [js_divergence(p[:, k], q[:, k]) for k in range(5)]
    np.testing.assert_allclose(values, expected, rtol=1e-9, atol=1e-12)
