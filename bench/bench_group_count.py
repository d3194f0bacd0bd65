"""How many groups the evidence supports: held-out log-likelihood of batch EM at several K.

The group lifecycle chooses the number of groups by evidence (Bayes factors on the novelty
buffer, merges by the same test), so the count it ends with can only be as close to the number
of reference labels as the evidence allows. This bench asks the corpus directly, without the
lifecycle: K-fold cross-validation (documents dealt to folds at random), batch EM
(``mixture.em.fit_texts``, every setting at its default) on the other folds at each K, and the
mixture's log p(d) of the held-out documents over their known tokens (words the training folds
never saw are left out, the same words at every K). The K with the highest held-out
log-likelihood per token is the count a predictive criterion picks; the NMI of the held-out
documents against the reference labels (``sklearn.metrics.normalized_mutual_info_score``) shows
what that count costs or gains against the labels. Held-out likelihood as the criterion for the
number of mixture components: Smyth (2000), "Model selection for probabilistic clustering using
cross-validated likelihood", Statistics and Computing 10 (from memory).

Corpora as in bench.bench_drift_one (``make corpora``): ``bbc`` (2,127 articles, 5 topics),
``wordnet-26`` (the 26 noun files) and ``wordnet-45`` (all 45 files), at most 1,000 glosses a
file (34,896 in all for the 45 files).

Run ``python -m bench.bench_group_count --corpus bbc --groups 2 5 10 20 [--folds 5]``.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy.special import logsumexp
from sklearn.metrics import normalized_mutual_info_score

from bench.bench_quality import DRIFT_PER_FILE
from mixture.config import MixtureConfig
from mixture.counting import count_texts
from mixture.em import fit_texts
from tests import corpora


def load(name: str) -> corpora.LabelledCorpus:
    """The named corpus in its stored order (the folds are drawn at random)."""
    if name == "bbc":
        return corpora.load_bbc()
    files = None if name == "wordnet-45" else list(corpora.NOUN_LEXNAMES.values())
    corpus = corpora.load_wordnet_files(files, DRIFT_PER_FILE, seed=0)
    corpus.name = name
    return corpus


def held_out(
    corpus: corpora.LabelledCorpus, n_groups: int, folds: int, seed: int = 0
) -> tuple[float, float]:
    """Held-out log-likelihood per known token and mean held-out NMI over the folds.

    Parameters
    ----------
    corpus : LabelledCorpus
    n_groups : int
        K of the batch fits.
    folds : int
        Number of folds; fold f trains on the others with seed ``seed + f``.
    seed : int
        Seed of the fold assignment.

    Returns
    -------
    (float, float)
        Sum over held-out documents of log p(d) divided by their known tokens; mean NMI.
    """
    texts = list(corpus.texts)
    labels = np.asarray(corpus.labels)
    fold_of = np.random.default_rng(seed).permutation(len(texts)) % folds
    log_lik = 0.0
    tokens = 0.0
    nmis = []
    for fold in range(folds):
        test = np.flatnonzero(fold_of == fold)
        train = [texts[i] for i in np.flatnonzero(fold_of != fold)]
        state, _ = fit_texts(train, MixtureConfig(n_groups=n_groups), seed=seed + fold)
        test_texts = [texts[i] for i in test]
        counts = count_texts(test_texts, state.tokenizer, state.vocabulary, grow=False).counts
        counts = counts.tocsr()
        params = state.parameters()
        joint = np.asarray(counts @ params.log_word_prob[: counts.shape[1]]) + params.log_weights
        log_lik += float(logsumexp(joint, axis=1).sum())
        tokens += float(counts.sum())
        # The MAP group is the argmax of the joint (route_texts' answer, without counting twice).
        nmis.append(normalized_mutual_info_score(labels[test], joint.argmax(axis=1)))
    return log_lik / tokens, float(np.mean(nmis))


def main(argv: list[str] | None = None) -> None:
    """Print one row per K and the K a held-out criterion picks."""
    parser = argparse.ArgumentParser(prog="python -m bench.bench_group_count", description=__doc__)
    parser.add_argument("--corpus", choices=("bbc", "wordnet-26", "wordnet-45"), required=True)
    parser.add_argument("--groups", type=int, nargs="+", required=True)
    parser.add_argument("--folds", type=int, default=5)
    args = parser.parse_args(argv)
    corpus = load(args.corpus)
    true_k = len(corpus.label_names)
    print(
        f"{args.corpus}: {len(corpus)} documents, {true_k} labels, {args.folds}-fold held-out",
        flush=True,
    )
    print(f"{'K':>4} {'held-out ll/token':>18} {'vs K=' + str(args.groups[0]):>9} {'NMI':>6}")
    rows = []
    for k in args.groups:
        began = time.perf_counter()
        per_token, nmi = held_out(corpus, k, args.folds)
        rows.append((k, per_token, nmi))
        print(
            f"{k:>4} {per_token:>18.4f} {per_token - rows[0][1]:>+9.4f} {nmi:>6.3f}"
            f"   ({time.perf_counter() - began:.0f} s)",
            flush=True,
        )
    best = max(rows, key=lambda row: row[1])
    nearest = min(rows, key=lambda row: abs(row[0] - true_k))
    print(
        f"held-out criterion picks K={best[0]} (labels: {true_k}); NMI there {best[2]:.3f}, "
        f"at K={nearest[0]} {nearest[2]:.3f}",
        flush=True,
    )


if __name__ == "__main__":
    main()
