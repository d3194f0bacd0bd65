"""EM sweeps over a corpus cut into blocks that run on all cores at once.

An iteration of batch EM is two sparse products (documents x words times words x groups, and
back) plus an exponential over the n x K joint and a logarithm over the V x K smoothed counts.
scipy's sparse-times-dense products and numpy's ufuncs release the GIL, so the corpus is cut
into document blocks (for the E-step) and word blocks (for the M-step with its logarithm) of
about equal work, and each block's whole chain runs in one thread: product, then softmax, or
smoothing and logarithm, then partial sums. No block waits on another inside a step, and the
per-row arithmetic is that of the single-threaded building blocks (mixture.em.e_step, m_step
and mixture.stats.derive_parameters): every block calls the same kernels (mixture.kernels),
so the results agree with them up to the rounding of sums taken in another order.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from mixture.kernels import (
    smoothed_log_weights,
    smoothed_log_word_prob,
    softmax_rows,
    word_log_normaliser,
)
from mixture.stats import Parameters
from mixture.threads import run_blocks, set_worker_threads, worker_threads

__all__ = [
    "EMSweep",
    "RowBlock",
    "blocked_product",
    "row_blocks",
    "run_blocks",
    "set_worker_threads",
    "worker_threads",
]

# A block's cost in units of one multiply-add of the sparse product: its non-zeros times K plus
# this many units per row times K for the row's exponential or logarithm and the element-wise
# passes around it (measured here: a float64 log or exp costs about four multiply-adds).
_ROW_COST = 4
# Below this much work (non-zeros x K) per block a thread costs more than it saves.
_MIN_BLOCK_WORK = 1 << 17


@dataclass(frozen=True)
class RowBlock:
    """Rows [start, stop) of a CSR matrix and the CSR matrix of those rows."""

    start: int
    stop: int
    matrix: sp.csr_matrix


def row_blocks(matrix: sp.csr_matrix, n_blocks: int, row_cost: float) -> list[RowBlock]:
    """Cut a CSR matrix into at most ``n_blocks`` row ranges of about equal cost.

    A row costs its non-zeros plus ``row_cost``. The parts are contiguous slices of the
    parent's arrays (scipy copies a slice that is small beside its parent, so it can free it).
    """
    n_rows = matrix.shape[0]
    indptr = matrix.indptr
    cost = indptr.astype(np.float64) + row_cost * np.arange(n_rows + 1)
    bounds = np.searchsorted(cost, np.linspace(0.0, cost[-1], n_blocks + 1))
    bounds[0], bounds[-1] = 0, n_rows
    blocks = []
    for start, stop in itertools.pairwise(np.unique(bounds)):
        first, last = indptr[start], indptr[stop]
        view = sp.csr_matrix(
            (matrix.data[first:last], matrix.indices[first:last], indptr[start : stop + 1] - first),
            shape=(int(stop - start), matrix.shape[1]),
            copy=False,
        )
        blocks.append(RowBlock(int(start), int(stop), view))
    return blocks


def blocked_product(matrix: sp.csr_matrix, dense: np.ndarray) -> np.ndarray:
    """``matrix @ dense`` with the rows cut into blocks that run on the pool's threads."""
    n_rows = matrix.shape[0]
    by_work = max(1, (matrix.nnz * dense.shape[1]) // _MIN_BLOCK_WORK)
    n_blocks = max(1, min(worker_threads(), by_work, n_rows))
    if n_blocks == 1:
        return np.asarray(matrix @ dense)
    blocks = row_blocks(matrix, n_blocks, _ROW_COST)
    out = np.empty((n_rows, dense.shape[1]))

    def block(i: int) -> None:
        part = blocks[i]
        out[part.start : part.stop] = part.matrix @ dense

    run_blocks(block, len(blocks))
    return out


class EMSweep:
    """Batch-EM steps over one corpus, blocked for threads.

    Parameters
    ----------
    counts : csr_matrix of shape (n_docs, V)
        Validated counts, every row with at least one token. The sweep keeps them, restricted
        to the used words, as ``counts``.
    counts_t : csr_matrix of shape (V, n_docs)
        The same counts transposed, in CSR.
    n_groups : int
    active : ndarray of shape (V,) of bool, or None for all active
    word_pseudocount, weight_pseudocount : float
    threads : int, optional
        Upper bound on blocks; defaults to :func:`worker_threads`.

    Notes
    -----
    :meth:`m_step` writes the log-parameters into one of two buffers in turn, so the
    :class:`Parameters` of the step before stay valid until the next M-step (re-seeding uses
    them). The responsibilities returned by :meth:`e_step` live in a buffer of the sweep that
    the next E-step overwrites.
    """

    def __init__(
        self,
        counts: sp.csr_matrix,
        counts_t: sp.csr_matrix,
        n_groups: int,
        active: np.ndarray | None,
        word_pseudocount: float,
        weight_pseudocount: float,
        threads: int | None = None,
    ) -> None:
        n_docs, n_words = counts.shape
        self.n_words = n_words
        self.n_groups = n_groups
        self.word_pseudocount = word_pseudocount
        self.weight_pseudocount = weight_pseudocount
        if active is not None and active.all():
            active = None
        self.n_active = n_words if active is None else int(np.count_nonzero(active))
        # Words no document uses (vocabulary slots beyond this corpus, spare capacity) have the
        # same smoothed log-probability log(beta) - log(norm_k) and no product reads them, so
        # the sweep works on the used words only and accounts for the others in closed form.
        used = np.flatnonzero(np.diff(counts_t.indptr) > 0)
        if used.size < n_words:
            new_id = np.full(n_words, -1, dtype=counts.indices.dtype)
            new_id[used] = np.arange(used.size, dtype=new_id.dtype)
            counts = sp.csr_matrix(
                (counts.data, new_id[counts.indices], counts.indptr), shape=(n_docs, used.size)
            )
            counts_t = sp.csr_matrix(counts_t[used])
            self.used_words: np.ndarray | None = used
        else:
            self.used_words = None
        unused_active = (
            (n_words - used.size)
            if active is None
            else int(np.count_nonzero(active) - np.count_nonzero(active[used]))
        )
        self._unused_active = unused_active
        self.active = None if active is None or active[used].all() else active[used]
        self.counts = counts
        wanted = worker_threads() if threads is None else threads
        by_work = max(1, (counts.nnz * n_groups) // _MIN_BLOCK_WORK)
        n_blocks = max(1, min(wanted, by_work, n_docs, used.size))
        self.doc_blocks = row_blocks(counts, n_blocks, _ROW_COST)
        self.word_blocks = row_blocks(counts_t, n_blocks, _ROW_COST)
        # Tokens of each document that count towards the smoothed totals (all, or active ones).
        weights = np.ones(used.size) if self.active is None else self.active.astype(np.float64)
        self._active_lengths = np.asarray(counts @ weights).ravel()
        self._resp = np.empty((n_docs, n_groups))
        self._buffers = (np.empty((used.size, n_groups)), np.empty((used.size, n_groups)))
        self._turn = 0
        self._expected: list[np.ndarray] = []
        self.doc_counts = np.zeros(n_groups)
        self.log_weights = np.zeros(n_groups)
        self.log_prior = 0.0

    # ---- M-step: expected counts and the MAP log-parameters --------------------------------
    def m_step(self, resp: np.ndarray) -> None:
        """Expected counts from responsibilities, then the smoothed log-parameters.

        The per-group word totals come from the responsibilities and the documents' lengths
        (``sum_d r_dk len_d`` equals ``sum_w C_wk``), so every word block can take its
        logarithm as soon as its product is done.
        """
        self._m_step_with(
            resp.sum(axis=0),
            resp.T @ self._active_lengths,
            lambda part: np.asarray(part.matrix @ resp),
        )

    def m_step_after_e_step(self, resp: np.ndarray) -> None:
        """The M-step from the responsibilities the last :meth:`e_step` returned, unchanged.

        Here the same as :meth:`m_step`; a sweep whose E-step already reduced the expected
        counts (a distributed one) uses those instead of the responsibilities.
        """
        self.m_step(resp)

    def m_step_from_statistics(
        self, doc_counts: np.ndarray, totals: np.ndarray, expected: np.ndarray
    ) -> None:
        """The M-step from reduced expected counts instead of responsibilities.

        Parameters
        ----------
        doc_counts : ndarray of shape (K,)
            Expected documents per group, ``sum_d r_dk``.
        totals : ndarray of shape (K,)
            Expected active tokens per group, ``sum_d r_dk len_d`` (active words only).
        expected : ndarray of shape (n_used_words, K)
            Expected word counts ``X^T R`` over the used words (columns of ``counts``).
        """
        self._m_step_with(doc_counts, totals, lambda part: expected[part.start : part.stop])

    def _m_step_with(
        self,
        doc_counts: np.ndarray,
        totals: np.ndarray,
        expected_of: Callable[[RowBlock], np.ndarray],
    ) -> None:
        beta, a = self.word_pseudocount, self.weight_pseudocount
        self.doc_counts = doc_counts
        self.log_weights = smoothed_log_weights(self.doc_counts, a)
        log_norm = word_log_normaliser(totals, self.n_active, beta)
        self._turn ^= 1
        log_word_prob = self._buffers[self._turn]

        def block(i: int) -> tuple[np.ndarray, float]:
            part = self.word_blocks[i]
            expected = expected_of(part)
            active = None if self.active is None else self.active[part.start : part.stop]
            out = smoothed_log_word_prob(
                expected,
                totals,
                self.n_active,
                beta,
                active=active,
                out=log_word_prob[part.start : part.stop],
            )
            if active is None:
                return expected, float(out.sum()) if beta > 0 else 0.0
            return expected, float(out[active].sum()) if beta > 0 else 0.0

        results = run_blocks(block, len(self.word_blocks))
        self._expected = [expected for expected, _ in results]
        prior = 0.0
        if a > 0:
            prior += a * float(self.log_weights.sum())
        if beta > 0:
            prior += beta * sum(part for _, part in results)
            if self._unused_active:
                prior += beta * self._unused_active * float((np.log(beta) - log_norm).sum())
        self.log_prior = prior

    def parameters(self) -> Parameters:
        """The log-parameters of the last M-step, over the used words (columns of ``counts``)."""
        active = self.active
        if active is None:
            active = np.ones(self._buffers[0].shape[0], dtype=bool)
        return Parameters(
            log_weights=self.log_weights, log_word_prob=self._buffers[self._turn], active=active
        )

    def word_counts(self) -> np.ndarray:
        """Expected word counts of the last M-step over the whole vocabulary, shape (V, K)."""
        used = np.vstack(self._expected) if len(self._expected) > 1 else self._expected[0]
        if self.used_words is None:
            return used
        full = np.zeros((self.n_words, self.n_groups))
        full[self.used_words] = used
        return full

    # ---- E-step ----------------------------------------------------------------------------
    def e_step(self, temperature: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
        """Responsibilities under the last M-step's parameters, tempered by ``temperature``.

        Returns
        -------
        resp : ndarray of shape (n_docs, K)
            The sweep's own buffer (overwritten by the next E-step).
        log_norm : ndarray of shape (n_docs,)
            Log-sum-exp of each document's (tempered) joint: its log-likelihood without the
            multinomial coefficient when ``temperature`` is 1.
        """
        log_word_prob = self._buffers[self._turn]
        log_weights = self.log_weights
        resp = self._resp

        def block(i: int) -> np.ndarray:
            part = self.doc_blocks[i]
            joint = np.asarray(part.matrix @ log_word_prob)
            joint += log_weights
            if temperature != 1.0:
                joint *= temperature
            return softmax_rows(joint, out=resp[part.start : part.stop], parallel=False)

        parts = run_blocks(block, len(self.doc_blocks))
        return resp, np.concatenate(parts) if len(parts) > 1 else parts[0]
