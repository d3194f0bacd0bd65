"""Routing: the MAP group and the full posterior for new documents.

p(k | d) is proportional to pi_k * prod_w theta_k(w) ** c(w, d), computed in log space and
normalised with log-sum-exp. Words the model does not know are ignored (and counted). A
document with no known word has no evidence: its posterior is the prior and it is flagged,
never routed as if the text had spoken.

Review reasons
--------------
:data:`REVIEW_REASONS` is the one table of the reasons a routing answer asks a person to look
at, with the words the dashboard and the README show. The offline command line, the API's
``review_reasons`` and its JSON schema all take their names from it: a new reason is one row
here (and the rule that fires it).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp

from mixture.counting import count_texts
from mixture.errors import InputError
from mixture.kernels import softmax_rows
from mixture.stats import MixtureState, Parameters
from mixture.sweep import blocked_product

LOW_POSTERIOR = "low_posterior"
NO_KNOWN_WORDS = "no_known_words"
MOSTLY_UNKNOWN_WORDS = "mostly_unknown_words"
ATYPICAL = "atypical"
PROVISIONAL_MODEL = "provisional_model"
NEW_GROUP = "new_group"
LABEL_STALE = "label_stale"

# name -> what it means, in words (the dashboard's text, the README's table)
REVIEW_REASONS: dict[str, str] = {
    LOW_POSTERIOR: "the MAP posterior is under the review threshold",
    NO_KNOWN_WORDS: "no word of the message is in the vocabulary; the posterior is the prior",
    MOSTLY_UNKNOWN_WORDS: "most of the message's words are unknown to the model",
    ATYPICAL: "far less typical of its group than the group's recent messages",
    PROVISIONAL_MODEL: "answered by a provisional fit of the first messages (warm-up not done)",
    NEW_GROUP: "the group was born while learning and nobody has named it yet",
    LABEL_STALE: "the group's words have moved away from those its label was given to",
}


def review_reasons(
    routing: Routing,
    threshold: float,
    unknown_share: float,
    atypical: np.ndarray | None = None,
    *,
    provisional: bool = False,
    new_group: np.ndarray | None = None,
    label_stale: np.ndarray | None = None,
) -> list[list[str]]:
    """The review reasons of every routed document, in the table's order.

    Parameters
    ----------
    routing : Routing
    threshold : float
        MAP posterior under which ``low_posterior`` fires.
    unknown_share : float
        Share of unknown tokens above which ``mostly_unknown_words`` fires (a document without
        known words has ``no_known_words`` instead).
    atypical : ndarray of bool (n,), optional
        The typicality rule's verdicts (the API keeps the statistics; offline has none).
    provisional : bool
        The answers come from a provisional fit of the warm-up buffer: every one is flagged.
    new_group : ndarray of bool (n,), optional
        The MAP group was born while learning and has no label or destination (the API knows
        the labels; offline has none).
    label_stale : ndarray of bool (n,), optional
        The MAP group's label is stale: its words moved away from those it was given to (the
        API holds the labels' records; offline has none).

    Returns
    -------
    list of list of str
        Names from :data:`REVIEW_REASONS`; an empty list means no review.
    """
    n_docs = len(routing)
    best = routing.posterior[np.arange(n_docs), routing.group].tolist()
    no_evidence = routing.no_evidence.tolist()
    known = routing.known_tokens.tolist()
    unknown = routing.unknown_tokens.tolist()
    flagged = [False] * n_docs if atypical is None else np.asarray(atypical).tolist()
    newborn = [False] * n_docs if new_group is None else np.asarray(new_group).tolist()
    stale = [False] * n_docs if label_stale is None else np.asarray(label_stale).tolist()
    answers: list[list[str]] = []
    for i in range(n_docs):
        reasons = []
        if best[i] < threshold:
            reasons.append(LOW_POSTERIOR)
        if no_evidence[i]:
            reasons.append(NO_KNOWN_WORDS)
        elif unknown[i] > unknown_share * (known[i] + unknown[i]):
            reasons.append(MOSTLY_UNKNOWN_WORDS)
        if flagged[i]:
            reasons.append(ATYPICAL)
        if provisional:
            reasons.append(PROVISIONAL_MODEL)
        if newborn[i]:
            reasons.append(NEW_GROUP)
        if stale[i]:
            reasons.append(LABEL_STALE)
        answers.append(reasons)
    return answers


def posterior_entries(
    posterior: np.ndarray, top: int | None = None, group_ids: Sequence[int] | None = None
) -> list[list[dict[str, Any]]]:
    """Posteriors as lists of ``{"group", "probability"}``, most probable first.

    The one posterior shape of every output (API and command line). Ties keep the lower
    position first.

    Parameters
    ----------
    posterior : ndarray (n, K)
    top : int, optional
        Keep only the ``top`` most probable groups.
    group_ids : sequence of int, optional
        The stable id of each position (``state.group_ids``); positions when omitted.

    Returns
    -------
    list of list of dict
    """
    order = np.argsort(-posterior, axis=1, kind="stable")
    if top is not None:
        order = order[:, :top]
    rows = posterior.tolist()
    ids = list(range(posterior.shape[1])) if group_ids is None else list(group_ids)
    return [
        [{"group": ids[k], "probability": row[k]} for k in ranked]
        for row, ranked in zip(rows, order.tolist(), strict=True)
    ]


@dataclass
class Routing:
    """Routing answer for a batch of n documents.

    Attributes
    ----------
    group : ndarray (n,) int64
        MAP group (argmax of the posterior; a tie goes to the lower id).
    posterior : ndarray (n, K)
    margin : ndarray (n,)
        Posterior of the best group minus that of the second best (1.0 when K = 1).
    log_likelihood_per_token : ndarray (n,)
        log p(d | MAP group) over known tokens, per known token: how typical the document is
        for its group (nan without known tokens).
    known_tokens, unknown_tokens : ndarray (n,) int64
    no_evidence : ndarray (n,) bool
        No known token: the posterior is the prior.
    """

    group: np.ndarray
    posterior: np.ndarray
    margin: np.ndarray
    log_likelihood_per_token: np.ndarray
    known_tokens: np.ndarray
    unknown_tokens: np.ndarray
    no_evidence: np.ndarray

    def __len__(self) -> int:
        return int(self.group.shape[0])


def route_counts(
    params: Parameters,
    counts: sp.spmatrix,
    unknown_tokens: np.ndarray | None = None,
) -> Routing:
    """Route documents given as counts over the model's vocabulary ids.

    Parameters
    ----------
    params : Parameters
    counts : sparse matrix (n, V') with V' <= the parameters' vocabulary size
    unknown_tokens : ndarray (n,), optional
        Tokens that were left out because the vocabulary does not know them.

    Returns
    -------
    Routing
    """
    matrix = sp.csr_matrix(counts, dtype=np.float64)
    n_words = params.log_word_prob.shape[0]
    if matrix.shape[1] > n_words:
        raise InputError(
            f"counts have {matrix.shape[1]} columns but the model knows {n_words} word ids"
        )
    if matrix.data.size and (not np.all(np.isfinite(matrix.data)) or matrix.data.min() < 0):
        raise InputError("counts must be finite and >= 0")
    log_word_prob = params.log_word_prob
    if matrix.shape[1] < n_words:
        log_word_prob = log_word_prob[: matrix.shape[1]]
    log_lik = blocked_product(matrix, log_word_prob)
    known = np.asarray(matrix.sum(axis=1)).ravel()
    unknown = (
        np.zeros(matrix.shape[0], dtype=np.int64)
        if unknown_tokens is None
        else np.asarray(unknown_tokens, dtype=np.int64)
    )
    return _answer(log_lik, params.log_weights, known, unknown)


def _answer(
    log_lik: np.ndarray, log_weights: np.ndarray, known: np.ndarray, unknown: np.ndarray
) -> Routing:
    """Posterior, MAP group, margin and typicality from per-group document log-likelihoods.

    ``known`` may be fractional (weighted counts); the per-token figure divides by it as is.
    A document that every group finds impossible (log-likelihood
    ``-inf`` everywhere: counts of retired words, or a word unseen in every group under zero
    pseudo-counts) gets the prior as its posterior and is flagged ``no_evidence``, like a
    document without known words (mixture.kernels.softmax_rows).
    """
    n_docs, k = log_lik.shape
    rows = np.arange(n_docs)
    joint = np.add(log_lik, log_weights)
    group = joint.argmax(axis=1)
    log_norm = softmax_rows(joint, fallback_log=log_weights)
    posterior = joint
    impossible = np.isneginf(log_norm)
    if impossible.any():
        group[impossible] = posterior[impossible].argmax(axis=1)
    top = posterior[rows, group]
    if k > 1:
        # The runner-up: mask the MAP entry for one max pass, then put it back.
        posterior[rows, group] = -1.0
        margin = top - posterior.max(axis=1)
        posterior[rows, group] = top
    else:
        margin = np.ones(n_docs)
    no_evidence = (known == 0) | impossible
    per_token = log_lik[rows, group] / np.where(no_evidence, 1.0, known)
    per_token[no_evidence] = np.nan
    return Routing(
        group=group.astype(np.int64),
        posterior=posterior,
        margin=margin,
        log_likelihood_per_token=per_token,
        known_tokens=np.rint(known).astype(np.int64),
        unknown_tokens=unknown,
        no_evidence=no_evidence,
    )


# Up to this many documents a direct path beats building sparse matrices (their fixed cost of
# a few hundred microseconds is most of the work of routing one message).
SMALL_BATCH = 8


def route_texts(state: MixtureState, texts: Sequence[str]) -> Routing:
    """Tokenise texts with the state's tokenizer (no vocabulary growth) and route them.

    A handful of documents (the service's one-message requests) takes a direct path that
    sums the words' ``log_word_prob`` rows and shares the batch path's posterior code; it
    gives the answer of :func:`route_counts` to rounding.
    """
    if len(texts) <= SMALL_BATCH:
        return _route_few(state, texts)
    batch = count_texts(texts, state.tokenizer, state.vocabulary, grow=False)
    return route_counts(state.parameters(), batch.counts, batch.unknown_tokens)


def _route_few(state: MixtureState, texts: Sequence[str]) -> Routing:
    # Document by document: at this size building sparse matrices, not the arithmetic, is the
    # cost. Each document's log-likelihoods are one gather-and-sum of log_word_prob rows; the
    # posterior then comes from the same code as the batch path (_answer).
    params = state.parameters()
    log_word_prob = params.log_word_prob
    tokenize, lookup = state.tokenizer.tokenize, state.vocabulary.lookup
    n_docs, k = len(texts), params.n_groups
    log_lik = np.zeros((n_docs, k))
    known = np.zeros(n_docs)
    unknown = np.zeros(n_docs, dtype=np.int64)
    for index, text in enumerate(texts):
        if not isinstance(text, str):
            raise InputError(f"document {index} is {type(text).__name__}, not str")
        tokens = tokenize(text)
        ids = [word_id for word_id in map(lookup, tokens) if word_id >= 0]
        known[index] = len(ids)
        unknown[index] = len(tokens) - len(ids)
        if ids:
            # A repeated word adds its row again: the same sum as counts @ log_word_prob.
            log_word_prob[ids].sum(axis=0, out=log_lik[index])
    return _answer(log_lik, params.log_weights, known, unknown)
