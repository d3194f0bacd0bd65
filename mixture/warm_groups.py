"""The groups the lifecycle starts from: the warm-up fit keeps the groups its documents support.

With the lifecycle on, the warm-up fit (batch EM with ``n_groups`` groups on the warm-up
buffer, mixture.online) is followed by passes over its documents decided by the same
Dirichlet-multinomial Bayes factor as the lifecycle's own tests
(:func:`mixture.lifecycle.components_log_bayes_factor`: one group against two for two sets of
documents' pooled counts, with the assignment term and a BIC penalty for the second weight):

- joins (always): while one group explains a pair of groups' documents better than two (ln
  BF > 0, as :func:`mixture.lifecycle.join_components` joins the novelty buffer's
  components), the pair is merged (:func:`mixture.lifecycle.merge`), the largest Bayes factor
  first. ``n_groups`` so becomes "at most n_groups at the start": a model given K groups whose
  warm-up holds fewer topics (a stream whose topics arrive in turn) keeps the slots its
  warm-up does not support free for births.
- splits (``lifecycle.warm_up_splits``, off by default; before the joins): a group whose
  documents a two-component fit cuts into halves that two groups explain better than one by
  more than ``lifecycle.birth_log_bayes_factor`` (each half with at least
  ``birth_min_documents``) is split, its smaller half (fewer documents move) becoming a new
  group (:func:`mixture.lifecycle.birth`), the largest Bayes factor first, the halves tested
  again, up to the ceiling (``lifecycle.ceiling``). A model started with too few groups (K
  unknown) so grows to what its warm-up shows; the novelty buffer would not split them later,
  because it only sees documents that look novel and the documents of a mixed group are
  typical of it. Why it is off by default: lifecycle_config.

The thresholds are the birth test's (a new group needs strong evidence, ln BF > 5, Kass and
Raftery 1995) and the join's (one group more probable than two, ln BF > 0); between the two
a pair is neither split nor joined. After the joins no pair of starting groups is one group by
this test.

Group ids stay stable in the lifecycle's sense (mixture.lifecycle): a join keeps the
survivor's id (the group with more expected documents, or the one holding labelled
documents) and the absorbed id is gone for good, so the ids after the warm-up are a subset of
0..n_groups-1 (and, with splits, the next ids); births later take the next ids, never an
absorbed one. Each join and split is an ordinary merge or birth event at the warm-up's end, in
the report of the learning call that ended the warm-up, so the checkpoint that ends the
warm-up carries them. Two groups that hold labelled documents are never joined (operators
said they differ), and the half a split moves never holds labelled documents (they stay in
their group). The provisional fits before the warm-up's end are not shaped: they route with
``n_groups`` groups, as before.

The documents are taken as hard assignments (their MAP group under the warm-up fit), as the
novelty buffer's components are. Cost: the pairs' Bayes factors once (O(K^2) marginals over the
words the pair uses), then O(K) per join; a split is a two-component batch-EM fit on one
group's documents.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from mixture.lifecycle import (
    GroupEvent,
    birth,
    components_log_bayes_factor,
    local_fit_labels,
    merge,
    survivor_and_absorbed,
)
from mixture.lifecycle_config import LifecycleConfig
from mixture.stats import MixtureState

__all__ = ["shape_warm_up_groups"]


def shape_warm_up_groups(state: MixtureState, documents: sp.spmatrix) -> list[GroupEvent]:
    """Split and join the groups of a warm-up fit by Bayes factor (module docstring).

    Parameters
    ----------
    state : MixtureState
        Just warmed up (its statistics are the warm-up fit's); changed in place.
    documents : sparse matrix (n, <= capacity)
        The warm-up documents' counts over the state's vocabulary ids (retired words are left
        out; rows without a known word take no part).

    Returns
    -------
    list of GroupEvent
        Births (splits) and merges (joins), in the order applied.
    """
    config = state.config.lifecycle
    matrix = sp.csr_matrix(documents, dtype=np.float64)
    if matrix.shape[1] < state.capacity:  # the split's fit takes columns over every id
        matrix = sp.csr_matrix(
            (matrix.data, matrix.indices, matrix.indptr), shape=(matrix.shape[0], state.capacity)
        )
    active = state.vocabulary.active_mask()
    used = np.unique(matrix.indices)
    used = used[active[used]]
    local = sp.csr_matrix(matrix[:, used])
    lengths = np.asarray(local.sum(axis=1)).ravel()
    if not np.any(lengths > 0):
        return []
    labels = _map_groups(state, local, used, lengths)
    events = []
    if config.warm_up_splits:
        events += _splits(state, matrix, local, labels, config)
    events += _joins(state, local, labels)
    return events


def _map_groups(
    state: MixtureState, local: sp.csr_matrix, used: np.ndarray, lengths: np.ndarray
) -> np.ndarray:
    """Each document's MAP group position (-1 without a known word)."""
    log_joint = np.asarray(local @ state.log_word_prob_rows(used)) + state.log_weights()
    labels = log_joint.argmax(axis=1).astype(np.int64)
    labels[lengths == 0] = -1
    return labels


def _score_split(
    state: MixtureState,
    matrix: sp.csr_matrix,
    local: sp.csr_matrix,
    members: np.ndarray,
    config: LifecycleConfig,
) -> tuple[float, np.ndarray]:
    """ln BF of two groups against one for a group's documents cut by a two-component fit.

    Returns the Bayes factor (-inf when no cut leaves both halves ``birth_min_documents``) and
    the members of the half that becomes the new group, the smaller one (fewer documents
    move).
    """
    minimum = config.birth_min_documents
    if members.size < 2 * minimum:
        return -np.inf, members[:0]
    halves = local_fit_labels(state, matrix[members], 2, state.seed + int(members[0]))
    first, second = members[halves == 0], members[halves == 1]
    if first.size < minimum or second.size < minimum:
        return -np.inf, members[:0]
    pooled_first = np.asarray(local[first].sum(axis=0)).ravel()
    pooled_second = np.asarray(local[second].sum(axis=0)).ravel()
    one = components_log_bayes_factor(
        pooled_first,
        pooled_second,
        (first.size, second.size),
        state.vocabulary.n_active,
        state.config.word_pseudocount,
    )
    taken = second if second.size <= first.size else first
    return -one, taken


def _splits(
    state: MixtureState,
    matrix: sp.csr_matrix,
    local: sp.csr_matrix,
    labels: np.ndarray,
    config: LifecycleConfig,
) -> list[GroupEvent]:
    """Split groups while a cut of one passes the birth test's threshold, up to the ceiling."""
    ceiling = config.ceiling(state.config.n_groups)
    assert state.group_ids is not None
    # Candidate cuts by group id; a group's cut is scored again only after it changed.
    scored: dict[int, tuple[float, np.ndarray]] = {}
    events: list[GroupEvent] = []
    while state.n_groups < ceiling:
        for position, group_id in enumerate(state.group_ids):
            if int(group_id) not in scored:
                members = np.flatnonzero(labels == position)
                scored[int(group_id)] = _score_split(state, matrix, local, members, config)
        group_id, (score, taken) = max(scored.items(), key=lambda item: item[1][0])
        if not score > config.birth_log_bayes_factor:
            break
        event = birth(
            state,
            matrix[taken],
            reason=(
                f"warm-up fit: group {group_id}'s documents are two groups, ln Bayes factor "
                f"{score:.1f} > {config.birth_log_bayes_factor:g}; {taken.size} of them form "
                "a new group"
            ),
            evidence={"log_bayes_factor": score, "split_from": float(group_id)},
        )
        events.append(event)
        labels[taken] = state.n_groups - 1
        del scored[group_id]
    return events


def _joins(state: MixtureState, local: sp.csr_matrix, labels: np.ndarray) -> list[GroupEvent]:
    """Merge pairs of groups while one group explains a pair's documents better than two."""
    n_words = state.vocabulary.n_active
    beta = state.config.word_pseudocount
    assert state.group_ids is not None
    ids = [int(g) for g in state.group_ids]
    by_id = {g: np.flatnonzero(labels == p) for p, g in enumerate(ids)}
    pooled = {g: np.asarray(local[rows].sum(axis=0)).ravel() for g, rows in by_id.items()}
    labelled = {g for g in ids if state.labelled.holds_group(g)}
    pair_scores: dict[tuple[int, int], float] = {}

    def score(a: int, b: int) -> float:
        if not by_id[a].size or not by_id[b].size or (a in labelled and b in labelled):
            return -np.inf
        return components_log_bayes_factor(
            pooled[a], pooled[b], (by_id[a].size, by_id[b].size), n_words, beta
        )

    for i, a in enumerate(ids):
        for b in ids[i + 1 :]:
            pair_scores[(a, b)] = score(a, b)
    events: list[GroupEvent] = []
    while pair_scores and state.n_groups > 1:
        (a, b), best = max(pair_scores.items(), key=lambda item: item[1])
        if not best > 0.0:
            break
        survivor, absorbed = survivor_and_absorbed(state, a, b)
        events.append(
            merge(
                state,
                survivor,
                absorbed,
                reason=(
                    f"warm-up fit: one group explains the documents of groups {survivor} and "
                    f"{absorbed} better than two, ln Bayes factor {best:.1f} > 0"
                ),
                evidence={"log_bayes_factor": best},
            )
        )
        ids.remove(absorbed)
        by_id[survivor] = np.concatenate([by_id[survivor], by_id.pop(absorbed)])
        pooled[survivor] = pooled[survivor] + pooled.pop(absorbed)
        if absorbed in labelled:
            labelled.add(survivor)
        pair_scores = {
            pair: value
            for pair, value in pair_scores.items()
            if absorbed not in pair and survivor not in pair
        }
        for other in ids:
            if other != survivor:
                pair = (min(survivor, other), max(survivor, other))
                pair_scores[pair] = score(*pair)
    return events
