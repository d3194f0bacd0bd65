"""Corrections and examples through the stream and the worker.

Reference: the model core (mixture/) fed directly, in stream order, with the worker's rule for
labelled entries (``reference_with_labels``): documents in units of ``batch_size``; a labelled
entry with no document pending before it is applied at once, one behind pending documents of
an incomplete unit right after that unit. The exactly-once effect means the states are equal
(tests/worker_support.py's ``assert_same_state`` plus the labelled set, compared id by id).
"""

from __future__ import annotations

import contextlib
import random
import threading
import time
from collections.abc import Sequence

import numpy as np
import pytest
import redis

from mixture.errors import InputError
from mixture.labelled import LabelledItem
from mixture.online import OnlineLearner
from mixture.stats import MixtureState
from state.connection import redis_from_url
from state.corrections import remaining_of, unit_of
from state.store import ModelStore
from state.stream import correction_fields, withdraw_fields
from tests.worker_support import (
    GROUP_WORDS,
    WorkerThread,
    assert_same_state,
    create_model,
    fast_options,
    ferry_texts,
    kill_workers_mid_stream,
    small_config,
    start_worker_process,
    stop_worker,
    wait_for,
)
from worker.learner import Worker

pytestmark = pytest.mark.redis

# One stream event: ("doc", text) | ("correct", LabelledItem) | ("withdraw", doc id)
Event = tuple[str, object]


def reference_with_labels(
    events: Sequence[Event], config, seed: int = 0, start: MixtureState | None = None
) -> MixtureState:
    """mixture/ fed directly with the worker's rule (see the module docstring)."""
    learner = (
        OnlineLearner.from_state(start.copy())
        if start is not None
        else OnlineLearner(config, seed=seed)
    )
    unit: list[str] = []
    waiting: list[Event] = []

    def apply(event: Event) -> None:
        kind, value = event
        if kind == "correct":
            with contextlib.suppress(InputError):  # refused: the worker dead-letters it
                learner.learn_labelled([value])  # type: ignore[list-item]
        else:
            learner.withdraw_labelled([value])  # type: ignore[list-item]

    for event in events:
        if event[0] == "doc":
            unit.append(event[1])  # type: ignore[arg-type]
            if len(unit) == config.batch_size:
                learner.learn(unit)
                unit = []
                for held in waiting:
                    apply(held)
                waiting = []
        elif unit:
            waiting.append(event)
        else:
            apply(event)
    return learner.state


def labelled_stream(
    n: int, seed: int, share: float = 0.02, withdraw_share: float = 0.2
) -> list[Event]:
    """Invented ferry-inbox documents with corrections of some of them (and of texts given
    only with the correction), and withdrawals of a few corrections."""
    rng = random.Random(seed)
    texts = ferry_texts(n, seed=seed)
    events: list[Event] = []
    corrected: list[str] = []
    for i, text in enumerate(texts):
        events.append(("doc", text))
        if rng.random() < share:
            group = rng.randrange(3)
            words = GROUP_WORDS[group]
            body = " ".join(rng.choice(words) for _ in range(6))
            doc_id = f"c-{i}"
            events.append(("correct", LabelledItem(doc_id, body, group, "correction")))
            corrected.append(doc_id)
            if corrected and rng.random() < withdraw_share:
                events.append(("withdraw", rng.choice(corrected)))
    return events


def enqueue_events(store: ModelStore, events: Sequence[Event], chunk: int = 97) -> None:
    """Queue the events in order: runs of documents with enqueue, labelled entries one by one."""
    texts: list[str] = []

    def flush() -> None:
        for start in range(0, len(texts), chunk):
            store.enqueue(texts[start : start + chunk])
        texts.clear()

    for kind, value in events:
        if kind == "doc":
            texts.append(value)  # type: ignore[arg-type]
            continue
        flush()
        if kind == "correct":
            item: LabelledItem = value  # type: ignore[assignment]
            store.enqueue_labelled(
                [correction_fields(item.doc_id, item.group_id, item.text, item.source, 0.0)]
            )
        else:
            store.enqueue_labelled([withdraw_fields(value, 0.0)])  # type: ignore[arg-type]
    flush()


def all_read(store: ModelStore) -> object:
    """Predicate: the checkpoint's watermark is the stream's last entry (all handled)."""

    def check() -> bool:
        summary = store.summary()
        return summary is not None and summary["watermark"] == store.last_stream_id()

    return check


