"""The group lifecycle of the model core: stable ids, birth, merge, retirement, novelty.

Streams are invented (tests/lifecycle_streams.py generates them from known unigram topics with
numpy); the outside checks are scipy's Dirichlet-multinomial pmf and scipy's Jensen-Shannon
distance.
"""

from __future__ import annotations

import hashlib
import io
import json
import struct

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.special import gammaln, logsumexp
from scipy.stats import dirichlet_multinomial

from mixture.config import MixtureConfig
from mixture.counting import count_texts
from mixture.errors import ConfigError, InputError
from mixture.lifecycle import (
    BIRTH,
    MERGE,
    RETIRE,
    birth,
    birth_log_bayes_factor,
    cheapest_merge,
    components_log_bayes_factor,
    join_components,
    merge,
    position_of,
    retire,
)
from mixture.lifecycle_config import LifecycleConfig
from mixture.novelty import dirichlet_multinomial_log_marginal
from mixture.online import OnlineLearner
from mixture.routing import route_counts, route_texts
from mixture.serialize import MAGIC, state_from_bytes, state_to_bytes
from mixture.stats import MixtureState
from mixture.vocabulary import Vocabulary
from tests.lifecycle_streams import TopicStream

# These streams were designed with the warm-up of 1,000 documents (before the token rule).
OLD_WARM_UP = {"warmup_documents": 1000, "warmup_tokens": 0}
LIFECYCLE_ON = LifecycleConfig(enabled=True)


def _random_state(n_words: int = 60, k: int = 3, seed: int = 0) -> MixtureState:
    rng = np.random.default_rng(seed)
    vocab = Vocabulary()
    for i in range(n_words):
        vocab.add(f"w{i}")
    config = MixtureConfig(n_groups=k, batch_size=16, warmup_documents=k, lifecycle=LIFECYCLE_ON)
    counts = rng.gamma(2.0, 40.0, size=(n_words, k)) + 20.0
    docs = rng.uniform(200, 400, size=k)
    state = MixtureState.from_counts(config, vocab, counts, docs, int(docs.sum()))
    # Move the running scale away from 1, as a long stream does.
    state.running_scale = 1e-3
    state.unscaled_word /= 1e-3
    state.unscaled_docs /= 1e-3
    state.unscaled_total /= 1e-3
    state.touch()
    return state


def _founders(n_docs: int, words: np.ndarray, n_words: int, seed: int = 1) -> sp.csr_matrix:
    rng = np.random.default_rng(seed)
    dense = np.zeros((n_docs, n_words))
    for d in range(n_docs):
        dense[d, rng.choice(words, size=8)] += 1.0
    return sp.csr_matrix(dense)


def _learn(learner: OnlineLearner, texts: list[str], size: int = 256) -> list:
    events = []
    for start in range(0, len(texts), size):
        events += learner.learn(texts[start : start + size]).events
    return events


# ---- outside check: the closed-form marginal likelihood ------------------------------------
def test_dirichlet_multinomial_marginal_matches_scipy():
    """Our sequence probability plus the multinomial coefficient log(N! / prod n_w!) is the
    Dirichlet-multinomial pmf of scipy.stats.dirichlet_multinomial (scipy >= 1.11)."""
    rng = np.random.default_rng(3)
    for n_words, beta in ((5, 0.1), (40, 1.0), (200, 0.5)):
        counts = rng.poisson(0.7, size=n_words).astype(float)
        counts[0] += 1.0
        total = int(counts.sum())
        coefficient = gammaln(total + 1) - gammaln(counts + 1).sum()
        ours = dirichlet_multinomial_log_marginal(counts, n_words, beta) + coefficient
        reference = dirichlet_multinomial.logpmf(counts, np.full(n_words, beta), total)
        assert ours == pytest.approx(float(reference), rel=1e-10)


# ---- the operations ------------------------------------------------------------------------
def test_birth_moves_documents_into_a_new_group_with_a_new_id():
    state = _random_state()
    before_docs = state.expected_documents().sum()
    before_words = state.expected_word_counts().sum()
    founders = _founders(25, np.arange(50, 60), state.capacity)
    event = birth(state, founders, reason="test", documents=tuple(range(25)))
    assert event.kind == BIRTH and event.groups == (3,)
    np.testing.assert_array_equal(state.group_ids, [0, 1, 2, 3])
    assert state.next_group_id == 4 and state.n_groups == 4
    # The founders are assigned anew: totals are preserved (nothing was clipped here).
    assert state.expected_documents().sum() == pytest.approx(before_docs, rel=1e-9)
    assert state.expected_word_counts().sum() == pytest.approx(before_words, rel=1e-9)
    assert state.expected_documents()[3] == pytest.approx(25.0)
    np.testing.assert_allclose(
        state.unscaled_total, state.unscaled_word[: state.capacity].sum(axis=0), rtol=1e-12
    )
    params = state.parameters()
    assert np.all(np.isfinite(params.log_word_prob)) and np.all(np.isfinite(params.log_weights))
    routed = route_counts(params, founders)
    assert np.all(routed.group == 3)


