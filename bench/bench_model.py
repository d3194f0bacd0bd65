"""Model speed as ratios against references measured in the same run.

1. Routing a batch: ``route_counts`` / scikit-learn ``MultinomialNB.predict_proba`` with the
   same parameters copied into the classifier (target <= 1.0). Ours also computes the margin,
   the per-token log-likelihood and the evidence flags. Ours cuts a large batch into row
   blocks on all cores (mixture.sweep); it is timed on one thread too.
2. One batch EM iteration / the two sparse products no EM iteration can avoid,
   ``X @ log_word_prob`` and ``X.T @ resp`` (target <= 1.5). The iteration is measured inside
   ``fit_batch_em`` (median gap between its per-iteration progress calls, after annealing,
   with the reference products run and timed inside each call so both share the machine's
   load; annealing iterations are shown too) and as the public building blocks
   ``derive_parameters`` + ``e_step`` + ``m_step``. The fit runs its blocks on every core
   (mixture.sweep); the reference products are scipy's, on one core, as any caller gets them.
   The fit is also measured on one thread, to show what the blocking buys; the two modes
   alternate, twice, after an untimed warm-up fit.
3. One stepwise update at V = 1,000,000 / the same at V = 10,000, same mini-batch (target <= 1.5):
   the update must cost O(nonzeros + K), not O(K x V).

The data is synthetic (Zipf-like word frequencies, generated here). Run
``python -m bench.bench_model [--quick]``.
"""

from __future__ import annotations

import argparse
import gc
import statistics
import time
from collections.abc import Callable

import numpy as np
import scipy.sparse as sp
from sklearn.naive_bayes import MultinomialNB

from mixture.config import MixtureConfig
from mixture.em import e_step, fit_batch_em, m_step
from mixture.online import stepwise_update
from mixture.routing import route_counts
from mixture.stats import MixtureState, derive_parameters
from mixture.sweep import set_worker_threads, worker_threads
from mixture.vocabulary import Vocabulary


def timed_pair(
    first: Callable[[], object], second: Callable[[], object], repeats: int
) -> tuple[float, float]:
    """Median wall times of two calls measured in alternation (a change in machine load hits
    both alike); one untimed warm-up call of each first."""
    first()
    second()
    times: tuple[list[float], list[float]] = ([], [])
    for _ in range(repeats):
        for call, bucket in ((first, times[0]), (second, times[1])):
            gc.collect()
            start = time.perf_counter()
            call()
            bucket.append(time.perf_counter() - start)
    return statistics.median(times[0]), statistics.median(times[1])


def zipf_counts(
    n_docs: int, n_words: int, tokens_per_doc: int, seed: int, word_offset: int = 0
) -> sp.csr_matrix:
    """Documents with Zipf-distributed words (exponent 1.1), as a CSR count matrix."""
    rng = np.random.default_rng(seed)
    ranks = np.arange(1, n_words + 1, dtype=np.float64)
    prob = ranks**-1.1
    prob /= prob.sum()
    lengths = rng.poisson(tokens_per_doc, size=n_docs) + 1
    words = rng.choice(n_words, size=int(lengths.sum()), p=prob) + word_offset
    rows = np.repeat(np.arange(n_docs), lengths)
    width = n_words + word_offset
    matrix = sp.csr_matrix((np.ones(words.size), (rows, words)), shape=(n_docs, width))
    matrix.sum_duplicates()
    return matrix


def mixture_counts(
    n_docs: int, n_words: int, n_groups: int, tokens_per_doc: int, seed: int
) -> sp.csr_matrix:
    """Documents from a K-group mixture: each group has its own Zipf ranking of the words,
    mixed half-and-half with a shared Zipf background (so groups overlap, as real topics do).
    Structured data matters: on structureless text EM empties groups and re-seeds them, which
    would time the re-seeding instead of the iteration."""
    rng = np.random.default_rng(seed)
    ranks = np.arange(1, n_words + 1, dtype=np.float64)
    zipf = ranks**-1.1
    zipf /= zipf.sum()
    groups = rng.integers(0, n_groups, size=n_docs)
    lengths = rng.poisson(tokens_per_doc, size=n_docs) + 1
    rows_all, words_all = [], []
    for k in range(n_groups):
        members = np.flatnonzero(groups == k)
        total = int(lengths[members].sum())
        own = rng.permutation(n_words)[rng.choice(n_words, size=total, p=zipf)]
        shared = rng.choice(n_words, size=total, p=zipf)
        words_all.append(np.where(rng.random(total) < 0.5, own, shared))
        rows_all.append(np.repeat(members, lengths[members]))
    rows = np.concatenate(rows_all)
    words = np.concatenate(words_all)
    matrix = sp.csr_matrix((np.ones(words.size), (rows, words)), shape=(n_docs, n_words))
    matrix.sum_duplicates()
    return matrix


