"""Describing groups (top and distinctive terms) and aligning the groups of two states."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import linear_sum_assignment

from mixture.kernels import smoothed_log_word_prob
from mixture.stats import MixtureState

# Greetings, closings and politeness words, as the tokenizer spells them (case-folded,
# apostrophes removed). Every kind of message carries them, so they top the word lists of
# every group and say nothing about its topic; describe_groups leaves them out of top and
# distinctive terms unless asked to keep them. They stay in the model: its likelihood and
# routing are unchanged. Our own list, common practice, no source. Words that also name a
# topic in a service inbox ("morning", "sorry", "help", "forward") are deliberately absent.
_COURTESY_TEXT = """
    appreciate appreciated best cheers dear faithfully greetings hello hey hi hiya kind kindly
    madam pls please regards respectfully sincerely sir thank thankful thanks thankyou thx ty
    warm warmest warmly wishes
"""
COURTESY_TERMS: frozenset[str] = frozenset(_COURTESY_TEXT.split())


@dataclass
class GroupSummary:
    """One group in words.

    Attributes
    ----------
    group : int
    weight : float
        Mixture weight (share of the traffic).
    expected_documents : float
    top_terms : list of (word, probability)
        Most probable words, p(w | k).
    distinctive_terms : list of (word, lift)
        Words most over-represented in the group against the pooled distribution,
        lift = p(w | k) / p(w), among words with an expected count in the group of at least
        ``min_count`` (without that floor, lift is topped by words seen once).
    """

    group: int
    weight: float
    expected_documents: float
    top_terms: list[tuple[str, float]] = field(default_factory=list)
    distinctive_terms: list[tuple[str, float]] = field(default_factory=list)


def describe_groups(
    state: MixtureState,
    top_n: int = 10,
    min_count: float = 3.0,
    *,
    keep_courtesy_terms: bool = False,
) -> list[GroupSummary]:
    """Summaries of every group of a state.

    Parameters
    ----------
    state : MixtureState
    top_n : int
        Terms per list.
    min_count : float
        Minimum expected count of a word in a group for it to be called distinctive.
    keep_courtesy_terms : bool
        Keep greetings and closings (:data:`COURTESY_TERMS`) in both lists; by default they
        are left out. The scores of the other words are the same either way (p(w | k) and
        lift are not renormalised).

    Returns
    -------
    list of GroupSummary
        One per group, by position.
    """
    vocab = state.vocabulary
    weights = state.weights()
    docs = state.expected_documents()
    if state.capacity == 0 or not state.warmed_up:
        return [
            GroupSummary(group=k, weight=float(weights[k]), expected_documents=float(docs[k]))
            for k in range(state.n_groups)
        ]
    params = state.parameters()
    active = np.flatnonzero(params.active)
    prob = np.exp(params.log_word_prob[active])  # (V_active, K)
    counts = state.expected_word_counts()[active]
    pooled_counts = counts.sum(axis=1)
    # The pooled (one-group) distribution, smoothed like the groups' own.
    pooled = np.exp(
        smoothed_log_word_prob(
            pooled_counts[:, None],
            pooled_counts.sum(keepdims=True),
            active.size,
            state.config.word_pseudocount,
        )[:, 0]
    )
    shown = np.ones(active.size, dtype=bool)
    if not keep_courtesy_terms:
        courtesy_ids = vocab.lookup_many(COURTESY_TERMS)
        shown[np.isin(active, courtesy_ids[courtesy_ids >= 0])] = False
    out: list[GroupSummary] = []
    n = min(top_n, int(shown.sum()))
    for k in range(state.n_groups):
        col = prob[:, k]
        top = _top_indices(np.where(shown, col, -np.inf), n)
        lift = col / pooled
        eligible = (counts[:, k] >= min_count) & shown
        lift_masked = np.where(eligible, lift, -np.inf)
        n_eligible = int(eligible.sum())
        distinct = _top_indices(lift_masked, min(n, n_eligible)) if n_eligible else []
        out.append(
            GroupSummary(
                group=k,
                weight=float(weights[k]),
                expected_documents=float(docs[k]),
                top_terms=[(vocab.word(int(active[i])), float(col[i])) for i in top],
                distinctive_terms=[(vocab.word(int(active[i])), float(lift[i])) for i in distinct],
            )
        )
    return out


def _top_indices(values: np.ndarray, n: int) -> list[int]:
    if n <= 0:
        return []
    part = np.argpartition(-values, n - 1)[:n] if n < values.size else np.arange(values.size)
    # Ties broken by index so the answer is deterministic.
    order = np.lexsort((part, -values[part]))
    return [int(i) for i in part[order]]


def word_distributions_on(
    a: MixtureState, b: MixtureState
) -> tuple[list[str], np.ndarray, np.ndarray]:
    """Word distributions of both states over the union of their active words.

    A word one state does not know gets, in that state, the smoothed probability of an unseen
    word (beta over the group's normaliser) so both columns stay proper distributions after
    renormalising.
    """
    words_a = _active_words(a)
    words_b = _active_words(b)
    union = sorted(set(words_a) | set(words_b))
    index = {w: i for i, w in enumerate(union)}
    return union, _on_union(a, words_a, index), _on_union(b, words_b, index)


def _active_words(state: MixtureState) -> dict[str, int]:
    vocab = state.vocabulary
    return {vocab.word(int(i)): int(i) for i in np.flatnonzero(vocab.active_mask())}


def _on_union(state: MixtureState, words: dict[str, int], index: dict[str, int]) -> np.ndarray:
    k = state.n_groups
    out = np.empty((len(index), k))
    if not words or not state.warmed_up:
        out[:] = 1.0 / max(len(index), 1)
        return out
    params = state.parameters()
    ids = np.fromiter(words.values(), dtype=np.int64, count=len(words))
    rows = np.fromiter((index[w] for w in words), dtype=np.int64, count=len(words))
    # An unknown word: the smoothed probability of a word with no count (the same kernel).
    unseen = smoothed_log_word_prob(
        np.zeros((1, k)),
        state.word_totals(),
        state.vocabulary.n_active,
        state.config.word_pseudocount,
    )
    out[:] = np.exp(unseen)
    out[rows] = np.exp(params.log_word_prob[ids])
    out /= out.sum(axis=0, keepdims=True)
    return out


def align_groups(reference: MixtureState, other: MixtureState) -> np.ndarray:
    """Match other's groups to reference's by minimum total Jensen-Shannon distance.

    Hungarian assignment (scipy.optimize.linear_sum_assignment) over the JS distances of the
    word distributions. Returns ``perm`` with ``perm[j]`` the reference group matched to other's
    group j (-1 when other has more groups than reference).
    """
    from mixture.drift import js_divergence

    _, p_ref, p_other = word_distributions_on(reference, other)
    k_ref, k_other = p_ref.shape[1], p_other.shape[1]
    cost = np.empty((k_other, k_ref))
    for j in range(k_other):
        for k in range(k_ref):
            cost[j, k] = np.sqrt(js_divergence(p_other[:, j], p_ref[:, k]))
    rows, cols = linear_sum_assignment(cost)
    perm = np.full(k_other, -1, dtype=np.int64)
    perm[rows] = cols
    return perm
