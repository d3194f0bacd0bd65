"""The evidence the group lifecycle decides on, kept in the model state.

Per group, and updated after every stepwise unit in O(words in the unit x K):

- typicality: an exponentially weighted mean and variance of the per-token log-likelihood of
  the documents whose MAP group it is (a document's weight halves after
  ``typicality_half_life`` further documents of the group). Documents found novel are left out,
  so a burst of strays does not teach the group to accept them;
- the current window (``check_every_documents`` long, or shorter once its documents hold the
  token cadence, ``LifecycleConfig.window_tokens``): each group's posterior mass, and for
  each pair the mass the two share (the smaller of the two posteriors, taken over each
  document's two most probable groups), from which the overlap coefficient of the soft
  memberships follows; the count of whole quiet windows in a row;
- the novelty buffer: the counts of recent documents their MAP group explains poorly (far below
  its typicality, or mostly words never seen before), with their stream positions (ordinals),
  bounded in size and age, and the stream position of the last birth test (the buffered
  documents after it are the evidence a birth test between windows waits for).

Everything here is part of the checkpointed state (mixture.serialize), so the lifecycle is a
function of the stream alone. :func:`dirichlet_multinomial_log_marginal` is the closed form the
birth test uses.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy.special import gammaln

from mixture.lifecycle_config import LifecycleConfig


def dirichlet_multinomial_log_marginal(
    word_counts: np.ndarray, n_words: int, pseudocount: float
) -> float:
    """Log probability of a token sequence under one unigram group with a Dirichlet prior.

    With theta ~ Dirichlet(beta, ..., beta) over V words, integrating theta out of
    prod_w theta_w ** n_w gives (the sequence probability, without the multinomial
    coefficient, as the model's own likelihoods are)::

        log Gamma(V beta) - log Gamma(N + V beta) + sum_w [log Gamma(n_w + beta) - log Gamma(beta)]

    Only words with n_w > 0 contribute to the sum, so the cost is the number of words used.

    Parameters
    ----------
    word_counts : ndarray
        Pooled counts of the words used (zeros allowed, they add nothing).
    n_words : int
        V, the size of the vocabulary the prior spreads over.
    pseudocount : float
        beta > 0, the model's word pseudo-count.

    Returns
    -------
    float
    """
    counts = np.asarray(word_counts, dtype=np.float64).ravel()
    counts = counts[counts > 0]
    total = float(counts.sum())
    v_beta = n_words * pseudocount
    return float(
        gammaln(v_beta)
        - gammaln(total + v_beta)
        + (gammaln(counts + pseudocount) - gammaln(pseudocount)).sum()
    )


@dataclass(frozen=True)
class UnitEStep:
    """One learning unit's E-step, as mixture.online has it before the update.

    Attributes
    ----------
    present : ndarray (m_all,) of bool
        Which rows of the unit had tokens (the rows below are those).
    counts : csr_matrix (m, n_words)
        Their counts over the unit's words only (column j is vocabulary id ``words[j]``).
    words : ndarray (n_words,)
        Vocabulary ids of the unit's words, sorted.
    lengths : ndarray (m,)
        Tokens per document.
    resp : ndarray (m, K)
        Posteriors under the parameters before the update (read only).
    log_norm : ndarray (m,)
        log p(d) under the mixture.
    log_weights : ndarray (K,)
        Log mixture weights used for ``resp``.
    step : float
        The unit's step size eta (the update shrinks the statistics by 1 - eta).
    mass : ndarray (K,), optional
        ``resp.sum(axis=0)``, the posterior mass of each group in the unit (None: not given).
    tokens : float, optional
        ``lengths.sum()`` (None: not given).
    """

    present: np.ndarray
    counts: sp.csr_matrix
    words: np.ndarray
    lengths: np.ndarray
    resp: np.ndarray
    log_norm: np.ndarray
    log_weights: np.ndarray
    step: float
    mass: np.ndarray | None = None
    tokens: float | None = None


@dataclass
class GroupEvidence:
    """Lifecycle evidence of a state with K groups (arrays indexed by group position).

    Attributes
    ----------
    typical_weight, typical_sum, typical_square : ndarray (K,)
        Decayed weight, sum and sum of squares of per-token log-likelihoods.
    window_mass : ndarray (K,)
        Posterior mass each group took in the current window.
    window_shared : ndarray (K, K)
        Upper triangle: mass two groups shared in the current window.
    window_documents : float
        Documents (with evidence) in the current window.
    window_start : int
        Stream position (documents learned) where the current window began.
    window_tokens : float
        Tokens of the documents in the current window (the token cadence,
        ``lifecycle.check_every_tokens``).
    births_checked_at : int
        Stream position of the last birth test: the buffered documents at or after it are
        the evidence the test has not seen (``lifecycle.birth_check_novel_documents``). -1
        until the first window closes (no birth test between windows before that).
    quiet_windows : ndarray (K,) int64
        Whole windows in a row with a posterior share under ``retire_share``.
    born_at : ndarray (K,) int64
        Stream position at which each group came to be (0 for the starting groups).
    buffer : csr_matrix (B, columns)
        Counts of the buffered novel documents (columns may lag the vocabulary's capacity).
    buffer_ordinals : ndarray (B,) int64
        Stream position of each buffered document (0-based: documents learned before it).
    buffer_log_lik : ndarray (B,)
        log p(d) of each buffered document under the mixture it arrived at (before the model
        learned it): the prequential score of the "no new group" side of the birth test. NaN
        for documents buffered by a state that did not record it (scored under the current
        mixture instead).
    held_log_scale : ndarray (K,)
        Per group, the log of the factor its word statistics are owed for the forgetting they
        were spared since the last window (``lifecycle.forget_by_own_traffic``): applied to
        the group's column once per window (mixture.lifecycle.apply_held_scale), so a unit
        costs O(K) for it.
    """

    typical_weight: np.ndarray
    typical_sum: np.ndarray
    typical_square: np.ndarray
    window_mass: np.ndarray
    window_shared: np.ndarray
    window_documents: float
    window_start: int
    quiet_windows: np.ndarray
    born_at: np.ndarray
    buffer: sp.csr_matrix
    buffer_ordinals: np.ndarray
    buffer_log_lik: np.ndarray = field(default_factory=lambda: np.zeros(0))
    held_log_scale: np.ndarray | None = None
    window_tokens: float = 0.0
    births_checked_at: int = -1

    def __post_init__(self) -> None:
        if self.held_log_scale is None:
            self.held_log_scale = np.zeros(self.typical_weight.shape[0])

    @classmethod
    def empty(cls, n_groups: int, capacity: int, start: int = 0) -> GroupEvidence:
        """No evidence yet for ``n_groups`` groups; the first window starts at ``start``."""
        k = n_groups
        return cls(
            typical_weight=np.zeros(k),
            typical_sum=np.zeros(k),
            typical_square=np.zeros(k),
            window_mass=np.zeros(k),
            window_shared=np.zeros((k, k)),
            window_documents=0.0,
            window_start=int(start),
            births_checked_at=-1,
            quiet_windows=np.zeros(k, dtype=np.int64),
            born_at=np.zeros(k, dtype=np.int64),
            buffer=sp.csr_matrix((0, capacity)),
            buffer_ordinals=np.zeros(0, dtype=np.int64),
            buffer_log_lik=np.zeros(0),
        )

    @property
    def n_groups(self) -> int:
        return int(self.typical_weight.shape[0])

    # ---- typicality -----------------------------------------------------------------------
    def typical_mean(self) -> np.ndarray:
        """Recent mean per-token log-likelihood per group (nan before any document)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.typical_weight > 0, self.typical_sum / self.typical_weight, np.nan)

    def typical_std(self) -> np.ndarray:
        """Recent standard deviation per group (nan before any document)."""
        mean = self.typical_mean()
        with np.errstate(invalid="ignore", divide="ignore"):
            var = self.typical_square / self.typical_weight - mean**2
        return np.sqrt(np.maximum(var, 0.0))

    def add_typicality(self, groups: np.ndarray, values: np.ndarray, half_life: float) -> None:
        """Fold per-token log-likelihoods of documents (by MAP group) into the typicality.

        A group that receives n documents decays its old statistics by 0.5 ** (n / half_life)
        first (the documents of one unit enter together).
        """
        k = self.typical_weight.shape[0]
        n = np.bincount(groups, minlength=k).astype(np.float64)
        decay = 0.5 ** (n / half_life)
        self.typical_weight = self.typical_weight * decay + n
        self.typical_sum = self.typical_sum * decay + np.bincount(
            groups, weights=values, minlength=k
        )
        self.typical_square = self.typical_square * decay + np.bincount(
            groups, weights=values**2, minlength=k
        )

    # ---- the novelty buffer ---------------------------------------------------------------
    def push(
        self,
        rows: sp.csr_matrix,
        ordinals: np.ndarray,
        config: LifecycleConfig,
        log_lik: np.ndarray | None = None,
    ) -> None:
        """Append novel documents; the oldest go first when the buffer is over capacity.

        ``log_lik`` is each document's log p(d) under the mixture it arrived at (NaN: unknown).
        """
        if rows.shape[0] == 0:
            return
        width = max(self.buffer.shape[1], rows.shape[1])
        stacked = sp.vstack([_widen(self.buffer, width), _widen(rows, width)], format="csr")
        ordinals = np.concatenate([self.buffer_ordinals, np.asarray(ordinals, dtype=np.int64)])
        arrived = np.full(rows.shape[0], np.nan) if log_lik is None else np.asarray(log_lik, float)
        scores = np.concatenate([self.buffer_log_lik, arrived])
        over = stacked.shape[0] - config.buffer_documents
        if over > 0:
            stacked = stacked[over:]
            ordinals = ordinals[over:]
            scores = scores[over:]
        self.buffer = stacked
        self.buffer_ordinals = ordinals
        self.buffer_log_lik = scores

    def keep_buffered(self, keep: np.ndarray) -> None:
        """Keep only the buffered documents where ``keep`` (bool, shape (B,)) is true."""
        self.buffer = self.buffer[np.flatnonzero(keep)]
        self.buffer_ordinals = self.buffer_ordinals[keep]
        self.buffer_log_lik = self.buffer_log_lik[keep]

    def forget_older_than(self, position: int) -> None:
        """Drop buffered documents whose stream position is below ``position``."""
        if self.buffer_ordinals.size and self.buffer_ordinals[0] < position:
            self.keep_buffered(self.buffer_ordinals >= position)

    def novel_since_birth_check(self) -> int:
        """Buffered documents that arrived since the last birth test (0 before the first
        window closed)."""
        if self.births_checked_at < 0 or not self.buffer_ordinals.size:
            return 0
        return int(np.count_nonzero(self.buffer_ordinals >= self.births_checked_at))

    def buffer_counts(self, capacity: int) -> sp.csr_matrix:
        """The buffer widened to the vocabulary's capacity."""
        return _widen(self.buffer, capacity)

    # ---- vocabulary maintenance (called by MixtureState) ----------------------------------
    def drop_words(self, word_ids: np.ndarray) -> None:
        """Zero out retired words in the buffer."""
        if not self.buffer.nnz:
            return
        retired = np.zeros(max(self.buffer.shape[1], int(word_ids.max(initial=-1)) + 1), bool)
        retired[word_ids] = True
        buffer = self.buffer.copy()
        hit = retired[buffer.indices]
        # A document that lost words no longer matches its arrival score: score it anew.
        rows = np.repeat(np.arange(buffer.shape[0]), np.diff(buffer.indptr))
        self.buffer_log_lik = self.buffer_log_lik.copy()
        self.buffer_log_lik[np.unique(rows[hit])] = np.nan
        buffer.data[hit] = 0.0
        buffer.eliminate_zeros()
        self.buffer = buffer

    def renumber_words(self, mapping: np.ndarray, capacity: int) -> None:
        """Apply a vocabulary compaction (old id -> new id, -1 for retired)."""
        coo = self.buffer.tocoo()
        new_cols = mapping[coo.col]
        ok = new_cols >= 0
        self.buffer = sp.csr_matrix(
            (coo.data[ok], (coo.row[ok], new_cols[ok])), shape=(self.buffer.shape[0], capacity)
        )

    # ---- changes of structure (called by mixture.lifecycle) -------------------------------
    def append_group(self, born_at: int) -> None:
        """Room for a new last group, with no evidence yet."""
        k = self.n_groups
        for name in (
            "typical_weight",
            "typical_sum",
            "typical_square",
            "window_mass",
            "held_log_scale",
        ):
            setattr(self, name, np.append(getattr(self, name), 0.0))
        shared = np.zeros((k + 1, k + 1))
        shared[:k, :k] = self.window_shared
        self.window_shared = shared
        self.quiet_windows = np.append(self.quiet_windows, 0)
        self.born_at = np.append(self.born_at, np.int64(born_at))

    def remove_group(self, position: int) -> None:
        """Forget the group at ``position`` (retired, or absorbed by a merge)."""
        for name in (
            "typical_weight",
            "typical_sum",
            "typical_square",
            "window_mass",
            "quiet_windows",
            "born_at",
            "held_log_scale",
        ):
            setattr(self, name, np.delete(getattr(self, name), position))
        shared = np.delete(np.delete(self.window_shared, position, axis=0), position, axis=1)
        self.window_shared = shared

    def absorb_group(self, survivor: int, absorbed: int) -> None:
        """Pool the evidence of ``absorbed`` into ``survivor`` (positions; before removal)."""
        for name in ("typical_weight", "typical_sum", "typical_square", "window_mass"):
            values = getattr(self, name)
            values[survivor] += values[absorbed]
        # Shared mass with third groups adds; what the pair shared is now inside one group.
        shared = self.window_shared + self.window_shared.T
        shared[survivor] += shared[absorbed]
        shared[:, survivor] += shared[:, absorbed]
        shared[survivor, survivor] = 0.0
        self.window_shared = np.triu(shared, 1)
        self.quiet_windows[survivor] = min(
            self.quiet_windows[survivor], self.quiet_windows[absorbed]
        )
        self.born_at[survivor] = min(self.born_at[survivor], self.born_at[absorbed])

    # ---- serialisation ----------------------------------------------------------------------
    def to_arrays(self) -> dict[str, np.ndarray]:
        """Plain arrays for mixture.serialize (no objects, no pickle)."""
        buffer = sp.csr_matrix(self.buffer)
        return {
            "typical_weight": self.typical_weight,
            "typical_sum": self.typical_sum,
            "typical_square": self.typical_square,
            "window_mass": self.window_mass,
            "window_shared": self.window_shared,
            "window": np.asarray(
                [
                    self.window_documents,
                    self.window_start,
                    self.window_tokens,
                    self.births_checked_at,
                ],
                dtype=np.float64,
            ),
            "quiet_windows": self.quiet_windows.astype(np.int64),
            "born_at": self.born_at.astype(np.int64),
            "buffer.data": buffer.data,
            "buffer.indices": buffer.indices.astype(np.int64),
            "buffer.indptr": buffer.indptr.astype(np.int64),
            "buffer.shape": np.asarray(buffer.shape, dtype=np.int64),
            "buffer_ordinals": self.buffer_ordinals.astype(np.int64),
            "buffer_log_lik": self.buffer_log_lik.astype(np.float64),
            "held_log_scale": np.asarray(self.held_log_scale, dtype=np.float64),
        }

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray], n_groups: int) -> GroupEvidence:
        """Inverse of :meth:`to_arrays`; ValueError when the shapes do not fit K groups."""
        shape = tuple(int(x) for x in arrays["buffer.shape"])
        buffer = sp.csr_matrix(
            (arrays["buffer.data"], arrays["buffer.indices"], arrays["buffer.indptr"]),
            shape=shape,
        )
        window = np.asarray(arrays["window"], dtype=np.float64)
        evidence = cls(
            typical_weight=np.array(arrays["typical_weight"], dtype=np.float64),
            typical_sum=np.array(arrays["typical_sum"], dtype=np.float64),
            typical_square=np.array(arrays["typical_square"], dtype=np.float64),
            window_mass=np.array(arrays["window_mass"], dtype=np.float64),
            window_shared=np.array(arrays["window_shared"], dtype=np.float64),
            window_documents=float(window[0]),
            window_start=int(window[1]),
            # States written before the token cadence: no tokens counted in the window yet.
            window_tokens=float(window[2]) if window.size > 2 else 0.0,
            # States written before births were tested between windows: last tested at the
            # window's start.
            births_checked_at=int(window[3]) if window.size > 3 else int(window[1]),
            quiet_windows=np.array(arrays["quiet_windows"], dtype=np.int64),
            born_at=np.array(arrays["born_at"], dtype=np.int64),
            buffer=buffer,
            buffer_ordinals=np.array(arrays["buffer_ordinals"], dtype=np.int64),
            # States written before the arrival scores were kept: unknown (NaN).
            buffer_log_lik=np.array(
                arrays.get("buffer_log_lik", np.full(shape[0], np.nan)), dtype=np.float64
            ),
            # States written before the own-traffic forgetting: nothing owed.
            held_log_scale=np.array(
                arrays.get("held_log_scale", np.zeros(n_groups)), dtype=np.float64
            ),
        )
        k = n_groups
        for name in (
            "typical_weight",
            "typical_sum",
            "typical_square",
            "window_mass",
            "held_log_scale",
        ):
            if getattr(evidence, name).shape != (k,):
                raise ValueError(f"lifecycle evidence {name} does not have {k} groups")
        if evidence.window_shared.shape != (k, k) or evidence.quiet_windows.shape != (k,):
            raise ValueError(f"lifecycle window evidence does not have {k} groups")
        if (
            evidence.born_at.shape != (k,)
            or buffer.shape[0] != evidence.buffer_ordinals.size
            or buffer.shape[0] != evidence.buffer_log_lik.size
        ):
            raise ValueError("lifecycle evidence is inconsistent")
        return evidence