def test_merge_adds_the_statistics_and_the_absorbed_id_is_gone():
    state = _random_state(k=4)
    words = state.expected_word_counts()
    docs = state.expected_documents()
    event = merge(state, 1, 3, reason="test")
    assert event.kind == MERGE and event.groups == (1, 3)
    np.testing.assert_array_equal(state.group_ids, [0, 1, 2])
    np.testing.assert_allclose(state.expected_word_counts()[:, 1], words[:, 1] + words[:, 3])
    np.testing.assert_allclose(state.expected_documents(), [docs[0], docs[1] + docs[3], docs[2]])
    assert state.expected_word_counts().sum() == pytest.approx(words.sum())
    with pytest.raises(InputError, match="id 3"):
        position_of(state, 3)
    assert np.all(np.isfinite(state.parameters().log_word_prob))
    assert route_counts(state.parameters(), _founders(5, np.arange(10), 60)).posterior.shape[1] == 3


def test_retire_removes_the_mass_and_the_weights_renormalise():
    state = _random_state(k=3)
    words = state.expected_word_counts()
    event = retire(state, 1, reason="test")
    assert event.kind == RETIRE and event.groups == (1,)
    np.testing.assert_array_equal(state.group_ids, [0, 2])
    # The other groups' counts are unchanged; only the weights renormalise over them.
    np.testing.assert_allclose(state.expected_word_counts(), words[:, [0, 2]])
    assert state.weights().sum() == pytest.approx(1.0)
    assert np.all(np.isfinite(state.parameters().log_word_prob))
    retire(state, 2, reason="test")
    with pytest.raises(InputError, match="last group"):
        retire(state, 0, reason="test")


def test_ids_are_never_given_again():
    state = _random_state(k=3)
    retire(state, 2, reason="test")
    event = birth(state, _founders(20, np.arange(40, 50), 60), reason="test")
    assert event.groups == (3,)  # not 2, which named another group
    np.testing.assert_array_equal(state.group_ids, [0, 1, 3])


def test_bayes_factor_prefers_a_coherent_cluster_to_strays():
    """Documents that share new words make one group (large ln BF); documents spread over
    the words the groups already know do not."""
    state = _random_state(n_words=200, k=3)
    coherent = _founders(25, np.arange(180, 190), 200)
    strays = _founders(25, np.arange(0, 150), 200, seed=4)
    ordinals = np.arange(state.documents_learned - 500, state.documents_learned - 475)
    assert birth_log_bayes_factor(state, coherent, ordinals) > 5.0
    assert birth_log_bayes_factor(state, strays, ordinals) < 0.0


def test_bayes_factor_matches_scipy_with_arrival_scores():
    """With arrival scores given, ln BF is scipy's Dirichlet-multinomial log pmf of the pooled
    counts (over the active vocabulary, minus its multinomial coefficient) plus the weight
    terms, minus the arrival scores, minus (1/2) ln S."""
    state = _random_state(n_words=80, k=3)
    founders = _founders(25, np.arange(70, 80), 80)
    span = 400
    ordinals = np.arange(state.documents_learned - span, state.documents_learned - span + 25)
    arrival = np.random.default_rng(2).uniform(-60.0, -30.0, size=25)
    pooled = np.asarray(founders.sum(axis=0)).ravel()
    total = int(pooled.sum())
    coefficient = gammaln(total + 1) - gammaln(pooled + 1).sum()
    beta = state.config.word_pseudocount
    marginal = dirichlet_multinomial.logpmf(pooled, np.full(80, beta), total) - coefficient
    weight = 25 / span
    expected = (
        marginal
        + 25 * np.log(weight)
        + (span - 25) * np.log1p(-weight)
        - arrival.sum()
        - 0.5 * np.log(span)
    )
    ours = birth_log_bayes_factor(state, founders, ordinals, arrival)
    assert ours == pytest.approx(float(expected), rel=1e-10)
    # NaN arrival scores fall back to the current mixture (what a state of before holds).
    assert birth_log_bayes_factor(state, founders, ordinals, np.full(25, np.nan)) == pytest.approx(
        birth_log_bayes_factor(state, founders, ordinals), rel=1e-12
    )


def test_the_buffer_keeps_each_documents_score_at_arrival():
    """A buffered document carries log p(d) under the mixture before the model learned it
    (scipy's logsumexp over the parameters of a copy taken before the unit), not under the
    mixture that has since absorbed it."""
    stream = TopicStream(4, seed=7)
    # Births only at the window's end (3,072), so the new topic's documents stay buffered.
    lifecycle = LifecycleConfig(enabled=True, birth_check_novel_documents=0)
    config = MixtureConfig(**OLD_WARM_UP, n_groups=3, n_restarts=1, lifecycle=lifecycle)
    learner = OnlineLearner(config, seed=0)
    _learn(learner, stream.messages(stream.labels(2560, [0, 1, 2])))
    before = learner.state.copy()
    already = learner.state.evidence.buffer_ordinals.size
    unit = stream.messages(stream.labels(256, [3]))
    learner.learn(unit)
    evidence = learner.state.evidence
    fresh = evidence.buffer_ordinals >= before.documents_learned
    assert fresh.sum() >= 100 and evidence.buffer_log_lik.size >= already + fresh.sum() - 500
    counts = count_texts(unit, before.tokenizer, before.vocabulary, grow=True).counts
    before.ensure_capacity()
    before.touch()
    params = before.parameters()
    log_p = logsumexp(np.asarray(counts @ params.log_word_prob) + params.log_weights, axis=1)
    rows = evidence.buffer_ordinals[fresh] - before.documents_learned
    np.testing.assert_allclose(evidence.buffer_log_lik[fresh], log_p[rows], rtol=1e-9)
    now = learner.state.parameters()
    log_p_now = logsumexp(np.asarray(counts @ now.log_word_prob) + now.log_weights, axis=1)
    assert (log_p_now[rows] - log_p[rows]).mean() > 1.0  # the unit taught the model its words


