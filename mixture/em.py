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

from collections.abc import Callable, Sequence

import numpy as np
import scipy.sparse as sp

from mixture.config import MixtureConfig
from mixture.errors import ConfigError, InputError
from mixture.kernels import softmax_rows
from mixture.labelled import LabelledCounts, LabelledItem, add_items
from mixture.restarts import (
    ANNEALED,
    MATCHED_START,
    PLAIN,
    SEEDS_START,
    FitReport,
    FixedResponsibilities,
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

    A ``csr_matrix`` of float64 is returned itself (its duplicates summed in place); any
    other input as a new CSR matrix.

    Raises
    ------
    InputError
        For a matrix that is not 2-D, is empty, or holds negative or non-finite counts.
    """
    if type(counts) is sp.csr_matrix and counts.dtype == np.float64:
        # already CSR float64 (count_texts' output, the learning path): taken as it is, as
        # wrapping it again shared its arrays anyway and only cost a construction a unit
        matrix = counts
    elif sp.issparse(counts):
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
    return seed_assignment_with_labels(
        counts, n_groups, rng, np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    )


def seed_assignment_with_labels(
    counts: sp.csr_matrix,
    n_groups: int,
    rng: np.random.Generator,
    fixed_rows: np.ndarray,
    fixed_groups: np.ndarray,
) -> np.ndarray:
    """k-means++-style seeding where some documents are labelled.

    A seeded group (one that labelled documents name) starts from the pooled word frequencies
    of its labelled documents, as a chosen seed does from one document's; those seeds count as
    already chosen, and the other groups are drawn by k-means++ among the unlabelled documents
    only, in order of position. Labelled rows are assigned to their groups. Without labelled
    rows this is :func:`seed_assignment` (the same draws).

    Parameters
    ----------
    counts : csr_matrix of shape (n_docs, V)
        Every row with at least one token.
    n_groups : int
    rng : numpy.random.Generator
    fixed_rows, fixed_groups : ndarray of int
        Labelled rows and their group positions.

    Returns
    -------
    ndarray of shape (n_docs,)
        A group position per document.
    """
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

    def take(group: int, seed_vector: np.ndarray) -> None:
        gain = log_half + freq @ seed_vector
        better = gain > best_gain
        best_gain[better] = gain[better]
        best_seed[better] = group

    fixed_rows = np.asarray(fixed_rows, dtype=np.int64)
    fixed_groups = np.asarray(fixed_groups, dtype=np.int64)
    seeded = [int(g) for g in np.unique(fixed_groups)]
    for group in seeded:
        pooled = np.asarray(counts[fixed_rows[fixed_groups == group]].sum(axis=0)).ravel()
        pooled /= max(float(pooled.sum()), 1e-300)
        seed_vector = np.zeros(n_words)
        words = np.flatnonzero(pooled)
        seed_vector[words] = np.log1p(pooled[words] / background[words])
        take(group, seed_vector)
    free = np.ones(n_docs, dtype=bool)
    free[fixed_rows] = False
    unseeded = [g for g in range(n_groups) if g not in set(seeded)]
    chosen: list[int] = []
    for group in unseeded:
        if not seeded and not chosen:
            pick = (
                int(rng.integers(n_docs)) if free.all() else int(rng.choice(np.flatnonzero(free)))
            )
        else:
            deficit = np.clip(self_gain - best_gain, 0.0, None) ** 2
            deficit[chosen] = 0.0
            deficit[~free] = 0.0
            total = deficit.sum()
            if not np.isfinite(total) or total <= 0:
                remaining = np.setdiff1d(np.flatnonzero(free), chosen)
                pick = int(rng.choice(remaining))
            else:
                pick = int(rng.choice(n_docs, p=deficit / total))
        chosen.append(pick)
        seed_row = ratio.getrow(pick)
        seed_vector = np.zeros(n_words)
        seed_vector[seed_row.indices] = seed_row.data
        take(group, seed_vector)
    best_seed[chosen] = unseeded
    best_seed[fixed_rows] = fixed_groups
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
    labelled: LabelledCounts | None = None,
    starts: tuple[str, ...] = (SEEDS_START, MATCHED_START),
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
    labelled : LabelledCounts, optional
        Labelled documents (same columns as ``counts``) with their group positions: their
        responsibilities are fixed one-hot throughout and the groups they name start from
        them (semi-supervised EM, Nigam et al. 2000; mixture.restarts). With labelled
        documents or ``config.unlabelled_weight`` below 1, each unlabelled document weighs
        ``unlabelled_weight`` in the M-step. The fit then has two starts (mixture.restarts):
        ``"seeds"`` (the groups start from their examples) and ``"matched"`` (an unsupervised
        fit's components matched to the labelled classes); the final semi-supervised MAP
        objective picks between them.
    starts : tuple of str, optional
        The starts to run with labelled documents, by default both; for comparisons, one
        alone is the fit with that start only. Ignored without labelled documents.

    Returns
    -------
    word_counts : ndarray of shape (V, K)
    doc_counts : ndarray of shape (K,)
        The M-step's counts: ``unlabelled_weight`` times the unlabelled documents' expected
        counts plus the labelled documents' counts (those the parameters are smoothed from).
    report : FitReport
    """
    matrix = validate_counts(counts)
    lengths = np.asarray(matrix.sum(axis=1)).ravel()
    nonempty = lengths > 0
    used = matrix[nonempty] if not nonempty.all() else matrix
    n_docs = used.shape[0]
    lab_matrix, lab_groups = _labelled_rows(labelled, matrix.shape[1], config.n_groups)
    n_seeded = int(np.unique(lab_groups).size)
    if n_docs == 0 and lab_groups.size == 0:
        raise InputError("no document has a known token: nothing to fit")
    if config.n_groups - n_seeded > n_docs:
        raise ConfigError(
            f"n_groups ({config.n_groups}) is larger than the number of documents with "
            f"tokens ({n_docs}) plus the groups labelled documents name ({n_seeded}); "
            f"use fewer groups or more documents"
        )
    if active is not None and active.shape != (matrix.shape[1],):
        raise InputError(f"active mask has shape {active.shape}, expected ({matrix.shape[1]},)")
    used_lengths = lengths[nonempty]
    fixed = None
    if lab_groups.size or config.unlabelled_weight != 1.0:
        rows = np.arange(n_docs, n_docs + lab_groups.size, dtype=np.int64)
        used = sp.csr_matrix(sp.vstack([used, lab_matrix], format="csr"))
        used_lengths = np.concatenate([used_lengths, np.asarray(lab_matrix.sum(axis=1)).ravel()])
        row_weight = np.concatenate(
            [np.full(n_docs, config.unlabelled_weight), np.ones(lab_groups.size)]
        )

        def labelled_seeder(
            all_counts: sp.csr_matrix, n_groups: int, rng: np.random.Generator
        ) -> np.ndarray:
            return seed_assignment_with_labels(all_counts, n_groups, rng, rows, lab_groups)

        fixed = FixedResponsibilities(rows, lab_groups, row_weight, labelled_seeder)
    used_t = used.T.tocsr()
    if kinds is None:
        kinds = restart_kinds(config)
    unknown = set(kinds) - {ANNEALED, PLAIN}
    if not kinds or unknown:
        raise ConfigError(f"kinds must name 'annealed' and/or 'plain'; got {kinds!r}")
    matching = bool(lab_groups.size) and MATCHED_START in starts
    total = iteration_bound(config, kinds, labelled=matching, seeds=SEEDS_START in starts)
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
        fixed,
        starts,
    )


