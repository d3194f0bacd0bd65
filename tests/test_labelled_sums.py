"""Running per-group sums of the labelled documents (mixture.labelled.LabelledSums).

The reference is a from-scratch recount written here, independently of the sums' code: every
labelled document's whole counts added to its group, its documents counting only when they
have a token (Nigam, McCallum, Thrun and Mitchell 2000, "Text classification from labeled and
unlabeled documents using EM", Machine Learning 39: a labelled document adds its counts wholly
to its class). The sums are int64, so after any sequence of adds, withdrawals, relabels,
merges, retired words and compactions they must equal the recount exactly, not to a
tolerance. The state's parameters must be bit-identical to those from the recount: IEEE 754
doubles represent every whole number below 2**53 exactly and add them exactly in any order,
so a float sum of whole counts and an integer sum turned to float are the same number.
"""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import example, given, settings
from hypothesis import strategies as st

from mixture.config import MixtureConfig
from mixture.errors import InputError, StateFormatError
from mixture.labelled import LabelledItem, LabelledSet, LabelledSums
from mixture.lifecycle import merge
from mixture.online import OnlineLearner
from mixture.serialize import state_from_bytes, state_to_bytes
from mixture.stats import MixtureState
from tests.lifecycle_streams import TopicStream

N_WORDS = 6  # few words: retiring some often empties a document


def recount(
    labelled: LabelledSet, capacity: int = N_WORDS
) -> dict[int, tuple[int, int, int, dict[int, int]]]:
    """(members, documents with a token, tokens, {word: count}) per group, from the rows."""
    matrix = labelled.counts_matrix(capacity)
    members: Counter[int] = Counter()
    documents: Counter[int] = Counter()
    tokens: Counter[int] = Counter()
    words: dict[int, Counter[int]] = {}
    for row, group in zip(matrix, labelled.groups().tolist(), strict=True):
        members[group] += 1
        total = int(row.sum())
        documents[group] += total > 0
        tokens[group] += total
        counter = words.setdefault(group, Counter())
        for word, count in zip(row.indices.tolist(), row.data.tolist(), strict=True):
            counter[word] += int(count)
    return {
        group: (
            members[group],
            documents[group],
            tokens[group],
            {w: c for w, c in sorted(words[group].items()) if c},
        )
        for group in members
    }


def _row(counts: list[int]) -> sp.csr_matrix:
    return sp.csr_matrix(np.array([counts], dtype=np.float64))


# Sparse documents (a few words, sometimes none) so that retired words can empty one.
_counts = st.dictionaries(
    st.integers(0, N_WORDS - 1), st.one_of(st.integers(1, 3), st.integers(1, 2**40)), max_size=3
).map(lambda words: [words.get(w, 0) for w in range(N_WORDS)])
_operation = st.one_of(
    st.tuples(st.just("put"), st.integers(0, 7), st.integers(0, 4), _counts),
    st.tuples(st.just("remove"), st.lists(st.integers(0, 9), max_size=3)),
    st.tuples(st.just("move"), st.integers(0, 4), st.integers(0, 4)),
    st.tuples(st.just("drop"), st.lists(st.integers(0, N_WORDS - 1), max_size=4)),
    st.tuples(st.just("compact"), st.integers(0, 2**31)),
)


@settings(max_examples=150, deadline=None)
@given(st.lists(_operation, max_size=30))
@example([("put", 0, 1, [0, 2, 0, 1, 0, 0]), ("drop", [1, 3]), ("remove", [0])])
def test_the_running_sums_equal_a_recount_after_any_sequence_of_changes(operations) -> None:
    labelled = LabelledSet()
    for operation in operations:
        kind = operation[0]
        if kind == "put":
            _, doc, group, counts = operation
            labelled.put(f"d{doc}", group, "correction", "", _row(counts))
        elif kind == "remove":
            labelled.remove([f"d{doc}" for doc in operation[1]])
        elif kind == "move":
            labelled.move_group(operation[1], operation[2])
        elif kind == "drop":
            labelled.drop_words(np.array(operation[1], dtype=np.int64))
        else:  # a compaction: some words retired, the rest renumbered in order
            rng = np.random.default_rng(operation[1])
            keep = rng.random(N_WORDS) < 0.8
            mapping = np.full(N_WORDS, -1, dtype=np.int64)
            mapping[keep] = np.arange(int(keep.sum()))
            labelled.renumber_words(mapping)
        assert labelled.sums.by_group() == recount(labelled)
        assert labelled.group_counts() == {g: v[0] for g, v in recount(labelled).items()}
    # Read back from bytes the sums are counted again: the same as the running ones.
    rebuilt = LabelledSet.from_arrays(labelled.to_arrays())
    assert rebuilt.sums.by_group() == labelled.sums.by_group()