def handled_through(store: ModelStore, documents: int) -> object:
    """Predicate: the checkpoint learned ``documents`` documents and passed every entry it can
    (a partial unit and the labelled entries behind it stay after the watermark)."""

    def check() -> bool:
        summary = store.summary()
        return summary is not None and summary["documents_learned"] == documents

    return check


def assert_same_labelled(actual: MixtureState, expected: MixtureState) -> None:
    assert actual.labelled.documents() == expected.labelled.documents()
    assert len(set(actual.labelled.ids())) == actual.labelled.len()  # each id once
    np.testing.assert_allclose(
        actual.parameters().log_word_prob, expected.parameters().log_word_prob, rtol=1e-9
    )


@pytest.mark.parametrize("read_count", [7, 100, 1000])
def test_the_state_equals_the_core_fed_directly_whatever_the_page_size(
    redis_client: redis.Redis, model_name: str, read_count: int
) -> None:
    config = small_config()
    events = labelled_stream(1200, seed=3)
    store = create_model(redis_client, model_name, config, fast_options(read_count=read_count))
    enqueue_events(store, events)
    assert sum(1 for kind, _ in events if kind == "doc") % config.batch_size == 0
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(all_read(store), what="every entry handled")
    state = store.load_state()
    expected = reference_with_labels(events, config)
    assert_same_state(state, expected)
    assert_same_labelled(state, expected)
    assert state.labelled.len() > 5  # the stream did carry corrections


def test_labelled_entries_at_the_head_apply_at_once_and_behind_a_partial_unit_wait(
    redis_client: redis.Redis, model_name: str
) -> None:
    config = small_config()
    store = create_model(redis_client, model_name, config, fast_options())
    texts = ferry_texts(config.warmup_documents + 30, seed=5)
    head = LabelledItem("e-0", "refund ticket fare voucher", 0, "example")
    late = LabelledItem("c-1", "lost bag deck locker", 1, "correction")
    events: list[Event] = [("correct", head), *[("doc", t) for t in texts], ("correct", late)]
    enqueue_events(store, events)
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(handled_through(store, config.warmup_documents), what="the warm-up learned")
        state = store.load_state()
        # the example at the head is learned; the correction behind 30 pending documents of an
        # incomplete unit is not, and the watermark stays before those documents
        assert state.labelled.ids() == ["e-0"]
        assert store.labelled_queued() == 1
        store.enqueue(ferry_texts(20, seed=6))  # completes the unit: the correction follows it
        wait_for(
            lambda: "c-1" in (store.load_state().labelled.ids()), what="the correction applied"
        )
    assert store.labelled_queued() == 0


def test_a_correction_of_a_retired_or_unknown_group_is_a_dead_letter_not_a_crash(
    redis_client: redis.Redis, model_name: str
) -> None:
    config = small_config()
    store = create_model(redis_client, model_name, config, fast_options())
    store.enqueue(ferry_texts(config.warmup_documents, seed=8))
    store.enqueue_labelled(
        [
            correction_fields("c-1", 1, "lost bag deck", "correction", 0.0),
            correction_fields("c-2", 17, "storm delay", "correction", 0.0),
            correction_fields("c-3", 2, "storm delay fog", "correction", 0.0),
        ]
    )
    with WorkerThread(Worker(redis_client, model_name)) as running:
        wait_for(all_read(store), what="everything read")
        assert running.worker.errors == 0
    state = store.load_state()
    assert state.labelled.ids() == ["c-1", "c-3"]  # the others learned, in order
    letters = store.dead_letters()
    assert len(letters) == 1 and letters[0]["fields"]["target"] == "c-2"
    assert "17" in letters[0]["reason"] and "refused" in letters[0]["reason"]