def test_two_new_topics_at_once_are_born_at_one_decision():
    """Two topics appear together at message 4,000: both get a group at the same decision
    (each component of the buffer's fit is tested on its own documents), not one a window
    after the other."""
    stream = TopicStream(6, seed=4)
    labels = np.concatenate([stream.labels(4000, [0, 1, 2]), stream.labels(4000, [0, 1, 2, 3, 4])])
    texts = stream.messages(labels)
    learner = OnlineLearner(
        MixtureConfig(**OLD_WARM_UP, n_groups=3, lifecycle=LIFECYCLE_ON), seed=0
    )
    events = _learn(learner, texts)
    births = [e for e in events if e.kind == BIRTH]
    assert len(births) == 2
    assert births[0].position == births[1].position <= 5500
    later = np.arange(6000, 8000)
    routed = learner.state.group_ids[route_texts(learner.state, [texts[i] for i in later]).group]
    for topic in (3, 4):
        ids, hits = np.unique(routed[labels[later] == topic], return_counts=True)
        assert ids[hits.argmax()] in {b.groups[0] for b in births}
        assert hits.max() / hits.sum() >= 0.9


def test_the_warm_up_documents_start_each_groups_typicality():
    """Right after the warm-up fit every group's typicality holds its warm-up documents: the
    count, mean and spread of their per-token log-likelihood under their MAP group, as the
    routing path reports it for the same documents."""
    stream = TopicStream(3, seed=8)
    texts = stream.messages(stream.labels(1000, [0, 1, 2]))
    config = MixtureConfig(**OLD_WARM_UP, n_groups=3, n_restarts=1, lifecycle=LIFECYCLE_ON)
    learner = OnlineLearner(config, seed=0)
    learner.learn(texts)
    state = learner.state
    assert state.warmed_up and state.evidence is not None
    routed = route_texts(state, texts)
    for g in range(3):
        mine = routed.log_likelihood_per_token[routed.group == g]
        assert state.evidence.typical_weight[g] == pytest.approx(mine.size)
        assert state.evidence.typical_mean()[g] == pytest.approx(mine.mean(), rel=1e-9)
        assert state.evidence.typical_std()[g] == pytest.approx(mine.std(), rel=1e-6)


# ---- configuration ---------------------------------------------------------------------------
def test_lifecycle_settings_are_validated_and_nested():
    with pytest.raises(ConfigError, match=r"lifecycle\.novelty_z"):
        LifecycleConfig(novelty_z=-1.0)
    with pytest.raises(ConfigError, match=r"lifecycle\.retire_windows"):
        LifecycleConfig(retire_windows=True)
    with pytest.raises(ConfigError, match=r"lifecycle\.max_groups"):
        MixtureConfig(n_groups=5, lifecycle=LifecycleConfig(max_groups=3))
    with pytest.raises(ConfigError, match="unknown lifecycle field"):
        MixtureConfig.from_dict({"lifecycle": {"births": True}})
    config = MixtureConfig(
        **OLD_WARM_UP, n_groups=3, lifecycle=LifecycleConfig(enabled=True, max_groups=9)
    )
    assert MixtureConfig.from_dict(json.loads(json.dumps(config.to_dict()))) == config
    assert MixtureConfig.from_dict({"n_groups": 3}).lifecycle == LifecycleConfig()
    assert LifecycleConfig().ceiling(4) == 8
    with pytest.raises(ConfigError, match=r"lifecycle\.birth_check_novel_documents"):
        LifecycleConfig(birth_check_novel_documents=-1)
    assert LifecycleConfig().birth_check_every() == LifecycleConfig().birth_min_documents
    assert LifecycleConfig(birth_check_novel_documents=0).birth_check_every() == 0


# ---- serialisation ---------------------------------------------------------------------------
def _as_version_1(data: bytes) -> bytes:
    """Rewrite version-2 bytes as the version-1 layout (no ids, no lifecycle evidence)."""
    with np.load(io.BytesIO(data[42:]), allow_pickle=False) as archive:
        arrays = {name: archive[name] for name in archive.files}
    for name in list(arrays):
        if name == "group_ids" or name.startswith("life."):
            del arrays[name]
    header = json.loads(arrays["header"].tobytes().decode("utf-8"))
    del header["next_group_id"]
    del header["config"]["lifecycle"]
    arrays["header"] = np.frombuffer(json.dumps(header).encode("utf-8"), dtype=np.uint8)
    buffer = io.BytesIO()
    np.savez(buffer, allow_pickle=False, **arrays)
    payload = buffer.getvalue()
    return struct.pack("<8sH32s", MAGIC, 1, hashlib.sha256(payload).digest()) + payload


