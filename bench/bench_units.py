"""Stepwise steps cut by a token budget, against whole units of ``batch_size`` documents.

An experiment, not the product: :class:`TokenStepLearner` is the online learner with each unit
that holds more than ``step_tokens`` tokens cut, greedily in order, into runs of documents
holding at most that many (a longer document is a step of its own). Each run is one stepwise
update, a fraction (documents / batch_size) of a step as for any partial unit, with the
lifecycle's evidence and decisions between runs as between units. Measured on the drift
streams with ``python -m bench.bench_drift_one --unit-tokens N``; here
``python -m bench.bench_units --seeds 0 1 2 --budgets 0 5120`` prints, per budget and seed:

1. the stationary case: one shuffled pass of the online learner over BBC (the corpus tests'
   pass, tests/corpora.py ``stepwise_pass``: a warm-up of 500 documents, learn calls of 256
   texts; and the default token warm-up), end NMI against the topics
   (``sklearn.metrics.normalized_mutual_info_score``), with the forgetting at the end of the
   pass: ``state.log_forgetting`` (sum of log(1 - eta) over the steps), the steps taken and
   Kish's effective documents 1 / ``weight_square_sum``;
2. the drift streams' units: how many learn calls of ``batch_size`` texts on each drift stream
   hold more tokens than the budget (0: learning there is the same with and without it);
3. the worker's short messages (bench.bench_worker ``short_messages``, 5-8 tokens): whether
   the state bytes after 40 units (warm-up included) are identical with and without the
   budget, lifecycle off and on.
"""

from __future__ import annotations

import argparse
from collections.abc import Sequence

import numpy as np
from sklearn.metrics import normalized_mutual_info_score

from mixture.counting import count_texts
from mixture.lifecycle import run_due_decisions, unit_observer
from mixture.online import BatchReport, OnlineLearner, stepwise_update
from tests import corpora


def step_bounds(lengths: np.ndarray, batch_size: int, step_tokens: int) -> list[tuple[int, int]]:
    """Row ranges of the steps: units of ``batch_size`` rows from the start, each cut into
    runs of at most ``step_tokens`` tokens when it holds more (0: no cut)."""
    n = lengths.size
    units = [(start, min(start + batch_size, n)) for start in range(0, n, batch_size)]
    if not step_tokens:
        return units
    before = np.concatenate(([0], np.cumsum(lengths)))  # tokens before each row
    bounds: list[tuple[int, int]] = []
    for start, stop in units:
        while start < stop:
            # The last row whose end stays within the budget, and at least one row.
            end = int(np.searchsorted(before, before[start] + step_tokens, side="right")) - 1
            end = min(max(end, start + 1), stop)
            bounds.append((start, end))
            start = end
    return bounds


class TokenStepLearner(OnlineLearner):
    """The online learner with steps of at most ``step_tokens`` tokens (0: whole units).

    ``learn`` is :meth:`OnlineLearner.learn` with the cut of :func:`step_bounds`: the call's
    texts are counted at once (the vocabulary grows with all of them before the first step)
    and each run of rows is one stepwise update with the lifecycle's evidence and decisions.
    With ``count_per_step`` each run is instead passed to ``OnlineLearner.learn`` on its own
    (counted when its step comes, as if the stream had arrived in those pieces).
    """

    step_tokens: int = 0
    count_per_step: bool = False

    def learn(self, texts: Sequence[str]) -> BatchReport:
        if not self.step_tokens:
            return super().learn(texts)
        state = self.state
        report = BatchReport(warmed_up=state.warmed_up)
        if not state.warmed_up:
            # The warm-up as the learner does it; the units start after its cut, as there.
            cut = self._warm_up(texts, report)
            if cut == len(texts):
                return report
            texts = texts[cut:]
        if self.count_per_step:
            lengths = np.array([len(state.tokenizer.tokenize(t)) for t in texts], dtype=np.int64)
            for start, stop in step_bounds(lengths, self.config.batch_size, self.step_tokens):
                report = report.merge(super().learn(texts[start:stop]))
            return report
        batch = count_texts(texts, state.tokenizer, state.vocabulary, grow=True)
        state.ensure_capacity()
        report.new_words += batch.new_words
        counts = batch.counts
        lengths = np.asarray(counts.sum(axis=1)).ravel().astype(np.int64)
        lifecycle = self.config.lifecycle.enabled
        for start, stop in step_bounds(lengths, self.config.batch_size, self.step_tokens):
            unit = counts[start:stop]
            observe = unit_observer(state, unit) if lifecycle else None
            part = stepwise_update(state, unit, observe=observe)
            state.documents_learned += part.documents
            report = report.merge(part)
            if lifecycle:
                report.events.extend(run_due_decisions(state))
        if state.vocabulary.n_active > self.config.vocabulary_limit:
            report.pruned_words += state.prune_vocabulary()
        return report


