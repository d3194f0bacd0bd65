"""EM against theory and against a known generating mixture.

Sources:
- Dempster, Laird and Rubin (1977), "Maximum likelihood from incomplete data via the EM
  algorithm", J. R. Statist. Soc. B 39: each EM iteration never lowers the objective; for
  MAP-EM (a prior on the parameters) the same holds for log-likelihood + log prior.
- Synthetic recovery: documents sampled from a mixture we choose, so the truth is known; the
  tolerances (total variation 0.05; held-out log-likelihood within 1%) are the issue's targets.
- Underflow: Bayes' rule in log space (a 100k-token document must give a finite posterior).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from mixture.config import MixtureConfig
from mixture.counting import count_texts
from mixture.drift import total_variation
from mixture.em import e_step, fit_batch_em, fit_texts, m_step, map_objective
from mixture.online import OnlineLearner
from mixture.routing import route_counts
from mixture.stats import MixtureState, derive_parameters
from mixture.tokenizer import Tokenizer

# Relative slack for float noise in the monotonicity checks (common practice, no source).
FLOAT_SLACK = 1e-9

TRUE_WEIGHTS = np.array([0.4, 0.3, 0.2, 0.1])
N_WORDS = 150
CONSONANTS = "bcdfghjklmnpqrstvwxz"


def _word(i: int) -> str:
    # Consonant-only pseudo-words: never a stop word, never folded as a number or URL.
    return "zq" + CONSONANTS[i // 20 % 20] + CONSONANTS[i % 20]


def _truth(seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    # Flat Dirichlet: groups share much of their vocabulary, so the fit is not trivial.
    theta = rng.dirichlet(np.ones(N_WORDS), size=TRUE_WEIGHTS.size).T  # (V, K)
    return TRUE_WEIGHTS, theta


def _sample(
    n_docs: int, seed: int, weights: np.ndarray, theta: np.ndarray
) -> tuple[sp.csr_matrix, np.ndarray]:
    rng = np.random.default_rng(seed)
    groups = rng.choice(weights.size, size=n_docs, p=weights)
    lengths = rng.integers(40, 120, size=n_docs)
    dense = np.vstack(
        [rng.multinomial(n, theta[:, g]) for g, n in zip(groups, lengths, strict=True)]
    )
    return sp.csr_matrix(dense.astype(np.float64)), groups


def _texts(counts: sp.csr_matrix, seed: int) -> list[str]:
    rng = np.random.default_rng(seed)
    texts = []
    for row in counts:
        tokens = np.repeat(row.indices, row.data.astype(np.int64))
        rng.shuffle(tokens)
        texts.append(" ".join(_word(int(i)) for i in tokens))
    return texts


# ---- Dempster, Laird and Rubin (1977) --------------------------------------------------------
def _overlapping_corpus(seed: int) -> sp.csr_matrix:
    """Groups that share most words, so EM needs many iterations (a real test of ascent)."""
    rng = np.random.default_rng(seed)
    base = rng.dirichlet(np.ones(80))
    theta = np.column_stack([0.7 * base + 0.3 * rng.dirichlet(np.ones(80)) for _ in range(3)])
    counts, _ = _sample(300, seed + 1, np.array([0.5, 0.3, 0.2]), theta)
    return counts


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4])
@pytest.mark.parametrize("annealing_steps", [0, None])
def test_fit_objective_trace_never_decreases(seed: int, annealing_steps: int | None) -> None:
    # Source: Dempster, Laird and Rubin (1977), monotonicity of EM. The trace starts after
    # deterministic annealing (tempered E-steps are not EM steps of the MAP objective), so
    # plain EM from the seeds (annealing_steps=0) gives the long traces; the default shows
    # the same holds for the EM iterations that follow annealing.
    counts = _overlapping_corpus(seed)
    config = MixtureConfig(n_groups=3, n_restarts=2, max_iter=60, tolerance=0.0)
    if annealing_steps is not None:
        config = config.replace(annealing_steps=annealing_steps)
    word_counts, doc_counts, report = fit_batch_em(counts, config, seed=seed)
    trace = np.asarray(report.objective_trace)
    minimum = 10 if annealing_steps == 0 else 2
    assert trace.size >= minimum, "too few iterations to say anything about ascent"
    assert np.all(np.isfinite(trace))
    restarts_after = set(report.reseed_iterations)  # a re-seed may legitimately lower it
    for i in range(1, trace.size):
        if i in restarts_after:
            continue
        assert trace[i] >= trace[i - 1] - FLOAT_SLACK * abs(trace[i - 1]), (
            f"objective fell at iteration {i}: {trace[i - 1]!r} -> {trace[i]!r}"
        )
    # The returned statistics are at least as good as the last recorded objective.
    final = map_objective(counts, word_counts, doc_counts, config)
    assert final >= trace[-1] - FLOAT_SLACK * abs(trace[-1])
    assert report.restart_objectives[report.best_restart] == max(report.restart_objectives)


@pytest.mark.parametrize("seed", [5, 6, 7])
def test_e_and_m_steps_ascend_from_a_random_start(seed: int) -> None:
    # Source: Dempster, Laird and Rubin (1977): E-step then M-step never lowers the MAP
    # objective, from any starting point (here random soft responsibilities, no seeding).
    counts = _overlapping_corpus(seed)
    config = MixtureConfig(n_groups=3, word_pseudocount=0.1, weight_pseudocount=1.0)
    rng = np.random.default_rng(seed)
    resp = rng.dirichlet(np.ones(3), size=counts.shape[0])
    word_counts, doc_counts = m_step(counts, resp)
    previous = map_objective(counts, word_counts, doc_counts, config)
    for _ in range(40):
        params = derive_parameters(word_counts, doc_counts, None, 0.1, 1.0)
        resp, _ = e_step(counts, params)
        word_counts, doc_counts = m_step(counts, resp)
        current = map_objective(counts, word_counts, doc_counts, config)
        assert current >= previous - FLOAT_SLACK * abs(previous)
        previous = current


# ---- synthetic recovery ----------------------------------------------------------------------
@pytest.fixture(scope="module")
def synthetic() -> dict:
    weights, theta = _truth(0)
    train_counts, _ = _sample(3000, 1, weights, theta)
    heldout_counts, _ = _sample(1000, 2, weights, theta)
    train = _texts(train_counts, 3)
    heldout = _texts(heldout_counts, 4)
    # Precondition: our tokenizer keeps the pseudo-words exactly as written.
    assert Tokenizer().tokenize(train[0]) == train[0].split()
    return {"weights": weights, "theta": theta, "train": train, "heldout": heldout}


def _heldout_log_likelihood_per_token(state: MixtureState, texts: list[str]) -> float:
    batch = count_texts(texts, state.tokenizer, state.vocabulary, grow=False)
    assert batch.unknown_tokens.sum() == 0, "held-out words unknown to the model"
    _, log_likelihood = e_step(batch.counts, state.parameters())
    return log_likelihood / float(batch.known_tokens.sum())


def _truth_state(state: MixtureState, weights: np.ndarray, theta: np.ndarray) -> MixtureState:
    """The generating mixture as a state over ``state``'s vocabulary (for align_groups)."""
    ids = np.array([state.vocabulary.lookup(_word(i)) for i in range(N_WORDS)])
    seen = ids >= 0
    word_counts = np.zeros((state.capacity, weights.size))
    word_counts[ids[seen]] = theta[seen] * weights * 1e6
    return MixtureState.from_counts(
        state.config, state.vocabulary, word_counts, weights * 1e4, documents_learned=10_000
    )