def test_state_bytes_keep_ids_and_evidence_and_read_version_1():
    stream = TopicStream(3, seed=5)
    texts = stream.messages(stream.labels(2600, [0, 1, 2]))
    config = MixtureConfig(n_groups=3, n_restarts=1, warmup_documents=1000, lifecycle=LIFECYCLE_ON)
    learner = OnlineLearner(config, seed=0)
    _learn(learner, texts)
    state = learner.state
    founders = state.evidence.buffer_counts(state.capacity)[:3]
    event = birth(state, founders, reason="x")
    retire(state, 0, reason="x")
    data = state_to_bytes(state)
    loaded = state_from_bytes(data)
    np.testing.assert_array_equal(loaded.group_ids, [1, 2, event.groups[0]])
    assert loaded.next_group_id == 4 and loaded.n_groups == 3
    for name, value in state.evidence.to_arrays().items():
        np.testing.assert_array_equal(loaded.evidence.to_arrays()[name], value)
    assert state_to_bytes(loaded) == data
    # The old layout: the ids are 0..K-1 and the lifecycle starts with no evidence.
    fresh = OnlineLearner(config, seed=0)
    _learn(fresh, texts)
    fresh.state.evidence = None
    version_1 = _as_version_1(state_to_bytes(fresh.state))
    assert version_1[8:10] == b"\x01\x00"
    read = state_from_bytes(version_1)
    np.testing.assert_array_equal(read.group_ids, [0, 1, 2])
    assert read.next_group_id == 3 and read.evidence is None
    np.testing.assert_array_equal(
        route_texts(read, texts[:50]).posterior, route_texts(fresh.state, texts[:50]).posterior
    )


def test_a_buffer_saved_without_arrival_scores_reads_them_as_unknown():
    """Version-2 bytes written before the arrival scores were kept: the buffer loads with
    NaN scores (the birth test then scores those documents under the current mixture)."""
    stream = TopicStream(4, seed=5)
    labels = np.concatenate([stream.labels(2600, [0, 1, 2]), stream.labels(300, [3])])
    config = MixtureConfig(**OLD_WARM_UP, n_groups=3, n_restarts=1, lifecycle=LIFECYCLE_ON)
    learner = OnlineLearner(config, seed=0)
    _learn(learner, stream.messages(labels))
    data = state_to_bytes(learner.state)
    with np.load(io.BytesIO(data[42:]), allow_pickle=False) as archive:
        arrays = {name: archive[name] for name in archive.files if name != "life.buffer_log_lik"}
    buffer = io.BytesIO()
    np.savez(buffer, allow_pickle=False, **arrays)
    payload = buffer.getvalue()
    older = struct.pack("<8sH32s", MAGIC, 2, hashlib.sha256(payload).digest()) + payload
    read = state_from_bytes(older)
    size = learner.state.evidence.buffer_ordinals.size
    assert size > 0 and read.evidence.buffer_log_lik.shape == (size,)
    assert np.isnan(read.evidence.buffer_log_lik).all()


def test_a_window_saved_before_births_between_windows_reads_its_start_as_the_last_test():
    """Bytes whose evidence window holds three numbers (written before the birth test ran
    between windows): the last birth test is taken to be the window's start."""
    stream = TopicStream(4, seed=5)
    labels = np.concatenate([stream.labels(2600, [0, 1, 2]), stream.labels(300, [3])])
    config = MixtureConfig(**OLD_WARM_UP, n_groups=3, n_restarts=1, lifecycle=LIFECYCLE_ON)
    learner = OnlineLearner(config, seed=0)
    _learn(learner, stream.messages(labels))
    data = state_to_bytes(learner.state)
    with np.load(io.BytesIO(data[42:]), allow_pickle=False) as archive:
        arrays = {name: archive[name] for name in archive.files}
    assert arrays["life.window"].size == 4
    arrays["life.window"] = arrays["life.window"][:3]
    buffer = io.BytesIO()
    np.savez(buffer, allow_pickle=False, **arrays)
    payload = buffer.getvalue()
    older = struct.pack("<8sH32s", MAGIC, 2, hashlib.sha256(payload).digest()) + payload
    read = state_from_bytes(older)
    assert read.evidence.births_checked_at == learner.state.evidence.window_start


def test_the_lifecycle_is_a_function_of_the_stream():
    """Saved and loaded between units (as the worker checkpoints), the stream gives the same
    state bytes and the same events as one uninterrupted run: the checkpoint holds everything
    the lifecycle uses. (One unit per call, as the worker hands them over: a call with several
    units grows the vocabulary for all of them at once, which the plain learner does too.)"""
    stream = TopicStream(5, seed=6)
    labels = np.concatenate([stream.labels(2500, [0, 1, 2]), stream.labels(2500, [0, 1, 2, 3])])
    texts = stream.messages(labels)
    config = MixtureConfig(n_groups=3, n_restarts=1, warmup_documents=1000, lifecycle=LIFECYCLE_ON)
    whole = OnlineLearner(config, seed=0)
    events = _learn(whole, texts)
    assert any(e.kind == BIRTH for e in events)
    pieces = OnlineLearner(config, seed=0)
    events_again = []
    for cut in (0, 1536, 2816, 3072, 4096):
        pieces = OnlineLearner.from_state(state_from_bytes(state_to_bytes(pieces.state)))
        end = {0: 1536, 1536: 2816, 2816: 3072, 3072: 4096, 4096: len(texts)}[cut]
        events_again += _learn(pieces, texts[cut:end])
    assert [e.to_dict() for e in events_again] == [e.to_dict() for e in events]
    assert state_to_bytes(pieces.state) == state_to_bytes(whole.state)


