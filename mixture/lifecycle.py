"""Groups that change: birth, merge and retirement as pure operations on the statistics.

The operations (:func:`birth`, :func:`merge`, :func:`retire`) change a state's structure in
place and return a :class:`GroupEvent`; :func:`run_due_decisions` decides, from the evidence in
the state (mixture.novelty), which of them to apply when the evidence window closes (at most
every ``check_every_documents`` learned documents, or its token cadence); the birth test also
runs between windows once the novelty buffer has gained ``birth_check_novel_documents`` new
documents (a birth rests on the buffer's evidence, not the window's). Groups are named by
stable ids (``state.group_ids``: position -> id); an id is never given to another group, so an
id that is gone (retired, or absorbed by a merge) stays gone. Positions are an internal detail
and shift when a group leaves.

What each operation does to the statistics (stored as running averages times a scale; see
mixture.stats), in count units:

- birth: the founding documents' counts become the new group's statistics, one document's
  worth each, and are taken out of the groups that claim them now, in proportion to their
  posteriors under the current parameters (clipped at what a group holds). Total documents
  and word counts are preserved (up to the clipping); the effective sample size is unchanged,
  because the same documents are only assigned anew;
- merge: the absorbed group's statistics add to the survivor's; every total is preserved;
- retirement: the group's column is removed with its mass. The documents it explained are
  forgotten, the other groups' counts are unchanged, and the weights renormalise over the
  groups that remain (the log weights divide by the remaining total). The running average
  sums to less than one after this and returns towards one as the stream goes on.

Decisions, and the principle behind each (thresholds in mixture.lifecycle_config):

- birth: a Bayes factor, because both hypotheses have closed forms and it needs no tuning of a
  parameter count. The buffer is split by a small batch-EM fit (at most four components);
  for each component C with enough documents,
  ln BF = [ln DM(C) + n ln w + (S - n) ln(1 - w)] - sum_{d in C} ln p(d | mixture at d's
  arrival) - (1/2) ln S, where DM is the Dirichlet-multinomial marginal likelihood of C's
  pooled counts with the model's word pseudo-count as the Dirichlet parameter over the active
  vocabulary (the new group's word distribution integrated out), S the stream span in which
  C's documents arrived, w = n / S the new group's weight there, and (1/2) ln S the BIC
  penalty for that one fitted weight (Schwarz 1978). The new hypothesis assigns C's
  documents to the new group outright, a lower bound of its mixture likelihood, so the test
  leans towards no birth. Every component above the threshold is born (they are disjoint
  sets of documents), the largest ln BF first, up to the ceiling. Before that, components of
  the split are joined while one Dirichlet-multinomial group explains a pair better than two
  (:func:`components_log_bayes_factor` > 0, the same closed form, with the assignment term and
  a BIC penalty for the second group's weight) and the union's ln BF is above each part's
  alone (one new group beats "only one part is new, the other's documents stay with the
  mixture"): the split asks for four components whatever the buffer holds, and without the
  join one new topic gave several births at one decision (BBC drift: sport born four times,
  filling the ceiling before the last topic came); without the second condition a new
  topic's component was joined to strays the mixture explains and the union was rejected
  (WordNet glosses, :func:`join_components`). When the ceiling leaves less room than
  components passed, each further component is born if, with the merge of the pair of
  groups that loses least evidence (:func:`cheapest_merge`: :func:`components_log_bayes_factor`
  on the pair's statistics), the sum of the two log Bayes factors still passes the birth
  threshold: at a fixed number of groups the two are one move of the model. Failing that,
  groups quiet (share under the retirement floor) for at least one whole window are retired
  to make it: a documented new topic outweighs one more window of waiting for a topic that
  stopped.

  Both sides are prequential scores (Dawid 1984): DM(C) is the product of the new group's
  predictive probabilities of C's documents, each given only the ones before it, and the
  "no birth" side is each document's probability under the mixture as it stood when the
  document arrived, before the model learned it (kept with the buffered counts,
  ``GroupEvidence.buffer_log_lik``). Scoring that side with the mixture at decision time
  instead counts the documents twice: the stepwise updates have absorbed them since, and on
  WordNet drift streams that in-sample gain was 1 to 2 nats per token, enough to reject every
  new topic (at the first decision on the 26 noun files, four components scored ln BF -750
  to -620 under the current mixture and +260 to +610 with their arrival scores). The
  documents are in the buffer because they scored low on arrival, which favours a birth; the
  guard against that is measured, not assumed: on a shuffled (stationary) stream of the same
  glosses with the true number of groups, no birth happens (tests/test_lifecycle_corpus.py).
- merge: two groups merge when the overlap coefficient of their soft memberships in the last
  window is high (documents cannot tell them apart) and the squared Jensen-Shannon distance
  of their word distributions (scipy.spatial.distance.jensenshannon, base 2) is small. The
  survivor is the group with more expected documents (the lower id on a tie).
- retirement: a group whose posterior share stayed under a floor for whole windows in a row.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.sparse as sp
from scipy.spatial.distance import jensenshannon

from mixture.em import e_step, fit_batch_em
from mixture.errors import InputError
from mixture.kernels import smoothed_log_word_prob, softmax_rows
from mixture.lifecycle_config import LifecycleConfig
from mixture.novelty import (
    GroupEvidence,
    UnitEStep,
    dirichlet_multinomial_log_marginal,
    observe_unit,
    overlap_coefficients,
)
from mixture.stats import MixtureState, derive_parameters

BIRTH = "birth"
MERGE = "merge"
RETIRE = "retire"

# Components of the local fit on the novelty buffer (a new topic or two at a time).
_BUFFER_COMPONENTS = 4


@dataclass(frozen=True)
class GroupEvent:
    """One change of the model's groups.

    Attributes
    ----------
    kind : str
        "birth", "merge" or "retire".
    groups : tuple of int
        Group ids: (new,) for a birth, (survivor, absorbed) for a merge, (retired,).
    reason : str
        Why, in words, with the decisive numbers.
    position : int
        Stream position (documents learned) at which it happened.
    documents : tuple of int
        Stream positions of a birth's founding documents (empty for the other kinds).
    evidence : dict
        The numbers the decision used (JSON-able floats).
    """

    kind: str
    groups: tuple[int, ...]
    reason: str
    position: int
    documents: tuple[int, ...] = ()
    evidence: dict[str, float] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dict."""
        return {
            "kind": self.kind,
            "groups": list(self.groups),
            "reason": self.reason,
            "position": self.position,
            "documents": list(self.documents),
            "evidence": dict(self.evidence),
        }