def _word_distributions(state: MixtureState) -> np.ndarray:
    """p(w | k) over the pseudo-word ids 0..N_WORDS-1 (unseen words: 0)."""
    prob = np.exp(state.parameters().log_word_prob)
    out = np.zeros((N_WORDS, state.n_groups))
    for i in range(N_WORDS):
        j = state.vocabulary.lookup(_word(i))
        if j >= 0:
            out[i] = prob[j]
    return out


def test_batch_em_recovers_the_generating_mixture(synthetic: dict) -> None:
    # Source: synthetic data from a known mixture; alignment by our align_groups.
    from mixture.describe import align_groups

    config = MixtureConfig(n_groups=4, n_restarts=4)
    state, _ = fit_texts(synthetic["train"], config, seed=0)
    truth = _truth_state(state, synthetic["weights"], synthetic["theta"])
    perm = align_groups(truth, state)  # fitted group j -> true group perm[j]
    assert sorted(perm.tolist()) == [0, 1, 2, 3]

    fitted_weights = np.empty(4)
    fitted_weights[perm] = state.weights()
    assert total_variation(fitted_weights, synthetic["weights"]) <= 0.05

    fitted_theta = np.empty((N_WORDS, 4))
    fitted_theta[:, perm] = _word_distributions(state)
    for k in range(4):
        tv = total_variation(fitted_theta[:, k], synthetic["theta"][:, k])
        assert tv <= 0.05, f"group {k}: total variation {tv:.4f} > 0.05"


