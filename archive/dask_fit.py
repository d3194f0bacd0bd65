"""Batch EM with the E-step spread over a Dask cluster (dask.distributed).

The archive's count matrix is cut into row partitions, each made on a Dask worker by a task
whose inputs are the partition's CSR arrays (so Dask can make it again on another worker when
the one holding it dies: data given by ``scatter`` could not be rebuilt). Every EM iteration
broadcasts the current log-parameters, and each partition returns its sufficient statistics:
the expected word counts ``X_p^T R_p``, the expected documents ``sum R_p``, the expected active
tokens ``R_p^T len_p`` and its documents' log-normalisers (whose sum is the log-likelihood),
with its responsibilities ``R_p``. The client adds them up and runs the M-step with the model
core's own formulas (:meth:`mixture.sweep.EMSweep.m_step_from_statistics`).

The responsibilities come back too because the fit's revival of starved groups (a split of a
large group, :mod:`mixture.restarts`) reads and changes them in the client; the seeding
(k-means++) also runs in the client, on the counts it made. What is spread is the work of every
iteration: the two sparse products and the exponentials over documents x groups.

Same seed and restarts, same fit: the per-row arithmetic is the model core's (the kernels'
``softmax_rows``); only sums are taken in another order, so the states agree to rounding.
"""

from __future__ import annotations

import contextlib
import itertools
import time
from collections.abc import Callable, Iterator, Sequence
from typing import Any

import numpy as np
import scipy.sparse as sp

from mixture.config import MixtureConfig
from mixture.em import Progress, fit_texts
from mixture.kernels import softmax_rows
from mixture.labelled import LabelledItem
from mixture.restarts import FitReport
from mixture.stats import MixtureState
from mixture.sweep import EMSweep

# Partitions per Dask worker thread: a few, so a lost worker's share spreads over the others
# and a slow one does not hold the iteration long (common practice, no source).
PARTITIONS_PER_THREAD = 2
# An E-step that lost a worker is asked again this many times in all, after growing pauses.
E_STEP_ATTEMPTS = 5
RETRY_PAUSE_SECONDS = 0.5
# What a worker lost mid-request raises in the client (its connection closed, the task's
# worker gone): OSError covers distributed's CommClosedError; KilledWorker is appended when
# distributed is importable.
LOST_WORKER_ERRORS: tuple[type[BaseException], ...] = (OSError,)
with contextlib.suppress(ImportError):
    from distributed import KilledWorker
    from distributed.client import FutureCancelledError

    LOST_WORKER_ERRORS = (OSError, KilledWorker, FutureCancelledError)


def _import_distributed() -> Any:
    try:
        import distributed
    except ImportError as exc:  # pragma: no cover - the extra is installed in dev
        raise RuntimeError(
            "the Dask fit needs the optional extra: pip install 'mixroute[dask]'"
        ) from exc
    return distributed


def check_dask_address(address: str) -> tuple[int, bool] | None:
    """(workers, processes) of a ``local:N`` / ``local:N:threads`` address, None for a
    scheduler address; ValueError for a malformed local one."""
    if not address.startswith("local:"):
        return None
    parts = address.split(":")
    try:
        n_workers = int(parts[1])
    except (IndexError, ValueError):
        n_workers = 0
    if n_workers < 1 or len(parts) > 3 or (len(parts) == 3 and parts[2] != "threads"):
        raise ValueError(f"--dask takes local:N or local:N:threads (N >= 1); got {address!r}")
    return n_workers, len(parts) == 2


@contextlib.contextmanager
def dask_session(address: str) -> Iterator[Any]:
    """A ``distributed.Client`` for ``address``: a scheduler address, or ``local:N``.

    ``local:N`` starts a LocalCluster of N worker processes (one thread each) for the length
    of the session; ``local:N:threads`` the same N workers as threads of this process.
    """
    distributed = _import_distributed()
    local = check_dask_address(address)
    if local is not None:
        n_workers, processes = local
        with (
            distributed.LocalCluster(
                n_workers=n_workers,
                threads_per_worker=1,
                processes=processes,
                dashboard_address=None,
            ) as cluster,
            distributed.Client(cluster) as client,
        ):
            yield client
        return
    with distributed.Client(address) as client:
        yield client