def position_of(state: MixtureState, group_id: int) -> int:
    """Array position of a group id; InputError when no current group has that id."""
    assert state.group_ids is not None
    hits = np.flatnonzero(state.group_ids == group_id)
    if hits.size != 1:
        raise InputError(f"no current group has id {group_id}")
    return int(hits[0])


# ---- the operations ------------------------------------------------------------------------
def birth(
    state: MixtureState,
    counts: sp.spmatrix,
    *,
    reason: str,
    documents: tuple[int, ...] = (),
    evidence: dict[str, float] | None = None,
) -> GroupEvent:
    """Add a group made of some documents, with a new id.

    Parameters
    ----------
    state : MixtureState
        Warmed up; changed in place.
    counts : sparse matrix (n, <= capacity)
        The founding documents' word counts over the state's vocabulary ids.
    reason : str
    documents : tuple of int
        Their stream positions, for the record.
    evidence : dict, optional
        Numbers behind the decision, for the record.

    Returns
    -------
    GroupEvent
    """
    if not state.warmed_up:
        raise InputError("a birth needs a warmed-up state")
    matrix = sp.csr_matrix(counts, dtype=np.float64)
    if matrix.shape[1] > state.capacity:
        raise InputError("founding counts have more columns than the vocabulary has ids")
    active = state.vocabulary.active_mask()
    used, local = np.unique(matrix.indices, return_inverse=True)
    keep_words = active[used] if used.size else np.zeros(0, dtype=bool)
    local_counts = sp.csr_matrix(
        (matrix.data, local.astype(np.int32), matrix.indptr), shape=(matrix.shape[0], used.size)
    )[:, np.flatnonzero(keep_words)]
    used = used[keep_words]
    lengths = np.asarray(local_counts.sum(axis=1)).ravel()
    local_counts = local_counts[lengths > 0]
    n_docs = local_counts.shape[0]
    if n_docs == 0:
        raise InputError("a birth needs founding documents with known words")

    # Take the documents out of the groups that claim them now (their current posteriors).
    scale = state.count_scale
    log_joint = np.asarray(local_counts @ state.log_word_prob_rows(used)) + state.log_weights()
    softmax_rows(log_joint)
    resp = log_joint
    taken_word = np.minimum(np.asarray(local_counts.T @ resp), state.unscaled_word[used] * scale)
    taken_docs = np.minimum(resp.sum(axis=0), state.unscaled_docs * scale)
    state.unscaled_word[used] -= taken_word / scale
    state.unscaled_docs = state.unscaled_docs - taken_docs / scale
    state.unscaled_total = state.unscaled_total - taken_word.sum(axis=0) / scale

    new_word = np.asarray(local_counts.sum(axis=0)).ravel()
    column = np.zeros((state.unscaled_word.shape[0], 1))
    column[used, 0] = new_word / scale
    state.unscaled_word = np.hstack([state.unscaled_word, column])
    state.unscaled_docs = np.append(state.unscaled_docs, n_docs / scale)
    state.unscaled_total = np.append(state.unscaled_total, new_word.sum() / scale)
    new_id = int(state.next_group_id)
    assert state.group_ids is not None
    state.group_ids = np.append(state.group_ids, np.int64(new_id))
    state.next_group_id = new_id + 1
    state.touch()

    if state.evidence is not None:
        state.evidence.append_group(state.documents_learned)
        # The new group's typicality starts from its founders under its own parameters.
        own = np.asarray(local_counts @ state.log_word_prob_rows(used)[:, -1]).ravel()
        state.evidence.add_typicality(
            np.full(n_docs, state.n_groups - 1),
            own / lengths[lengths > 0],
            state.config.lifecycle.typicality_half_life,
        )
    numbers = {"documents": float(n_docs), **(evidence or {})}
    return GroupEvent(BIRTH, (new_id,), reason, state.documents_learned, documents, numbers)


