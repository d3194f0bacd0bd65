"""The blocked, multi-threaded EM sweep (mixture.sweep) against references.

Sources:
- scikit-learn ``sklearn.naive_bayes.MultinomialNB``: with one-hot responsibilities the sweep's
  M-step is supervised multinomial naive Bayes (``feature_log_prob_``, ``class_log_prior_``)
  and its untempered E-step is ``predict_proba`` under those parameters.
- Our single-threaded building blocks (``e_step``, ``m_step``, ``derive_parameters``), which
  tests/test_reference_sklearn.py checks against the same classifier: the sweep must agree
  with them, tempered E-steps and retired words included, whatever the number of blocks.
"""

from __future__ import annotations

import itertools
from collections.abc import Iterator

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.special
from sklearn.naive_bayes import MultinomialNB

from mixture import sweep as sweep_module
from mixture.config import MixtureConfig
from mixture.em import e_step, fit_batch_em, log_prior, m_step
from mixture.stats import derive_parameters
from mixture.sweep import EMSweep, row_blocks, set_worker_threads


def _corpus(seed: int, n_docs: int = 3000, n_words: int = 2000) -> sp.csr_matrix:
    # About 30 non-zeros a row: nnz x K is large enough for the sweep to use two blocks.
    rng = np.random.default_rng(seed)
    counts = sp.random(
        n_docs,
        n_words,
        density=0.015,
        format="csr",
        random_state=seed,
        data_rvs=lambda size: rng.integers(1, 5, size=size).astype(np.float64),
    )
    counts = counts[np.diff(counts.indptr) > 0]
    return sp.csr_matrix(counts)


@pytest.fixture
def two_threads() -> Iterator[None]:
    previous = set_worker_threads(2)
    yield
    set_worker_threads(previous)


def test_row_blocks_reassemble_the_matrix_in_balanced_parts() -> None:
    counts = _corpus(0)
    for n_blocks in (1, 2, 3, 7):
        blocks = row_blocks(counts, n_blocks, row_cost=4)
        assert 1 <= len(blocks) <= n_blocks
        assert blocks[0].start == 0 and blocks[-1].stop == counts.shape[0]
        assert all(a.stop == b.start for a, b in itertools.pairwise(blocks))
        stacked = sp.vstack([block.matrix for block in blocks], format="csr")
        assert (stacked != counts).nnz == 0
    costs = [block.matrix.nnz + 4 * block.matrix.shape[0] for block in row_blocks(counts, 2, 4)]
    assert max(costs) / min(costs) < 1.1


@pytest.mark.usefixtures("two_threads")
@pytest.mark.parametrize(("seed", "alpha"), [(0, 1.0), (1, 0.1)])
def test_hard_m_step_and_e_step_equal_multinomial_nb(seed: int, alpha: float) -> None:
    # Source: scikit-learn MultinomialNB.feature_log_prob_, class_log_prior_, predict_proba.
    counts = _corpus(seed)
    k = 4
    rng = np.random.default_rng(seed)
    labels = rng.integers(0, k, size=counts.shape[0])
    resp = np.zeros((counts.shape[0], k))
    resp[np.arange(labels.size), labels] = 1.0
    sweep = EMSweep(counts, counts.T.tocsr(), k, None, alpha, 0.0)
    assert len(sweep.doc_blocks) == 2 and len(sweep.word_blocks) == 2
    sweep.m_step(resp)
    nb = MultinomialNB(alpha=alpha).fit(counts, labels)
    params = sweep.parameters()
    np.testing.assert_allclose(sweep.word_counts().T, nb.feature_count_, rtol=0, atol=1e-12)
    np.testing.assert_allclose(sweep.doc_counts, nb.class_count_, rtol=0, atol=1e-12)
    np.testing.assert_allclose(params.log_word_prob.T, nb.feature_log_prob_, rtol=0, atol=1e-10)
    np.testing.assert_allclose(params.log_weights, nb.class_log_prior_, rtol=0, atol=1e-10)
    posterior, _ = sweep.e_step()
    np.testing.assert_allclose(posterior, nb.predict_proba(counts), rtol=0, atol=1e-10)


