"""A rollback gives each restored label back the words it was given to (``label_words``, the
stale-label check's reference, state.label_words), in the same MULTI as the labels.

Real Redis (the session's private server). References: the sketches recorded when the labels
were set, read before the edits the rollback undoes; the Jensen-Shannon divergence from scipy
(``jensenshannon(p, q, base=2) ** 2``, bits) between a restored sketch and the restored model's
group, computed from the model's word probabilities directly. Each test takes about a second.
"""

from __future__ import annotations

import os
import socket
import time
import warnings

import numpy as np
import pytest
import redis
from scipy.spatial.distance import jensenshannon

from mixture.lifecycle import GroupEvent
from mixture.online import OnlineLearner
from mixture.stats import MixtureState
from service.app import create_app
from service.settings import Settings
from state.label_words import WordSketch, label_divergences, sketch_group
from state.records import WorkerStatus
from state.store import Checkpoint, ModelStore
from tests.worker_support import SPAM_WORDS, create_model, ferry_texts, small_config

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis

WORKER = "label-words-test-worker"


class Learning:
    """A learner whose state is committed as the next version, as the worker would."""

    def __init__(self, store: ModelStore, seed: int) -> None:
        self.store = store
        self.learner = OnlineLearner(store.info.config, seed=seed)
        status = WorkerStatus(WORKER, os.getpid(), socket.gethostname(), time.time(), 0, 0)
        assert store.hold_lease(status)

    def commit(self, texts: list[str], **extra: object) -> MixtureState:
        self.learner.learn(texts)
        self.store.commit_checkpoint(
            Checkpoint(
                worker=WORKER,
                expected_version=self.store.version(),
                state=self.learner.state,
                watermark=self.store.last_stream_id(),
                **extra,  # type: ignore[arg-type]
            )
        )
        return self.learner.state.copy()

    def sketch(self, group: int) -> WordSketch:
        sketch = sketch_group(self.learner.state, group, self.store.version(), time.time())
        assert sketch is not None
        return sketch


def scipy_js_to_group(sketch: WordSketch, state: MixtureState, group: int) -> float:
    """JS (bits, scipy) between a sketch and the group now on the sketch's partition, the
    group's probabilities read from the state's parameters directly."""
    position = [int(g) for g in state.group_ids].index(group)
    prob = np.exp(state.parameters().log_word_prob[:, position])
    active = state.vocabulary.active_ids()
    prob = prob / prob[active].sum()
    ids = [state.vocabulary.lookup(w) for w in sketch.words]
    now = np.array([prob[i] if i is not None and i >= 0 else 0.0 for i in ids])
    q = np.append(now, max(0.0, 1.0 - now.sum()))
    p = np.array([*sketch.prob, sketch.rest])
    return float(jensenshannon(p, q, base=2.0) ** 2)


def test_a_rollback_restores_the_words_each_label_was_given_to(
    redis_client: redis.Redis, model_name: str
) -> None:
    store = create_model(redis_client, model_name, small_config())
    learning = Learning(store, seed=61)
    at_snapshot = learning.commit(ferry_texts(300, seed=61))
    sketch_then = learning.sketch(0)
    store.set_group_label(0, "timetables", "desk-a", sketch_then)
    snap = store.create_snapshot("labels as given")
    # after the snapshot: the groups move (a spam burst), group 0's label is refreshed on the
    # new words, and group 1 gets a label
    learning.commit(ferry_texts(300, seed=62, weights=[1.0], words=[SPAM_WORDS]))
    refreshed, other = learning.sketch(0), learning.sketch(1)
    store.patch_group_label(0, {"destination": "desk-b"}, refreshed)
    store.set_group_label(1, "offers", None, other)
    assert store.label_sketches() == {0: refreshed, 1: other}

    result = store.rollback(snap.id)
    assert result.labels_restored and result.label_words_restored
    assert store.label_sketches() == {0: sketch_then}  # group 1's label did not exist then
    restored = store.load_state()
    assert restored is not None
    # the stale check now compares the restored label with the words it was given to: the
    # restored model's own, so the divergence is that of the sketch's 6-digit rounding
    divergence = label_divergences(store.label_sketches(), restored)[0]
    assert divergence == pytest.approx(scipy_js_to_group(sketch_then, at_snapshot, 0), abs=1e-9)
    assert divergence < 1e-6
    # the premise: the refreshed words, left in place, would call the restored label stale, a
    # move the restored model never made (the same computation, checked against scipy at a
    # value far from zero: 0.74 bit measured)
    moved = label_divergences({0: refreshed}, restored)[0]
    assert moved == pytest.approx(scipy_js_to_group(refreshed, restored, 0), rel=1e-6)
    assert moved > store.options.label_stale_threshold
    history = store.label_history(0)[-1]
    assert history["action"] == "rollback" and history["words_recorded"] is False

    # the pre-rollback snapshot kept the words it replaced: rolling back to it brings them back
    again = store.rollback(str(result.safety_snapshot_id))
    assert again.label_words_restored
    assert store.label_sketches() == {0: refreshed, 1: other}