def merge(
    state: MixtureState,
    survivor_id: int,
    absorbed_id: int,
    *,
    reason: str,
    evidence: dict[str, float] | None = None,
) -> GroupEvent:
    """Add the statistics of one group to another's; the absorbed id is gone for good.

    The absorbed group's labelled documents move to the survivor. Two groups that both hold
    labelled documents never merge (operators said they are different): InputError.
    """
    if survivor_id == absorbed_id:
        raise InputError("a group cannot merge with itself")
    a = position_of(state, survivor_id)
    b = position_of(state, absorbed_id)
    if state.labelled.holds_group(survivor_id) and state.labelled.holds_group(absorbed_id):
        raise InputError(
            f"groups {survivor_id} and {absorbed_id} both hold labelled documents: never merged"
        )
    state.labelled.move_group(absorbed_id, survivor_id)
    absorbed_docs = float(state.expected_documents()[b])
    state.unscaled_word[:, a] += state.unscaled_word[:, b]
    state.unscaled_docs = state.unscaled_docs.copy()
    state.unscaled_docs[a] += state.unscaled_docs[b]
    state.unscaled_total = state.unscaled_total.copy()
    state.unscaled_total[a] += state.unscaled_total[b]
    if state.evidence is not None:
        state.evidence.absorb_group(a, b)
    _remove_position(state, b)
    numbers = {"absorbed_documents": absorbed_docs, **(evidence or {})}
    return GroupEvent(
        MERGE, (survivor_id, absorbed_id), reason, state.documents_learned, (), numbers
    )


def retire(
    state: MixtureState,
    group_id: int,
    *,
    reason: str,
    evidence: dict[str, float] | None = None,
) -> GroupEvent:
    """Remove a group and its mass; the weights renormalise over the groups that remain."""
    if state.n_groups <= 1:
        raise InputError("the last group cannot be retired")
    g = position_of(state, group_id)
    if state.labelled.holds_group(group_id):
        raise InputError(f"group {group_id} holds labelled documents: it is never retired")
    removed = float(state.expected_documents()[g])
    _remove_position(state, g)
    numbers = {"removed_documents": removed, **(evidence or {})}
    return GroupEvent(RETIRE, (group_id,), reason, state.documents_learned, (), numbers)


def _remove_position(state: MixtureState, position: int) -> None:
    state.unscaled_word = np.delete(state.unscaled_word, position, axis=1)
    state.unscaled_docs = np.delete(state.unscaled_docs, position)
    state.unscaled_total = np.delete(state.unscaled_total, position)
    assert state.group_ids is not None
    state.group_ids = np.delete(state.group_ids, position)
    if state.evidence is not None:
        state.evidence.remove_group(position)
    state.touch()


# ---- the decisions -------------------------------------------------------------------------
def ensure_evidence(state: MixtureState) -> GroupEvidence:
    """The state's lifecycle evidence, created empty (window starting now) when missing."""
    if state.evidence is None or state.evidence.n_groups != state.n_groups:
        state.evidence = GroupEvidence.empty(
            state.n_groups, state.capacity, start=state.documents_learned
        )
    return state.evidence


def seed_typicality(state: MixtureState, documents: sp.spmatrix) -> None:
    """Start each group's typicality from the documents of its warm-up fit.

    Without this the first ``typicality_min_documents`` of every group after the warm-up go
    unjudged, and on a stream whose topics move those are the very documents of the next
    topic: they widen the typicality they should have stood out from (on BBC by category the
    buffer then never held enough documents for a birth). The warm-up documents are the
    groups' own documents, scored by their MAP group under the fitted parameters. Words
    retired since the documents were counted are left out.

    Parameters
    ----------
    state : MixtureState
        Just warmed up; its evidence is created when missing.
    documents : sparse matrix (n, <= capacity)
        The warm-up documents' counts over the state's vocabulary ids.
    """
    evidence = ensure_evidence(state)
    matrix = sp.csr_matrix(documents, dtype=np.float64)
    active = state.vocabulary.active_mask()[: matrix.shape[1]]
    used = np.unique(matrix.indices)
    used = used[active[used]]
    local = matrix[:, used]
    lengths = np.asarray(local.sum(axis=1)).ravel()
    local = local[lengths > 0]
    if local.shape[0] == 0:
        return
    log_weights = state.log_weights()
    log_joint = np.asarray(local @ state.log_word_prob_rows(used)) + log_weights
    groups = log_joint.argmax(axis=1)
    own = log_joint[np.arange(groups.size), groups] - log_weights[groups]
    evidence.add_typicality(
        groups, own / lengths[lengths > 0], state.config.lifecycle.typicality_half_life
    )


def run_due_decisions(state: MixtureState) -> list[GroupEvent]:
    """Close the evidence window when it is full and apply the changes it calls for; between
    windows, run the birth test alone when the buffer has gained enough new documents
    (:func:`birth_check_is_due`).

    Retirements first, then merges, then the births. Cost: O(K^2) for the overlap,
    O(V) per merge candidate, and a small batch-EM fit on the bounded novelty buffer.

    Returns
    -------
    list of GroupEvent
        In the order applied (empty when the window is not full and no birth test is due).
    """
    config = state.config.lifecycle
    evidence = state.evidence
    if evidence is None:
        return []
    if not window_is_full(evidence, config, state.config.warmup_tokens):
        if not birth_check_is_due(evidence, config):
            return []
        # A birth rests on the buffer's evidence, not the window's: test it as soon as the
        # buffer has gained enough new documents. Merges and retirements wait for the window.
        apply_held_scale(state)  # a birth takes counts out of the columns: make them exact
        events = _births_from_buffer(state, evidence, config)
        assert state.evidence is not None
        state.evidence.births_checked_at = state.documents_learned
        return events
    apply_held_scale(state)
    events: list[GroupEvent] = []
    events += _retirements(state, evidence, config)
    events += _merges(state, evidence, config)
    events += _births_from_buffer(state, evidence, config)
    evidence = state.evidence
    assert evidence is not None
    evidence.window_mass = np.zeros(state.n_groups)
    evidence.window_shared = np.zeros((state.n_groups, state.n_groups))
    evidence.window_documents = 0.0
    evidence.window_tokens = 0.0
    evidence.window_start = state.documents_learned
    evidence.births_checked_at = state.documents_learned
    return events


