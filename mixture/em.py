"""Batch MAP-EM for a mixture of unigram language models.

E-step: responsibilities r_dk = p(k | d) from log pi_k + sum_w c_dw log theta_k(w), normalised
with log-sum-exp (mixture.kernels.softmax_rows) so that documents of 100k tokens neither
underflow nor overflow.
M-step: expected counts N_k = sum_d r_dk and C_wk = sum_d r_dk c_dw, then MAP parameters by
additive smoothing (mixture.stats.derive_parameters).

The objective is the log posterior up to a constant: the log-likelihood (without the
multinomial coefficients, which do not depend on the parameters) plus the log Dirichlet prior
that the pseudo-counts stand for, ``a sum_k log pi_k + beta sum_kw log theta_k(w)``. EM never
lowers it (Dempster, Laird and Rubin 1977), except at the iterations where a starved group is
revived, which the report lists.

Seeding follows k-means++ (Arthur and Vassilvitskii 2007), weighted by the model's own
divergence rather than a Euclidean one: each chosen seed s induces the word distribution
``0.5 * (its word frequencies) + 0.5 * background``, a document's gain under a seed is its
per-token log-likelihood ratio against the background, and the next seed is drawn with
probability proportional to the square of how much worse a document is explained by the
chosen seeds than by its own seed distribution. This spreads the seeds over the distinct
themes instead of starting several groups on one theme, the classic bad start of EM. Each
seeding is then run with deterministic annealing (Ueda and Nakano 1998) and without; the
objective trace starts once the temperature has reached 1 (mixture.restarts: why both, and
how starved groups are revived).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import scipy.sparse as sp

from mixture.config import MixtureConfig
from mixture.errors import ConfigError, InputError
from mixture.kernels import softmax_rows
from mixture.restarts import (
    ANNEALED,
    PLAIN,
    FitReport,
    RestartSummary,
    SweepFactory,
    fit_restarts,
    iteration_bound,
    restart_kinds,
)
from mixture.stats import MixtureState, Parameters, derive_parameters
from mixture.sweep import EMSweep

__all__ = ["FitReport", "RestartSummary"]

Progress = Callable[[int, int], None]


def validate_counts(counts: sp.spmatrix | np.ndarray) -> sp.csr_matrix:
    """Check a document-term count matrix and return it as CSR float64.

    Raises
    ------
    InputError
        For a matrix that is not 2-D, is empty, or holds negative or non-finite counts.
    """
    if sp.issparse(counts):
        matrix = sp.csr_matrix(counts, dtype=np.float64)
    else:
        array = np.asarray(counts, dtype=np.float64)
        if array.ndim != 2:
            raise InputError(f"counts must be a 2-D documents x words matrix; got {array.ndim}-D")
        matrix = sp.csr_matrix(array)
    if matrix.shape[0] == 0:
        raise InputError("empty corpus: no documents to fit")
    data = matrix.data
    if data.size and not np.all(np.isfinite(data)):
        raise InputError("counts contain non-finite values (nan or inf)")
    if data.size and data.min() < 0:
        raise InputError("counts contain negative values; word counts must be >= 0")
    matrix.sum_duplicates()
    return matrix


def _log_joint(counts: sp.csr_matrix, params: Parameters) -> np.ndarray:
    log_joint = counts @ params.log_word_prob
    log_joint += params.log_weights
    return np.asarray(log_joint)


def e_step(counts: sp.csr_matrix, params: Parameters) -> tuple[np.ndarray, float]:
    """Responsibilities and the log-likelihood (without multinomial coefficients).

    Returns
    -------
    resp : ndarray of shape (n_docs, K)
    log_likelihood : float
    """
    resp = _log_joint(counts, params)
    log_norm = softmax_rows(resp)
    return resp, float(log_norm.sum())


def m_step(
    counts: sp.csr_matrix, resp: np.ndarray, counts_t: sp.csr_matrix | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Expected counts from responsibilities.

    Returns
    -------
    word_counts : ndarray of shape (V, K)
    doc_counts : ndarray of shape (K,)
    """
    transposed = counts.T if counts_t is None else counts_t
    word_counts = np.asarray(transposed @ resp)
    return word_counts, resp.sum(axis=0)