def test_one_pass_of_stepwise_em_is_within_one_percent_of_batch(synthetic: dict) -> None:
    # Source: Liang and Klein (2009) report stepwise EM matching batch EM after about one
    # pass; the 1% held-out tolerance is the target.
    batch_state, _ = fit_texts(synthetic["train"], MixtureConfig(n_groups=4), seed=0)
    batch_ll = _heldout_log_likelihood_per_token(batch_state, synthetic["heldout"])

    order = np.random.default_rng(11).permutation(len(synthetic["train"]))
    shuffled = [synthetic["train"][i] for i in order]
    warmup = 100
    config = MixtureConfig(n_groups=4, warmup_documents=warmup, batch_size=100)
    learner = OnlineLearner(config, seed=0)
    learner.learn(shuffled[:warmup])
    assert learner.state.warmed_up and learner.state.step >= 0
    warmup_ll = _heldout_log_likelihood_per_token(learner.state, synthetic["heldout"])
    steps_after_warmup = learner.state.step
    for start in range(warmup, len(shuffled), 250):
        learner.learn(shuffled[start : start + 250])
    assert learner.state.documents_learned == len(shuffled)
    assert learner.state.step > steps_after_warmup, "no stepwise update after the warm-up"
    online_ll = _heldout_log_likelihood_per_token(learner.state, synthetic["heldout"])
    assert np.isfinite(online_ll) and np.isfinite(batch_ll)
    assert abs(online_ll - batch_ll) <= 0.01 * abs(batch_ll), (online_ll, batch_ll)
    # The pass itself must have done the work: the warm-up fit alone is further away.
    assert online_ll > warmup_ll, (online_ll, warmup_ll)


# ---- underflow -------------------------------------------------------------------------------
def test_hundred_thousand_token_document_gives_a_finite_posterior() -> None:
    # Source: Bayes' rule; a naive product of 100k probabilities underflows to 0/0.
    rng = np.random.default_rng(0)
    n_words, k = 1000, 5
    theta = rng.dirichlet(np.ones(n_words), size=k).T
    params = derive_parameters(theta * 1e4, np.full(k, 100.0), None, 0.1, 1.0)
    row = rng.multinomial(100_000, theta[:, 2]).astype(np.float64)
    long_doc = sp.csr_matrix(row[None, :])
    routing = route_counts(params, long_doc)
    assert np.all(np.isfinite(routing.posterior))
    assert abs(routing.posterior.sum() - 1.0) < 1e-12
    assert routing.group[0] == 2
    assert np.isfinite(routing.log_likelihood_per_token[0])
    assert routing.known_tokens[0] == 100_000

    # Two identical groups: the evidence cancels, so the posterior is exactly the prior.
    twin = np.column_stack([theta[:, 0], theta[:, 0]]) * 1e4
    params = derive_parameters(twin, np.array([30.0, 70.0]), None, 0.1, 0.0)
    routing = route_counts(params, long_doc)
    np.testing.assert_allclose(routing.posterior[0], [0.3, 0.7], rtol=0, atol=1e-9)
    resp, log_likelihood = e_step(long_doc, params)
    assert np.isfinite(log_likelihood) and log_likelihood < -1e5
    np.testing.assert_allclose(resp[0], [0.3, 0.7], rtol=0, atol=1e-9)