# ---- synthetic streams (invented) -----------------------------------------------------------
def test_a_new_topic_gets_a_group_and_its_messages_route_there():
    """A topic appearing at message 5,000 gets a birth within 1,500 messages (the decisions run
    every 1,000; the novel messages need a few hundred to fill a cluster), and later its
    messages go to the new group with purity and recall >= 0.9."""
    stream = TopicStream(6, seed=0)
    old = [0, 1, 2, 3]
    labels = np.concatenate([stream.labels(5000, old), stream.labels(10000, [*old, 4])])
    texts = stream.messages(labels)
    learner = OnlineLearner(
        MixtureConfig(**OLD_WARM_UP, n_groups=4, lifecycle=LIFECYCLE_ON), seed=0
    )
    events = _learn(learner, texts)
    assert [e.kind for e in events] == [BIRTH]
    born = events[0]
    assert 5000 <= born.position <= 6500
    assert all(5000 <= d < born.position for d in born.documents)
    later = np.arange(8000, 15000)
    routed = learner.state.group_ids[route_texts(learner.state, [texts[i] for i in later]).group]
    new_topic = labels[later] == 4
    in_new_group = routed == born.groups[0]
    assert (new_topic & in_new_group).sum() / in_new_group.sum() >= 0.9  # purity
    assert (new_topic & in_new_group).sum() / new_topic.sum() >= 0.9  # recall


@pytest.mark.parametrize("seed", [0, 1])
def test_a_new_topic_is_born_before_the_window_closes(seed):
    """A topic appearing at message 4,200, early in the window 4,096-5,120: the birth test
    runs once the buffer has gained ``birth_min_documents`` novel messages, so the birth comes
    within 408 messages (the next two units of 256), not at the window's end (5,120, where
    births wait with ``birth_check_novel_documents=0``)."""
    stream = TopicStream(6, seed=seed)
    old = [0, 1, 2, 3]
    labels = np.concatenate([stream.labels(4200, old), stream.labels(2800, [*old, 4])])
    texts = stream.messages(labels)
    positions = {}
    for every in (None, 0):
        lifecycle = LifecycleConfig(enabled=True, birth_check_novel_documents=every)
        learner = OnlineLearner(
            MixtureConfig(**OLD_WARM_UP, n_groups=4, lifecycle=lifecycle), seed=seed
        )
        events = _learn(learner, texts)
        assert [e.kind for e in events] == [BIRTH]
        positions[every] = events[0].position
        assert np.mean(labels[list(events[0].documents)] == 4) >= 0.9
    assert 4200 < positions[None] <= 4608
    assert positions[0] == 5120


def test_no_birth_test_between_windows_before_the_first_window_closes():
    """Right after the warm-up the typicality is seeded from the warm-up fit's own documents
    (in-sample), so the buffer is not yet evidence for a birth between windows: the counter
    of new buffered documents stays at 0 until the first window closes. The price, shown
    here: a topic that starts at the warm-up's end (message 1,000) is born when the first
    window closes (2,048), where without the rule it was born at 1,024."""
    stream = TopicStream(6, seed=0)
    labels = np.concatenate([stream.labels(1000, [0, 1, 2, 3]), stream.labels(1500, [4])])
    learner = OnlineLearner(MixtureConfig(**OLD_WARM_UP, n_groups=4, lifecycle=LIFECYCLE_ON))
    assert _learn(learner, stream.messages(labels[:1792])) == []
    evidence = learner.state.evidence
    assert evidence.buffer_ordinals.size >= 2 * LIFECYCLE_ON.birth_min_documents
    assert evidence.births_checked_at == -1 and evidence.novel_since_birth_check() == 0
    events = _learn(learner, stream.messages(labels[1792:]))
    assert [e.kind for e in events][:1] == [BIRTH]
    assert events[0].position == learner.state.evidence.window_start == 2048


def test_a_topic_that_stops_is_retired():
    """With the default floor and two windows of 1,000, a group whose topic stopped at message
    5,000 is retired within 4,000 messages; the other groups stay."""
    stream = TopicStream(4, seed=1)
    labels = np.concatenate([stream.labels(5000, [0, 1, 2, 3]), stream.labels(6000, [0, 1, 2])])
    texts = stream.messages(labels)
    learner = OnlineLearner(
        MixtureConfig(**OLD_WARM_UP, n_groups=4, lifecycle=LIFECYCLE_ON), seed=0
    )
    events = _learn(learner, texts)
    assert [e.kind for e in events] == [RETIRE]
    assert 5000 <= events[0].position <= 9000
    state = learner.state
    assert state.n_groups == 3
    routed = route_texts(state, texts[-1000:]).group
    for t in range(3):
        assert np.bincount(routed[labels[-1000:] == t]).max() / (labels[-1000:] == t).sum() >= 0.9


def test_two_groups_started_on_one_topic_merge():
    """Four groups warmed up on three topics: the two that share a topic merge, now at the
    warm-up's end (one Dirichlet-multinomial group explains their documents better than two;
    mixture.warm_groups), and every topic ends in one group."""
    stream = TopicStream(3, seed=2)
    labels = stream.labels(8000, [0, 1, 2])
    texts = stream.messages(labels)
    learner = OnlineLearner(
        MixtureConfig(**OLD_WARM_UP, n_groups=4, lifecycle=LIFECYCLE_ON), seed=0
    )
    events = _learn(learner, texts)
    assert [e.kind for e in events] == [MERGE]
    assert events[0].position == 1000
    assert events[0].evidence["log_bayes_factor"] > 0.0
    state = learner.state
    assert state.n_groups == 3
    routed = route_texts(state, texts[-1000:]).group
    for t in range(3):
        assert np.bincount(routed[labels[-1000:] == t]).max() / (labels[-1000:] == t).sum() >= 0.9


