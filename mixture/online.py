"""Stepwise (online) EM, after Liang and Klein (2009), "Online EM for unsupervised models".

For each mini-batch: an E-step with the current parameters gives the batch's average
sufficient statistics s_batch, and the running statistics move towards them,

    s <- (1 - eta_k) s + eta_k s_batch,    eta_k = (k + 2) ** -alpha,  0.5 < alpha <= 1,

optionally with eta floored (exponential forgetting, so the model follows drift). k counts units
of ``batch_size`` documents: a batch of m documents moves it by m / batch_size and takes the step
1 - (1 - eta_k) ** (m / batch_size), so partial units do not shorten the memory; a batch of
more than ``batch_size`` documents is applied as consecutive units of it. The update
touches only the rows of the words in the batch plus O(K) numbers: the uniform shrink by
(1 - eta) is a change of the running scale factor (see mixture.stats).

Cold start: stepwise EM from random parameters is fragile, so the first documents are buffered
until they hold ``warmup_tokens`` tokens (or ``warmup_documents`` documents, a cap) and fitted
by batch EM with seeded restarts; stepwise learning then continues from those statistics with a
step counter chosen so the next batch weighs as in a running average. Meanwhile a provisional
fit of the buffer (at ``provisional_documents`` documents with tokens, then at every doubling)
is kept in ``state.provisional`` for routing only. Each fit sees exactly the buffered prefix:
the texts are cut at the document that reaches a fit and the vocabulary grows only with the
texts before the cut, so the fits (and the state) do not depend on how the stream was cut
into calls.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from mixture.config import MixtureConfig
from mixture.counting import count_texts
from mixture.em import fit_pending, validate_counts
from mixture.errors import InputError
from mixture.kernels import softmax_rows
from mixture.labelled import LabelledItem, add_items, check_items
from mixture.lifecycle import GroupEvent, run_due_decisions, seed_typicality, unit_observer
from mixture.novelty import UnitEStep
from mixture.stats import MixtureState
from mixture.warm_groups import shape_warm_up_groups


@dataclass
class BatchReport:
    """What one call to learn or stepwise_update did."""

    documents: int = 0
    tokens: int = 0
    no_evidence: int = 0
    warmed_up: bool = False
    log_likelihood_per_token: float = float("nan")
    pruned_words: int = 0
    new_words: int = 0
    steps: int = 0
    events: list[GroupEvent] = field(default_factory=list)  # births, merges, retirements
    provisional_fits: int = 0  # provisional fits of the warm-up buffer
    labelled: int = 0  # labelled documents added, moved or replaced (learn_labelled)
    # Per stepwise update, in order: its step size, the documents with tokens it averaged,
    # and state.log_forgetting right after it (mixture.labelled.remaining_weight).
    unit_etas: list[float] = field(default_factory=list)
    unit_documents: list[int] = field(default_factory=list)
    unit_log_forgetting: list[float] = field(default_factory=list)

    def merge(self, other: BatchReport) -> BatchReport:
        # Token-weighted mean of the parts that measured a log-likelihood.
        parts = [
            (r.log_likelihood_per_token, r.tokens)
            for r in (self, other)
            if r.tokens and np.isfinite(r.log_likelihood_per_token)
        ]
        weight = sum(t for _, t in parts)
        ll = sum(v * t for v, t in parts) / weight if weight else float("nan")
        return BatchReport(
            documents=self.documents + other.documents,
            tokens=self.tokens + other.tokens,
            no_evidence=self.no_evidence + other.no_evidence,
            warmed_up=other.warmed_up,
            log_likelihood_per_token=ll,
            pruned_words=self.pruned_words + other.pruned_words,
            new_words=self.new_words + other.new_words,
            steps=self.steps + other.steps,
            events=[*self.events, *other.events],
            provisional_fits=self.provisional_fits + other.provisional_fits,
            labelled=self.labelled + other.labelled,
            unit_etas=[*self.unit_etas, *other.unit_etas],
            unit_documents=[*self.unit_documents, *other.unit_documents],
            unit_log_forgetting=[*self.unit_log_forgetting, *other.unit_log_forgetting],
        )


def stepwise_update(
    state: MixtureState,
    counts: sp.spmatrix,
    *,
    observe: Callable[[UnitEStep], np.ndarray | None] | None = None,
) -> BatchReport:
    """Apply stepwise EM updates with a mini-batch of counts.

    A batch of at most ``batch_size`` documents is one update (a fraction of a unit when
    smaller). A larger batch is applied as consecutive units of ``batch_size`` rows, each with
    its own E-step and step, exactly as :meth:`OnlineLearner.learn` cuts its texts: the
    schedule counts units, and one step over many units would give the batch a step size that
    rounds to 1 (the whole memory replaced by one E-step, and a running scale of zero).

    Parameters
    ----------
    state : MixtureState
        Warmed up; changed in place.
    counts : sparse matrix of shape (m, capacity)
        Word counts of the batch over the state's vocabulary ids.
    observe : callable (UnitEStep) -> ndarray (K,) or None, optional
        Called with the E-step before the state changes (the group lifecycle's evidence):
        which rows had tokens, their counts over the batch's words, their posteriors and
        log p(d) (mixture.novelty.UnitEStep). Only for a batch of at most ``batch_size`` rows
        (one update), since it is built for one unit. What it returns, when not None,
        multiplies each group's word statistics of the unit before they are added (the
        lifecycle's ``forget_by_own_traffic``).

    Returns
    -------
    BatchReport
        Documents (all rows), tokens, rows without any token (they carry no evidence and are
        left out of the update), the number of updates, and the batch log-likelihood per token
        under the parameters before each update (over the documents the model finds possible;
        a document impossible under every group, which only zero pseudo-counts allow, learns
        with the prior as its responsibilities).
    """
    if not state.warmed_up:
        raise InputError("stepwise_update needs a warmed-up state (fit the warm-up first)")
    matrix = validate_counts(counts)
    if matrix.shape[1] > state.capacity:
        raise InputError(
            f"counts have {matrix.shape[1]} columns but the vocabulary has {state.capacity} ids"
        )
    size = state.config.batch_size
    if matrix.shape[0] <= size:
        return _update_unit(state, matrix, observe)
    if observe is not None:
        raise InputError(f"observe is for one unit: at most batch_size ({size}) rows")
    report = BatchReport(warmed_up=True)
    for start in range(0, matrix.shape[0], size):
        report = report.merge(_update_unit(state, matrix[start : start + size]))
    return report


def _update_unit(
    state: MixtureState,
    matrix: sp.csr_matrix,
    observe: Callable[[UnitEStep], np.ndarray | None] | None = None,
) -> BatchReport:
    """One stepwise update with at most ``batch_size`` validated rows."""
    # Row sums from the raw arrays (scipy's sum costs more than the rest of a small update).
    token_rows = np.repeat(np.arange(matrix.shape[0]), np.diff(matrix.indptr))
    lengths = np.bincount(token_rows, weights=matrix.data, minlength=matrix.shape[0])
    evidence = lengths > 0
    report = BatchReport(
        documents=matrix.shape[0],
        tokens=int(lengths.sum()),
        no_evidence=int((~evidence).sum()),
        warmed_up=True,
    )
    if not evidence.any():
        return report
    if not evidence.all():
        matrix = matrix[evidence]
        lengths = lengths[evidence]
    m = matrix.shape[0]

    # Restrict to the words in the batch: O(nnz log nnz + unique words x K).
    rows, local = np.unique(matrix.indices, return_inverse=True)
    local_counts = sp.csr_matrix(
        (matrix.data, local.astype(np.int32), matrix.indptr), shape=(m, rows.size)
    )
    log_word_prob = state.log_word_prob_rows(rows)
    resp = np.asarray(local_counts @ log_word_prob)
    log_weights = state.log_weights()
    resp += log_weights
    log_norm = softmax_rows(resp, fallback_log=log_weights)
    possible = np.isfinite(log_norm)
    tokens = lengths.sum()
    if possible.all():
        report.log_likelihood_per_token = float(log_norm.sum() / tokens)
    elif possible.any():
        report.log_likelihood_per_token = float(log_norm[possible].sum() / lengths[possible].sum())
    batch_word = np.asarray(local_counts.T @ resp) / m  # average per document
    mass = resp.sum(axis=0)
    batch_docs = mass / m

    # The schedule counts units of batch_size documents. A smaller batch (a partial unit
    # flushed for latency, a trickle of single messages) is that fraction of a step: eta is
    # what applying eta_k over the whole unit gives to its share of the documents, and the
    # counter moves by the same fraction, so the memory in documents does not depend on how
    # the traffic was cut. With m <= batch_size, eta <= eta_k <= 2 ** -alpha < 1.
    fraction = m / state.config.batch_size
    eta = state.config.step_size(state.step)
    if fraction != 1.0:
        eta = -float(np.expm1(fraction * np.log1p(-eta)))
    if observe is not None:
        # What the E-step already has (the batch's words, row lengths, log weights): the
        # observer then costs O(words in the unit x K) with no sparse re-indexing of its own.
        factors = observe(
            UnitEStep(
                evidence,
                local_counts,
                rows,
                lengths,
                resp,
                log_norm,
                log_weights,
                eta,
                mass=mass,
                tokens=float(tokens),
            )
        )
        if factors is not None:  # per-group weights of this unit's word statistics
            batch_word = batch_word * factors
    state.running_scale *= 1.0 - eta
    gain = eta / state.running_scale
    state.unscaled_word[rows] += gain * batch_word
    state.unscaled_total += gain * batch_word.sum(axis=0)
    state.unscaled_docs += gain * batch_docs
    state.weight_square_sum = (1.0 - eta) ** 2 * state.weight_square_sum + eta**2 / m
    state.step += fraction
    state.log_forgetting += float(np.log1p(-eta))
    report.steps = 1
    report.unit_etas.append(float(eta))
    report.unit_documents.append(int(m))
    report.unit_log_forgetting.append(state.log_forgetting)
    state.maybe_fold_scale()
    state.touch()
    return report


class OnlineLearner:
    """Turns texts into learning: warm-up buffer, batch EM, then stepwise EM.

    Parameters
    ----------
    config : MixtureConfig
    seed : int
        Seed of the warm-up fit.
    """

    def __init__(self, config: MixtureConfig, seed: int = 0) -> None:
        self.state = MixtureState.empty(config, seed)

    @classmethod
    def from_state(cls, state: MixtureState, seed: int | None = None) -> OnlineLearner:
        """Continue learning from an existing state (e.g. loaded from a checkpoint)."""
        learner = cls.__new__(cls)
        learner.state = state
        if seed is not None:
            state.seed = seed
        return learner

    @property
    def config(self) -> MixtureConfig:
        return self.state.config

    def learn(self, texts: Sequence[str]) -> BatchReport:
        """Learn from texts in order; returns what was done.

        While warming up the documents are buffered (their counts, in the state, so that a
        checkpoint keeps them); the buffer is fitted with batch EM at the first document that
        ends the warm-up (see :func:`warm_up_progress`), and provisionally before that.
        """
        state = self.state
        report = BatchReport(warmed_up=state.warmed_up)
        if not state.warmed_up:
            cut = self._warm_up(texts, report)
            if cut == len(texts):
                return report
            texts = texts[cut:]
        batch = count_texts(texts, state.tokenizer, state.vocabulary, grow=True)
        state.ensure_capacity()
        report.new_words += batch.new_words
        counts = batch.counts
        size = self.config.batch_size
        lifecycle = self.config.lifecycle.enabled
        for start in range(0, counts.shape[0], size):
            # Units of batch_size documents, one update each; the lifecycle observes each unit
            # and decides between them. No copy when the batch is one unit (the worker's case).
            whole = start == 0 and counts.shape[0] <= size
            unit = counts if whole else counts[start : start + size]
            observe = unit_observer(state, unit) if lifecycle else None
            part = stepwise_update(state, unit, observe=observe)
            state.documents_learned += part.documents
            report = report.merge(part)
            if lifecycle:
                report.events.extend(run_due_decisions(state))
        if state.vocabulary.n_active > self.config.vocabulary_limit:
            report.pruned_words += state.prune_vocabulary()
        return report

    def learn_labelled(self, items: Sequence[LabelledItem]) -> BatchReport:
        """Learn labelled documents (corrections, examples): fixed responsibilities, weight 1.

        Each item's counts go wholly to its group (Nigam et al. 2000) and stay there until
        withdrawn; no stepwise step is taken for them, so after the warm-up the parameters
        change at once and the step schedule does not move. During the warm-up they are kept
        in ``state.labelled`` (and given to the provisional fit at once) and every later
        provisional fit and the warm-up fit use them; they do not count towards the warm-up's
        end, which stays a function of the unlabelled stream alone (the fits then depend on
        the same prefix of documents whatever the labelled traffic, and a model started from
        examples still waits for enough unlabelled documents to find its unseeded groups).

        Idempotent per id: the same id with the same group, source and text is a no-op; with
        another group it moves; the text given last wins. Items are applied in order.

        Parameters
        ----------
        items : sequence of LabelledItem

        Returns
        -------
        BatchReport
            ``labelled`` = documents added, moved or replaced; ``tokens`` and ``new_words`` of
            the texts; ``documents`` 0 (no unlabelled document was learned).

        Raises
        ------
        InputError
            For a bad item, a group id that is not a current group (retired, merged or never
            made), or more labelled documents than ``config.labelled_limit``. Nothing is
            changed then.
        """
        state = self.state
        items = check_items(items)
        added = add_items(state, items)
        report = BatchReport(
            warmed_up=state.warmed_up,
            tokens=added.tokens,
            new_words=added.new_words,
            labelled=added.changed,
        )
        if state.provisional is not None:
            OnlineLearner.from_state(state.provisional).learn_labelled(items)
        if state.warmed_up and state.vocabulary.n_active > self.config.vocabulary_limit:
            report.pruned_words += state.prune_vocabulary()
        return report

    def withdraw_labelled(self, doc_ids: Sequence[str]) -> int:
        """Remove labelled documents by id; unknown ids are ignored.

        The set's integer per-group sums give these documents' counts back exactly, and the
        words only these documents brought (no unlabelled mass, no other labelled or buffered
        document) are retired, so right after a withdrawal the parameters are those of never
        having had the documents (word ids aside). Stepwise updates made while a labelled document
        was held saw it in their E-steps; that influence stays, as any past parameter's does.

        Returns
        -------
        int
            How many were removed.
        """
        if isinstance(doc_ids, str) or not isinstance(doc_ids, Sequence):
            raise InputError("doc_ids must be a sequence of str")
        for index, doc_id in enumerate(doc_ids):
            if not isinstance(doc_id, str):
                raise InputError(f"doc_ids[{index}] must be a str")
        state = self.state
        words = state.labelled.word_ids_of(doc_ids)
        removed = state.labelled.remove(doc_ids)
        if removed:
            state.touch()
            # Words only these documents brought leave with them (as if never learned).
            state.retire_unused_words(words)
        if state.provisional is not None:
            OnlineLearner.from_state(state.provisional).withdraw_labelled(doc_ids)
        return removed

    def _warm_up(self, texts: Sequence[str], report: BatchReport) -> int:
        """Buffer texts up to the end of the warm-up, fitting where a fit is due.

        Returns the number of texts consumed (all of them unless the warm-up ended).
        """
        state = self.state
        tokenizer = state.tokenizer
        # Tokens each text will count (count_texts with grow=True counts every token), so the
        # fits' cuts are known before any word of a later text enters the vocabulary.
        lengths = [len(tokenizer.tokenize(text)) for text in texts]
        progress = warm_up_progress(state)
        documents, tokens = progress.documents, progress.tokens
        start = 0
        for index, length in enumerate(lengths):
            if not length:
                continue
            documents += 1
            tokens += length
            final = _warm_up_ends(self.config, documents, tokens)
            if not final and not _provisional_due(self.config, documents):
                continue
            self._buffer(texts[start : index + 1], report)
            start = index + 1
            if final:
                warmup, generation = state.pending, state.vocabulary.generation
                fit_pending(state)
                if self.config.lifecycle.enabled and state.vocabulary.generation == generation:
                    # Start from the groups the warm-up supports (mixture.warm_groups), then
                    # seed their typicality (a compaction renumbered the ids: start empty).
                    report.events.extend(shape_warm_up_groups(state, warmup))
                    seed_typicality(state, warmup)
                state.provisional = None
                report.warmed_up = True
                return start
            self._fit_provisional()
            report.provisional_fits += 1
        if start < len(texts):
            self._buffer(texts[start:], report)
        return len(texts)

    def _buffer(self, texts: Sequence[str], report: BatchReport) -> None:
        """Count texts with a growing vocabulary and add them to the warm-up buffer."""
        state = self.state
        batch = count_texts(texts, state.tokenizer, state.vocabulary, grow=True)
        state.ensure_capacity()
        capacity = state.capacity
        pending = _widen(
            state.pending if state.pending is not None else sp.csr_matrix((0, capacity)), capacity
        )
        taken = _widen(batch.counts, capacity)
        state.pending = sp.vstack([pending, taken], format="csr")
        state.documents_learned += taken.shape[0]
        lengths = np.diff(taken.indptr)
        report.documents += taken.shape[0]
        report.tokens += int(taken.sum())
        report.no_evidence += int((lengths == 0).sum())
        report.new_words += batch.new_words
        state.touch()

    def _fit_provisional(self) -> None:
        """Batch EM on a copy of the buffer, kept in ``state.provisional`` for routing."""
        state = self.state
        state.provisional = None  # the copy must not carry the previous fit
        trial = state.copy()
        trial.metadata = {}
        fit_pending(trial)
        state.provisional = trial
        state.touch()


@dataclass(frozen=True)
class WarmUpProgress:
    """Where a state stands in its warm-up (all zero-need once warmed up).

    Attributes
    ----------
    documents, tokens : int
        Documents with tokens, and tokens, in the warm-up buffer.
    warmup_tokens, warmup_documents : int
        The configuration's token target (0: none) and document cap.
    provisional_documents : int
        Documents with tokens at which provisional answers start (0: never).
    warmed_up, provisional : bool
        The warm-up fit is done; a provisional fit is there to route with.
    """

    documents: int
    tokens: int
    warmup_tokens: int
    warmup_documents: int
    provisional_documents: int
    warmed_up: bool
    provisional: bool

    @property
    def documents_until_provisional(self) -> int:
        """Documents with tokens still needed before provisional answers (0 when routable)."""
        if self.warmed_up or self.provisional or not self.provisional_documents:
            return 0
        return max(self.provisional_documents - self.documents, 0)

    def describe(self) -> str:
        """One line for people: "warming up: N of M tokens buffered (...)"."""
        if self.warmed_up:
            return "warmed up"
        if self.warmup_tokens:
            line = f"warming up: {self.tokens} of {self.warmup_tokens} tokens buffered"
            line += f" ({self.documents} documents, at most {self.warmup_documents})"
        else:
            line = (
                f"warming up: {self.documents} of {self.warmup_documents} documents buffered"
                f" ({self.tokens} tokens)"
            )
        if self.provisional:
            line += "; routing with a provisional fit"
        elif self.provisional_documents:
            line += (
                f"; provisional routing after {self.provisional_documents} documents"
                f" ({self.documents_until_provisional} more)"
            )
        return line


def warm_up_progress(state: MixtureState) -> WarmUpProgress:
    """The warm-up's progress of ``state`` (documents and tokens buffered, what is needed)."""
    config = state.config
    pending = state.pending
    documents = tokens = 0
    if pending is not None and pending.shape[0]:
        documents = int(np.count_nonzero(np.diff(pending.indptr)))
        tokens = round(float(pending.data.sum()))
    return WarmUpProgress(
        documents=documents,
        tokens=tokens,
        warmup_tokens=config.warmup_tokens,
        warmup_documents=max(config.warmup_documents, config.n_groups),
        provisional_documents=config.provisional_documents,
        warmed_up=state.warmed_up,
        provisional=state.provisional is not None,
    )


def _warm_up_ends(config: MixtureConfig, documents: int, tokens: int) -> bool:
    """The warm-up ends with this document: the token target or the document cap is reached
    (and there are at least as many documents as groups)."""
    if documents < config.n_groups:
        return False
    if documents >= config.warmup_documents:
        return True
    return bool(config.warmup_tokens) and tokens >= config.warmup_tokens


def _provisional_due(config: MixtureConfig, documents: int) -> bool:
    """A provisional fit is due at P, 2P, 4P, ... documents with tokens (and n_groups or more)."""
    first = config.provisional_documents
    if not first or documents < max(first, config.n_groups) or documents % first:
        return False
    multiple = documents // first
    return multiple & (multiple - 1) == 0


def _widen(matrix: sp.csr_matrix, columns: int) -> sp.csr_matrix:
    if matrix.shape[1] == columns:
        return matrix
    return sp.csr_matrix(
        (matrix.data, matrix.indices, matrix.indptr), shape=(matrix.shape[0], columns)
    )