def random_parameters(n_words: int, n_groups: int, seed: int):
    rng = np.random.default_rng(seed)
    word_counts = rng.gamma(0.3, 10.0, size=(n_words, n_groups))
    doc_counts = rng.uniform(50.0, 500.0, size=n_groups)
    return word_counts, doc_counts


def bench_routing(n_docs: int, n_words: int, n_groups: int, repeats: int) -> dict[str, float]:
    counts = zipf_counts(n_docs, n_words, 120, seed=1)
    word_counts, doc_counts = random_parameters(n_words, n_groups, seed=2)
    params = derive_parameters(word_counts, doc_counts, None, 0.1, 1.0)
    # The classifier gets exactly our parameters (fit once for its attributes, then replaced).
    nb = MultinomialNB(alpha=0.1).fit(counts[:n_groups], np.arange(n_groups))
    nb.feature_log_prob_ = np.ascontiguousarray(params.log_word_prob.T)
    nb.class_log_prior_ = params.log_weights.copy()
    assert np.allclose(nb.predict_proba(counts[:50]), route_counts(params, counts[:50]).posterior)
    ours, reference = timed_pair(
        lambda: route_counts(params, counts), lambda: nb.predict_proba(counts), repeats
    )
    return {"ours": ours, "reference": reference}


def bbc_counts() -> sp.csr_matrix | None:
    """The BBC corpus as our counts (None when the corpus is not installed)."""
    from mixture.counting import count_texts
    from mixture.tokenizer import Tokenizer
    from tests.corpora import CorpusMissingError, load_bbc

    try:
        corpus = load_bbc()
    except CorpusMissingError:
        return None
    return count_texts(corpus.texts, Tokenizer(), Vocabulary(), grow=True).counts


def bench_em_iteration(
    counts: sp.csr_matrix, n_groups: int, repeats: int, iterations: int
) -> dict[str, float]:
    n_words = counts.shape[1]
    counts_t = counts.T.tocsr()
    word_counts, doc_counts = random_parameters(n_words, n_groups, seed=4)
    params = derive_parameters(word_counts, doc_counts, None, 0.1, 1.0)
    resp, _ = e_step(counts, params)
    log_word_prob = params.log_word_prob

    def products() -> None:
        _ = counts @ log_word_prob
        _ = counts_t @ resp

    def building_blocks() -> None:
        p = derive_parameters(word_counts, doc_counts, None, 0.1, 1.0)
        r, _ = e_step(counts, p)
        m_step(counts, r, counts_t)

    reference, blocks = timed_pair(products, building_blocks, repeats)

    # Inside the fit: fit_batch_em calls progress() after every iteration. The callback runs
    # the two reference products once and times them, so iterations and reference alternate in
    # the same stretch of machine load; an iteration is the gap from the end of one callback
    # to the start of the next (seeding and set-up fall outside the gaps).
    config = MixtureConfig(n_groups=n_groups, n_restarts=1, max_iter=iterations, tolerance=0.0)
    starts: list[float] = []
    ends: list[float] = []

    def tick(done: int, total: int) -> None:
        starts.append(time.perf_counter())
        products()
        ends.append(time.perf_counter())

    # One annealed run, as timed before both kinds ran (the plain run would follow it).
    report = fit_batch_em(counts, config, seed=0, progress=tick, kinds=("annealed",))[2]
    gaps = np.asarray(starts[1:]) - np.asarray(ends[:-1])
    paired = np.asarray(ends) - np.asarray(starts)
    n_em = max(report.n_iter - 1, 1)
    em_gaps = gaps[-n_em:]
    return {
        "reference": float(np.median(paired[-n_em:])),
        "reference_alone": reference,
        "blocks": blocks,
        "in_fit": float(np.median(em_gaps)),
        "annealing": float(np.median(gaps[: config.annealing_steps - 1]))
        if config.annealing_steps > 1
        else float("nan"),
        "annealing_reference": float(np.median(paired[: config.annealing_steps - 1]))
        if config.annealing_steps > 1
        else float("nan"),
        "reseeds": float(len(report.reseeded)),
        "n_iter": float(report.n_iter),
    }


def stepwise_state(n_words: int, n_groups: int, seed: int) -> MixtureState:
    """A warmed-up state over ``n_words`` vocabulary ids with random statistics."""
    config = MixtureConfig(n_groups=n_groups, vocabulary_limit=max(n_words, 1), batch_size=256)
    vocabulary = Vocabulary(f"w{i}" for i in range(n_words))
    rng = np.random.default_rng(seed)
    word_counts = rng.gamma(0.3, 1.0, size=(n_words, n_groups))
    doc_counts = rng.uniform(50.0, 500.0, size=n_groups)
    return MixtureState.from_counts(
        config, vocabulary, word_counts, doc_counts, documents_learned=1000, seed=seed
    )