def test_two_groups_on_one_topic_merge_while_learning():
    """The merge decision itself (posterior overlap and JS divergence): four groups fitted on
    three topics without the lifecycle (so no join at the warm-up), the lifecycle switched on
    afterwards; the two that share a topic merge within 5,000 messages."""
    stream = TopicStream(3, seed=2)
    labels = stream.labels(8000, [0, 1, 2])
    texts = stream.messages(labels)
    learner = OnlineLearner(MixtureConfig(**OLD_WARM_UP, n_groups=4), seed=0)
    learner.learn(texts[:1000])
    state = learner.state
    state.config = state.config.replace(lifecycle=LIFECYCLE_ON)
    events = _learn(OnlineLearner.from_state(state), texts[1000:])
    assert [e.kind for e in events] == [MERGE]
    assert events[0].position <= 6000
    assert events[0].evidence["js_divergence"] < 0.1
    assert state.n_groups == 3
    routed = route_texts(state, texts[-1000:]).group
    for t in range(3):
        assert np.bincount(routed[labels[-1000:] == t]).max() / (labels[-1000:] == t).sum() >= 0.9


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_a_stationary_stream_gets_no_events(seed):
    """Fixed topics (unequal shares, short and long messages): no birth, merge or retirement
    in 20,000 messages."""
    stream = TopicStream(5, seed=10 + seed)
    rng = np.random.default_rng(seed)
    labels = rng.choice(5, size=20000, p=[0.4, 0.25, 0.2, 0.1, 0.05])
    texts = stream.messages(labels, mean_length=8.0 if seed == 1 else 12.0)
    learner = OnlineLearner(
        MixtureConfig(**OLD_WARM_UP, n_groups=5, lifecycle=LIFECYCLE_ON), seed=seed
    )
    assert _learn(learner, texts) == []
    assert learner.state.evidence.buffer.shape[0] <= 500


def test_the_ceiling_stops_births():
    stream = TopicStream(6, seed=0)
    labels = np.concatenate([stream.labels(3000, [0, 1, 2]), stream.labels(4000, [0, 1, 2, 4])])
    capped = LifecycleConfig(enabled=True, max_groups=3)
    learner = OnlineLearner(MixtureConfig(**OLD_WARM_UP, n_groups=3, lifecycle=capped), seed=0)
    assert _learn(learner, stream.messages(labels)) == []
    assert learner.state.n_groups == 3


def test_a_quiet_group_gives_its_place_under_the_ceiling_to_a_new_topic():
    """Ceiling 4, four topics; at message 3,000 topic 3 stops and topic 4 starts. The group of
    topic 3 is quiet for one whole window by the decision at 4,096 and gives its place there:
    the retirement and the birth come one window before the two-window retirement rule
    alone would make room (5,120 without the yield), and topic 4's later messages route to
    the new group."""
    stream = TopicStream(6, seed=0)
    labels = np.concatenate([stream.labels(3000, [0, 1, 2, 3]), stream.labels(4000, [0, 1, 2, 4])])
    texts = stream.messages(labels)
    capped = LifecycleConfig(enabled=True, max_groups=4)
    learner = OnlineLearner(MixtureConfig(**OLD_WARM_UP, n_groups=4, lifecycle=capped), seed=0)
    assert _learn(learner, texts[:3072]) == []  # units of 256, as in one pass
    topic_3_group = np.bincount(
        learner.state.group_ids[route_texts(learner.state, texts[2000:3000]).group][
            labels[2000:3000] == 3
        ]
    ).argmax()
    events = _learn(learner, texts[3072:])
    assert [e.kind for e in events] == [RETIRE, BIRTH]
    retired, born = events
    assert retired.position == born.position <= 4096
    assert retired.groups == (topic_3_group,)
    assert retired.evidence["yielded_to_birth"] == 1.0
    assert learner.state.n_groups == 4
    later = np.arange(5000, 7000)
    routed = learner.state.group_ids[route_texts(learner.state, [texts[i] for i in later]).group]
    new_topic = labels[later] == 4
    in_new_group = routed == born.groups[0]
    assert (new_topic & in_new_group).sum() / in_new_group.sum() >= 0.9  # purity
    assert (new_topic & in_new_group).sum() / new_topic.sum() >= 0.9  # recall


def test_cheapest_merge_picks_the_pair_drawn_from_one_distribution():
    """Invented statistics: groups 0 and 2 hold counts of one word distribution, group 1 of
    another; the pair that loses least as one group is (0, 2), with the ln BF of
    components_log_bayes_factor (checked above against scipy's gammaln) on their counts, and
    the group with more documents survives."""
    state = _random_state(n_words=60, k=3)
    rng = np.random.default_rng(5)
    shared = rng.dirichlet(np.full(60, 0.5))
    other = rng.dirichlet(np.full(60, 0.5))
    counts = np.column_stack(
        [rng.multinomial(3000, shared), rng.multinomial(3000, other), rng.multinomial(2000, shared)]
    ).astype(float)
    state.unscaled_word = counts / state.count_scale
    state.unscaled_total = state.unscaled_word.sum(axis=0)
    state.unscaled_docs = np.array([300.0, 300.0, 200.0]) / state.count_scale
    state.touch()
    score, survivor, absorbed = cheapest_merge(state)
    assert (survivor, absorbed) == (0, 2)
    docs = state.expected_documents()
    expected = components_log_bayes_factor(
        counts[:, 0], counts[:, 2], (docs[0], docs[2]), 60, state.config.word_pseudocount
    )
    assert score == pytest.approx(expected, rel=1e-9)
    assert score > components_log_bayes_factor(
        counts[:, 0], counts[:, 1], (docs[0], docs[1]), 60, state.config.word_pseudocount
    )