def log_prior(params: Parameters, config: MixtureConfig) -> float:
    """Log Dirichlet prior density (up to a constant) that the pseudo-counts stand for."""
    total = 0.0
    a, beta = config.weight_pseudocount, config.word_pseudocount
    if a > 0:
        total += a * float(params.log_weights.sum())
    if beta > 0:
        rows = params.log_word_prob[params.active] if not params.active.all() else None
        total += beta * float((params.log_word_prob if rows is None else rows).sum())
    return total


def map_objective(
    counts: sp.spmatrix,
    word_counts: np.ndarray,
    doc_counts: np.ndarray,
    config: MixtureConfig,
    active: np.ndarray | None = None,
) -> float:
    """Log-likelihood plus log prior of the parameters derived from the given counts."""
    params = derive_parameters(
        word_counts, doc_counts, active, config.word_pseudocount, config.weight_pseudocount
    )
    _, log_lik = e_step(validate_counts(counts), params)
    return log_lik + log_prior(params, config)


# ---- seeding --------------------------------------------------------------------------------
def seed_assignment(counts: sp.csr_matrix, n_groups: int, rng: np.random.Generator) -> np.ndarray:
    """k-means++-style seeding with the model's divergence; returns a group per document."""
    n_docs, n_words = counts.shape
    lengths = np.asarray(counts.sum(axis=1)).ravel()
    freq = sp.diags(1.0 / np.maximum(lengths, 1e-300)) @ counts  # per-token frequencies
    freq = sp.csr_matrix(freq)
    background = np.asarray(counts.sum(axis=0)).ravel() + 0.5
    background /= background.sum()
    log_half = np.log(0.5)

    # Each document's gain under its own seed distribution: the best any seed can do for it.
    ratio = freq.copy()
    ratio.data = np.log1p(freq.data / background[freq.indices])
    self_gain = log_half + np.asarray(freq.multiply(ratio).sum(axis=1)).ravel()

    best_gain = np.full(n_docs, -np.inf)
    best_seed = np.zeros(n_docs, dtype=np.int64)
    chosen: list[int] = []
    for k in range(n_groups):
        if k == 0:
            pick = int(rng.integers(n_docs))
        else:
            deficit = np.clip(self_gain - best_gain, 0.0, None) ** 2
            deficit[chosen] = 0.0
            total = deficit.sum()
            if not np.isfinite(total) or total <= 0:
                remaining = np.setdiff1d(np.arange(n_docs), chosen)
                pick = int(rng.choice(remaining))
            else:
                pick = int(rng.choice(n_docs, p=deficit / total))
        chosen.append(pick)
        seed_row = ratio.getrow(pick)
        seed_vector = np.zeros(n_words)
        seed_vector[seed_row.indices] = seed_row.data
        gain = log_half + freq @ seed_vector
        better = gain > best_gain
        best_gain[better] = gain[better]
        best_seed[better] = k
    best_seed[chosen] = np.arange(n_groups)
    return best_seed