def birth_check_is_due(evidence: GroupEvidence, config: LifecycleConfig) -> bool:
    """Whether the novelty buffer gained enough documents since the last birth test for
    another one before the window closes (``lifecycle.birth_check_novel_documents``; none
    before the first window after the warm-up has closed)."""
    every = config.birth_check_every()
    return every > 0 and evidence.novel_since_birth_check() >= every


def window_is_full(evidence: GroupEvidence, config: LifecycleConfig, warmup_tokens: int) -> bool:
    """Whether the evidence window holds enough for a decision.

    The window closes at ``check_every_documents`` documents or at the token cadence
    (:meth:`LifecycleConfig.window_tokens`, by default the warm-up's token count), whichever
    comes first: a decision then rests on as much text as the starting groups were fitted on.

    Parameters
    ----------
    evidence : GroupEvidence
    config : LifecycleConfig
    warmup_tokens : int
        The model's ``warmup_tokens`` (0: no token cadence unless one is set).
    """
    if evidence.window_documents >= config.check_every_documents:
        return True
    tokens = config.window_tokens(warmup_tokens)
    return tokens > 0 and evidence.window_documents > 0 and evidence.window_tokens >= tokens


def apply_held_scale(state: MixtureState) -> None:
    """Give each group's word statistics the forgetting they were spared (O(V) per group
    whose factor is not 1; ``lifecycle.forget_by_own_traffic``, see mixture.novelty).

    Per group k and unit t, stepwise EM does s_k <- (1 - eta_t) s_k + eta_t b_kt for all
    groups alike; own-traffic forgetting wants s_k <- (1 - eta_t) ** u_kt s_k + eta_t b_kt.
    Between windows the state keeps the first recursion's column times exp(-H_kt) for the
    units' additions (H_kt: the owed log factor, sum of (u - 1) ln(1 - eta), up to t), so
    multiplying the column by exp(H_k) here gives the second recursion exactly; in between,
    each group's column is the exact one times a per-group constant, so its word
    distribution is exact up to the pseudo-count's share.
    """
    evidence = state.evidence
    if evidence is None or evidence.held_log_scale is None:
        return
    owed = np.flatnonzero(evidence.held_log_scale != 0.0)
    if owed.size == 0:
        return
    factor = np.exp(evidence.held_log_scale[owed])
    if 8 * owed.size >= state.n_groups:
        # Every column in place, factor 1 (exact) where nothing is owed: a gather and scatter
        # of the owed columns moves several times the memory once more than an eighth of them
        # are owed (V = 150,000, K = 50: 56 ms for all columns against 6 ms in place).
        every = np.ones(state.n_groups)
        every[owed] = factor
        state.unscaled_word *= every
        state.unscaled_total = state.unscaled_total * every
    else:
        state.unscaled_word[:, owed] *= factor
        state.unscaled_total = state.unscaled_total.copy()
        state.unscaled_total[owed] *= factor
    evidence.held_log_scale = np.zeros(state.n_groups)
    state.touch()


def _retirements(
    state: MixtureState, evidence: GroupEvidence, config: LifecycleConfig
) -> list[GroupEvent]:
    share = evidence.window_mass / evidence.window_documents
    whole = evidence.born_at <= evidence.window_start  # present for the whole window
    quiet = whole & (share < config.retire_share)
    evidence.quiet_windows = np.where(quiet, evidence.quiet_windows + 1, 0)
    due = evidence.quiet_windows >= config.retire_windows
    if not due.any():
        return []
    due = np.flatnonzero(due)
    due = due[np.argsort(share[due], kind="stable")]  # the quietest first
    assert state.group_ids is not None
    # Operators' labelled documents keep a group alive (mixture.labelled).
    due = np.array(
        [g for g in due if not state.labelled.holds_group(int(state.group_ids[g]))], dtype=np.int64
    )
    found = [
        (int(state.group_ids[g]), float(share[g]), int(evidence.quiet_windows[g])) for g in due
    ]
    events = []
    for group_id, group_share, windows in found:
        if state.n_groups <= 1:
            break
        events.append(
            retire(
                state,
                group_id,
                reason=(
                    f"posterior share {group_share:.2g} under the floor {config.retire_share:g} "
                    f"for {windows} windows of {config.check_every_documents} documents"
                ),
                evidence={
                    "window_share": group_share,
                    "quiet_windows": float(windows),
                    "floor": config.retire_share,
                },
            )
        )
    return events


def _merges(
    state: MixtureState, evidence: GroupEvidence, config: LifecycleConfig
) -> list[GroupEvent]:
    if state.n_groups < 2:
        return []
    overlap = overlap_coefficients(evidence)
    mass = evidence.window_mass
    enough = mass >= config.birth_min_documents
    hits = (overlap >= config.merge_overlap) & enough[:, None] & enough[None, :]
    if not hits.any():
        return []
    candidates = np.argwhere(hits)
    order = np.argsort(-overlap[candidates[:, 0], candidates[:, 1]], kind="stable")
    assert state.group_ids is not None
    ids = state.group_ids.copy()
    pairs = [(int(ids[a]), int(ids[b]), float(overlap[a, b])) for a, b in candidates[order]]
    touched: set[int] = set()
    events = []
    for first, second, coefficient in pairs:
        if first in touched or second in touched:
            continue
        if state.labelled.holds_group(first) and state.labelled.holds_group(second):
            continue  # operators' labels say the two are different groups
        a, b = position_of(state, first), position_of(state, second)
        p, q = _word_distributions(state, (a, b))
        divergence = float(jensenshannon(p, q, base=2) ** 2)
        if divergence >= config.merge_divergence:
            continue
        survivor, absorbed = survivor_and_absorbed(state, first, second)
        touched.update((first, second))
        events.append(
            merge(
                state,
                survivor,
                absorbed,
                reason=(
                    f"posterior overlap {coefficient:.2f} >= {config.merge_overlap:g} and word "
                    f"divergence {divergence:.3f} < {config.merge_divergence:g} bits"
                ),
                evidence={"overlap": coefficient, "js_divergence": divergence},
            )
        )
    return events


