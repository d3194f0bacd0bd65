"""Forgetting by a group's own traffic (``lifecycle.forget_by_own_traffic``).

The outside reference is the stepwise EM update of Liang and Klein (2009), "Online EM for
unsupervised models": s <- (1 - eta_k) s + eta_k s_batch with eta_k = (k + 2) ** -alpha, which
the option changes, per group, to s_k <- (1 - eta_k) ** u_k s_k + eta_k s_batch,k (u_k the
group's share of the unit over its weight, at most 1). Streams are invented
(tests/lifecycle_streams.py).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from scipy.spatial.distance import jensenshannon

from mixture.config import MixtureConfig
from mixture.lifecycle import apply_held_scale, unit_observer
from mixture.lifecycle_config import LifecycleConfig
from mixture.novelty import UnitEStep
from mixture.online import OnlineLearner, stepwise_update
from mixture.routing import route_texts
from mixture.serialize import state_from_bytes, state_to_bytes
from mixture.stats import MixtureState
from mixture.vocabulary import Vocabulary
from tests.lifecycle_streams import TopicStream

OLD_WARM_UP = {"warmup_documents": 1000, "warmup_tokens": 0}
FORGET = LifecycleConfig(enabled=True, forget_by_own_traffic=True)


def _state(forget: bool, n_words: int = 40, k: int = 3) -> MixtureState:
    """A warmed-up state whose groups own disjoint blocks of words."""
    vocab = Vocabulary()
    for i in range(n_words):
        vocab.add(f"w{i}")
    lifecycle = LifecycleConfig(enabled=True, forget_by_own_traffic=forget)
    config = MixtureConfig(n_groups=k, batch_size=32, warmup_documents=k, lifecycle=lifecycle)
    counts = np.full((n_words, k), 0.5)
    block = n_words // k
    for g in range(k):
        counts[g * block : (g + 1) * block, g] += 60.0
    docs = np.full(k, 100.0)
    return MixtureState.from_counts(config, vocab, counts, docs, int(docs.sum()))


def _units(n_units: int, groups: list[int], n_words: int = 40, k: int = 3) -> list[sp.csr_matrix]:
    """Units of 32 documents of 6 tokens, each from the word block of one of ``groups``."""
    rng = np.random.default_rng(7)
    block = n_words // k
    units = []
    for _ in range(n_units):
        dense = np.zeros((32, n_words))
        for d in range(32):
            g = groups[rng.integers(len(groups))]
            np.add.at(dense[d], rng.integers(g * block, (g + 1) * block, size=6), 1.0)
        units.append(sp.csr_matrix(dense))
    return units


def _running_average(state: MixtureState) -> np.ndarray:
    """The word statistics as stepwise EM's running average (unscaled times the scale)."""
    return state.unscaled_word[: state.capacity] * state.running_scale


def test_a_group_without_traffic_keeps_its_word_statistics():
    """Units from groups 0 and 1 only: with the option the statistics of group 2 stay as they
    were (its u is about 0), without it they shrink by prod (1 - eta_k), the published
    update's factor for a group that receives nothing."""
    kept, faded = _state(True), _state(False)
    before = _running_average(kept)[:, 2].copy()
    shrink = 1.0
    for unit in _units(40, [0, 1]):
        shrink *= 1.0 - faded.config.step_size(faded.step)
        for state in (kept, faded):
            stepwise_update(state, unit, observe=unit_observer(state, unit))
            state.documents_learned += unit.shape[0]
    apply_held_scale(kept)
    # The group's own block: what it got from other groups' documents is negligible here.
    own = slice(26, 39)
    np.testing.assert_allclose(_running_average(kept)[own, 2], before[own], rtol=1e-3)
    np.testing.assert_allclose(_running_average(faded)[own, 2], before[own] * shrink, rtol=1e-3)
    assert shrink < 0.5  # the difference is not small: the test can tell them apart


