"""bench.bench_group_count's held-out likelihood, and bench_drift_one's --set parsing.

The held-out sum is recomputed document by document with scipy's multinomial pmf
(scipy.stats.multinomial.logpmf, less its multinomial coefficient, which does not depend on
the group: log p(d) of a unigram mixture is logsumexp_k of log pi_k + sum_w c_dw log theta_kw).
Invented data (tests/lifecycle_streams.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import gammaln, logsumexp
from scipy.stats import multinomial

from bench.bench_drift_one import parse_overrides
from bench.bench_group_count import held_out
from mixture.config import MixtureConfig
from mixture.counting import count_texts
from mixture.em import fit_texts
from tests.corpora import LabelledCorpus
from tests.lifecycle_streams import TopicStream


def _corpus(n: int = 240, topics: int = 3) -> LabelledCorpus:
    labels = np.arange(n) % topics
    texts = TopicStream(topics, words_per_topic=60, shared_words=30, seed=4).messages(labels)
    return LabelledCorpus("invented", texts, labels, [f"t{i}" for i in range(topics)], "invented")


def test_held_out_matches_scipy_multinomial_per_document() -> None:
    corpus = _corpus()
    folds = 3
    per_token, _ = held_out(corpus, 3, folds)
    fold_of = np.random.default_rng(0).permutation(len(corpus)) % folds
    total, tokens = 0.0, 0.0
    for fold in range(folds):
        train = [t for t, f in zip(corpus.texts, fold_of, strict=True) if f != fold]
        test = [t for t, f in zip(corpus.texts, fold_of, strict=True) if f == fold]
        state, _ = fit_texts(train, MixtureConfig(n_groups=3), seed=fold)
        counts = count_texts(test, state.tokenizer, state.vocabulary, grow=False).counts.toarray()
        params = state.parameters()
        theta = np.exp(params.log_word_prob[: counts.shape[1]]).T  # (K, V)
        theta = theta / theta.sum(axis=1, keepdims=True)  # float round-off only
        for row in counts:
            n = int(row.sum())
            if n == 0:
                continue
            coefficient = gammaln(n + 1) - gammaln(row + 1).sum()
            joint = [
                params.log_weights[k] + multinomial.logpmf(row, n, theta[k]) - coefficient
                for k in range(theta.shape[0])
            ]
            total += float(logsumexp(joint))
            tokens += n
    assert per_token == pytest.approx(total / tokens, rel=1e-6)


def test_held_out_prefers_the_generating_number_of_groups_to_one() -> None:
    # Three separated invented topics: one unigram model cannot predict held-out documents
    # as well as three (the mixture that generated them).
    corpus = _corpus()
    one, _ = held_out(corpus, 1, 3)
    three, nmi = held_out(corpus, 3, 3)
    assert three > one + 0.1
    assert nmi > 0.9


def test_parse_overrides_reads_json_values_and_lifecycle_fields() -> None:
    model, lifecycle = parse_overrides(
        ["step_exponent=0.6", "lifecycle.novelty_z=2.5", "lifecycle.enabled=false", "x=word"]
    )
    assert model == {"step_exponent": 0.6, "x": "word"}
    assert lifecycle == {"novelty_z": 2.5, "enabled": False}
    with pytest.raises(SystemExit, match="FIELD=VALUE"):
        parse_overrides(["step_exponent"])