def _word_distributions(state: MixtureState, positions: tuple[int, ...]) -> np.ndarray:
    """Word distributions over the active words of some groups, one per row: O(V) per group.

    The same smoothed estimates as the E-step's (``MixtureState.log_word_prob_rows``, with the
    running totals), for a few columns only: the whole V x K parameters would cost more than
    the window's learning (derive_parameters is the dense cost of an EM iteration).
    """
    columns = list(positions)
    ids = np.flatnonzero(state.vocabulary.active_mask())
    scale = state.count_scale
    log_prob = smoothed_log_word_prob(
        state.unscaled_word[ids[:, None], columns] * scale,
        state.unscaled_total[columns] * scale,
        state.vocabulary.n_active,
        state.config.word_pseudocount,
    )
    return np.exp(log_prob.T)


def birth_log_bayes_factor(
    state: MixtureState,
    counts: sp.csr_matrix,
    ordinals: np.ndarray,
    arrival_log_lik: np.ndarray | None = None,
) -> float:
    """ln BF of "one new group" against "the current mixture" for some documents.

    See the module docstring for the formula. ``counts`` are rows over the vocabulary ids;
    ``ordinals`` their stream positions (the span runs from the oldest to now);
    ``arrival_log_lik`` their log p(d) under the mixture they arrived at (NaN or None: scored
    under the current mixture, which has learned them since).
    """
    matrix = sp.csr_matrix(counts, dtype=np.float64)
    known, mixture_side = _no_birth_scores(state, matrix, arrival_log_lik)
    if not known.any():
        return -np.inf
    return _new_group_side(state, matrix[known], ordinals) - float(mixture_side[known].sum())


def _no_birth_scores(
    state: MixtureState, matrix: sp.csr_matrix, arrival_log_lik: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray]:
    """Which rows have an active word, and each row's log p(d) on the "no birth" side: its
    arrival score where known, else under the current mixture (O(words x K))."""
    active = state.vocabulary.active_mask()
    used = np.unique(matrix.indices)
    used = used[active[used]]
    local = matrix[:, used]
    known = np.asarray(local.sum(axis=1)).ravel() > 0
    arrived = (
        np.full(matrix.shape[0], np.nan)
        if arrival_log_lik is None
        else np.asarray(arrival_log_lik, dtype=np.float64)
    )
    scores = np.full(matrix.shape[0], np.nan)
    if known.any():
        log_joint = np.asarray(local[known] @ state.log_word_prob_rows(used)) + state.log_weights()
        log_norm = softmax_rows(log_joint)
        scores[known] = np.where(np.isnan(arrived[known]), log_norm, arrived[known])
    return known, scores


def _new_group_side(state: MixtureState, matrix: sp.csr_matrix, ordinals: np.ndarray) -> float:
    """The "one new group" side of the birth test for documents with active words: the
    Dirichlet-multinomial marginal of their pooled counts, the weight terms over their span
    and the BIC penalty of the one weight (module docstring). O(words used)."""
    active = state.vocabulary.active_mask()
    pooled = np.asarray(matrix.sum(axis=0)).ravel()
    width = min(pooled.size, active.size)
    pooled = pooled[:width][active[:width]]
    n = matrix.shape[0]
    new_group = dirichlet_multinomial_log_marginal(
        pooled, state.vocabulary.n_active, state.config.word_pseudocount
    )
    span = float(max(state.documents_learned - int(np.min(ordinals)), n))
    weight = n / span
    weight_terms = n * np.log(weight) + ((span - n) * np.log1p(-weight) if span > n else 0.0)
    return float(new_group + weight_terms - 0.5 * np.log(span))