def test_add_then_withdraw_returns_every_sum_exactly() -> None:
    labelled = LabelledSet()
    labelled.put("a", 1, "correction", "", _row([3, 0, 1] + [0] * (N_WORDS - 3)))
    before = labelled.sums.by_group()
    # Counts far apart in magnitude: a float accumulator would keep a residue of 2**60 + 1.
    labelled.put("b", 1, "correction", "", _row([2**60, 1] + [0] * (N_WORDS - 2)))
    labelled.put("b", 2, "correction", "", _row([1, 2**60] + [0] * (N_WORDS - 2)))  # relabel
    labelled.remove(["b"])
    assert labelled.sums.by_group() == before == recount(labelled)
    labelled.remove(["a"])
    assert labelled.sums.by_group() == {} and not labelled.holds_group(1)


def test_counts_that_are_not_whole_numbers_are_refused() -> None:
    labelled = LabelledSet()
    with pytest.raises(InputError, match="whole numbers"):
        labelled.put("a", 0, "correction", "", _row([0.5] + [0] * (N_WORDS - 1)))
    assert len(labelled) == 0 and labelled.sums.by_group() == {}
    labelled.put("a", 0, "correction", "", _row([2] + [0] * (N_WORDS - 1)))
    arrays = labelled.to_arrays()
    arrays["data"] = arrays["data"] + 0.25
    with pytest.raises(StateFormatError, match="whole numbers"):
        LabelledSet.from_arrays(arrays)


def test_recount_of_no_documents_is_empty() -> None:
    assert LabelledSums.recount([], [], []).by_group() == {}


# ---- the state: parameters from the sums, bit for bit -----------------------------------------
CONFIG = MixtureConfig(
    n_groups=3, n_restarts=1, warmup_documents=120, warmup_tokens=0, batch_size=40
)


def _reference_counts(state: MixtureState) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """lambda * unlabelled + labelled, the labelled part summed from the rows (dense)."""
    position = {int(g): i for i, g in enumerate(state.group_ids)}
    matrix = state.labelled.counts_matrix(state.capacity).toarray()
    labelled_words = np.zeros((state.capacity, state.n_groups))
    labelled_docs = np.zeros(state.n_groups)
    labelled_tokens = np.zeros(state.n_groups)
    for row, group in zip(matrix, state.labelled.groups().tolist(), strict=True):
        if group in position and row.sum() > 0:
            labelled_words[:, position[group]] += row
            labelled_docs[position[group]] += 1
            labelled_tokens[position[group]] += row.sum()
    weight = state.config.unlabelled_weight
    words = state.unlabelled_word_counts() * weight + labelled_words
    docs = state.unlabelled_documents() * weight + labelled_docs
    totals = state.unscaled_total * state.count_scale * weight + labelled_tokens
    return words, docs, totals


