"""Drift between two points of one line of versions, matched by group id (pure numpy).

Groups are compared by their stable ids, never by array position: weights and word
distributions only for the groups present at both points; a group born or gone in between is
reported, not aligned. The content reference is a compact summary of each group's word
distribution (its ``top_n`` most probable words with their probabilities), small enough to
ride in the state's metadata (so it follows the versions: a rollback restores the reference
of the line it returns to, and the comparison never spans a rollback).

Content divergence on a summary: the reference's top words plus one bucket "every other
word"; the current group's distribution is read on the same partition (its probabilities of
those words, the rest in the bucket). JS on a coarsened partition never exceeds JS on the full
vocabulary (the data-processing inequality for f-divergences; Cover and Thomas, Elements of
Information Theory, 2nd ed., 2.8), so an alert raised on the summary is one the full
distributions would raise too; what it can miss is a change confined to words outside the
reference's top words, which by construction carry little of the group's mass.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from mixture.kernels import js_divergence
from mixture.stats import MixtureState

SUMMARY_WORDS = 50  # top words per group in a content reference (rule of thumb, no source)


def group_ids_of(state: MixtureState) -> list[int]:
    """The state's group ids in position order (0..K-1 for a state without ids)."""
    ids = state.group_ids if state.group_ids is not None else np.arange(state.n_groups)
    return [int(g) for g in ids]


def word_summary(state: MixtureState, top_n: int = SUMMARY_WORDS) -> dict[str, Any]:
    """Each group's ``top_n`` most probable words with their probabilities, keyed by id.

    Returns ``{"groups": {"<id>": [[word, p], ...]}}`` (JSON-able; ids as strings).
    """
    params = state.parameters()
    prob = np.exp(params.log_word_prob)  # (capacity, K); retired rows are 0
    vocab = state.vocabulary
    out: dict[str, list[list[Any]]] = {}
    n = min(top_n, prob.shape[0])
    for position, group in enumerate(group_ids_of(state)):
        column = prob[:, position]
        top = np.argpartition(-column, n - 1)[:n] if n < column.size else np.arange(column.size)
        top = top[np.argsort(-column[top], kind="stable")]
        out[str(group)] = [[vocab.word(int(i)), float(column[i])] for i in top if column[i] > 0]
    return {"groups": out}


def content_divergence(reference: dict[str, Any], state: MixtureState) -> dict[int, float]:
    """JS divergence (bits) of each group's words now against the reference summary, for the
    ids present in both (see the module docstring for the partition)."""
    params = state.parameters()
    vocab = state.vocabulary
    positions = {g: p for p, g in enumerate(group_ids_of(state))}
    out: dict[int, float] = {}
    for key, pairs in dict(reference.get("groups", {})).items():
        group = int(key)
        if group not in positions or not pairs:
            continue
        ref = np.array([float(p) for _, p in pairs] + [0.0])
        ref[-1] = max(1.0 - ref[:-1].sum(), 0.0)
        ids = vocab.lookup_many([str(w) for w, _ in pairs])
        column = params.log_word_prob[:, positions[group]]
        now = np.zeros(ref.size)
        known = ids >= 0
        now[:-1][known] = np.exp(column[ids[known]])
        now[-1] = max(1.0 - now[:-1].sum(), 0.0)
        out[group] = float(js_divergence(now, ref))
    return out


def word_divergence_by_id(reference: MixtureState, state: MixtureState) -> list[float]:
    """JS divergence (bits) of each reference group's word distribution against the group of
    the same id now, over the union of both vocabularies; nan for a group gone since."""
    from mixture.describe import word_distributions_on

    _, p_ref, p_now = word_distributions_on(reference, state)
    positions = {g: p for p, g in enumerate(group_ids_of(state))}
    out = []
    for position, group in enumerate(group_ids_of(reference)):
        if group in positions:
            out.append(float(js_divergence(p_ref[:, position], p_now[:, positions[group]])))
        else:
            out.append(float("nan"))
    return out


@dataclass(frozen=True)
class WeightComparison:
    """Weights at two points matched by group id."""

    common: list[int]  # ids present at both points
    born: list[int]  # ids present now only
    gone: list[int]  # ids present at the reference only
    now: np.ndarray  # weights of the common ids now, renormalised
    reference: np.ndarray  # ... and at the reference
    js_divergence: float  # between the two (0.0 with fewer than two common groups)


def compare_weights(
    now: list[float], now_ids: list[int], reference: list[float], reference_ids: list[int]
) -> WeightComparison:
    """Match two weight vectors by id; JS over the common groups, renormalised."""
    ref_by_id = dict(zip(reference_ids, reference, strict=True))
    now_by_id = dict(zip(now_ids, now, strict=True))
    common = [g for g in now_ids if g in ref_by_id]
    born = [g for g in now_ids if g not in ref_by_id]
    gone = [g for g in reference_ids if g not in now_by_id]
    w_now = np.array([now_by_id[g] for g in common], dtype=float)
    w_ref = np.array([ref_by_id[g] for g in common], dtype=float)
    value = 0.0
    if len(common) >= 2 and w_now.sum() > 0 and w_ref.sum() > 0:
        value = float(js_divergence(w_now, w_ref))
        w_now, w_ref = w_now / w_now.sum(), w_ref / w_ref.sum()
    return WeightComparison(common, born, gone, w_now, w_ref, value)
