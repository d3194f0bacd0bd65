"""The cost of the matched start of a semi-supervised batch fit at the warm-up's size.

Corpora as in bench.bench_quality (``make corpora``; tests/corpora.py): BBC news and the
six-file WordNet noun subset. Per corpus and seed: the documents of a shuffled order up to the
warm-up's ``warmup_tokens`` (the default config), one labelled document per class among them,
K the number of classes, every other setting at its default (``n_restarts`` = 4). Timed in the
same run, interleaved: ``mixture.em.fit_batch_em`` with the examples start alone
(``starts=("seeds",)``) and with both starts (the default), the best of ``--repeats`` each.
Printed: both times and their ratio, and which start won.

Run ``python -m bench.bench_semi_starts [--seeds N] [--repeats N]``.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from bench.bench_quality import load_corpora
from mixture.config import MixtureConfig
from mixture.counting import count_texts
from mixture.em import fit_batch_em
from mixture.labelled import LabelledCounts
from mixture.restarts import MATCHED_START, SEEDS_START
from mixture.stats import MixtureState


def _warm_up_case(corpus, seed: int, config: MixtureConfig):
    """Counts of the warm-up's unlabelled documents and one labelled document per class."""
    rng = np.random.default_rng(seed)
    order = rng.permutation(len(corpus))
    state = MixtureState.empty(config, seed)
    counts = count_texts(
        [corpus.texts[i] for i in order], state.tokenizer, state.vocabulary, grow=True
    ).counts
    tokens = np.cumsum(np.asarray(counts.sum(axis=1)).ravel())
    n_docs = int(np.searchsorted(tokens, config.warmup_tokens) + 1)
    labels = corpus.labels[order[:n_docs]]
    chosen = [int(np.flatnonzero(labels == c)[0]) for c in range(config.n_groups)]
    rest = np.setdiff1d(np.arange(n_docs), chosen)
    labelled = LabelledCounts(counts[chosen], np.arange(config.n_groups))
    return counts[rest], labelled


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=3)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    print(
        f"{'corpus':<16} {'seed':>4} {'docs':>5} {'seeds start s':>13} {'both starts s':>13} "
        f"{'ratio':>6}  winner"
    )
    for corpus in load_corpora():
        name = corpus.name
        config = MixtureConfig(n_groups=len(corpus.label_names))
        for seed in range(args.seeds):
            counts, labelled = _warm_up_case(corpus, seed, config)
            best = {SEEDS_START: np.inf, MATCHED_START: np.inf}
            winner = ""
            for _ in range(args.repeats):
                for key, starts in (
                    (SEEDS_START, (SEEDS_START,)),
                    (MATCHED_START, (SEEDS_START, MATCHED_START)),
                ):
                    start = time.perf_counter()
                    _, _, report = fit_batch_em(
                        counts, config, seed=seed, labelled=labelled, starts=starts
                    )
                    best[key] = min(best[key], time.perf_counter() - start)
                    if key == MATCHED_START and report.winner is not None:
                        winner = report.winner.start
            ratio = best[MATCHED_START] / best[SEEDS_START]
            print(
                f"{name:<16} {seed:>4} {counts.shape[0]:>5} {best[SEEDS_START]:>13.2f} "
                f"{best[MATCHED_START]:>13.2f} {ratio:>6.2f}  {winner}"
            )


if __name__ == "__main__":
    main()