@pytest.mark.parametrize("unlabelled_weight", [1.0, 0.3])
def test_the_state_reads_bit_identical_counts_from_the_sums(unlabelled_weight: float) -> None:
    config = CONFIG.replace(unlabelled_weight=unlabelled_weight)
    stream = TopicStream(3, seed=4)
    labels = stream.labels(600, [0, 1, 2])
    texts = stream.messages(labels)
    learner = OnlineLearner(config, seed=0)
    learner.learn(texts[:160])
    state = learner.state
    rng = np.random.default_rng(7)
    for step in range(40):
        choice = rng.random()
        ids = [f"m{i}" for i in rng.integers(0, 30, size=int(rng.integers(1, 4)))]
        if choice < 0.55:  # add or relabel (the text given last wins)
            items = [
                LabelledItem(doc_id, texts[160 + int(rng.integers(0, 400))], int(group))
                for doc_id, group in zip(
                    dict.fromkeys(ids), rng.choice(state.group_ids, size=len(ids)), strict=False
                )
            ]
            learner.learn_labelled(items)
        elif choice < 0.8:
            learner.withdraw_labelled(ids)
        else:
            start = 160 + 40 * (step % 10)
            learner.learn(texts[start : start + 40])
        words, docs, totals = _reference_counts(state)
        np.testing.assert_array_equal(state.expected_word_counts(), words)
        np.testing.assert_array_equal(state.expected_documents(), docs)
        np.testing.assert_array_equal(state.word_totals(), totals)
        rows = np.flatnonzero(state.vocabulary.active_mask())[::3]
        copy = state_from_bytes(state_to_bytes(state))  # sums counted again on load
        assert copy.labelled.sums.by_group() == state.labelled.sums.by_group()
        np.testing.assert_array_equal(copy.log_word_prob_rows(rows), state.log_word_prob_rows(rows))
        np.testing.assert_array_equal(
            copy.parameters().log_word_prob, state.parameters().log_word_prob
        )
        np.testing.assert_array_equal(copy.parameters().log_weights, state.parameters().log_weights)
    assert len(state.labelled) > 0


def test_a_merge_moves_the_sums_to_the_survivor() -> None:
    stream = TopicStream(3, seed=2)
    texts = stream.messages(stream.labels(200, [0, 1, 2]))
    learner = OnlineLearner(CONFIG, seed=0)
    learner.learn(texts[:160])
    state = learner.state
    survivor, absorbed = (int(g) for g in state.group_ids[:2])
    learner.learn_labelled([LabelledItem("x", texts[170], absorbed)])
    merge(state, survivor, absorbed, reason="test")
    assert state.labelled.sums.by_group() == recount(state.labelled, state.capacity)
    assert state.labelled.group_counts() == {survivor: 1}
    words, docs, _ = _reference_counts(state)
    np.testing.assert_array_equal(state.expected_word_counts(), words)
    np.testing.assert_array_equal(state.expected_documents(), docs)


def test_put_counts_takes_a_canonical_row_and_copies_it() -> None:
    labelled = LabelledSet()
    indices, data = np.array([1, 4]), np.array([2.0, 1.0])
    assert labelled.put_counts("a", 3, "correction", "", indices, data)
    data[0] = 7.0  # the caller's batch changes later: the set keeps its own counts
    assert labelled.sums.by_group() == {3: (1, 1, 3, {1: 2, 4: 1})} == recount(labelled)
    with pytest.raises(InputError, match="sorted, distinct"):
        labelled.put_counts("b", 3, "correction", "", np.array([4, 1]), np.array([1.0, 1.0]))
    with pytest.raises(InputError, match="sorted, distinct"):
        labelled.put_counts("b", 3, "correction", "", np.array([1, 1]), np.array([1.0, 1.0]))
    assert labelled.ids() == ["a"]


@pytest.mark.parametrize("n_removed", [1, 3, 17, 30])
def test_removal_keeps_the_order_and_the_index_in_place_or_rebuilt(n_removed: int) -> None:
    # Up to 16 documents are deleted in place, more rebuild the lists: both close the gaps.
    labelled = LabelledSet()
    rng = np.random.default_rng(n_removed)
    for i in range(40):
        counts = [int(c) for c in rng.integers(0, 3, size=N_WORDS)]
        labelled.put(f"d{i}", i % 3, "correction", f"text {i}", _row(counts))
    removed = [f"d{i}" for i in rng.choice(40, size=n_removed, replace=False)]
    assert labelled.remove([*removed, "unknown"]) == n_removed
    expected = [f"d{i}" for i in range(40) if f"d{i}" not in removed]
    assert labelled.ids() == expected
    assert [labelled.group_of(d) for d in expected] == [int(d[1:]) % 3 for d in expected]
    assert [item["excerpt"] for item in labelled.documents()] == [f"text {d[1:]}" for d in expected]
    assert all(labelled.group_of(d) is None for d in removed)
    assert labelled.sums.by_group() == recount(labelled)
    # The index still finds every document: replacing one keeps its place.
    labelled.put(expected[-1], 2, "example", "moved", _row([1] * N_WORDS))
    assert labelled.ids() == expected and labelled.sums.by_group() == recount(labelled)