def _labelled_rows(
    labelled: LabelledCounts | None, n_words: int, n_groups: int
) -> tuple[sp.csr_matrix, np.ndarray]:
    """The labelled rows with tokens and their group positions (checked)."""
    if labelled is None or len(labelled) == 0:
        return sp.csr_matrix((0, n_words)), np.zeros(0, dtype=np.int64)
    groups = np.asarray(labelled.groups)
    if groups.ndim != 1 or groups.dtype.kind not in "iu":
        raise InputError("labelled groups must be a 1-D array of group positions")
    groups = groups.astype(np.int64)
    matrix = validate_counts(labelled.counts)
    if matrix.shape != (groups.size, n_words):
        raise InputError(
            f"labelled counts have shape {matrix.shape}, expected ({groups.size}, {n_words})"
        )
    if groups.size and (groups.min() < 0 or groups.max() >= n_groups):
        raise InputError(f"labelled group positions must lie in [0, {n_groups})")
    keep = np.asarray(matrix.sum(axis=1)).ravel() > 0
    return sp.csr_matrix(matrix[keep]), groups[keep]


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
    if len(state.labelled):
        # Words of the labelled documents count for the vocabulary bound as well.
        column_totals += np.asarray(
            state.labelled.counts_matrix(state.capacity).sum(axis=0)
        ).ravel()
    state.pending = pending
    state.prune_vocabulary(keep=state.config.vocabulary_limit, word_totals=column_totals)
    pending = state.pending
    labelled = _state_labelled(state)
    word_counts, doc_counts, report = fit_batch_em(
        pending,
        state.config,
        seed=state.seed,
        active=state.vocabulary.active_mask(),
        progress=progress,
        kinds=kinds,
        sweep_factory=sweep_factory,
        labelled=labelled,
    )
    weight = state.config.unlabelled_weight
    if labelled is not None or weight != 1.0:
        # The state keeps the unlabelled statistics; the labelled ones are summed from the set.
        stats = state.labelled_statistics()
        word_counts = np.clip((word_counts - stats.word.toarray()) / weight, 0.0, None)
        doc_counts = np.clip((doc_counts - stats.docs) / weight, 0.0, None)
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


def _state_labelled(state: MixtureState) -> LabelledCounts | None:
    """The state's labelled documents as batch EM takes them (None when there are none)."""
    if not len(state.labelled):
        return None
    assert state.group_ids is not None
    position = {int(g): i for i, g in enumerate(state.group_ids)}
    positions = np.array(
        [position.get(int(g), -1) for g in state.labelled.groups()], dtype=np.int64
    )
    keep = positions >= 0
    matrix = state.labelled.counts_matrix(state.capacity)
    return LabelledCounts(sp.csr_matrix(matrix[keep]), positions[keep])


def fit_texts(
    texts: list[str],
    config: MixtureConfig,
    *,
    seed: int = 0,
    progress: Progress | None = None,
    kinds: tuple[str, ...] | None = None,
    sweep_factory: SweepFactory | None = None,
    labelled: Sequence[LabelledItem] = (),
) -> tuple[MixtureState, FitReport]:
    """Tokenise texts with a growing vocabulary, bound it, and fit batch EM.

    ``kinds`` is passed to :func:`fit_batch_em` (by default annealed and plain runs).
    ``labelled`` documents (their ``group_id`` in 0..n_groups-1) are kept in the state and
    fitted with fixed responsibilities (semi-supervised EM); the groups they name start from
    them.

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
    if labelled:
        add_items(state, labelled)
    report = fit_pending(state, progress, kinds, sweep_factory)
    return state, report
