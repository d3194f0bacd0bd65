"""Semi-supervised batch EM: labelled documents with fixed responsibilities, EM-lambda.

Sources:
- Nigam, McCallum, Thrun and Mitchell (2000), "Text classification from labeled and
  unlabeled documents using EM", Machine Learning 39: a labelled document's responsibility is
  one-hot on its class and never re-estimated; with EM-lambda each unlabelled document weighs
  lambda in the M-step. The objective is
  sum_labelled log(pi_y p(d|y)) + lambda * sum_unlabelled log sum_k pi_k p(d|k) + log prior.
- Dempster, Laird and Rubin (1977): EM never lowers the objective it is built on; here that
  objective with the labelled terms fixed (complete-data terms) and weighted unlabelled terms.
- scipy.special.logsumexp for the reference objective (not our kernels).
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.special import logsumexp

from mixture.config import MixtureConfig
from mixture.counting import count_texts
from mixture.em import e_step, fit_batch_em, fit_texts, log_prior, m_step
from mixture.errors import InputError
from mixture.labelled import LabelledCounts, LabelledItem
from mixture.online import OnlineLearner
from mixture.routing import route_texts
from mixture.stats import derive_parameters
from mixture.sweep import EMSweep
from mixture.tokenizer import Tokenizer
from mixture.vocabulary import Vocabulary
from tests import corpora
from tests.lifecycle_streams import TopicStream

# Relative slack for float noise in the monotonicity checks (common practice, no source).
FLOAT_SLACK = 1e-9


def _corpus(n: int = 600, topics: int = 3, seed: int = 3, mean_length: float = 12.0):
    stream = TopicStream(topics, seed=seed)
    labels = stream.labels(n, list(range(topics)))
    texts = stream.messages(labels, mean_length=mean_length)
    vocab = Vocabulary()
    counts = count_texts(texts, Tokenizer(), vocab, grow=True).counts
    return labels, texts, sp.csr_matrix(counts)


def _reference_objective(
    unlabelled: sp.csr_matrix,
    labelled: sp.csr_matrix,
    groups: np.ndarray,
    word_counts: np.ndarray,
    doc_counts: np.ndarray,
    config: MixtureConfig,
) -> float:
    """The objective of Nigam et al. (2000) with scipy's logsumexp, from the counts."""
    params = derive_parameters(
        word_counts, doc_counts, None, config.word_pseudocount, config.weight_pseudocount
    )
    joint_u = np.asarray(unlabelled @ params.log_word_prob) + params.log_weights
    joint_l = np.asarray(labelled @ params.log_word_prob) + params.log_weights
    own = joint_l[np.arange(groups.size), groups].sum()
    return float(
        config.unlabelled_weight * logsumexp(joint_u, axis=1).sum()
        + own
        + log_prior(params, config)
    )


class _RecordingSweep(EMSweep):
    """An EMSweep that keeps every responsibility matrix its M-step is given."""

    calls: ClassVar[list[np.ndarray]] = []

    def m_step(self, resp: np.ndarray) -> None:
        _RecordingSweep.calls.append(resp.copy())
        super().m_step(resp)


@pytest.mark.parametrize("kinds", [("annealed",), ("plain",)])
def test_labelled_responsibilities_stay_exactly_their_labels(kinds):
    """Nigam et al. (2000): every M-step of every run (each annealing temperature, plain EM,
    the iterations after a revival) sums the labelled rows one-hot on their group with weight
    1 and the unlabelled rows with weight lambda. Many small topics of short texts starve
    groups (tests/test_fit_restarts.py), so revivals happen (asserted)."""
    corpus = corpora.invented_small_topics(n_topics=20, per_topic=20, seed=0)
    counts = count_texts(corpus.texts, Tokenizer(), Vocabulary(), grow=True).counts
    lab_rows = np.concatenate([np.flatnonzero(corpus.labels == t)[:2] for t in range(3)])
    lab_rows = np.append(lab_rows, np.flatnonzero(corpus.labels == 3)[0])
    groups = np.array([0, 0, 1, 1, 2, 2, 3])
    unl = np.setdiff1d(np.arange(counts.shape[0]), lab_rows)
    config = MixtureConfig(n_groups=20, n_restarts=2, unlabelled_weight=0.3, annealing_steps=20)
    _RecordingSweep.calls = []
    _, _, report = fit_batch_em(
        counts[unl],
        config,
        seed=0,
        kinds=kinds,
        sweep_factory=_RecordingSweep,
        labelled=LabelledCounts(counts[lab_rows], groups),
    )
    assert any(run.reseeds for run in report.restarts), "no revival happened: pick another case"
    assert report.labelled_documents == 7 and report.documents == unl.size
    n_unl = unl.size
    expected = np.zeros((7, 20))
    expected[np.arange(7), groups] = 1.0
    assert len(_RecordingSweep.calls) > 20
    for resp in _RecordingSweep.calls:
        np.testing.assert_array_equal(resp[n_unl:], expected)
        np.testing.assert_allclose(resp[:n_unl].sum(axis=1), 0.3, rtol=1e-12)