def _births_from_buffer(
    state: MixtureState, evidence: GroupEvidence, config: LifecycleConfig
) -> list[GroupEvent]:
    """Every component of the buffer's local fit whose ln BF passes becomes a group (the
    largest first, up to the ceiling). The components are disjoint sets of documents, so
    each test stands on its own evidence. When the ceiling leaves less room than components
    passed, each further one is born only if, with the merge that loses least evidence, it
    still passes (:func:`_merges_for_room`)."""
    evidence.forget_older_than(state.documents_learned - config.buffer_horizon_documents)
    room = config.ceiling(state.config.n_groups) - state.n_groups
    n_buffered = evidence.buffer.shape[0]
    if n_buffered < config.birth_min_documents or (room <= 0 and state.n_groups < 2):
        return []  # no room can be made: the last group neither merges nor yields
    buffered = evidence.buffer_counts(state.capacity)
    labels = _split_buffer(state, buffered, config)
    labels = join_components(
        buffered, labels, state, evidence.buffer_ordinals, evidence.buffer_log_lik
    )
    passed: list[tuple[float, np.ndarray]] = []
    for label in np.unique(labels[labels >= 0]):  # after join_components
        members = np.flatnonzero(labels == label)
        if members.size < config.birth_min_documents:
            continue
        score = birth_log_bayes_factor(
            state,
            buffered[members],
            evidence.buffer_ordinals[members],
            evidence.buffer_log_lik[members],
        )
        if score > config.birth_log_bayes_factor:
            passed.append((score, members))
    passed.sort(key=lambda item: -item[0])
    # Under a full ceiling, a further component's place comes from the merge that loses
    # least evidence when the two changes together pass the birth test; failing that, from a
    # group quiet for a whole window.
    events = _merges_for_room(state, [score for score, _ in passed], room, config)
    room = config.ceiling(state.config.n_groups) - state.n_groups
    for group_id in _yielding_groups(state, evidence)[: max(len(passed) - room, 0)]:
        windows = int(evidence.quiet_windows[position_of(state, group_id)])
        events.append(
            retire(
                state,
                group_id,
                reason=(
                    f"posterior share under the floor {config.retire_share:g} for {windows} "
                    "whole window(s), and a new group needs its place under the ceiling of "
                    f"{config.ceiling(state.config.n_groups)}"
                ),
                evidence={
                    "quiet_windows": float(windows),
                    "floor": config.retire_share,
                    "yielded_to_birth": 1.0,
                },
            )
        )
    room = config.ceiling(state.config.n_groups) - state.n_groups
    keep = np.ones(n_buffered, dtype=bool)
    for score, members in passed[: max(room, 0)]:
        ordinals = tuple(int(x) for x in evidence.buffer_ordinals[members])
        events.append(
            birth(
                state,
                buffered[members],
                reason=(
                    f"{members.size} novel documents form one group: ln Bayes factor "
                    f"{score:.1f} > {config.birth_log_bayes_factor:g}"
                ),
                documents=ordinals,
                evidence={"log_bayes_factor": score, "buffered": float(n_buffered)},
            )
        )
        keep[members] = False
    if not keep.all():
        assert state.evidence is not None
        state.evidence.keep_buffered(keep)
    return events


def _merges_for_room(
    state: MixtureState, scores: list[float], room: int, config: LifecycleConfig
) -> list[GroupEvent]:
    """Merges that make room under the ceiling for the components beyond it.

    ``scores`` are the passing components' ln BF, strongest first; the first ``room`` need no
    place. Each further component is born only if its ln BF plus that of the merge losing the
    least evidence (:func:`cheapest_merge`, a negative number when two groups explain their
    documents better than one) still passes ``birth_log_bayes_factor``: the two changes
    together are one move of the model at a fixed number of groups, held to the birth's own
    standard. Scores fall and merge costs rise, so the first that fails ends the round.
    """
    events: list[GroupEvent] = []
    ceiling = config.ceiling(state.config.n_groups)
    for score in scores[max(room, 0) :]:
        found = cheapest_merge(state)
        if found is None:
            break
        merge_score, survivor, absorbed = found
        if score + merge_score <= config.birth_log_bayes_factor:
            break
        events.append(
            merge(
                state,
                survivor,
                absorbed,
                reason=(
                    f"room under the ceiling of {ceiling} for a new group (ln Bayes factor "
                    f"{score:.1f}): of all pairs, these two lose least as one group (ln Bayes "
                    f"factor {merge_score:.1f}), and the two changes together pass "
                    f"{config.birth_log_bayes_factor:g}"
                ),
                evidence={
                    "log_bayes_factor": merge_score,
                    "birth_log_bayes_factor": score,
                    "made_room": 1.0,
                },
            )
        )
    return events


def cheapest_merge(state: MixtureState) -> tuple[float, int, int] | None:
    """The pair of groups whose merge loses the least evidence, by their statistics.

    For every pair (a, b), :func:`components_log_bayes_factor` of their expected word counts
    and documents' worth (the statistics the word distributions are smoothed from): ln BF of
    one Dirichlet-multinomial group against two. O(K^2 x V_used) with V_used the words either
    group has counts for; run only when the ceiling is full and a component passed the birth
    test. Never a pair that both hold labelled documents (operators said they differ).

    Returns
    -------
    (ln BF, survivor id, absorbed id) or None
        None when fewer than two groups may merge. The survivor holds more expected documents
        (the lower id on a tie), or the labelled documents.
    """
    assert state.group_ids is not None
    ids = [int(g) for g in state.group_ids]
    if len(ids) < 2:
        return None
    active = np.flatnonzero(state.vocabulary.active_mask())
    counts = state.expected_word_counts()[active]
    docs = np.maximum(state.expected_documents(), np.finfo(np.float64).tiny)
    n_words = state.vocabulary.n_active
    beta = state.config.word_pseudocount
    labelled = [state.labelled.holds_group(g) for g in ids]
    best: tuple[float, int, int] | None = None
    for a in range(len(ids)):
        for b in range(a + 1, len(ids)):
            if labelled[a] and labelled[b]:
                continue
            used = (counts[:, a] > 0) | (counts[:, b] > 0)
            score = components_log_bayes_factor(
                counts[used, a], counts[used, b], (docs[a], docs[b]), n_words, beta
            )
            if best is None or score > best[0]:
                best = (score, ids[a], ids[b])
    if best is None:
        return None
    return (best[0], *survivor_and_absorbed(state, best[1], best[2]))


def survivor_and_absorbed(state: MixtureState, first: int, second: int) -> tuple[int, int]:
    """Which of two groups (ids) a merge keeps: the one holding labelled documents (it keeps
    its id), else the one with more expected documents, the lower id on a tie."""
    docs = state.expected_documents()
    a, b = position_of(state, first), position_of(state, second)
    if docs[a] != docs[b]:
        survivor, absorbed = (first, second) if docs[a] > docs[b] else (second, first)
    else:
        survivor, absorbed = min(first, second), max(first, second)
    if state.labelled.holds_group(absorbed):
        survivor, absorbed = absorbed, survivor
    return survivor, absorbed