def bench_stepwise(
    small: int, large: int, n_groups: int, repeats: int, updates: int
) -> dict[str, float]:
    # The same mini-batch (words among the first 10,000 ids) for both vocabulary sizes.
    batch = zipf_counts(256, min(small, 10_000), 60, seed=5)
    runs: dict[str, Callable[[], None]] = {}
    for name, n_words in (("small", small), ("large", large)):
        state = stepwise_state(n_words, n_groups, seed=6)
        wide = sp.csr_matrix(
            (batch.data, batch.indices, batch.indptr), shape=(batch.shape[0], n_words)
        )

        def run(state: MixtureState = state, wide: sp.csr_matrix = wide) -> None:
            for _ in range(updates):
                stepwise_update(state, wide)

        run()  # warm-up
        runs[name] = run
    # Interleaved, so a change in machine load hits both sizes alike.
    times: dict[str, list[float]] = {name: [] for name in runs}
    for _ in range(repeats):
        for name, run in runs.items():
            gc.collect()
            start = time.perf_counter()
            run()
            times[name].append((time.perf_counter() - start) / updates)
    return {name: statistics.median(values) for name, values in times.items()}


def main(argv: list[str] | None = None) -> None:
    """Print the three speed ratios with their absolute times."""
    parser = argparse.ArgumentParser(prog="python -m bench.bench_model", description=__doc__)
    parser.add_argument("--quick", action="store_true", help="smaller sizes (a smoke run)")
    args = parser.parse_args(argv)
    scale = 0.2 if args.quick else 1.0
    repeats = 3 if args.quick else 7
    k = 20

    n_route = int(20_000 * scale)
    print(f"routing {n_route} docs, V=50,000, K={k}")
    threads = worker_threads()
    for mode in [threads, 1] if threads > 1 else [1]:
        previous = set_worker_threads(mode)
        try:
            route = bench_routing(n_route, 50_000, k, repeats)
        finally:
            set_worker_threads(previous)
        print(
            f"  {mode} thread(s): route_counts {route['ours'] * 1e3:8.1f} ms   "
            f"MultinomialNB.predict_proba {route['reference'] * 1e3:8.1f} ms   "
            f"ratio {route['ours'] / route['reference']:.2f}  (target <= 1.0)"
        )

    n_em = int(20_000 * scale)
    # Short message-like documents: EM then needs tens of iterations (long ones converge in a
    # handful), so the per-iteration figure is a median over many iterations.
    synthetic = mixture_counts(n_em, 50_000, k, 20, seed=3)
    cases = [(f"{n_em} synthetic docs of ~20 tokens, V=50,000, K={k}", synthetic, k)]
    bbc = bbc_counts()
    if bbc is not None:
        cases.append((f"BBC corpus, {bbc.shape[0]} docs, V={bbc.shape[1]:,}, K=5", bbc, 5))
    modes = [threads, 1] if threads > 1 else [1]
    for title, counts, groups in cases:
        print(f"batch EM iteration, {title}, nnz={counts.nnz:,}")
        iterations = 20 if not args.quick else 8
        # An untimed fit first: the allocator's first large arrays come fresh from the kernel
        # (page faults), which would slow whichever mode ran first. Then the modes alternate,
        # twice, and both rounds are printed.
        warm = MixtureConfig(n_groups=groups, n_restarts=1, max_iter=3, annealing_steps=3)
        fit_batch_em(counts, warm, seed=0)
        for round_number in (1, 2):
            for mode in modes:
                previous = set_worker_threads(mode)
                try:
                    print(f"  round {round_number}, {mode} thread(s):")
                    report_em(bench_em_iteration(counts, groups, repeats, iterations))
                finally:
                    set_worker_threads(previous)

    large = 1_000_000 if not args.quick else 200_000
    step = bench_stepwise(10_000, large, k, repeats, updates=20)
    print(f"stepwise update, batch of 256 docs, K={k}")
    print(
        f"  V=10,000 {step['small'] * 1e3:8.3f} ms   V={large:,} {step['large'] * 1e3:8.3f} ms"
        f"   ratio {step['large'] / step['small']:.2f}  (target <= 1.5)"
    )


def report_em(em: dict[str, float]) -> None:
    """Print one EM-iteration measurement."""
    print(
        f"    X @ log_word_prob + X.T @ resp {em['reference'] * 1e3:8.1f} ms   "
        f"iteration in fit_batch_em {em['in_fit'] * 1e3:8.1f} ms   "
        f"ratio {em['in_fit'] / em['reference']:.2f}  (target <= 1.5; "
        f"{em['n_iter']:.0f} iterations, {em['reseeds']:.0f} re-seeds)"
    )
    print(
        f"    annealing iteration in fit_batch_em {em['annealing'] * 1e3:8.1f} ms   "
        f"ratio {em['annealing'] / em['annealing_reference']:.2f}"
    )
    print(
        f"    derive_parameters + e_step + m_step {em['blocks'] * 1e3:8.1f} ms   "
        f"products alone {em['reference_alone'] * 1e3:8.1f} ms   "
        f"ratio {em['blocks'] / em['reference_alone']:.2f}"
    )


if __name__ == "__main__":
    main()
