"""Our M-step, parameters and posterior against scikit-learn's multinomial naive Bayes.

Source: scikit-learn, ``sklearn.naive_bayes.MultinomialNB`` (its fitted ``feature_log_prob_``,
``class_log_prior_`` and ``predict_proba``). With hard (one-hot) responsibilities our M-step is
supervised multinomial naive Bayes: expected counts become class counts, our additive word
smoothing is MNB's ``alpha``, and with ``weight_pseudocount = 0`` our weights are MNB's
empirical class prior (``fit_prior=True``, no ``class_prior``).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from sklearn.naive_bayes import MultinomialNB

from mixture.em import e_step, m_step
from mixture.routing import route_counts
from mixture.stats import derive_parameters


def _random_corpus(
    seed: int, n_docs: int = 300, n_words: int = 500, n_groups: int = 4
) -> tuple[sp.csr_matrix, np.ndarray]:
    rng = np.random.default_rng(seed)
    density = 0.03
    counts = sp.random(
        n_docs,
        n_words,
        density=density,
        format="csr",
        random_state=seed,
        data_rvs=lambda size: rng.integers(1, 6, size=size).astype(np.float64),
    )
    labels = rng.integers(0, n_groups, size=n_docs)
    labels[:n_groups] = np.arange(n_groups)  # every class present
    return counts, labels


def _one_hot(labels: np.ndarray, n_groups: int) -> np.ndarray:
    resp = np.zeros((labels.size, n_groups))
    resp[np.arange(labels.size), labels] = 1.0
    return resp


@pytest.mark.parametrize(("seed", "alpha"), [(0, 1.0), (1, 0.1), (2, 0.5)])
def test_hard_m_step_equals_multinomial_nb(seed: int, alpha: float) -> None:
    # Source: scikit-learn MultinomialNB.feature_log_prob_ / class_log_prior_.
    counts, labels = _random_corpus(seed)
    k = 4
    word_counts, doc_counts = m_step(counts, _one_hot(labels, k))
    params = derive_parameters(
        word_counts, doc_counts, None, word_pseudocount=alpha, weight_pseudocount=0.0
    )
    nb = MultinomialNB(alpha=alpha).fit(counts, labels)

    assert word_counts.shape == (counts.shape[1], k)
    np.testing.assert_allclose(word_counts.T, nb.feature_count_, rtol=0, atol=1e-12)
    np.testing.assert_allclose(doc_counts, nb.class_count_, rtol=0, atol=1e-12)
    np.testing.assert_allclose(params.log_word_prob.T, nb.feature_log_prob_, rtol=0, atol=1e-10)
    np.testing.assert_allclose(params.log_weights, nb.class_log_prior_, rtol=0, atol=1e-10)


@pytest.mark.parametrize(("seed", "alpha"), [(3, 1.0), (4, 0.1)])
def test_posterior_equals_predict_proba(seed: int, alpha: float) -> None:
    # Source: scikit-learn MultinomialNB.predict_proba (posterior under the same parameters).
    counts, labels = _random_corpus(seed)
    k = 4
    word_counts, doc_counts = m_step(counts, _one_hot(labels, k))
    params = derive_parameters(word_counts, doc_counts, None, alpha, 0.0)
    nb = MultinomialNB(alpha=alpha).fit(counts, labels)

    rng = np.random.default_rng(seed + 100)
    fresh = sp.random(
        200,
        counts.shape[1],
        density=0.05,
        format="csr",
        random_state=seed + 100,
        data_rvs=lambda size: rng.integers(1, 9, size=size).astype(np.float64),
    )
    expected = nb.predict_proba(fresh)
    routing = route_counts(params, fresh)
    np.testing.assert_allclose(routing.posterior, expected, rtol=0, atol=1e-10)
    # The E-step's responsibilities are the same posterior.
    resp, _ = e_step(fresh, params)
    np.testing.assert_allclose(resp, expected, rtol=0, atol=1e-10)
    # MAP group is MNB's prediction wherever the decision is not a near tie.
    clear = routing.margin > 1e-9
    assert clear.sum() > 150
    np.testing.assert_array_equal(routing.group[clear], nb.predict(fresh)[clear])
