"""Our document log-likelihood against scipy's multinomial distribution.

Source: SciPy, ``scipy.stats.multinomial.logpmf``. The model drops the multinomial
coefficient log(n! / prod_w c_w!) because it does not depend on the parameters, so our
log-likelihood must equal logpmf minus that coefficient, per group and for the mixture.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from scipy.special import gammaln, logsumexp
from scipy.stats import multinomial

from mixture.em import e_step
from mixture.routing import route_counts
from mixture.stats import derive_parameters


def _model(seed: int, n_words: int = 40, n_groups: int = 3):
    rng = np.random.default_rng(seed)
    word_counts = rng.gamma(0.5, 20.0, size=(n_words, n_groups))
    doc_counts = rng.uniform(5.0, 50.0, size=n_groups)
    return derive_parameters(word_counts, doc_counts, None, 0.1, 1.0)


def _documents(seed: int, n_docs: int, n_words: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    dense = rng.poisson(0.6, size=(n_docs, n_words)).astype(np.float64)
    dense[dense.sum(axis=1) == 0, 0] = 1.0
    return dense


def _log_coefficient(row: np.ndarray) -> float:
    return float(gammaln(row.sum() + 1) - gammaln(row + 1).sum())


def test_group_log_likelihood_is_logpmf_minus_coefficient() -> None:
    # Source: scipy.stats.multinomial.logpmf.
    params = _model(0)
    dense = _documents(1, 25, params.log_word_prob.shape[0])
    ours = np.asarray(sp.csr_matrix(dense) @ params.log_word_prob)  # (n, K)
    for d, row in enumerate(dense):
        n = int(row.sum())
        for k in range(params.n_groups):
            p = np.exp(params.log_word_prob[:, k])
            expected = multinomial.logpmf(row, n, p / p.sum()) - _log_coefficient(row)
            assert abs(ours[d, k] - expected) < 1e-9 * max(1.0, abs(expected))


def test_mixture_and_map_log_likelihood_match_scipy() -> None:
    # Source: scipy.stats.multinomial.logpmf; mixture marginal log sum_k pi_k Mult(c; theta_k).
    params = _model(2)
    dense = _documents(3, 30, params.log_word_prob.shape[0])
    probs = np.exp(params.log_word_prob)
    logpmf = np.array(
        [
            [multinomial.logpmf(row, int(row.sum()), probs[:, k]) for k in range(params.n_groups)]
            for row in dense
        ]
    )
    coefficient = np.array([_log_coefficient(row) for row in dense])
    marginal = logsumexp(logpmf + params.log_weights, axis=1) - coefficient

    _, log_likelihood = e_step(sp.csr_matrix(dense), params)
    assert abs(log_likelihood - marginal.sum()) < 1e-9 * abs(marginal.sum())

    routing = route_counts(params, sp.csr_matrix(dense))
    map_group = routing.group
    expected_per_token = (logpmf[np.arange(len(dense)), map_group] - coefficient) / dense.sum(1)
    np.testing.assert_allclose(
        routing.log_likelihood_per_token, expected_per_token, rtol=1e-10, atol=0
    )
    np.testing.assert_array_equal(routing.known_tokens, dense.sum(axis=1).astype(np.int64))