def token_step_learner(step_tokens: int, count_per_step: bool = False) -> type[TokenStepLearner]:
    """A TokenStepLearner class with the given budget (for tests/corpora.py ``drift_pass``)."""
    attributes = {"step_tokens": step_tokens, "count_per_step": count_per_step}
    return type("TokenStepLearner", (TokenStepLearner,), attributes)


def one_pass(
    corpus: corpora.LabelledCorpus, seed: int, budget: int, token_warm_up: bool
) -> tuple[float, float, float, float]:
    """End NMI, log_forgetting, steps and effective documents of one shuffled pass."""
    from mixture.config import MixtureConfig
    from mixture.routing import route_texts

    if token_warm_up:
        config = MixtureConfig(n_groups=len(corpus.label_names))
    else:
        config = MixtureConfig(
            n_groups=len(corpus.label_names),
            warmup_documents=corpora.STEPWISE_WARMUP,
            warmup_tokens=0,
            provisional_documents=0,
        )
    order = np.random.default_rng(seed).permutation(len(corpus))
    learner = token_step_learner(budget)(config, seed=seed)
    steps = 0
    for start in range(0, len(order), corpora.STEPWISE_CHUNK):
        report = learner.learn(
            [corpus.texts[i] for i in order[start : start + corpora.STEPWISE_CHUNK]]
        )
        steps += report.steps
    state = learner.state
    final = route_texts(state, corpus.texts).group
    nmi = normalized_mutual_info_score(corpus.labels, final)
    return nmi, state.log_forgetting, float(steps), 1.0 / state.weight_square_sum


def units_over_budget(stream: corpora.LabelledCorpus, budget: int, batch_size: int) -> int:
    """Learn calls of batch_size texts on the stream holding more than ``budget`` tokens."""
    from mixture.tokenizer import Tokenizer, TokenizerConfig

    tokenizer = Tokenizer(TokenizerConfig())
    lengths = np.array([len(tokenizer.tokenize(text)) for text in stream.texts])
    sums = np.add.reduceat(lengths, np.arange(0, lengths.size, batch_size))
    print(
        f"  {stream.name}: {sums.size} units, tokens per unit {sums.min()}-{sums.max()} "
        f"(median {int(np.median(sums))})",
        flush=True,
    )
    return int((sums > budget).sum()) if budget else 0


def short_messages_identical(budget: int) -> bool:
    """Same state bytes after 40 units of the worker's short messages, budget or none."""
    from bench.bench_worker import short_messages
    from mixture.config import MixtureConfig
    from mixture.lifecycle_config import LifecycleConfig
    from mixture.serialize import state_to_bytes

    texts = short_messages(256 * 40, seed=0)  # the warm-up ends near 6,000 messages
    out = []
    for step_tokens in (0, budget):
        for enabled in (False, True):
            config = MixtureConfig(n_groups=4, lifecycle=LifecycleConfig(enabled=enabled))
            learner = token_step_learner(step_tokens)(config, seed=0)
            for start in range(0, len(texts), 256):
                learner.learn(texts[start : start + 256])
            assert learner.state.warmed_up
            out.append(state_to_bytes(learner.state))
    return out[0] == out[2] and out[1] == out[3]


def main(argv: list[str] | None = None) -> None:
    """Print the three parts for each budget."""
    from bench.bench_drift_one import build_stream

    parser = argparse.ArgumentParser(prog="python -m bench.bench_units", description=__doc__)
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    parser.add_argument("--budgets", type=int, nargs="+", default=[0, 5120])
    args = parser.parse_args(argv)

    bbc = corpora.load_bbc()
    for token_warm_up in (False, True):
        warm = "token warm-up (40,000)" if token_warm_up else "warm-up of 500 documents"
        for budget in args.budgets:
            rows = [one_pass(bbc, seed, budget, token_warm_up) for seed in args.seeds]
            for seed, (nmi, forgetting, steps, effective) in zip(args.seeds, rows, strict=True):
                print(
                    f"BBC stationary, {warm}, unit_tokens {budget}, seed {seed}: end NMI "
                    f"{nmi:.3f}, log_forgetting {forgetting:.3f}, steps {steps:.0f}, "
                    f"effective documents {effective:.0f}",
                    flush=True,
                )
            means = np.mean(np.asarray(rows), axis=0)
            print(
                f"BBC stationary, {warm}, unit_tokens {budget}, mean over seeds {args.seeds}: "
                f"end NMI {means[0]:.3f}, log_forgetting {means[1]:.3f}, steps {means[2]:.1f}, "
                f"effective documents {means[3]:.0f}",
                flush=True,
            )
    for budget in args.budgets:
        if not budget:
            continue
        print(f"drift streams, unit_tokens {budget}:", flush=True)
        for name in ("wordnet-26", "wordnet-45", "bbc"):
            over = units_over_budget(build_stream(name), budget, 256)
            print(f"  {name}: {over} units over the budget", flush=True)
        same = short_messages_identical(budget)
        print(f"short messages, unit_tokens {budget}: state bytes identical {same}", flush=True)


if __name__ == "__main__":
    main()