def observe_unit(
    evidence: GroupEvidence,
    config: LifecycleConfig,
    counts: sp.csr_matrix,
    resp: np.ndarray,
    log_norm: np.ndarray,
    log_weights: np.ndarray,
    lengths: np.ndarray,
    unknown_tokens: np.ndarray | None,
    ordinals: np.ndarray,
    words: np.ndarray | None = None,
    columns: int = 0,
    step: float = 0.0,
    mass: np.ndarray | None = None,
    tokens: float | None = None,
) -> int:
    """Update the evidence with one unit's E-step and buffer its novel documents.

    Parameters
    ----------
    evidence : GroupEvidence
        Changed in place.
    config : LifecycleConfig
    counts : csr_matrix (m, capacity), or (m, n_words) with ``words``
        The unit's documents with evidence (rows of ``resp``).
    resp : ndarray (m, K)
        Posteriors under the parameters before the unit's update.
    log_norm : ndarray (m,)
        log p(d) under the mixture.
    log_weights : ndarray (K,)
        Log mixture weights used for ``resp``.
    lengths : ndarray (m,)
        Tokens per document.
    unknown_tokens : ndarray (m,) or None
        Tokens of words the model had not seen before this unit (None: no such word).
    ordinals : ndarray (m,) int64
        Stream positions of the documents.
    words : ndarray (n_words,), optional
        Vocabulary id of each column of ``counts`` (None: the columns are vocabulary ids).
    columns : int
        With ``words``: the width of the buffered rows (the vocabulary's capacity).
    step : float
        The unit's stepwise step size eta (used by ``forget_by_own_traffic``).
    mass : ndarray (K,), optional
        ``resp.sum(axis=0)`` when the caller has it already (the E-step's).
    tokens : float, optional
        ``lengths.sum()`` when the caller has it already.

    Returns
    -------
    int
        Documents sent to the buffer.
    """
    m, k = resp.shape
    rows = np.arange(m)
    groups = resp.argmax(axis=1)
    weight = evidence.typical_weight
    # One errstate for the unit (a context costs as much as a small array operation): a group
    # without documents has 0/0 moments (nan), and its documents are not judged.
    with np.errstate(invalid="ignore", divide="ignore"):
        map_log_lik = np.log(resp[rows, groups]) + log_norm - log_weights[groups]
        per_token = map_log_lik / lengths
        # typical_mean and typical_std, and each group's novelty bound, once per group (the
        # same arithmetic as per document): -inf where a group is not judged yet
        group_mean = np.where(weight > 0, evidence.typical_sum / weight, np.nan)
        group_var = evidence.typical_square / weight - group_mean**2
        bound = group_mean - config.novelty_z * np.sqrt(np.maximum(group_var, 0.0))
        bound = np.where(weight >= config.typicality_min_documents, bound, -np.inf)
        novel = per_token < bound.take(groups)
    if unknown_tokens is not None:  # None: every word of the unit was known
        novel |= unknown_tokens > config.novel_unknown_share * lengths
    any_novel = bool(novel.any())  # np.flatnonzero costs more than a unit without novelty

    finite = np.isfinite(per_token)
    if not any_novel and finite.all():  # the usual unit: every document is typical
        evidence.add_typicality(groups, per_token, config.typicality_half_life)
    else:
        keep = ~novel & finite
        evidence.add_typicality(groups[keep], per_token[keep], config.typicality_half_life)

    unit_mass = resp.sum(axis=0) if mass is None else mass
    evidence.window_mass += unit_mass
    evidence.window_documents += m
    evidence.window_tokens += float(lengths.sum() if tokens is None else tokens)
    if config.forget_by_own_traffic and step > 0:
        # The stepwise update shrinks every group's statistics by (1 - eta). A group's word
        # statistics should shrink only for the traffic it received: by (1 - eta) ** u with
        # u = (its share of the unit) / (its weight), at most 1 (a stationary group's u
        # averages 1; a group whose topic stopped has u near 0 and keeps its distribution).
        # The difference is owed to the group and applied once per window.
        traffic = np.minimum(unit_mass / (m * np.exp(log_weights)), 1.0)
        evidence.held_log_scale += (traffic - 1.0) * np.log1p(-step)
    if k > 1:
        top_two = np.argpartition(resp, k - 2, axis=1)[:, k - 2 :]
        shared = resp[rows, top_two[:, 0]]  # the runner-up's posterior is the smaller one
        low = np.minimum(top_two[:, 0], top_two[:, 1])
        high = np.maximum(top_two[:, 0], top_two[:, 1])
        if not evidence.window_shared.flags.c_contiguous:
            evidence.window_shared = np.ascontiguousarray(evidence.window_shared)
        # the same additions in the same order, on the flat view (ufunc.at's fast 1-D path)
        np.add.at(evidence.window_shared.reshape(-1), low * k + high, shared)

    if not any_novel:
        return 0
    chosen = np.flatnonzero(novel)
    rows = counts[chosen]
    if words is not None:  # back to vocabulary ids (same entries, same order)
        rows = sp.csr_matrix(
            (rows.data, words[rows.indices], rows.indptr),
            shape=(chosen.size, max(columns, int(words[-1]) + 1)),
        )
    evidence.push(rows, ordinals[chosen], config, log_norm[chosen])
    return int(chosen.size)


