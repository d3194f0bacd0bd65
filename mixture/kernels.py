"""Numerical kernels of the model: each formula of the mixture written once.

Every path of mixture/ (batch EM and its blocked sweep, stepwise EM, routing of many or a few
documents) calls these functions, so the paths cannot drift apart:

- :func:`smoothed_log_weights`: log mixture weights from expected documents per group;
- :func:`word_log_normaliser` and :func:`smoothed_log_word_prob`: log word probabilities per
  group from expected word counts (whole vocabulary, a block of it, or a few rows);
- :func:`softmax_rows`: row-wise softmax in log space, in place, returning each row's log
  normaliser (log-sum-exp);
- :func:`js_divergence`: the Jensen-Shannon divergence, from scipy.

Zero pseudo-counts are handled exactly
--------------------------------------
The parameters are MAP estimates under Dirichlet priors (additive smoothing)::

    log pi_k       = log(N_k + a)     - log(sum_j N_j + K a)
    log theta_k(w) = log(C_wk + beta) - log(sum_v C_vk + V beta)

With ``beta = 0`` (or ``a = 0``) the kernels return the exact limit of these formulas as the
pseudo-count falls to zero, never nan:

- a word never seen in group k has ``log theta_k(w) = -inf`` (probability zero);
- a group with no mass at all (an emptied group: ``sum_v C_vk = 0``) has the uniform
  distribution over the active words, ``-log V``: for every ``beta > 0`` its smoothed
  probabilities are ``beta / (V beta) = 1 / V``, so that is the limit. The weights alike: with
  ``a = 0`` and no documents at all every weight is ``1 / K``, and a group with no documents
  (but others with some) has weight zero, ``-inf``;
- a row of log joint probabilities that is ``-inf`` in every group (a document each group
  finds impossible, e.g. a word unseen in every group under ``beta = 0``, or counts in a
  retired word's column) has no posterior: the data has probability zero under the model.
  Its row becomes the fallback distribution (the prior, for routing and stepwise EM) and its
  log normaliser is ``-inf``, which callers use to flag it. Batch EM never meets such a row
  (each document is possible in the groups it was assigned to).

Whether a configuration may set ``word_pseudocount = 0`` is mixture.config's decision (under
zero, every document with a new word is impossible in every group, so stepwise EM learns it
with the prior as its responsibilities); the kernels stay exact at zero regardless.
"""

from __future__ import annotations

import itertools

import numpy as np
from scipy.spatial.distance import jensenshannon

from mixture.errors import InputError
from mixture.threads import run_blocks, worker_threads

__all__ = [
    "as_distribution",
    "js_divergence",
    "parallel_rows",
    "smoothed_log_weights",
    "smoothed_log_word_prob",
    "softmax_rows",
    "word_log_normaliser",
]

# Arrays smaller than this (half a million elements) are not worth handing to threads.
_PARALLEL_MIN_SIZE = 1 << 19


def parallel_rows(ufunc: np.ufunc, array: np.ndarray) -> np.ndarray:
    """Apply a unary ufunc in place, in row blocks on the model core's threads when large.

    Parameters
    ----------
    ufunc : numpy.ufunc
        A unary ufunc (numpy releases the GIL inside it, so blocks run in parallel).
    array : ndarray
        Changed in place.

    Returns
    -------
    ndarray
        ``array``.
    """
    workers = worker_threads()
    if array.size < _PARALLEL_MIN_SIZE or workers < 2 or array.shape[0] < workers:
        return ufunc(array, out=array)
    bounds = np.linspace(0, array.shape[0], workers + 1).astype(int)
    blocks = [array[a:b] for a, b in itertools.pairwise(bounds)]
    run_blocks(lambda i: ufunc(blocks[i], out=blocks[i]), len(blocks))
    return array


def smoothed_log_weights(doc_counts: np.ndarray, pseudocount: float) -> np.ndarray:
    """Log mixture weights ``log(N_k + a) - log(sum_j N_j + K a)``.

    Parameters
    ----------
    doc_counts : ndarray of shape (K,)
        Expected documents per group (count units).
    pseudocount : float
        ``a``, the symmetric Dirichlet pseudo-count (>= 0).

    Returns
    -------
    ndarray of shape (K,)
        With ``a = 0``: ``-inf`` for a group without documents, and ``-log K`` for every group
        when there are no documents at all (the limit as ``a`` falls to zero).
    """
    docs = np.maximum(np.asarray(doc_counts, dtype=np.float64), 0.0)
    n_groups = docs.shape[0]
    total = float(docs.sum()) + n_groups * pseudocount
    if total <= 0.0:
        return np.full(n_groups, -np.log(n_groups))
    with np.errstate(divide="ignore"):
        return np.log(docs + pseudocount) - np.log(total)


def word_log_normaliser(totals: np.ndarray, n_active: int, pseudocount: float) -> np.ndarray:
    """Log normaliser of each group's word distribution, ``log(sum_v C_vk + V beta)``.

    Parameters
    ----------
    totals : ndarray of shape (K,)
        Expected word counts per group summed over the active words.
    n_active : int
        V, the number of active words.
    pseudocount : float
        ``beta`` (>= 0).

    Returns
    -------
    ndarray of shape (K,)
        ``-inf`` for a group without mass when ``beta = 0`` (see :func:`smoothed_log_word_prob`).
    """
    # Totals kept by subtraction (vocabulary pruning) can end a hair below zero.
    totals = np.maximum(np.asarray(totals, dtype=np.float64), 0.0)
    with np.errstate(divide="ignore"):
        return np.log(totals + n_active * pseudocount)