def test_the_semi_supervised_objective_never_decreases():
    """Dempster, Laird and Rubin (1977), with the labelled terms fixed: (a) a plain
    semi-supervised EM loop written here from the single-threaded e_step / m_step never lowers
    the reference objective; (b) the fit's own objective trace never falls between revivals,
    and its final objective is the reference objective of the counts it returns."""
    labels, _, counts = _corpus(seed=5, mean_length=8.0)
    lab_rows = np.concatenate([np.flatnonzero(labels == t)[:2] for t in range(3)])
    groups = np.repeat(np.arange(3), 2)
    unl = np.setdiff1d(np.arange(counts.shape[0]), lab_rows)
    X_u, X_l = counts[unl], counts[lab_rows]
    config = MixtureConfig(n_groups=4, n_restarts=1, unlabelled_weight=0.5, tolerance=1e-10)
    # (a) the reference loop, from random responsibilities
    rng = np.random.default_rng(0)
    resp_u = rng.dirichlet(np.ones(4), size=unl.size)
    resp_l = np.zeros((groups.size, 4))
    resp_l[np.arange(groups.size), groups] = 1.0
    previous = -np.inf
    for _ in range(40):
        word_u, docs_u = m_step(X_u, resp_u)
        word_l, docs_l = m_step(X_l, resp_l)
        word, docs = 0.5 * word_u + word_l, 0.5 * docs_u + docs_l
        objective = _reference_objective(X_u, X_l, groups, word, docs, config)
        assert objective >= previous - FLOAT_SLACK * abs(objective)
        previous = objective
        params = derive_parameters(word, docs, None, config.word_pseudocount, 1.0)
        resp_u, _ = e_step(X_u, params)
    # (b) the fit
    word, docs, report = fit_batch_em(X_u, config, seed=0, labelled=LabelledCounts(X_l, groups))
    trace = np.array(report.objective_trace)
    revived = set(report.reseed_iterations)
    for i in range(1, trace.size):
        if i not in revived:
            assert trace[i] >= trace[i - 1] - FLOAT_SLACK * abs(trace[i])
    assert report.converged
    assert report.winner.objective == pytest.approx(
        _reference_objective(X_u, X_l, groups, word, docs, config), rel=1e-9
    )


def test_seeded_groups_start_from_their_examples_and_keep_their_topic():
    """Four topics; examples of topics 0, 1, 2 given to groups 2, 0, 1 and none of topic 3:
    each seeded topic's messages are routed to the group its examples named, and the one
    unseeded group (3) finds topic 3 among the unlabelled messages."""
    stream = TopicStream(4, seed=8)
    labels = stream.labels(1200, [0, 1, 2, 3])
    texts = stream.messages(labels)
    target = {0: 2, 1: 0, 2: 1, 3: 3}
    items = [
        LabelledItem(f"ex{t}-{i}", text, target[t], "example")
        for t in range(3)
        for i, text in enumerate(stream.messages(np.full(3, t)))
    ]
    state, report = fit_texts(texts, MixtureConfig(n_groups=4, n_restarts=1), labelled=items)
    assert report.labelled_documents == 9 and len(state.labelled) == 9
    routed = route_texts(state, texts).group
    for topic, group in target.items():
        assert np.mean(routed[labels == topic] == group) >= 0.9


def test_the_warm_up_state_keeps_the_unlabelled_statistics_and_the_fit_parameters():
    """After a warm-up fit with labelled documents the state's combined counts are the batch
    fit's M-step counts (lambda * unlabelled + labelled), and its stepwise statistics the
    unlabelled part alone (one document's worth per unlabelled document)."""
    stream = TopicStream(3, seed=9)
    labels = stream.labels(400, [0, 1, 2])
    texts = stream.messages(labels)
    config = MixtureConfig(
        n_groups=3, n_restarts=1, warmup_documents=400, warmup_tokens=0, unlabelled_weight=0.3
    )
    learner = OnlineLearner(config)
    examples = [LabelledItem(f"e{i}", t, 1, "example") for i, t in enumerate(texts[:3])]
    learner.learn_labelled(examples)
    learner.learn(texts)
    state = learner.state
    assert state.warmed_up
    assert state.unlabelled_documents().sum() == pytest.approx(400.0, rel=1e-9)
    np.testing.assert_allclose(
        state.expected_documents() - 0.3 * state.unlabelled_documents(), [0, 3, 0], atol=1e-9
    )
    # The same fit by hand: the state's counts are fit_batch_em's.
    vocab = state.vocabulary
    tokenizer = Tokenizer(config.tokenizer)
    x_u = count_texts(texts, tokenizer, vocab, grow=False).counts
    x_l = count_texts([e.text for e in examples], tokenizer, vocab, grow=False).counts
    word, docs, _ = fit_batch_em(
        x_u,
        config,
        seed=0,
        active=vocab.active_mask(),
        labelled=LabelledCounts(x_l, np.ones(3, int)),
    )
    np.testing.assert_allclose(state.expected_word_counts(), word, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(state.expected_documents(), docs, rtol=1e-9)


def test_bad_labelled_counts_are_refused():
    _, _, counts = _corpus(100)
    config = MixtureConfig(n_groups=3, n_restarts=1)
    with pytest.raises(InputError, match="shape"):
        fit_batch_em(counts, config, labelled=LabelledCounts(counts[:2, :5], np.array([0, 1])))
    with pytest.raises(InputError, match="positions"):
        fit_batch_em(counts, config, labelled=LabelledCounts(counts[:2], np.array([0, 3])))
