"""The warm-up in tokens and the provisional fits, on open data: NMI against the reference labels.

Corpora as in bench.bench_quality (``make corpora``; tests/corpora.py): BBC news (2,127
articles, 5 topics) and the six-file WordNet noun subset (6,000 glosses). One shuffled pass of
the online learner per seed (tests/corpora.py ``stepwise_pass``, texts in reads of 256), K the
number of labels, every other setting at its default. Scores:
``sklearn.metrics.normalized_mutual_info_score``.

Rows: the warm-up before the token rule (``warmup_documents = 1000``, ``warmup_tokens = 0``:
the old default) and the token rule at each target given (``warmup_documents`` the default cap,
provisional fits at 100 documents and every doubling). Columns: documents in the warm-up fit,
NMI at the end of the pass (mean and worst seed), and for the token rule the NMI of the first
provisional fit (100 documents) on the documents it did not see, beside chance: the same
groups against the labels permuted (20 permutations a seed).

Run ``python -m bench.bench_warmup [--seeds N] [--tokens 40000 80000 ...]``.
"""

from __future__ import annotations

import argparse

import numpy as np
from sklearn.metrics import normalized_mutual_info_score

from bench.bench_quality import load_corpora
from mixture.config import MixtureConfig
from tests import corpora

PROVISIONAL = 100


def warmup_table(corpus: corpora.LabelledCorpus, seeds: range, targets: list[int]) -> None:
    """Print one row for the old document warm-up and one per token target."""
    print(f"{corpus.name} ({len(corpus)} documents), seeds {seeds.start}-{seeds.stop - 1}")
    print(
        f"{'warm-up':<22} {'documents':>9} {'NMI pass':>9} {'worst':>6} "
        f"{'NMI prov':>9} {'chance':>7}"
    )
    cap = MixtureConfig().warmup_documents
    rows: list[tuple[str, int, int]] = [("1000 documents (old)", 1000, 0)]
    rows += [(f"{target} tokens", cap, target) for target in targets]
    for name, documents, tokens in rows:
        final, sizes, provisional, chance = [], [], [], []
        for seed in seeds:
            try:
                run = corpora.stepwise_pass(
                    corpus,
                    seed,
                    warmup_documents=documents,
                    warmup_tokens=tokens,
                    provisional_documents=PROVISIONAL if tokens else 0,
                )
            except ValueError:  # the corpus ends inside the warm-up
                break
            final.append(normalized_mutual_info_score(corpus.labels, run.final))
            sizes.append(run.warmup_documents)
            if PROVISIONAL in run.provisional:
                rest = run.order[PROVISIONAL:]
                groups = run.provisional[PROVISIONAL][rest]
                provisional.append(normalized_mutual_info_score(corpus.labels[rest], groups))
                rng = np.random.default_rng(seed)
                chance.append(
                    np.mean(
                        [
                            normalized_mutual_info_score(
                                rng.permutation(corpus.labels[rest]), groups
                            )
                            for _ in range(20)
                        ]
                    )
                )
        if not final:
            print(f"{name:<22} (the corpus ends inside the warm-up)")
            continue
        prov = f"{np.mean(provisional):>9.3f} {np.mean(chance):>7.3f}" if provisional else ""
        print(
            f"{name:<22} {np.mean(sizes):>9.0f} {np.mean(final):>9.3f} {min(final):>6.3f} {prov}",
            flush=True,
        )


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(prog="python -m bench.bench_warmup", description=__doc__)
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--tokens", type=int, nargs="+", default=[40_000, 80_000])
    args = parser.parse_args(argv)
    for corpus in load_corpora():
        warmup_table(corpus, range(args.seeds), args.tokens)
        print()


if __name__ == "__main__":
    main()
