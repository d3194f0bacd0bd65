"""Drift between two points of one line of versions, matched by group id (pure numpy).

Groups are compared by their stable ids, never by array position: weights and word
distributions only for the groups present at both points; a group born or gone in between is
reported, not aligned.

The content reference (:class:`WordReference`) is each group's full word distribution at one
checkpoint, held by the worker in memory: two (capacity, K) float32 copies taken a
``drift_window`` apart (once per window the words are compared with the older one), no Redis
traffic and no extra bytes in any version. They start at the worker's load, so the comparison
never spans a rollback (a rollback reloads the worker); after a restart the window starts
again from the loaded state. A summary of each group's top words riding in the state's
metadata was tried first and rejected: on a coarsened partition JS can only shrink (the
data-processing inequality; Cover and Thomas, Elements of Information Theory, 2nd ed., 2.8),
and with 50 words plus an "other" bucket it saw 0.10 where the full distributions showed 0.19.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from mixture.kernels import js_divergence
from mixture.stats import MixtureState


def group_ids_of(state: MixtureState) -> list[int]:
    """The state's group ids in position order (0..K-1 for a state without ids)."""
    ids = state.group_ids if state.group_ids is not None else np.arange(state.n_groups)
    return [int(g) for g in ids]


@dataclass(frozen=True)
class WordReference:
    """Each group's word distribution at one checkpoint, for the content drift check.

    ``prob`` is (capacity, K) in float32 (half the memory; the divergence needs no more), rows
    in vocabulary-id order of ``generation`` (a compaction renumbers the ids: a reference of
    another generation is not comparable and is renewed).
    """

    version: int
    group_ids: list[int]
    generation: int
    prob: np.ndarray


def word_reference(state: MixtureState, version: int) -> WordReference:
    """The reference of ``state`` (its smoothed word probabilities; retired rows are 0)."""
    prob = np.exp(state.parameters().log_word_prob).astype(np.float32)
    return WordReference(version, group_ids_of(state), int(state.vocabulary.generation), prob)


def content_divergence(reference: WordReference, state: MixtureState) -> dict[int, float]:
    """JS divergence (bits) of each group's word distribution now against the reference's,
    for the ids present in both (empty when the vocabulary was renumbered since).

    Words issued after the reference have probability zero in it (they had not been seen);
    both columns are renormalised by :func:`mixture.kernels.js_divergence`.
    """
    if int(state.vocabulary.generation) != reference.generation:
        return {}
    positions = {g: p for p, g in enumerate(group_ids_of(state))}
    pairs = [(r, positions[g]) for r, g in enumerate(reference.group_ids) if g in positions]
    if not pairs:
        return {}
    now = np.exp(state.parameters().log_word_prob[:, [p for _, p in pairs]])
    ref = np.zeros_like(now)
    rows = reference.prob.shape[0]
    ref[:rows] = reference.prob[:, [r for r, _ in pairs]]
    values = js_divergence_columns(now, ref)
    return {reference.group_ids[r]: float(v) for (r, _), v in zip(pairs, values, strict=True)}


def js_divergence_columns(p: np.ndarray, q: np.ndarray) -> np.ndarray:
    """JS divergence in bits of each column pair of ``p`` and ``q`` (columns normalised), in
    one vectorised pass: (KL(p || m) + KL(q || m)) / 2 with m = (p + q) / 2 (Lin 1991). Agrees
    with :func:`mixture.kernels.js_divergence` (scipy) column by column (tested)."""
    p = p / p.sum(axis=0, keepdims=True)
    q = q / q.sum(axis=0, keepdims=True)
    m = 0.5 * (p + q)
    with np.errstate(divide="ignore", invalid="ignore"):
        kl_p = np.where(p > 0, p * np.log2(p / m), 0.0).sum(axis=0)
        kl_q = np.where(q > 0, q * np.log2(q / m), 0.0).sum(axis=0)
    return np.clip(0.5 * (kl_p + kl_q), 0.0, 1.0)


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