def _sub_topic_stream(share_of_theme: float) -> tuple[np.ndarray, list[str]]:
    """Invented stream: topics 0 and 1 are sub-topics (each keeps ``share_of_theme`` of one
    theme's word distribution, the rest its own words), 2 and 3 other topics; topic 4 starts
    at message 3,000 while the others go on."""
    stream = TopicStream(6, seed=0)
    theme, a, b, c, d, new = stream.topics
    mixed = share_of_theme * theme
    rest = 1 - share_of_theme
    stream.topics = np.vstack([mixed + rest * a, mixed + rest * b, c, d, new])
    labels = np.concatenate(
        [stream.labels(3000, [0, 1, 2, 3]), stream.labels(4000, [0, 1, 2, 3, 4])]
    )
    return labels, stream.messages(labels)


def test_a_full_ceiling_makes_room_by_merging_two_sub_topics():
    """Ceiling 4, groups on two sub-topics and two topics, all live; a fifth topic starts.
    The two sub-topics' groups merge (the pair that loses least evidence, and the merge and
    the birth together pass the birth test) and the new topic gets the freed place; with
    retirement alone nothing is quiet and the new topic would have no group."""
    labels, texts = _sub_topic_stream(0.6)
    capped = LifecycleConfig(enabled=True, max_groups=4)
    learner = OnlineLearner(MixtureConfig(**OLD_WARM_UP, n_groups=4, lifecycle=capped), seed=0)
    events = _learn(learner, texts)
    assert [e.kind for e in events] == [MERGE, BIRTH]
    merged, born = events
    assert merged.position == born.position
    assert merged.evidence["made_room"] == 1.0
    assert born.evidence["log_bayes_factor"] + merged.evidence["log_bayes_factor"] > 5.0
    state = learner.state
    later = np.arange(5000, 7000)
    routed = state.group_ids[route_texts(state, [texts[i] for i in later]).group]
    truth = labels[later]
    in_new = routed == born.groups[0]
    assert (in_new & (truth == 4)).sum() / in_new.sum() >= 0.9  # purity
    assert (in_new & (truth == 4)).sum() / (truth == 4).sum() >= 0.9  # recall
    sub_topics = np.isin(truth, [0, 1])
    assert np.all(routed[sub_topics] == merged.groups[0])  # both sub-topics in the survivor


def test_a_merge_that_costs_more_than_the_birth_gains_does_not_make_room():
    """The same stream with sub-topics further apart (40 % of the theme): every merge loses
    more evidence than the new topic's birth gains, so under the full ceiling nothing changes
    (and no group is quiet to give way)."""
    _, texts = _sub_topic_stream(0.4)
    capped = LifecycleConfig(enabled=True, max_groups=4)
    learner = OnlineLearner(MixtureConfig(**OLD_WARM_UP, n_groups=4, lifecycle=capped), seed=0)
    assert _learn(learner, texts) == []
    assert learner.state.n_groups == 4


def test_vocabulary_pruning_keeps_the_buffer_on_the_vocabulary():
    """With a small vocabulary limit words are retired and renumbered while novel documents
    sit in the buffer; the buffer follows (no retired or out-of-range word ids)."""
    stream = TopicStream(5, seed=3)
    labels = np.concatenate([stream.labels(2500, [0, 1, 2]), stream.labels(4000, [0, 1, 2, 3])])
    config = MixtureConfig(
        n_groups=3, vocabulary_limit=400, warmup_documents=1000, lifecycle=LIFECYCLE_ON
    )
    learner = OnlineLearner(config, seed=0)
    _learn(learner, stream.messages(labels))
    state = learner.state
    assert state.vocabulary.generation > 0  # a compaction happened
    buffer = state.evidence.buffer
    assert buffer.shape[1] <= state.capacity
    assert np.all(state.vocabulary.active_mask()[buffer.indices])


def test_long_messages_are_judged_every_warm_up_of_tokens():
    """Invented long messages (about 200 tokens): the window closes at the warm-up's token
    count (about 200 messages here), not after 1,000 messages, so a topic appearing at
    message 600 is born within two such windows; with the cadence in documents only
    (``check_every_tokens = 0``) the first decision after it waits for message 1,000+."""
    stream = TopicStream(4, seed=2)
    labels = np.concatenate([stream.labels(600, [0, 1, 2]), stream.labels(1400, [0, 1, 2, 3])])
    texts = stream.messages(labels, mean_length=200.0)
    tokens = np.asarray([len(t.split()) for t in texts])
    first_births = {}
    for cadence in (None, 0):
        config = MixtureConfig(
            n_groups=3,
            n_restarts=1,
            batch_size=32,
            warmup_tokens=40_000,
            lifecycle=LifecycleConfig(enabled=True, check_every_tokens=cadence),
        )
        learner = OnlineLearner(config, seed=0)
        births = [e for e in _learn(learner, texts, size=32) if e.kind == BIRTH]
        assert births, f"no birth with check_every_tokens={cadence}"
        first_births[cadence] = births[0].position
        assert learner.state.evidence is not None
        if cadence is None:  # the open window holds less than one warm-up of tokens
            held = learner.state.evidence.window_tokens
            assert 0 < held < 40_000
            assert state_from_bytes(state_to_bytes(learner.state)).evidence.window_tokens == held
    # The topic's first ~200 messages carry one warm-up of tokens (~40,000 / 200 per message).
    window_messages = int(np.searchsorted(np.cumsum(tokens[600:]), 40_000)) + 1
    assert 600 < first_births[None] <= 600 + 2 * window_messages + 32
    assert first_births[0] >= 1000