# ---- the fit --------------------------------------------------------------------------------
def fit_batch_em(
    counts: sp.spmatrix | np.ndarray,
    config: MixtureConfig,
    *,
    seed: int = 0,
    active: np.ndarray | None = None,
    progress: Progress | None = None,
    kinds: tuple[str, ...] | None = None,
    sweep_factory: SweepFactory | None = None,
) -> tuple[np.ndarray, np.ndarray, FitReport]:
    """Fit the mixture by MAP-EM with seeded restarts; the best MAP objective wins.

    Each seeding is run annealed and plain (see mixture.restarts for why), and starved groups
    are revived split-style once EM has converged at temperature 1.

    Parameters
    ----------
    counts : sparse or dense matrix of shape (n_docs, V)
        Word counts per document; rows without any token are left out of the fit.
    config : MixtureConfig
        Uses n_groups, pseudo-counts, n_restarts, max_iter and tolerance.
    seed : int
        Seed of the random generator; the same seed gives the same fit.
    active : ndarray of shape (V,) of bool, optional
        Words that count for smoothing (retired vocabulary ids are inactive).
    progress : callable (done, total), optional
        Called after every iteration; total is an upper bound
        (mixture.restarts.iteration_bound).
    kinds : tuple of str, optional
        Runs made from each seeding, ``"annealed"`` and/or ``"plain"``; by default both (plain
        only when annealing_steps is 0). For comparisons: one kind alone is the fit of before.
    sweep_factory : callable, optional
        Makes each run's sweep (default :class:`mixture.sweep.EMSweep`, this machine's cores).

    Returns
    -------
    word_counts : ndarray of shape (V, K)
    doc_counts : ndarray of shape (K,)
    report : FitReport
    """
    matrix = validate_counts(counts)
    lengths = np.asarray(matrix.sum(axis=1)).ravel()
    nonempty = lengths > 0
    used = matrix[nonempty] if not nonempty.all() else matrix
    n_docs = used.shape[0]
    if n_docs == 0:
        raise InputError("no document has a known token: nothing to fit")
    if config.n_groups > n_docs:
        raise ConfigError(
            f"n_groups ({config.n_groups}) is larger than the number of documents with "
            f"tokens ({n_docs}); use fewer groups or more documents"
        )
    if active is not None and active.shape != (matrix.shape[1],):
        raise InputError(f"active mask has shape {active.shape}, expected ({matrix.shape[1]},)")
    used_t = used.T.tocsr()
    used_lengths = lengths[nonempty]
    if kinds is None:
        kinds = restart_kinds(config)
    unknown = set(kinds) - {ANNEALED, PLAIN}
    if not kinds or unknown:
        raise ConfigError(f"kinds must name 'annealed' and/or 'plain'; got {kinds!r}")
    total = iteration_bound(config, kinds)
    done = 0

    def tick() -> None:
        nonlocal done
        done += 1
        if progress is not None:
            progress(min(done, total), total)

    return fit_restarts(
        used,
        used_t,
        used_lengths,
        config,
        seed,
        active,
        seed_assignment,
        kinds,
        tick,
        EMSweep if sweep_factory is None else sweep_factory,
    )


def fit_pending(
    state: MixtureState,
    progress: Progress | None = None,
    kinds: tuple[str, ...] | None = None,
    sweep_factory: SweepFactory | None = None,
) -> FitReport:
    """Fit batch EM on the state's warm-up buffer and make it the state's statistics."""
    if state.pending is None or state.pending.shape[0] == 0:
        raise InputError("no buffered documents to fit")
    state.ensure_capacity()
    pending = state.pending
    if pending.shape[1] < state.capacity:
        pending = sp.csr_matrix(
            (pending.data, pending.indices, pending.indptr),
            shape=(pending.shape[0], state.capacity),
        )
    column_totals = np.asarray(pending.sum(axis=0)).ravel()
    state.pending = pending
    state.prune_vocabulary(keep=state.config.vocabulary_limit, word_totals=column_totals)
    pending = state.pending
    word_counts, doc_counts, report = fit_batch_em(
        pending,
        state.config,
        seed=state.seed,
        active=state.vocabulary.active_mask(),
        progress=progress,
        kinds=kinds,
        sweep_factory=sweep_factory,
    )
    fitted = MixtureState.from_counts(
        state.config, state.vocabulary, word_counts, doc_counts, state.documents_learned
    )
    state.unscaled_word = fitted.unscaled_word
    state.unscaled_docs = fitted.unscaled_docs
    state.unscaled_total = fitted.unscaled_total
    state.running_scale = 1.0
    state.weight_square_sum = fitted.weight_square_sum
    state.step = fitted.step
    state.warmed_up = True
    state.pending = None
    state.touch()
    return report


def fit_texts(
    texts: list[str],
    config: MixtureConfig,
    *,
    seed: int = 0,
    progress: Progress | None = None,
    kinds: tuple[str, ...] | None = None,
    sweep_factory: SweepFactory | None = None,
) -> tuple[MixtureState, FitReport]:
    """Tokenise texts with a growing vocabulary, bound it, and fit batch EM.

    ``kinds`` is passed to :func:`fit_batch_em` (by default annealed and plain runs).

    Returns
    -------
    state : MixtureState
        Warmed up; ready for routing or for stepwise learning.
    report : FitReport
    """
    from mixture.counting import count_texts

    state = MixtureState.empty(config, seed)
    batch = count_texts(texts, state.tokenizer, state.vocabulary, grow=True)
    state.pending = batch.counts
    state.documents_learned = len(texts)
    report = fit_pending(state, progress, kinds, sweep_factory)
    return state, report