def test_the_api_serves_the_restored_words_and_says_so(
    redis_client: redis.Redis, model_name: str, redis_url: str
) -> None:
    store = create_model(redis_client, model_name, small_config())
    learning = Learning(store, seed=63)
    learning.commit(ferry_texts(300, seed=63))
    version_then = store.version()
    with TestClient(create_app(Settings(redis_url=redis_url))) as http:
        groups = f"/models/{model_name}/groups"
        assert http.put(f"{groups}/0/label", json={"label": "timetables"}).status_code == 200
        snap = http.post(f"/models/{model_name}/snapshots", json={"reason": "labelled"}).json()
        learning.commit(ferry_texts(300, seed=64, weights=[1.0], words=[SPAM_WORDS]))
        version_now = store.version()

        def served(version: int) -> bool:
            return http.get(f"/models/{model_name}").json()["version"] == version

        deadline = time.monotonic() + 10
        while not served(version_now):
            assert time.monotonic() < deadline, "the new version was never served"
            time.sleep(0.05)
        refresh = http.patch(f"{groups}/0/label", json={"refresh": True})
        assert refresh.status_code == 200, refresh.text
        assert refresh.json()["label_words_version"] == version_now
        answer = http.post(
            f"/models/{model_name}/snapshots/{snap['id']}/restore", json={"replay": False}
        )
        assert answer.status_code == 200, answer.text
        assert answer.json()["labels_restored"] is True
        assert answer.json()["label_words_restored"] is True
        group = http.get(f"{groups}/0").json()
        assert group["label_words_version"] == version_then  # the words it was given to
        assert group["label_stale"] is False
        assert group["label_divergence"] == pytest.approx(0.0, abs=1e-6)


def test_a_snapshot_without_words_keeps_only_the_words_older_than_it(
    redis_client: redis.Redis, model_name: str
) -> None:
    """A snapshot written before snapshots kept the words (its ``label_words`` field removed,
    as the older format): the labels are restored; a recorded sketch stays only when its label
    survives and it was recorded before the snapshot, i.e. it went with the restored label."""
    store = create_model(redis_client, model_name, small_config())
    learning = Learning(store, seed=65)
    learning.commit(ferry_texts(300, seed=65))
    kept, replaced = learning.sketch(1), learning.sketch(0)
    store.set_group_label(0, "timetables", None, replaced)
    store.set_group_label(1, "lost property", None, kept)
    snap = store.create_snapshot("older format")
    redis_client.hdel(store.keys.snapshot(snap.id), "label_words")
    assert store.snapshots.label_words(snap.id) is None
    learning.commit(ferry_texts(300, seed=66, weights=[1.0], words=[SPAM_WORDS]))
    store.patch_group_label(0, {"destination": "desk-b"}, learning.sketch(0))  # a refresh
    store.patch_group_label(1, {"destination": "desk-c"})  # no refresh: the same words
    store.set_group_label(2, "offers", None, learning.sketch(2))  # a label born after
    result = store.rollback(snap.id)
    assert result.labels_restored and not result.label_words_restored
    assert store.label_sketches() == {1: kept}
    assert {g: r.destination for g, r in store.group_labels().items()} == {0: None, 1: None}


def test_every_snapshot_kind_keeps_the_words(redis_client: redis.Redis, model_name: str) -> None:
    """Requested, automatic and pre-change snapshots (a checkpoint with a due snapshot and a
    group event) and the pre-rollback one all keep the label words beside the labels."""
    store = create_model(redis_client, model_name, small_config())
    learning = Learning(store, seed=67)
    learning.commit(ferry_texts(300, seed=67))
    store.set_group_label(2, "freight", "desk-f", learning.sketch(2))
    words = store.label_sketches()
    requested = store.create_snapshot("requested")
    retire = GroupEvent("retire", (2,), "a test event", position=600)
    learning.commit(ferry_texts(300, seed=68), snapshot_reason="due", events=[retire])
    result = store.rollback(requested.id)
    kinds = {s.kind: s.id for s in store.list_snapshots()}
    assert set(kinds) == {"requested", "automatic", "pre-change", "pre-rollback"}
    for kind, snapshot_id in kinds.items():
        assert store.snapshots.label_words(snapshot_id) == words, kind
    assert result.label_words_restored and store.label_sketches() == words
