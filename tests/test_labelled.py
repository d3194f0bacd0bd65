"""Labelled documents in the model core: the set, learn_labelled / withdraw_labelled, the
forgetting record, the state bytes (format 3) and the lifecycle's guards.

Sources:
- Nigam, McCallum, Thrun and Mitchell (2000), "Text classification from labeled and
  unlabeled documents using EM", Machine Learning 39: a labelled document's responsibility is
  one-hot on its class and never re-estimated; EM-lambda weighs each unlabelled document by
  lambda in the M-step. Here: the parameters are smoothed from lambda * unlabelled + labelled
  counts, checked against counts made independently of the state.
- Kish's effective sample size: for document weights w_i of a weighted average,
  1 / sum_i w_i^2; the state keeps sum_i w_i^2 (``weight_square_sum``), so the weights that
  ``remaining_weight`` gives every learned document must square-sum to it and sum to the
  running average's mass.
"""

from __future__ import annotations

import hashlib
import io
import json
import struct

import numpy as np
import pytest
import scipy.sparse as sp

from mixture.config import MixtureConfig
from mixture.counting import count_texts
from mixture.errors import ConfigError, InputError
from mixture.labelled import LabelledItem, LabelledSet, remaining_documents, remaining_weight
from mixture.lifecycle import MERGE, merge, retire
from mixture.lifecycle_config import LifecycleConfig
from mixture.online import OnlineLearner, warm_up_progress
from mixture.routing import route_texts
from mixture.serialize import MAGIC, state_from_bytes, state_to_bytes
from mixture.tokenizer import Tokenizer
from mixture.vocabulary import Vocabulary
from tests.lifecycle_streams import TopicStream

CONFIG = MixtureConfig(
    n_groups=3, n_restarts=1, warmup_documents=300, warmup_tokens=0, batch_size=50
)


def _stream(n: int = 900, seed: int = 1) -> tuple[TopicStream, np.ndarray, list[str]]:
    stream = TopicStream(3, seed=seed)
    labels = stream.labels(n, [0, 1, 2])
    return stream, labels, stream.messages(labels)


def _learned(texts: list[str], config: MixtureConfig = CONFIG) -> OnlineLearner:
    learner = OnlineLearner(config, seed=0)
    for start in range(0, len(texts), config.batch_size):
        learner.learn(texts[start : start + config.batch_size])
    return learner


def _word_probabilities(state) -> dict[str, np.ndarray]:
    """Each active word's probabilities per group (ids differ between vocabularies)."""
    params = state.parameters()
    vocab = state.vocabulary
    return {vocab.word(int(i)): params.log_word_prob[i] for i in vocab.active_ids()}