def test_corrections_under_sigkill_are_each_learned_exactly_once(
    redis_url: str, redis_client: redis.Redis, model_name: str
) -> None:
    config = small_config()
    store = create_model(
        redis_client, model_name, config, fast_options(checkpoint_documents=300, read_count=120)
    )
    events = labelled_stream(9000, seed=11, share=0.03)
    sent = threading.Event()

    def produce() -> None:
        client_store = ModelStore(redis_from_url(redis_url), model_name)
        for start in range(0, len(events), 300):
            enqueue_events(client_store, events[start : start + 300])
            time.sleep(0.01)
        sent.set()

    producer = threading.Thread(target=produce, daemon=True)
    producer.start()
    kill_workers_mid_stream(redis_url, store, "kill", sent, random.Random(2), max_delay=0.3)
    sent.wait(60)
    producer.join(60)
    assert sum(1 for kind, _ in events if kind == "doc") % config.batch_size == 0
    final = start_worker_process(redis_url, model_name, "final")
    try:
        wait_for(all_read(store), timeout=120, what="every entry handled")
    finally:
        code, err = stop_worker(final)
    assert code == 0, err
    state = store.load_state()
    expected = reference_with_labels(events, config)
    assert_same_state(state, expected)
    assert_same_labelled(state, expected)  # each id once, the same set as one run
    assert state.labelled.len() > 20


def test_a_rollback_with_replay_relearns_corrections_and_never_skips_them(
    redis_client: redis.Redis, model_name: str
) -> None:
    config = small_config()
    store = create_model(redis_client, model_name, config, fast_options())
    warm = [("doc", t) for t in ferry_texts(config.warmup_documents, seed=30)]
    enqueue_events(store, warm)
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(all_read(store), what="the warm-up learned")
    snapshot = store.create_snapshot("before the corrections")
    start = store.snapshot_state(snapshot.id)
    tail = labelled_stream(600, seed=31, share=0.05, withdraw_share=0.0)
    enqueue_events(store, tail)
    first_id = store.snapshot_state(snapshot.id).watermark
    last_id = store.last_stream_id()
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(all_read(store), what="the tail learned")
    before = store.load_state()
    corrected = [v.doc_id for k, v in tail if k == "correct"]
    assert before.labelled.ids() == corrected and corrected
    # roll back and replay, skipping the whole tail by id: its documents are passed over but
    # its corrections are relearned
    store.rollback(snapshot.id, replay=True, skip_ids=[[_after(first_id), last_id]])
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(all_read(store), what="the replay done")
    after = store.load_state()
    assert after.documents_learned == config.warmup_documents  # the tail's documents skipped
    expected = reference_with_labels([e for e in tail if e[0] != "doc"], config, start=start)
    assert_same_state(after, expected)
    assert_same_labelled(after, expected)
    assert after.labelled.ids() == corrected


def _after(stream_id: str) -> str:
    ms, _, seq = stream_id.partition("-")
    return f"{ms}-{int(seq or 0) + 1}"


def test_the_units_record_gives_the_core_remaining_weight_of_a_learned_document(
    redis_client: redis.Redis, model_name: str
) -> None:
    # mixture.labelled.remaining_weight from the unit's figures as the core reports them
    # (BatchReport.unit_etas, unit_documents, unit_log_forgetting), fed directly
    from mixture.labelled import remaining_weight

    config = small_config()
    store = create_model(redis_client, model_name, config, fast_options())
    texts = ferry_texts(config.warmup_documents + 4 * config.batch_size + 10, seed=40)
    ids = [f"m-{i}" for i in range(len(texts))]
    store.enqueue(texts, ids=ids)
    learned = config.warmup_documents + 4 * config.batch_size
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(handled_through(store, learned), what="learned")
    state = store.load_state()
    learner = OnlineLearner(config, seed=0)
    unit = config.batch_size
    reports = [learner.learn(texts[i : i + unit]) for i in range(0, learned, unit)]
    stepwise = [r for r in reports if r.unit_etas][-4:]
    now = learner.state.log_forgetting
    assert state.log_forgetting == pytest.approx(now, rel=1e-12)
    # a document of the second stepwise unit
    position = config.warmup_documents + config.batch_size + 3
    sid = store.texts_of([ids[position]])[0][0]
    report = stepwise[1]
    expected = remaining_weight(
        report.unit_etas[0], report.unit_documents[0], report.unit_log_forgetting[0], now
    )
    assert remaining_of(state.metadata, state.log_forgetting, sid) == pytest.approx(
        expected, rel=1e-12
    )
    assert not unit_of(state.metadata, sid)["warm_up"]
    # a warm-up document: 1 / n_warm at the fit, forgotten since
    warm_sid = store.texts_of([ids[5]])[0][0]
    assert unit_of(state.metadata, warm_sid)["warm_up"]
    assert remaining_of(state.metadata, state.log_forgetting, warm_sid) == pytest.approx(
        remaining_weight(1.0, config.warmup_documents, 0.0, now), rel=1e-12
    )