def smoothed_log_word_prob(
    word_counts: np.ndarray,
    totals: np.ndarray,
    n_active: int,
    pseudocount: float,
    *,
    active: np.ndarray | None = None,
    out: np.ndarray | None = None,
    parallel: bool = False,
) -> np.ndarray:
    """Log word probabilities ``log(C_wk + beta) - log(sum_v C_vk + V beta)`` for some rows.

    The one place the smoothed word distributions are computed: the whole vocabulary
    (:func:`mixture.stats.derive_parameters`), a word block of the threaded M-step
    (:class:`mixture.sweep.EMSweep`) and the rows of a mini-batch (stepwise EM) all call it.

    Parameters
    ----------
    word_counts : ndarray of shape (n_rows, K)
        Expected counts of the rows wanted (a subset of the vocabulary is fine).
    totals : ndarray of shape (K,)
        Expected counts per group over all active words (not only these rows).
    n_active : int
        V, the number of active words.
    pseudocount : float
        ``beta`` (>= 0); zero is handled exactly (module docstring).
    active : ndarray of shape (n_rows,) of bool, optional
        Rows that are active words; inactive (retired) rows become ``-inf``.
    out : ndarray of shape (n_rows, K), optional
        Where to write the result (may be ``word_counts`` itself).
    parallel : bool
        Take the logarithm in row blocks on the model's threads (for whole-vocabulary arrays;
        callers that already run in a block leave it off).

    Returns
    -------
    ndarray of shape (n_rows, K)
    """
    log_norm = word_log_normaliser(totals, n_active, pseudocount)
    result = np.add(word_counts, pseudocount, out=out)
    with np.errstate(divide="ignore"):
        if parallel:
            parallel_rows(np.log, result)
        else:
            np.log(result, out=result)
    empty = np.isneginf(log_norm)
    if empty.any():
        # beta = 0 and a group without mass: the limit of its smoothed distribution is uniform
        # over the active words (without this, -inf - -inf would be nan).
        log_norm = log_norm.copy()
        log_norm[empty] = 0.0
        result -= log_norm
        result[:, empty] = -np.log(n_active) if n_active > 0 else -np.inf
    else:
        result -= log_norm
    if active is not None and not active.all():
        result[~active] = -np.inf
    return result


def softmax_rows(
    values: np.ndarray,
    *,
    out: np.ndarray | None = None,
    fallback_log: np.ndarray | None = None,
    parallel: bool = True,
) -> np.ndarray:
    """Row-wise softmax in log space, in place unless ``out`` is given.

    Parameters
    ----------
    values : ndarray of shape (n, K), float64
        Log joint probabilities (``-inf`` allowed). Overwritten by the normalised rows unless
        ``out`` is given.
    out : ndarray of shape (n, K), optional
        Where the probabilities go (``values`` itself by default).
    fallback_log : ndarray of shape (K,), optional
        Log of the distribution given to a row that is ``-inf`` everywhere (the prior, for
        routing and stepwise EM); uniform when omitted. It is normalised here.
    parallel : bool
        Take the exponential in row blocks on the model's threads when the array is large
        (callers already running in a block leave it off).

    Returns
    -------
    ndarray of shape (n,)
        Log-sum-exp of each row before normalising (a document's log-likelihood), ``-inf``
        for a row that was ``-inf`` in every column: such rows hold the fallback distribution.
    """
    row_max = values.max(axis=1)
    impossible = np.isneginf(row_max)
    any_impossible = bool(impossible.any())
    if any_impossible:
        row_max[impossible] = 0.0
    prob = np.subtract(values, row_max[:, None], out=values if out is None else out)
    if parallel:
        parallel_rows(np.exp, prob)
    else:
        np.exp(prob, out=prob)
    row_sum = prob.sum(axis=1)
    if any_impossible:
        if fallback_log is None:
            fallback = np.full(prob.shape[1], 1.0 / prob.shape[1])
        else:
            fallback = np.array(fallback_log, dtype=np.float64, ndmin=2)
            softmax_rows(fallback, parallel=False)
        prob[impossible] = fallback
        row_sum[impossible] = 1.0
    prob /= row_sum[:, None]
    log_norm = np.log(row_sum, out=row_sum)
    log_norm += row_max
    if any_impossible:
        log_norm[impossible] = -np.inf
    return log_norm


def js_divergence(p: np.ndarray, q: np.ndarray) -> float:
    """Jensen-Shannon divergence in bits (base 2), in [0, 1].

    ``scipy.spatial.distance.jensenshannon(p, q, base=2) ** 2`` (scipy's is the distance, the
    square root of the divergence). Both inputs are checked and normalised first.

    Raises
    ------
    InputError
        For an input that is not a non-empty 1-D array of finite non-negative numbers with a
        positive sum, or inputs of different lengths.
    """
    p = as_distribution(p, "p")
    q = as_distribution(q, "q")
    if p.shape != q.shape:
        raise InputError(f"distributions differ in length: {p.size} and {q.size}")
    with np.errstate(invalid="ignore"):
        distance = float(jensenshannon(p, q, base=2.0))
    # scipy takes the square root of a sum that rounding can leave a hair below zero (nan).
    if not np.isfinite(distance):
        return 0.0
    return min(distance * distance, 1.0)


def as_distribution(p: np.ndarray, name: str) -> np.ndarray:
    """Check a non-negative finite 1-D array with a positive sum and return it normalised.

    Raises
    ------
    InputError
        Naming ``name`` when the array is not such a distribution.
    """
    arr = np.asarray(p, dtype=np.float64)
    if arr.ndim != 1 or arr.size == 0:
        raise InputError(f"{name} must be a non-empty 1-D distribution")
    if not np.all(np.isfinite(arr)) or arr.min() < 0:
        raise InputError(f"{name} must be finite and non-negative")
    total = arr.sum()
    if total <= 0:
        raise InputError(f"{name} sums to zero")
    return arr / total