def _assert_same_parameters(a, b) -> None:
    pa, pb = _word_probabilities(a), _word_probabilities(b)
    assert pa.keys() == pb.keys()
    for word, value in pa.items():
        np.testing.assert_allclose(value, pb[word], rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(a.parameters().log_weights, b.parameters().log_weights, rtol=1e-12)


# ---- the set ---------------------------------------------------------------------------------
def test_the_set_lists_counts_and_moves_documents():
    labelled = LabelledSet()
    row = sp.csr_matrix(np.array([[0.0, 2.0, 1.0]]))
    assert labelled.put("a", 4, "correction", "first text", row)
    assert not labelled.put("a", 4, "correction", "first text", row)  # the same: a no-op
    assert labelled.put("b", 5, "example", "second", sp.csr_matrix(np.array([[1.0, 0.0, 0.0]])))
    assert labelled.len() == len(labelled) == 2 and labelled.ids() == ["a", "b"]
    assert labelled.documents() == [
        {"id": "a", "group": 4, "source": "correction", "excerpt": "first text", "tokens": 3},
        {"id": "b", "group": 5, "source": "example", "excerpt": "second", "tokens": 1},
    ]
    assert labelled.group_counts() == {4: 1, 5: 1}
    assert labelled.move_group(5, 4) == 1 and labelled.group_counts() == {4: 2}
    np.testing.assert_array_equal(labelled.counts_matrix(3).toarray(), [[0, 2, 1], [1, 0, 0]])
    labelled.renumber_words(np.array([-1, 0, 1]))  # a compaction: word 0 retired
    np.testing.assert_array_equal(labelled.counts_matrix(2).toarray(), [[2, 1], [0, 0]])
    copy = LabelledSet.from_arrays(labelled.to_arrays())
    assert copy.documents() == labelled.documents()
    assert labelled.remove(["a", "zzz"]) == 1 and labelled.ids() == ["b"]


def test_configuration_ranges():
    assert MixtureConfig().unlabelled_weight == 1.0 and MixtureConfig().labelled_limit == 10_000
    for bad in (0.0, -0.1, 1.5, float("nan")):
        with pytest.raises(ConfigError, match="unlabelled_weight"):
            MixtureConfig(unlabelled_weight=bad)
    with pytest.raises(ConfigError, match="labelled_limit"):
        MixtureConfig(labelled_limit=-1)
    assert MixtureConfig(unlabelled_weight=0.1, labelled_limit=0).labelled_limit == 0


# ---- learning them -------------------------------------------------------------------------
def test_labelled_counts_go_wholly_to_their_group_and_never_decay():
    """Nigam et al. (2000): parameters from lambda * unlabelled + labelled counts, the
    labelled rows one-hot. Checked against counts made with a tokenizer and vocabulary of
    their own, after stepwise updates that leave the labelled part unchanged."""
    stream, _, texts = _stream()
    config = CONFIG.replace(unlabelled_weight=0.3)
    learner = _learned(texts[:600], config)
    state = learner.state
    step, learned = state.step, state.documents_learned
    examples = stream.messages(np.array([1, 1, 2]))
    items = [
        LabelledItem(f"x{i}", t, g)
        for i, (t, g) in enumerate(zip(examples, [1, 1, 2], strict=True))
    ]
    report = learner.learn_labelled(items)
    assert report.labelled == 3 and report.documents == 0 and report.steps == 0
    assert state.step == step and state.documents_learned == learned  # no stepwise step

    def labelled_part_is_exact() -> None:
        # Independent counts of the three texts over the state's words.
        own = Vocabulary(state.vocabulary.words())
        counted = count_texts(examples, Tokenizer(config.tokenizer), own, grow=False).counts
        expected = np.zeros((state.capacity, 3))
        for row, group in zip(range(3), [1, 1, 2], strict=True):
            expected[counted[row].indices, group] += counted[row].data
        np.testing.assert_allclose(
            state.expected_word_counts() - 0.3 * state.unlabelled_word_counts(),
            expected,
            atol=1e-9,
        )
        np.testing.assert_allclose(
            state.expected_documents() - 0.3 * state.unlabelled_documents(), [0, 2, 1], atol=1e-9
        )

    labelled_part_is_exact()
    for start in range(600, 900, 50):  # every stepwise update after it leaves it whole
        assert learner.learn(texts[start : start + 50]).steps == 1
        labelled_part_is_exact()
    # Routing sees them: the parameters are the combined counts'.
    params = state.parameters()
    totals = state.expected_word_counts().sum(axis=0) + state.vocabulary.n_active * 0.1
    np.testing.assert_allclose(
        np.exp(params.log_word_prob[: state.capacity]),
        (state.expected_word_counts() + 0.1) / totals,
        rtol=1e-9,
    )


def test_learn_labelled_is_idempotent_per_id_moves_and_the_last_text_wins():
    _, _, texts = _stream()
    learner = _learned(texts[:600])
    state = learner.state
    first = LabelledItem("m1", texts[700], 0)
    assert learner.learn_labelled([first]).labelled == 1
    before = state.parameters().log_word_prob.copy()
    assert learner.learn_labelled([first]).labelled == 0  # same id, group and text
    np.testing.assert_array_equal(state.parameters().log_word_prob, before)
    assert learner.learn_labelled([LabelledItem("m1", texts[700], 2)]).labelled == 1  # moves
    assert state.labelled.group_counts() == {2: 1}
    learner.learn_labelled([LabelledItem("m1", texts[701], 2, "example")])  # last text wins
    only = OnlineLearner.from_state(_learned(texts[:600]).state)
    only.learn_labelled([LabelledItem("m1", texts[701], 2, "example")])
    _assert_same_parameters(state, only.state)
    assert state.labelled.documents()[0]["excerpt"] == texts[701][:200]


def test_withdraw_is_exact():
    """Parameters after a withdrawal equal those of a learner that never had the document
    (to float tolerance), the words only it brought included."""
    _, _, texts = _stream()
    kept = LabelledItem("keep", texts[650], 1)
    with_it = _learned(texts[:600])
    with_it.learn_labelled([kept])
    without = _learned(texts[:600])
    without.learn_labelled([kept])
    novel = "zzqx zzqy zzqx " + texts[660]  # two words the model never saw
    with_it.learn_labelled([LabelledItem("gone", novel, 0)])
    assert "zzqx" in with_it.state.vocabulary
    assert with_it.withdraw_labelled(["gone", "never-there"]) == 1
    assert with_it.withdraw_labelled(["gone"]) == 0
    assert "zzqx" not in with_it.state.vocabulary
    _assert_same_parameters(with_it.state, without.state)


def test_bad_labelled_input_changes_nothing():
    _, _, texts = _stream()
    learner = _learned(texts[:600], CONFIG.replace(labelled_limit=2))
    state = learner.state
    before = state_to_bytes(state)
    with pytest.raises(InputError, match="group 7"):
        learner.learn_labelled([LabelledItem("a", texts[0], 0), LabelledItem("b", texts[1], 7)])
    with pytest.raises(InputError, match="labelled_limit"):
        learner.learn_labelled([LabelledItem(str(i), texts[i], 0) for i in range(3)])
    with pytest.raises(InputError, match="source"):
        learner.learn_labelled([LabelledItem("a", texts[0], 0, "guess")])
    with pytest.raises(InputError, match="doc_id"):
        learner.learn_labelled([LabelledItem("", texts[0], 0)])
    assert state_to_bytes(state) == before
    # Within the limit, and a repeated id is not a new document.
    learner.learn_labelled([LabelledItem("a", texts[0], 0), LabelledItem("b", texts[1], 1)])
    learner.learn_labelled([LabelledItem("a", texts[2], 1)])
    assert state.labelled.group_counts() == {1: 2}


def test_during_the_warm_up_they_are_kept_and_used_by_every_fit():
    """Labelled documents before the warm-up fit: kept, not counted towards the warm-up's end,
    given to the provisional fit at once, and used by the warm-up fit (group 0 seeded by them
    ends up holding their topic)."""
    stream, labels, texts = _stream(seed=4)
    config = CONFIG.replace(provisional_documents=100)
    learner = OnlineLearner(config, seed=0)
    examples = stream.messages(np.full(6, 2))
    items = [LabelledItem(f"e{i}", t, 0, "example") for i, t in enumerate(examples)]
    learner.learn_labelled(items)
    assert warm_up_progress(learner.state).documents == 0
    learner.learn(texts[:150])  # a provisional fit at 100 documents
    provisional = learner.state.provisional
    assert provisional is not None and provisional.labelled.ids() == [it.doc_id for it in items]
    # The provisional fit started group 0 from the examples: it routes their topic there.
    early = route_texts(provisional, texts[:150]).group
    assert np.mean(early[labels[:150] == 2] == 0) >= 0.9
    late = LabelledItem("late", texts[int(np.flatnonzero(labels == 2)[0])], 0)
    learner.learn_labelled([late])
    assert "late" in learner.state.provisional.labelled  # at once, without a refit
    assert warm_up_progress(learner.state).documents == 150
    learner.learn(texts[150:300])
    state = learner.state
    assert state.warmed_up and state.provisional is None and len(state.labelled) == 7
    routed = route_texts(state, texts[300:]).group
    topic_2 = labels[300:] == 2
    assert np.mean(routed[topic_2] == 0) >= 0.9


# ---- forgetting ------------------------------------------------------------------------------
def test_remaining_weights_are_the_running_average_weights():
    """Kish: the state's weight_square_sum is sum_i w_i^2 over the documents' weights, and
    the running average's mass is sum_i w_i (each document's posterior sums to 1). The
    weights remaining_weight gives every document learned must satisfy both."""
    _, _, texts = _stream(1200)
    config = CONFIG.replace(batch_size=64)
    learner = OnlineLearner(config, seed=0)
    learner.learn(texts[:300])  # the warm-up: n documents of weight 1 / n each
    warm = learner.state.documents_learned
    units = learner.learn(texts[300:1000])
    units = units.merge(learner.learn(texts[1000:1030]))  # a partial unit
    state = learner.state
    now = state.log_forgetting
    assert now == pytest.approx(float(np.sum(np.log1p(-np.array(units.unit_etas)))), rel=1e-12)
    weights = [remaining_weight(1.0, warm, 0.0, now)] * warm
    for eta, m, after in zip(
        units.unit_etas, units.unit_documents, units.unit_log_forgetting, strict=True
    ):
        weights += [remaining_weight(eta, m, after, now)] * m
    weights_array = np.array(weights)
    assert float(np.sum(weights_array**2)) == pytest.approx(state.weight_square_sum, rel=1e-9)
    assert float(weights_array.sum()) == pytest.approx(
        float(state.unscaled_docs.sum() * state.running_scale), rel=1e-9
    )
    # In count units the oldest documents count for less than one, the newest for more.
    assert remaining_documents(weights[0], state.weight_square_sum) < 1.0
    assert remaining_documents(weights[-1], state.weight_square_sum) > 1.0


# ---- bytes -------------------------------------------------------------------------------------
def _as_version_2(data: bytes) -> bytes:
    """Rewrite version-3 bytes as the version-2 layout (no labelled set, no log_forgetting,
    a configuration without the labelled fields)."""
    with np.load(io.BytesIO(data[42:]), allow_pickle=False) as archive:
        arrays = {name: archive[name] for name in archive.files}
    for name in list(arrays):
        if name.startswith("lab."):
            del arrays[name]
    header = json.loads(arrays["header"].tobytes().decode("utf-8"))
    del header["log_forgetting"]
    del header["config"]["unlabelled_weight"], header["config"]["labelled_limit"]
    arrays["header"] = np.frombuffer(json.dumps(header).encode("utf-8"), dtype=np.uint8)
    buffer = io.BytesIO()
    np.savez(buffer, allow_pickle=False, **arrays)
    payload = buffer.getvalue()
    return struct.pack("<8sH32s", MAGIC, 2, hashlib.sha256(payload).digest()) + payload


def test_state_bytes_format_3_round_trip_and_format_2_still_read():
    _, _, texts = _stream()
    learner = _learned(texts[:700])
    learner.learn_labelled(
        [LabelledItem("c1", texts[800], 1), LabelledItem("e1", texts[801], 2, "example")]
    )
    state = learner.state
    data = state_to_bytes(state)
    assert data[8:10] == b"\x03\x00"
    loaded = state_from_bytes(data)
    assert loaded.labelled.documents() == state.labelled.documents()
    assert loaded.log_forgetting == state.log_forgetting < 0
    np.testing.assert_array_equal(
        loaded.parameters().log_word_prob, state.parameters().log_word_prob
    )
    assert state_to_bytes(loaded) == data
    # Format 2: no labelled documents, log_forgetting 0, the configuration's defaults.
    plain = _learned(texts[:700]).state
    old = state_from_bytes(_as_version_2(state_to_bytes(plain)))
    assert len(old.labelled) == 0 and old.log_forgetting == 0.0
    assert old.config.unlabelled_weight == 1.0
    np.testing.assert_array_equal(old.parameters().log_word_prob, plain.parameters().log_word_prob)


def test_pruning_and_compaction_remap_the_labelled_rows():
    """A small vocabulary limit retires and renumbers words; the labelled rows follow: each
    keeps exactly its words still in the vocabulary, with their counts, and its counts count
    for the choice (a word the labelled document uses 60 times stays, one it uses once goes)."""
    stream = TopicStream(3, words_per_topic=400, seed=6)
    labels = stream.labels(1500, [0, 1, 2])
    texts = stream.messages(labels)
    config = CONFIG.replace(vocabulary_limit=300)
    learner = _learned(texts[:400], config)
    example = "qqrare " * 60 + "qqonce qqtwice qqtwice " + texts[450]
    learner.learn_labelled([LabelledItem("ex", example, 0, "example")])
    state = learner.state
    row = state.labelled.counts_matrix(state.capacity)[0]
    before = {
        state.vocabulary.word(int(i)): float(c) for i, c in zip(row.indices, row.data, strict=True)
    }
    generation = state.vocabulary.generation
    for start in range(400, 1500, 50):
        learner.learn(texts[start : start + 50])
    assert state.vocabulary.generation > generation  # compacted at least once
    row = state.labelled.counts_matrix(state.capacity)[0]
    after = {
        state.vocabulary.word(int(i)): float(c) for i, c in zip(row.indices, row.data, strict=True)
    }
    assert after == {w: c for w, c in before.items() if w in state.vocabulary}
    assert after["qqrare"] == 60.0
    assert "qqonce" not in after and "qqtwice" not in after  # the rarest go, here too


# ---- the lifecycle's guards ------------------------------------------------------------------
def test_groups_holding_labelled_documents_are_never_retired_nor_merged_together():
    _, _, texts = _stream()
    learner = _learned(texts[:600])
    state = learner.state
    learner.learn_labelled([LabelledItem("a", texts[0], 0), LabelledItem("b", texts[1], 1)])
    with pytest.raises(InputError, match="never retired"):
        retire(state, 0, reason="test")
    with pytest.raises(InputError, match="never merged"):
        merge(state, 0, 1, reason="test")
    merge(state, 2, 1, reason="test")  # the absorbed group's labelled document moves
    assert state.labelled.group_counts() == {0: 1, 2: 1}


def test_a_labelled_group_survives_a_merge_and_two_labelled_groups_do_not_merge():
    """Four groups warmed up on three topics: two of them share a topic and merge while
    learning (tests/test_lifecycle.py; the warm-up is fitted without the lifecycle, which
    would join them at its end, and the lifecycle switched on after it). With a labelled
    document in the smaller of the two, that one survives with its id; with one in each,
    they never merge."""
    stream = TopicStream(3, seed=2)
    labels = stream.labels(8000, [0, 1, 2])
    texts = stream.messages(labels)
    config = MixtureConfig(warmup_documents=1000, warmup_tokens=0, n_groups=4)

    def run(label_both: bool) -> tuple[list, OnlineLearner, tuple[int, int]]:
        learner = OnlineLearner(config, seed=0)
        learner.learn(texts[:1000])
        learner.state.config = config.replace(lifecycle=LifecycleConfig(enabled=True))
        routed = route_texts(learner.state, texts[:1000]).group
        # The topic split over two groups, and those two groups (smaller first).
        split = max(
            range(3),
            key=lambda t: np.sort(np.bincount(routed[labels[:1000] == t], minlength=4))[-2],
        )
        sizes = np.bincount(routed[labels[:1000] == split], minlength=4)
        pair = tuple(int(g) for g in np.argsort(sizes)[-2:])
        docs = np.flatnonzero(labels[:1000] == split)
        items = [LabelledItem("small", texts[docs[0]], pair[0])]
        if label_both:
            items.append(LabelledItem("large", texts[docs[1]], pair[1]))
        learner.learn_labelled(items)
        events = []
        for start in range(1000, 8000, 256):
            events += learner.learn(texts[start : start + 256]).events
        return events, learner, pair

    events, learner, pair = run(label_both=False)
    merges = [e for e in events if e.kind == MERGE]
    assert merges and merges[0].groups == (pair[0], pair[1])  # the labelled one survives
    assert pair[0] in learner.state.group_ids and pair[1] not in learner.state.group_ids
    events, learner, pair = run(label_both=True)
    assert not [e for e in events if e.kind == MERGE and set(e.groups) == set(pair)]
    assert set(pair) <= set(int(g) for g in learner.state.group_ids)