def _yielding_groups(state: MixtureState, evidence: GroupEvidence) -> list[int]:
    """Ids of the groups that may give their place under the ceiling to a birth.

    Quiet (posterior share under ``retire_share``) for at least one whole window, holding no
    labelled documents; the least mass in the current window first; never all groups. The
    retirement rule waits ``retire_windows`` quiet windows because retiring a live group for
    nothing loses it; here the alternative is a component that passed the birth test, so one
    quiet window is enough for the quiet group to give way (a ceiling of live groups spent
    on a topic that has stopped, while a documented new one waits, is the worse use).
    """
    assert state.group_ids is not None
    quiet = np.flatnonzero(evidence.quiet_windows >= 1)
    quiet = quiet[np.argsort(evidence.window_mass[quiet], kind="stable")]
    ids = [
        int(state.group_ids[g])
        for g in quiet
        if not state.labelled.holds_group(int(state.group_ids[g]))
    ]
    return ids[: state.n_groups - 1]


def components_log_bayes_factor(
    first: np.ndarray, second: np.ndarray, docs: tuple[int, int], n_words: int, beta: float
) -> float:
    """ln BF of "one group" against "two groups" for two sets of documents' pooled counts.

    ln DM(c_a + c_b) - ln DM(c_a) - ln DM(c_b) - [n_a ln(n_a/n) + n_b ln(n_b/n)] + (1/2) ln n,
    DM the Dirichlet-multinomial marginal (:func:`dirichlet_multinomial_log_marginal`): the
    two-group side also pays for telling each document's group (the assignment term, at the
    groups' maximum-likelihood weights) and the BIC penalty of that one extra weight (Schwarz
    1978), as the birth test does.

    Parameters
    ----------
    first, second : ndarray (V_used,)
        Pooled word counts of the two sets, over the same words.
    docs : tuple of int
        Documents in each set (both > 0).
    n_words : int
        V, the active vocabulary the Dirichlet prior spreads over.
    beta : float
        The word pseudo-count (the Dirichlet parameter).

    Returns
    -------
    float
    """
    n_a, n_b = docs
    n = n_a + n_b
    pooled = dirichlet_multinomial_log_marginal(first + second, n_words, beta)
    apart = dirichlet_multinomial_log_marginal(
        first, n_words, beta
    ) + dirichlet_multinomial_log_marginal(second, n_words, beta)
    assignments = n_a * np.log(n_a / n) + n_b * np.log(n_b / n)
    return float(pooled - apart - assignments + 0.5 * np.log(n))


def join_components(
    buffered: sp.csr_matrix,
    labels: np.ndarray,
    state: MixtureState,
    ordinals: np.ndarray | None = None,
    arrival_log_lik: np.ndarray | None = None,
) -> np.ndarray:
    """Join components of the buffer's split while one new group explains a pair best.

    The local fit always asks for up to four components; how many the buffer holds is chosen
    by evidence. For a pair (a, b) the hypotheses are: a and b two new groups, a and b one
    new group, only a new (b's documents stay with the mixture), only b new. The pair is
    joined when "one new group" is the most probable of them: one group explains the pair
    better than two (:func:`components_log_bayes_factor` > 0) and the union's birth Bayes
    factor (:func:`birth_log_bayes_factor`) is above each part's alone. Without the last
    condition a component of documents the mixture explains well (strays of its groups) is
    joined to a new topic's component, because among new groups one explains short
    documents better than two, and the union then fails the birth test (WordNet 45 from 2
    groups: buffer components of 100-500 glosses joined into one and rejected at ln BF -300
    to -1,700 at every test after the first 14,000 documents). Pairs with the largest
    :func:`components_log_bayes_factor` go first, until no pair is joined. O(V + B) per pair
    on the bounded buffer, at most six pairs a round.

    Parameters
    ----------
    buffered : csr_matrix (B, capacity)
        The buffered documents' counts.
    labels : ndarray (B,) int
        Their component from the local fit (-1: no known words, left alone).
    state : MixtureState
        For the active vocabulary's size, the word pseudo-count and the mixture.
    ordinals, arrival_log_lik : ndarray (B,), optional
        The documents' stream positions and arrival scores (the birth test's). None: the
        state's novelty buffer's when ``buffered`` is that buffer (same rows), else the pair
        is judged by :func:`components_log_bayes_factor` alone.

    Returns
    -------
    ndarray (B,) int
        Labels with joined components sharing the lower label.
    """
    labels = labels.copy()
    n_words = state.vocabulary.n_active
    beta = state.config.word_pseudocount
    matrix = sp.csr_matrix(buffered, dtype=np.float64)
    evidence = state.evidence
    if (
        ordinals is None
        and evidence is not None
        and evidence.buffer_ordinals.size == matrix.shape[0]
    ):
        ordinals, arrival_log_lik = evidence.buffer_ordinals, evidence.buffer_log_lik
    known = mixture_side = None
    if ordinals is not None:
        known, mixture_side = _no_birth_scores(state, matrix, arrival_log_lik)
        ordinals = np.asarray(ordinals)

    def birth_score(members: np.ndarray) -> float:
        assert known is not None and mixture_side is not None and ordinals is not None
        members = members[known[members]]
        if members.size == 0:
            return -np.inf
        return _new_group_side(state, matrix[members], ordinals[members]) - float(
            mixture_side[members].sum()
        )

    while True:
        present = [c for c in np.unique(labels) if c >= 0]
        if len(present) < 2:
            return labels
        rows = {c: np.flatnonzero(labels == c) for c in present}
        pooled = {c: np.asarray(matrix[rows[c]].sum(axis=0)).ravel() for c in present}
        alone = {c: birth_score(rows[c]) for c in present} if known is not None else {}
        pairs = []
        for i, a in enumerate(present):
            for b in present[i + 1 :]:
                score = components_log_bayes_factor(
                    pooled[a], pooled[b], (rows[a].size, rows[b].size), n_words, beta
                )
                if score > 0.0:
                    pairs.append((score, a, b))
        joined = False
        for _, a, b in sorted(pairs, reverse=True):
            if known is not None:
                union = birth_score(np.concatenate([rows[a], rows[b]]))
                if not union > max(alone[a], alone[b]):
                    continue
            labels[labels == b] = a
            joined = True
            break
        if not joined:
            return labels