def test_the_lazy_window_factor_gives_the_per_group_recursion_exactly():
    """The state keeps the owed factor per group and applies it once per window; after it,
    the statistics equal the per-group recursion computed unit by unit from the same E-steps."""
    state = _state(True)
    exact = _running_average(state).copy()
    units = _units(12, [0, 1]) + _units(12, [0, 1, 2])
    for unit in units:
        seen: list[UnitEStep] = []
        inner = unit_observer(state, unit)

        def observe(step: UnitEStep, inner=inner, seen=seen) -> np.ndarray | None:
            seen.append(step)
            return inner(step)

        stepwise_update(state, unit, observe=observe)
        state.documents_learned += unit.shape[0]
        step = seen[0]
        m = step.resp.shape[0]
        traffic = np.minimum(step.resp.sum(axis=0) / (m * np.exp(step.log_weights)), 1.0)
        batch = np.zeros_like(exact)
        batch[step.words] = np.asarray(step.counts.T @ step.resp) / m
        exact = (1.0 - step.step) ** traffic * exact + step.step * batch
    apply_held_scale(state)
    np.testing.assert_allclose(_running_average(state), exact, rtol=1e-9, atol=1e-15)


def test_with_the_option_the_lifecycle_is_still_a_function_of_the_stream():
    """Saved and loaded between units, the stream gives the same bytes and events as one run
    (the owed factors are part of the checkpoint)."""
    stream = TopicStream(5, seed=6)
    labels = np.concatenate([stream.labels(2500, [0, 1, 2]), stream.labels(2500, [0, 1, 3])])
    texts = stream.messages(labels)
    config = MixtureConfig(n_groups=3, n_restarts=1, warmup_documents=1000, lifecycle=FORGET)
    whole = OnlineLearner(config, seed=0)
    events = [e for s in range(0, len(texts), 256) for e in whole.learn(texts[s : s + 256]).events]
    pieces = OnlineLearner(config, seed=0)
    events_again = []
    for start, end in ((0, 1536), (1536, 2816), (2816, 3328), (3328, len(texts))):
        pieces = OnlineLearner.from_state(state_from_bytes(state_to_bytes(pieces.state)))
        for s in range(start, end, 256):
            events_again += pieces.learn(texts[s : min(s + 256, end)]).events
    assert [e.to_dict() for e in events_again] == [e.to_dict() for e in events]
    assert np.any(pieces.state.evidence.held_log_scale != 0.0)  # a window was open at the end
    assert state_to_bytes(pieces.state) == state_to_bytes(whole.state)


def test_on_a_stationary_stream_the_option_changes_little():
    """Fixed topics with unequal shares: no event either way, the same routing for almost every
    message, and word distributions within 0.01 bit (squared JS distance, scipy) of the run
    without it (every group gets its share, so u stays near 1)."""
    stream = TopicStream(5, seed=10)  # the stream of test_a_stationary_stream_gets_no_events
    rng = np.random.default_rng(0)
    labels = rng.choice(5, size=12000, p=[0.4, 0.25, 0.2, 0.1, 0.05])
    texts = stream.messages(labels)
    runs = {}
    for forget in (False, True):
        lifecycle = LifecycleConfig(enabled=True, forget_by_own_traffic=forget)
        learner = OnlineLearner(MixtureConfig(**OLD_WARM_UP, n_groups=5, lifecycle=lifecycle))
        events = [e for s in range(0, 12000, 256) for e in learner.learn(texts[s : s + 256]).events]
        assert events == []
        runs[forget] = learner.state
    off, on = runs[False], runs[True]
    agree = route_texts(off, texts[-2000:]).group == route_texts(on, texts[-2000:]).group
    assert agree.mean() >= 0.99
    p, q = np.exp(off.parameters().log_word_prob), np.exp(on.parameters().log_word_prob)
    for g in range(5):
        assert jensenshannon(p[:, g], q[:, g], base=2) ** 2 < 0.01