def test_components_bayes_factor_matches_a_hand_computed_marginal():
    """Worked example: V = 3, beta = 0.5, counts (3, 1, 0) in 2 documents and (0, 1, 3) in 2.
    Each Dirichlet-multinomial marginal by hand with scipy.special.gammaln:
    ln Gamma(V beta) - ln Gamma(N + V beta) + sum_w [ln Gamma(n_w + beta) - ln Gamma(beta)];
    one group against two pays the assignments 2 ln(1/2) + 2 ln(1/2) and gains (1/2) ln 4
    (the BIC penalty of the second group's weight, Schwarz 1978)."""
    beta, n_words = 0.5, 3

    def marginal(counts: list[float]) -> float:
        c = np.asarray(counts, dtype=np.float64)
        return float(
            gammaln(n_words * beta)
            - gammaln(c.sum() + n_words * beta)
            + np.sum(gammaln(c + beta) - gammaln(beta))
        )

    first, second = np.array([3.0, 1.0, 0.0]), np.array([0.0, 1.0, 3.0])
    expected = (
        marginal([3, 2, 3])
        - marginal([3, 1, 0])
        - marginal([0, 1, 3])
        - 4 * np.log(0.5)
        + 0.5 * np.log(4)
    )
    got = components_log_bayes_factor(first, second, (2, 2), n_words, beta)
    assert got == pytest.approx(expected, abs=1e-12)


def test_a_split_of_one_topic_is_joined_and_two_topics_stay_apart():
    """Invented documents: components 0 and 1 drawn from one word distribution are joined
    (one group explains them better), component 2 from other words stays apart."""
    state = _random_state(n_words=60, k=3)
    rng = np.random.default_rng(3)
    dense = np.zeros((90, 60))
    for d in range(60):
        dense[d, rng.choice(np.arange(0, 20), size=10)] += 1.0
    for d in range(60, 90):
        dense[d, rng.choice(np.arange(30, 50), size=10)] += 1.0
    labels = np.repeat([0, 1, 2], 30)
    joined = join_components(sp.csr_matrix(dense), labels, state)
    assert set(joined[:60]) == {0}
    assert set(joined[60:]) == {2}


def test_a_new_topic_is_not_joined_to_documents_the_mixture_explains():
    """Invented short documents: component a mixes a new topic's words with a group's
    common words, component b is drawn from that group alone. Among new groups one explains
    the pair better than two (the old rule joined them), but "only a is new" is the most
    probable hypothesis, so the pair stays apart and a passes the birth test alone. The
    hypotheses' scores are computed here independently: scipy's Dirichlet-multinomial pmf
    (minus its multinomial coefficient) for a new group, scipy's logsumexp over the
    mixture's parameters for the documents that stay with it."""
    state = _random_state(n_words=200, k=3)
    rng = np.random.default_rng(5)
    common = np.exp(state.parameters().log_word_prob[:200, 0])
    common /= common.sum()
    first = np.zeros((30, 200))
    for d in range(30):
        for _ in range(4):
            topical = rng.random() < 0.5
            first[d, rng.choice(np.arange(195, 200)) if topical else rng.choice(200, p=common)] += 1
    second = np.zeros((30, 200))
    for d in range(30):
        second[d, rng.choice(200, size=4, p=common)] += 1.0
    dense = np.vstack([first, second])
    span = 400
    ordinals = np.arange(state.documents_learned - span, state.documents_learned - span + 60)
    params = state.parameters()
    mixture = logsumexp(dense @ params.log_word_prob[:200] + params.log_weights, axis=1)
    beta = state.config.word_pseudocount

    def new_group(rows: np.ndarray) -> float:
        pooled = rows.sum(axis=0)
        total = int(pooled.sum())
        coefficient = gammaln(total + 1) - gammaln(pooled + 1).sum()
        marginal = dirichlet_multinomial.logpmf(pooled, np.full(200, beta), total) - coefficient
        n = rows.shape[0]
        weight = n / span
        return float(
            marginal + n * np.log(weight) + (span - n) * np.log1p(-weight) - 0.5 * np.log(span)
        )

    only_a = new_group(first) - mixture[:30].sum()  # against "neither is new"
    union = new_group(dense) - mixture.sum()
    assert only_a > 5.0 > union  # a alone passes the birth test, the union does not
    n_words = state.vocabulary.n_active
    old_rule = components_log_bayes_factor(first.sum(0), second.sum(0), (30, 30), n_words, beta)
    assert old_rule > 0.0  # among new groups, one explains the pair better than two
    labels = np.repeat([0, 1], 30)
    joined = join_components(sp.csr_matrix(dense), labels, state, ordinals, np.full(60, np.nan))
    np.testing.assert_array_equal(joined, labels)
    assert birth_log_bayes_factor(state, sp.csr_matrix(first), ordinals[:30]) == pytest.approx(
        only_a, rel=1e-9
    )
