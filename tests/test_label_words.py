"""The compact record of a label's words (state.label_words): what it keeps, its stated error
bound against the JS divergence over every word, and the closed form behind the default
``label_stale_threshold``. Pure numpy/scipy, no Redis."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.spatial.distance import jensenshannon

from mixture.config import MixtureConfig
from mixture.online import OnlineLearner
from service.demo_data import default_days, generate_day
from state.label_words import (
    SKETCH_COVERAGE,
    WordSketch,
    sketch_divergence,
    sketch_error_bound,
    sketch_group,
    sketch_partition,
)
from state.options import ModelOptions


def scipy_js(p: np.ndarray, q: np.ndarray) -> float:
    """JS divergence in bits straight from scipy (its distance squared), the outside reference."""
    return float(jensenshannon(p, q, base=2.0) ** 2)


def coarse(p: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """``p`` on the partition {each kept word} + {every other word}."""
    rest = np.ones(p.size, dtype=bool)
    rest[keep] = False
    return np.append(p[keep], p[rest].sum())


def test_the_compact_js_never_exceeds_the_full_js_and_misses_it_by_at_most_the_bound() -> None:
    """Coarsening can only lower an f-divergence (data-processing inequality; Cover and
    Thomas, Elements of Information Theory, 2nd ed., 2.8); the loss is at most the bound of
    state.label_words. Checked on random pairs of distributions, near and far, with the
    reference's top words covering 99 % as the sketch keeps them."""
    rng = np.random.default_rng(7)
    worst_gap_ratio = 0.0
    for trial in range(300):
        n = int(rng.integers(50, 2000))
        p = rng.dirichlet(np.full(n, rng.choice([0.05, 0.3, 1.0])))
        mix = rng.uniform(0.0, 1.0)
        q = (1 - mix) * p + mix * rng.dirichlet(np.full(n, 0.2))
        order = np.argsort(-p, kind="stable")
        keep = order[: int(np.searchsorted(np.cumsum(p[order]), SKETCH_COVERAGE)) + 1]
        pc, qc = coarse(p, keep), coarse(q, keep)
        full, compact = scipy_js(p, q), scipy_js(pc, qc)
        bound = sketch_error_bound(float(pc[-1]), float(qc[-1]))
        assert compact <= full + 1e-12, trial
        assert full - compact <= bound + 1e-12, (trial, full, compact, bound)
        if bound > 0:
            worst_gap_ratio = max(worst_gap_ratio, (full - compact) / bound)
    assert worst_gap_ratio > 0.05  # the bound is exercised, not vacuous for these pairs


def test_the_bound_is_a_hundredth_of_a_bit_for_a_group_that_kept_its_shape() -> None:
    # a = b = 0.01: (0.01 * 1 + 0.01 * 1) / 2, as the module docstring says
    assert sketch_error_bound(0.01, 0.01) == pytest.approx(0.01)
    assert sketch_error_bound(0.0, 0.0) == 0.0
    assert sketch_error_bound(0.01, 1.0) < 0.041


def test_half_a_group_of_disjoint_words_is_the_default_thresholds_principle() -> None:
    """JS(P, (1 - f) P + f J) with J disjoint from P has the closed form h(f) of
    state.options; h(1/2) = 1.5 - 0.75 log2 3. Checked against scipy, and the compact form
    of such a half take-over stays above the default threshold, 0.4 of it below."""
    rng = np.random.default_rng(3)
    p = np.append(rng.dirichlet(np.full(300, 0.3)), np.zeros(300))
    j = np.append(np.zeros(300), rng.dirichlet(np.full(300, 0.3)))

    def h(f: float) -> float:
        return f / 2 - math.log2(1 - f / 2) / 2 + (1 - f) / 2 * math.log2((1 - f) / (1 - f / 2))

    threshold = ModelOptions().label_stale_threshold
    for f in (0.2, 0.4, 0.5, 0.7):
        q = (1 - f) * p + f * j
        assert scipy_js(p, q) == pytest.approx(h(f), abs=1e-12)
    assert h(0.5) == pytest.approx(1.5 - 0.75 * math.log2(3), abs=1e-12)
    order = np.argsort(-p, kind="stable")
    keep = order[: int(np.searchsorted(np.cumsum(p[order]), SKETCH_COVERAGE)) + 1]
    half = coarse(0.5 * p + 0.5 * j, keep)
    assert scipy_js(coarse(p, keep), half) > threshold
    assert h(0.4) < threshold < h(0.5)


@pytest.fixture(scope="module")
def learned_state():  # type: ignore[no-untyped-def]
    """A state learned from the first two invented demo days."""
    plans = default_days(0.3)
    config = MixtureConfig(n_groups=4, warmup_documents=plans[0].messages, batch_size=60)
    learner = OnlineLearner(config, seed=0)
    for plan in plans[:2]:
        texts = [m.text for m in generate_day(plan, seed=2)]
        for i in range(0, len(texts), 60):
            learner.learn(texts[i : i + 60])
    return learner.state