# ---- what runs on the workers ------------------------------------------------------------
def make_partition(
    data: np.ndarray,
    indices: np.ndarray,
    indptr: np.ndarray,
    n_words: int,
    active_lengths: np.ndarray,
) -> tuple[sp.csr_matrix, np.ndarray]:
    """The partition a worker holds: its documents' counts and active lengths."""
    matrix = sp.csr_matrix((data, indices, indptr), shape=(indptr.size - 1, n_words), copy=False)
    return matrix, active_lengths


def hold(value: np.ndarray) -> np.ndarray:
    """The task that holds one iteration's log-parameters on the cluster."""
    return value


def partition_statistics(
    partition: tuple[sp.csr_matrix, np.ndarray],
    log_word_prob: np.ndarray,
    log_weights: np.ndarray,
    temperature: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """One partition's E-step and its sufficient statistics.

    Returns
    -------
    resp : (n_p, K)
    log_norm : (n_p,)
        Log-sum-exp of each document's (tempered) joint.
    expected : (n_used_words, K)
        ``X_p^T R_p``.
    doc_counts : (K,)
        ``sum R_p``.
    totals : (K,)
        ``R_p^T len_p`` over active tokens.
    """
    matrix, active_lengths = partition
    joint = np.asarray(matrix @ log_word_prob)
    joint += log_weights
    if temperature != 1.0:
        joint *= temperature
    resp = np.empty_like(joint)
    log_norm = softmax_rows(joint, out=resp, parallel=False)
    expected = np.asarray(matrix.T @ resp)
    return resp, log_norm, expected, resp.sum(axis=0), resp.T @ active_lengths


# ---- the client side -----------------------------------------------------------------------
class PartitionSet:
    """The partitions of one archive on the cluster, made once for every run of a fit.

    Every restart of a fit sweeps the same counts (the same matrix object), so the first run
    sends them and the others reuse the partitions; other counts replace them.
    """

    def __init__(self, client: Any, partitions: int) -> None:
        if partitions < 1:
            raise ValueError(f"partitions must be >= 1; got {partitions}")
        self.client = client
        self.partitions = int(partitions)
        self._source: sp.csr_matrix | None = None
        self._futures: list[Any] = []

    def of(
        self, source: sp.csr_matrix, matrix: sp.csr_matrix, active_lengths: np.ndarray
    ) -> list[Any]:
        """Futures of the partitions of ``matrix`` (the sweep's view of ``source``)."""
        if self._source is source and self._futures:
            return self._futures
        self.release()
        n_rows = matrix.shape[0]
        bounds = np.linspace(0, n_rows, max(1, min(self.partitions, n_rows)) + 1)
        bounds = np.unique(bounds.astype(np.int64))
        for start, stop in itertools.pairwise(bounds):
            first, last = matrix.indptr[start], matrix.indptr[stop]
            self._futures.append(
                self.client.submit(
                    make_partition,
                    matrix.data[first:last].copy(),
                    matrix.indices[first:last].copy(),
                    matrix.indptr[start : stop + 1] - first,
                    matrix.shape[1],
                    active_lengths[start:stop].copy(),
                    pure=False,
                )
            )
        self._source = source
        return self._futures

    def release(self) -> None:
        """Drop the partitions from the cluster."""
        for future in self._futures:
            future.release()
        self._futures = []
        self._source = None


class DaskSweep(EMSweep):
    """An :class:`~mixture.sweep.EMSweep` whose E-step runs on a Dask cluster.

    Parameters
    ----------
    client : distributed.Client
    partitions : int
        Row partitions of the counts.
    counts, counts_t, n_groups, active, word_pseudocount, weight_pseudocount
        As for :class:`~mixture.sweep.EMSweep` (which also keeps the counts here, for the
        seeding and the revival the fit runs in the client).
    """

    def __init__(
        self,
        client: Any,
        partitions: int | PartitionSet,
        counts: sp.csr_matrix,
        counts_t: sp.csr_matrix,
        n_groups: int,
        active: np.ndarray | None,
        word_pseudocount: float,
        weight_pseudocount: float,
    ) -> None:
        super().__init__(
            counts, counts_t, n_groups, active, word_pseudocount, weight_pseudocount, threads=1
        )
        self.client = client
        if isinstance(partitions, int):
            partitions = PartitionSet(client, partitions)
        self._partitions = partitions.of(counts, self.counts, self._active_lengths)
        self._reduced: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None

    @classmethod
    def factory(cls, client: Any, partitions: int | None = None) -> Callable[..., DaskSweep]:
        """A ``sweep_factory`` for :func:`mixture.em.fit_batch_em` on ``client``."""
        if partitions is None:
            threads = sum(client.nthreads().values()) or 1
            partitions = PARTITIONS_PER_THREAD * threads
        shared = PartitionSet(client, partitions)

        def make(*args: Any) -> DaskSweep:
            return cls(client, shared, *args)

        make.partition_set = shared  # type: ignore[attr-defined]
        return make

    def e_step(self, temperature: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
        """Responsibilities and log-normalisers from every partition; keeps their statistics
        for :meth:`m_step_after_e_step`."""
        log_word_prob = self._buffers[self._turn]
        log_weights = self.log_weights
        results = None
        for attempt in range(E_STEP_ATTEMPTS):
            try:
                results = self._partition_statistics(log_word_prob, log_weights, temperature)
                break
            except LOST_WORKER_ERRORS:
                # a worker died: its partitions are made again from their tasks, and the same
                # parameters give the same statistics, so the E-step is simply asked again
                if attempt == E_STEP_ATTEMPTS - 1:
                    raise
                time.sleep(RETRY_PAUSE_SECONDS * (attempt + 1))
        assert results is not None
        resp = np.vstack([r[0] for r in results]) if len(results) > 1 else results[0][0]
        log_norm = np.concatenate([r[1] for r in results])
        expected = results[0][2].copy()
        doc_counts = results[0][3].copy()
        totals = results[0][4].copy()
        for r in results[1:]:
            expected += r[2]
            doc_counts += r[3]
            totals += r[4]
        self._reduced = (doc_counts, totals, expected)
        self._resp = resp
        return resp, log_norm

    def _partition_statistics(
        self, log_word_prob: np.ndarray, log_weights: np.ndarray, temperature: float
    ) -> list[Any]:
        # a task, not scattered data: should its holder die, Dask makes it again from the graph
        theta = self.client.submit(hold, log_word_prob.copy(), pure=False)
        futures = [
            self.client.submit(
                partition_statistics, part, theta, log_weights, float(temperature), pure=False
            )
            for part in self._partitions
        ]
        return list(self.client.gather(futures))

    def m_step_after_e_step(self, resp: np.ndarray) -> None:
        """The M-step from the statistics the partitions reduced in the last E-step."""
        if self._reduced is None or resp is not self._resp:
            self.m_step(resp)  # not the E-step's answer: from the responsibilities given
            return
        doc_counts, totals, expected = self._reduced
        self._reduced = None
        self.m_step_from_statistics(doc_counts, totals, expected)

    def m_step(self, resp: np.ndarray) -> None:
        """The M-step from responsibilities changed in the client (seeding, revival)."""
        self._reduced = None
        super().m_step(resp)


def fit_texts_on_dask(
    texts: Sequence[str],
    config: MixtureConfig,
    client: Any,
    *,
    seed: int = 0,
    partitions: int | None = None,
    progress: Progress | None = None,
    labelled: Sequence[LabelledItem] = (),
) -> tuple[MixtureState, FitReport]:
    """:func:`mixture.em.fit_texts` with every E-step on the Dask cluster of ``client``.

    Parameters
    ----------
    texts : sequence of str
    config : MixtureConfig
    client : distributed.Client
    seed : int
        The same seed (and config) gives the single-process fit's state, to rounding.
    partitions : int, optional
        Row partitions of the archive (default: two per worker thread).
    progress : callable (done, total), optional
    labelled : sequence of LabelledItem
        Examples of groups (``mixroute fit --seeds``): fixed responsibilities, as in
        :func:`mixture.em.fit_texts`.

    Returns
    -------
    (MixtureState, FitReport)
    """
    factory = DaskSweep.factory(client, partitions)
    try:
        return fit_texts(
            list(texts),
            config,
            seed=seed,
            progress=progress,
            sweep_factory=factory,
            labelled=labelled,
        )
    finally:
        factory.partition_set.release()  # type: ignore[attr-defined]


__all__ = [
    "PARTITIONS_PER_THREAD",
    "DaskSweep",
    "PartitionSet",
    "check_dask_address",
    "dask_session",
    "fit_texts_on_dask",
    "hold",
    "make_partition",
    "partition_statistics",
]