def overlap_coefficients(evidence: GroupEvidence) -> np.ndarray:
    """Overlap coefficient of each pair's soft memberships in the window, upper triangle (K, K).

    shared(a, b) / min(mass(a), mass(b)): 1 when the smaller group's posterior mass is all
    shared with the other, 0 when no document hesitates between them.
    """
    mass = evidence.window_mass
    smaller = np.minimum(mass[:, None], mass[None, :])
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(smaller > 0, evidence.window_shared / smaller, 0.0)
    k = mass.shape[0]
    if k > _CACHED_TRIANGLES:
        return np.triu(out, 1)
    return np.where(_lower_triangle(k), 0.0, out)  # np.triu(out, 1), its mask kept


_CACHED_TRIANGLES = 512  # K up to which the triangle masks are kept (at most 256 kB each)


@functools.lru_cache(maxsize=8)
def _lower_triangle(k: int) -> np.ndarray:
    """The mask np.triu(x, 1) zeroes (diagonal and below), (k, k) bool, read only: built
    once per K (np.tri costs more than the rest of the overlap at small K)."""
    mask = np.tri(k, k, 0, dtype=bool)
    mask.flags.writeable = False
    return mask


def _widen(matrix: sp.csr_matrix, columns: int) -> sp.csr_matrix:
    if matrix.shape[1] == columns:
        return matrix
    return sp.csr_matrix(
        (matrix.data, matrix.indices, matrix.indptr), shape=(matrix.shape[0], columns)
    )