def _split_buffer(
    state: MixtureState, buffered: sp.csr_matrix, config: LifecycleConfig
) -> np.ndarray:
    """Cluster labels of the buffered documents from a small batch-EM fit (seeded by the
    state, so the split is a function of the state).

    One seeding (an annealed and a plain run, the better kept): on a drifting stream the
    buffer is full at every decision, and with two seedings this fit was most of the
    lifecycle's cost (WordNet noun drift stream at K = 26: learning kept 0.45 of the time
    without the lifecycle; 0.6 with one). The Bayes factor judges each component on its
    own, so a second-best split costs at most a later birth, not a wrong one.
    """
    lengths = np.asarray(buffered.sum(axis=1)).ravel()
    n_docs = int(np.count_nonzero(lengths))
    components = min(_BUFFER_COMPONENTS, n_docs // config.birth_min_documents)
    if components <= 1:
        return np.zeros(buffered.shape[0], dtype=np.int64)
    labels = local_fit_labels(state, buffered, components, state.seed + state.documents_learned)
    labels[lengths == 0] = -1
    return labels


def local_fit_labels(
    state: MixtureState, counts: sp.csr_matrix, components: int, seed: int
) -> np.ndarray:
    """Each document's MAP component under a local batch-EM fit of ``counts`` alone.

    One seeding, the lifecycle off, the state's vocabulary (active words) and pseudo-counts:
    the local fit of the novelty buffer's split and of the warm-up's split (mixture.warm_groups).

    Parameters
    ----------
    state : MixtureState
        Gives the configuration, the active words and the pseudo-counts.
    counts : sparse matrix (n, <= capacity)
        The documents' word counts over the state's vocabulary ids.
    components : int
        Components of the local fit.
    seed : int

    Returns
    -------
    ndarray of int64 (n,)
    """
    local_config = state.config.replace(
        n_groups=components, n_restarts=1, lifecycle=LifecycleConfig()
    )
    active = state.vocabulary.active_mask()
    word_counts, doc_counts, _ = fit_batch_em(counts, local_config, seed=seed, active=active)
    params = derive_parameters(
        word_counts,
        doc_counts,
        active,
        state.config.word_pseudocount,
        state.config.weight_pseudocount,
    )
    resp, _ = e_step(counts, params)
    return resp.argmax(axis=1)


def unit_observer(
    state: MixtureState, unit: sp.csr_matrix
) -> Callable[[UnitEStep], np.ndarray | None]:
    """The ``observe`` hook of :func:`mixture.online.stepwise_update` for one unit.

    Parameters
    ----------
    state : MixtureState
        The state about to learn the unit (its evidence is created when missing).
    unit : csr_matrix (m, capacity)
        The unit's counts. A token is unknown when its word has no mass in any group before
        the unit (new to the model, whichever way the stream was cut into calls).

    Notes
    -----
    Everything here works on the E-step's own restriction to the unit's words
    (``UnitEStep``): the unknown-word test looks at each distinct word once (O(words x K))
    and the unit is not re-indexed; only novel documents are mapped back to vocabulary ids.
    With ``forget_by_own_traffic`` the hook returns the per-group factors of the unit's word
    statistics (see :func:`apply_held_scale`).
    """
    config = state.config.lifecycle
    evidence = ensure_evidence(state)
    start = state.documents_learned
    capacity = unit.shape[1]

    def observe(step: UnitEStep) -> np.ndarray | None:
        counts = step.counts
        # before the update; np.take gathers the rows faster than indexing (same values)
        seen = np.take(state.unscaled_word, step.words, axis=0).sum(axis=1) > 0
        unknown = None if seen.all() else counts @ (~seen).astype(np.float64)
        present = step.present
        m = counts.shape[0]
        ordinals = (
            np.arange(start, start + m) if m == present.size else start + np.flatnonzero(present)
        )
        observe_unit(
            evidence,
            config,
            counts,
            step.resp,
            step.log_norm,
            step.log_weights,
            step.lengths,
            unknown,
            ordinals,
            words=step.words,
            columns=capacity,
            step=step.step,
            mass=step.mass,
            tokens=step.tokens,
        )
        if not config.forget_by_own_traffic:
            return None
        # The column is multiplied by exp(held) at the window's end (apply_held_scale); this
        # unit's statistics enter divided by what is owed so far, so after that each one
        # carries exactly the forgetting owed for the units after it.
        assert evidence.held_log_scale is not None
        return np.exp(-evidence.held_log_scale)

    return observe