@pytest.mark.usefixtures("two_threads")
@pytest.mark.parametrize("retired", [False, True])
@pytest.mark.parametrize("temperature", [1.0, 0.07])
def test_sweep_equals_the_single_threaded_building_blocks(
    retired: bool, temperature: float
) -> None:
    counts = _corpus(2)
    n_words, k = counts.shape[1], 5
    active = None
    if retired:
        # Retired words carry no counts (pruning removes them from the counts first).
        active = np.ones(n_words, dtype=bool)
        active[::9] = False
        counts = counts.copy()
        counts.data[~active[counts.indices]] = 0.0
        counts.eliminate_zeros()
        counts = sp.csr_matrix(counts[np.diff(counts.indptr) > 0])
    rng = np.random.default_rng(3)
    resp = rng.dirichlet(np.ones(k), size=counts.shape[0])
    sweep = EMSweep(counts, counts.T.tocsr(), k, active, 0.1, 1.0)
    sweep.m_step(resp)

    word_counts, doc_counts = m_step(counts, resp)
    params = derive_parameters(word_counts, doc_counts, active, 0.1, 1.0)
    np.testing.assert_allclose(sweep.word_counts(), word_counts, rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(sweep.doc_counts, doc_counts, rtol=1e-13)
    # The sweep works on the used words; the others are checked through the log prior.
    used = sweep.used_words if sweep.used_words is not None else np.arange(n_words)
    assert retired == (sweep.used_words is not None)
    ours = sweep.parameters()
    np.testing.assert_array_equal(ours.active, params.active[used])
    np.testing.assert_allclose(
        ours.log_word_prob, params.log_word_prob[used], rtol=1e-12, atol=1e-12
    )
    np.testing.assert_allclose(ours.log_weights, params.log_weights, rtol=0, atol=1e-13)
    config = MixtureConfig(n_groups=k, word_pseudocount=0.1, weight_pseudocount=1.0)
    assert sweep.log_prior == pytest.approx(log_prior(params, config), rel=1e-12)

    swept, swept_norm = sweep.e_step(temperature)
    joint = np.asarray(counts @ params.log_word_prob) + params.log_weights
    # Reference: scipy.special.softmax and logsumexp.
    expected = scipy.special.softmax(joint * temperature, axis=1)
    expected_norm = scipy.special.logsumexp(joint * temperature, axis=1)
    np.testing.assert_allclose(swept, expected, rtol=0, atol=1e-10)
    np.testing.assert_allclose(swept_norm, expected_norm, rtol=1e-12)
    if temperature == 1.0:
        _, log_lik = e_step(counts, params)
        assert swept_norm.sum() == pytest.approx(log_lik, rel=1e-12)


@pytest.mark.usefixtures("two_threads")
def test_previous_parameters_survive_one_m_step() -> None:
    # Re-seeding measures fit with the parameters of the E-step just done, after the M-step.
    counts = _corpus(4)
    k = 3
    rng = np.random.default_rng(5)
    sweep = EMSweep(counts, counts.T.tocsr(), k, None, 0.1, 1.0)
    sweep.m_step(rng.dirichlet(np.ones(k), size=counts.shape[0]))
    before = sweep.parameters()
    kept = before.log_word_prob.copy()
    sweep.m_step(rng.dirichlet(np.ones(k), size=counts.shape[0]))
    np.testing.assert_array_equal(before.log_word_prob, kept)
    assert not np.array_equal(sweep.parameters().log_word_prob, kept)


def test_fit_is_the_same_on_one_thread_and_on_two() -> None:
    counts = _corpus(6)
    config = MixtureConfig(n_groups=4, n_restarts=2, max_iter=15, annealing_steps=10)
    previous = set_worker_threads(1)
    try:
        one = fit_batch_em(counts, config, seed=3)
        set_worker_threads(2)
        two = fit_batch_em(counts, config, seed=3)
    finally:
        set_worker_threads(previous)
    np.testing.assert_allclose(one[0], two[0], rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(one[1], two[1], rtol=1e-9)
    np.testing.assert_allclose(one[2].objective_trace, two[2].objective_trace, rtol=1e-12)
    assert one[2].n_iter == two[2].n_iter


@pytest.mark.usefixtures("two_threads")
def test_unused_vocabulary_slots_change_nothing_but_the_normaliser() -> None:
    # Spare capacity: the same corpus over a wider vocabulary whose extra ids are partly
    # active (smoothing mass, as for words not in this corpus) and partly retired.
    counts = _corpus(7)
    n_docs, n_words = counts.shape
    wide = sp.csr_matrix(
        (counts.data, counts.indices, counts.indptr), shape=(n_docs, n_words + 500)
    )
    active = np.ones(n_words + 500, dtype=bool)
    active[n_words + 300 :] = False
    k = 3
    resp = np.random.default_rng(8).dirichlet(np.ones(k), size=n_docs)
    sweep = EMSweep(wide, wide.T.tocsr(), k, active, 0.1, 1.0)
    sweep.m_step(resp)
    word_counts, doc_counts = m_step(wide, resp)
    params = derive_parameters(word_counts, doc_counts, active, 0.1, 1.0)
    assert sweep.counts.shape[1] <= n_words
    np.testing.assert_allclose(sweep.word_counts(), word_counts, rtol=1e-13, atol=1e-13)
    config = MixtureConfig(n_groups=k, word_pseudocount=0.1, weight_pseudocount=1.0)
    assert sweep.log_prior == pytest.approx(log_prior(params, config), rel=1e-12)
    _, swept_norm = sweep.e_step()
    assert swept_norm.sum() == pytest.approx(e_step(wide, params)[1], rel=1e-12)


def test_thread_count_is_checked_and_restored() -> None:
    with pytest.raises(ValueError, match="thread count"):
        set_worker_threads(0)
    previous = set_worker_threads(3)
    assert sweep_module.worker_threads() == 3
    assert set_worker_threads(previous) == 3


@pytest.mark.usefixtures("two_threads")
def test_blocked_routing_equals_multinomial_nb_and_one_thread() -> None:
    # Source: scikit-learn MultinomialNB.predict_proba under the same parameters.
    from mixture.routing import route_counts

    counts = _corpus(9)
    k = 4
    labels = np.random.default_rng(9).integers(0, k, size=counts.shape[0])
    nb = MultinomialNB(alpha=0.1).fit(counts, labels)
    params = derive_parameters(nb.feature_count_.T, nb.class_count_, None, 0.1, 0.0)
    assert (counts.nnz * k) // sweep_module._MIN_BLOCK_WORK >= 2  # the blocked path runs
    two = route_counts(params, counts)
    np.testing.assert_allclose(two.posterior, nb.predict_proba(counts), rtol=0, atol=1e-10)
    previous = set_worker_threads(1)
    try:
        one = route_counts(params, counts)
    finally:
        set_worker_threads(previous)
    np.testing.assert_array_equal(two.posterior, one.posterior)
    np.testing.assert_array_equal(two.group, one.group)


@pytest.mark.usefixtures("two_threads")
def test_blocks_started_from_the_pool_run_inline() -> None:
    # A block that waited on the pool from inside it could wait for itself (a deadlock).
    from mixture.threads import run_blocks

    nested = run_blocks(lambda i: run_blocks(lambda j: (i, j), 3), 2)
    assert nested == [[(0, 0), (0, 1), (0, 2)], [(1, 0), (1, 1), (1, 2)]]
