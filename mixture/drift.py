"""Drift measures between distributions and between two model states.

``js_divergence`` is the kernel's (:func:`mixture.kernels.js_divergence`, from scipy).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from mixture.errors import InputError
from mixture.kernels import as_distribution, js_divergence

__all__ = ["js_divergence", "total_variation", "weight_drift", "word_drift"]

if TYPE_CHECKING:
    from mixture.stats import MixtureState


def total_variation(p: np.ndarray, q: np.ndarray) -> float:
    """Total variation distance, half the L1 distance, in [0, 1]."""
    p = as_distribution(p, "p")
    q = as_distribution(q, "q")
    if p.shape != q.shape:
        raise InputError(f"distributions differ in length: {p.size} and {q.size}")
    return float(0.5 * np.abs(p - q).sum())


def weight_drift(reference: MixtureState, other: MixtureState, aligned: bool = True) -> float:
    """JS divergence between the mixture weights of two states (groups aligned first)."""
    from mixture.describe import align_groups

    w_ref = reference.weights()
    w_other = other.weights()
    if aligned:
        perm = align_groups(reference, other)
        w_other = _permute_to_reference(w_other, perm, w_ref.size)
    return js_divergence(w_ref, w_other)


def word_drift(reference: MixtureState, other: MixtureState, aligned: bool = True) -> np.ndarray:
    """Per-group JS divergence between word distributions, over the words of both states.

    Returns an array indexed by the reference's groups (nan for a group with no partner).
    """
    from mixture.describe import align_groups, word_distributions_on

    _, p_ref, p_other = word_distributions_on(reference, other)
    k_ref = p_ref.shape[1]
    perm = align_groups(reference, other) if aligned else np.arange(p_other.shape[1])
    out = np.full(k_ref, np.nan)
    for j, k in enumerate(perm):
        if 0 <= k < k_ref:
            out[k] = js_divergence(p_ref[:, k], p_other[:, j])
    return out


def _permute_to_reference(values: np.ndarray, perm: np.ndarray, size: int) -> np.ndarray:
    out = np.zeros(size)
    for j, k in enumerate(perm):
        if 0 <= k < size:
            out[k] = values[j]
    return out