def test_a_sketch_keeps_the_top_words_covering_99_percent_by_word(learned_state) -> None:  # type: ignore[no-untyped-def]
    state = learned_state
    ids = [int(g) for g in state.group_ids]
    sketch = sketch_group(state, ids[1], version=7, recorded=123.0)
    assert sketch is not None and sketch.version == 7 and sketch.recorded == 123.0
    prob = np.exp(state.parameters().log_word_prob[:, 1])
    active = state.vocabulary.active_ids()
    expected = prob[active] / prob[active].sum()
    top = np.sort(expected)[::-1]
    n = int(np.searchsorted(np.cumsum(top), SKETCH_COVERAGE)) + 1
    assert len(sketch.words) == n
    np.testing.assert_allclose(sketch.prob, top[:n], rtol=1e-5)
    assert sum(sketch.prob) >= SKETCH_COVERAGE - 1e-5
    assert sketch.rest == pytest.approx(1 - sum(sketch.prob), abs=1e-6)
    # words, not ids: each is a word of the vocabulary with that probability
    for word, p in zip(sketch.words[:20], sketch.prob[:20], strict=True):
        assert expected[list(active).index(state.vocabulary.lookup(word))] == pytest.approx(
            p, rel=1e-5
        )
    assert WordSketch.from_dict(sketch.to_dict()) == sketch
    assert sketch_group(state, 999, 1, 0.0) is None


def test_the_divergence_of_an_unchanged_group_is_zero_and_of_another_group_large(
    learned_state,  # type: ignore[no-untyped-def]
) -> None:
    state = learned_state
    ids = [int(g) for g in state.group_ids]
    sketch = sketch_group(state, ids[0], 1, 0.0)
    assert sketch is not None
    assert sketch_divergence(sketch, state, ids[0]) == pytest.approx(0.0, abs=1e-6)
    # the same words against another group's distribution: computed on the sketch's partition
    then, now = sketch_partition(sketch, state, ids[2])
    assert then is not None and now is not None
    assert sketch_divergence(sketch, state, ids[2]) == pytest.approx(scipy_js(then, now))
    assert sketch_divergence(sketch, state, ids[2]) > 0.05
    assert sketch_divergence(sketch, state, 999) is None


def test_a_word_gone_from_the_vocabulary_counts_as_probability_zero(learned_state) -> None:  # type: ignore[no-untyped-def]
    """A sketch names words; a word the vocabulary no longer has (pruned, or never seen by
    this state) has probability 0 now and its mass moves to the rest bucket."""
    state = learned_state
    ids = [int(g) for g in state.group_ids]
    sketch = sketch_group(state, ids[0], 1, 0.0)
    assert sketch is not None
    altered = WordSketch(("zzzneverseen", *sketch.words[1:]), sketch.prob, sketch.rest, 1, 0.0)
    then, now = sketch_partition(altered, state, ids[0])
    assert then is not None and now is not None
    assert now[0] == 0.0
    assert now[-1] == pytest.approx(sketch.rest + sketch.prob[0], rel=1e-3)
    assert sketch_divergence(altered, state, ids[0]) > 0.0


class SketchStore:
    """What LabelWatch reads from a ModelStore: the label counter and the sketches."""

    def __init__(self, sketches: dict[int, WordSketch]) -> None:
        self.sketches = dict(sketches)
        self.version = 1
        self.reads = 0

    def labels_version(self) -> int:
        return self.version

    def label_sketches(self) -> dict[int, WordSketch]:
        self.reads += 1
        return dict(self.sketches)


def test_the_worker_alerts_once_per_recorded_distribution_even_across_a_restart(
    learned_state,  # type: ignore[no-untyped-def]
) -> None:
    """A sketch of another group's words stands in for a label whose group moved: the first
    checkpoint alerts, the next ones do not (the mark rides in the state's metadata, so it
    survives serialisation, i.e. a worker restart); a new sketch (the label set again) may
    alert again; a cleared label leaves no mark."""
    from mixture.serialize import state_from_bytes, state_to_bytes
    from state.label_words import ALERT_KIND, ALERTED_KEY, LabelWatch

    state = learned_state.copy()
    ids = [int(g) for g in state.group_ids]
    far = sketch_group(state, ids[2], 1, 10.0)  # group 2's words, recorded as group 0's label
    near = sketch_group(state, ids[1], 1, 11.0)  # group 1's own words: not stale
    assert far is not None and near is not None
    store = SketchStore({ids[0]: far, ids[1]: near})
    threshold = ModelOptions().label_stale_threshold
    assert sketch_divergence(far, state, ids[0]) > threshold  # the premise

    watch = LabelWatch(store)
    first = watch.alerts(state, 5, threshold)
    assert [a["kind"] for a in first] == [ALERT_KIND]
    assert first[0]["reason"].startswith(f"group {ids[0]}:") and first[0]["version"] == 5
    assert first[0]["value"] > first[0]["threshold"] == threshold
    assert watch.alerts(state, 6, threshold) == []
    assert store.reads == 1  # re-read only when the label counter moves

    restarted = state_from_bytes(state_to_bytes(state))
    assert LabelWatch(store).alerts(restarted, 7, threshold) == []

    store.sketches[ids[0]] = WordSketch(far.words, far.prob, far.rest, 2, 20.0)  # set again
    store.version += 1
    again = watch.alerts(state, 8, threshold)
    assert len(again) == 1 and again[0]["version"] == 8

    del store.sketches[ids[0]]  # cleared
    store.version += 1
    assert watch.alerts(state, 9, threshold) == []
    assert str(ids[0]) not in state.metadata[ALERTED_KEY]
