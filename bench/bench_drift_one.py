"""One drift stream, one starting mode, several seeds in sequence (the slow table's cells).

``python -m bench.bench_drift_one --stream bbc --start k --seeds 0 1 2`` prints, per seed,
arrival NMI, end NMI, ARI, live groups and events with the lifecycle on (max_groups twice the
true count), then the means; ``--batch`` adds batch EM on all documents beside them (at the
true count, or at ``--batch-groups N``). Streams: ``wordnet-26``, ``wordnet-45``, ``bbc``
(bench.bench_quality.drift_streams builds them the same way: sorted by topic, 16 parts,
each shuffled; Yin et al., KDD 2018), and ``wordnet-26-shuffled``, the 26-file glosses in
one random order (no drift: the null case a change for drift streams must not hurt).
``--trace`` prints each group event with its founders' topics and the final group x topic
counts. ``--unit-tokens N`` learns in steps of at most N tokens (bench.bench_units, an
experiment; ``--count-per-step`` counts each step's texts when it comes). ``--set
FIELD=VALUE`` overrides a field of the model's configuration and ``--set
lifecycle.FIELD=VALUE`` one of its lifecycle (values are read as JSON, else as text), for
measuring a variant beside the defaults.
"""

from __future__ import annotations

import argparse
import json
from typing import Any

import numpy as np
from sklearn.metrics import adjusted_rand_score, normalized_mutual_info_score

from bench.bench_quality import DRIFT_PER_FILE, DRIFT_START_GROUPS
from tests import corpora


def build_stream(name: str) -> corpora.LabelledCorpus:
    """The named drift stream, built as in bench.bench_quality.drift_streams."""
    if name == "bbc":
        return corpora.drift_stream(corpora.load_bbc())
    files = None if name == "wordnet-45" else list(corpora.NOUN_LEXNAMES.values())
    corpus = corpora.load_wordnet_files(files, DRIFT_PER_FILE, seed=0)
    corpus.name = name
    if name == "wordnet-26-shuffled":
        return corpus.subset(np.random.default_rng(0).permutation(len(corpus)))
    return corpora.drift_stream(corpus)


def print_trace(stream: corpora.LabelledCorpus, run: corpora.DriftPass) -> None:
    """Each event (position, kind, groups, founders by topic) and the final group x topic counts.

    The topic of message i is ``stream.label_names[stream.labels[i]]``; a founder's stream
    position is its index in the stream (the pass learns every message in order).
    """
    names = stream.label_names
    labels = np.asarray(stream.labels)
    for event in run.events:
        line = f"  {event.position:6d} {event.kind:7s} {list(event.groups)}"
        if event.documents:
            topics = np.bincount(labels[list(event.documents)], minlength=len(names))
            line += " founders " + ", ".join(
                f"{names[t]} {n}" for t, n in sorted(enumerate(topics), key=lambda x: -x[1]) if n
            )
        print(line, flush=True)
    for group in np.unique(run.final):
        topics = np.bincount(labels[run.final == group], minlength=len(names))
        counts = ", ".join(f"{names[t]} {n}" for t, n in enumerate(topics) if n)
        print(f"  final group {group}: {counts}", flush=True)


def parse_overrides(pairs: list[str]) -> tuple[dict[str, Any], dict[str, Any]]:
    """``FIELD=VALUE`` pairs as (model fields, lifecycle fields); VALUE as JSON, else text."""
    model: dict[str, Any] = {}
    lifecycle: dict[str, Any] = {}
    for pair in pairs:
        key, sep, text = pair.partition("=")
        if not sep or not key:
            raise SystemExit(f"--set wants FIELD=VALUE, got {pair!r}")
        try:
            value = json.loads(text)
        except json.JSONDecodeError:
            value = text
        if key.startswith("lifecycle."):
            lifecycle[key.removeprefix("lifecycle.")] = value
        else:
            model[key] = value
    return model, lifecycle


def main(argv: list[str] | None = None) -> None:
    """Run the chosen cells and print one line per seed and the means."""
    from bench.bench_units import token_step_learner
    from mixture.config import MixtureConfig
    from mixture.em import fit_texts
    from mixture.lifecycle_config import LifecycleConfig
    from mixture.routing import route_texts

    parser = argparse.ArgumentParser(prog="python -m bench.bench_drift_one", description=__doc__)
    parser.add_argument(
        "--stream",
        choices=("wordnet-26", "wordnet-45", "bbc", "wordnet-26-shuffled"),
        required=True,
    )
    parser.add_argument("--start", choices=("k", "2"), default="k")
    parser.add_argument("--seeds", type=int, nargs="+", default=[0])
    parser.add_argument("--batch", action="store_true", help="also batch EM on all documents")
    parser.add_argument(
        "--batch-groups",
        type=int,
        default=0,
        help="with --batch: batch EM at this many groups (0: the true count)",
    )
    parser.add_argument("--off", action="store_true", help="lifecycle off")
    parser.add_argument(
        "--unit-tokens",
        type=int,
        default=0,
        help="steps of at most this many tokens (bench.bench_units; 0: a step is a unit)",
    )
    parser.add_argument(
        "--count-per-step",
        action="store_true",
        help="with --unit-tokens: count each step's texts when it comes (bench.bench_units)",
    )
    parser.add_argument(
        "--trace", action="store_true", help="print each event with its founders' topics"
    )
    parser.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="FIELD=VALUE",
        help="override a MixtureConfig field, or lifecycle.FIELD of its LifecycleConfig",
    )
    args = parser.parse_args(argv)
    model_fields, lifecycle_fields = parse_overrides(args.set)

    stream = build_stream(args.stream)
    k = len(stream.label_names)
    start = k if args.start == "k" else DRIFT_START_GROUPS
    rows = []
    for seed in args.seeds:
        if args.batch:
            groups = args.batch_groups or k
            state, _ = fit_texts(stream.texts, MixtureConfig(n_groups=groups), seed=seed)
            batch = route_texts(state, stream.texts).group
            batch_nmi = normalized_mutual_info_score(stream.labels, batch)
            print(f"seed {seed} batch EM at K={groups} end {batch_nmi:.3f}", flush=True)
        lifecycle = LifecycleConfig(
            **{"enabled": not args.off, "max_groups": 2 * k, **lifecycle_fields}
        )
        run = corpora.drift_pass(
            stream,
            MixtureConfig(**{"n_groups": start, **model_fields, "lifecycle": lifecycle}),
            seed=seed,
            learner_class=token_step_learner(args.unit_tokens, args.count_per_step),
        )
        arrival = normalized_mutual_info_score(stream.labels, run.arrival)
        end = normalized_mutual_info_score(stream.labels, run.final)
        ari = adjusted_rand_score(stream.labels, run.final)
        events = ", ".join(f"{n} {kind}" for kind, n in run.event_counts().items())
        rows.append((arrival, end, ari, run.live_groups))
        if args.trace:
            print_trace(stream, run)
        print(
            f"{args.stream} K={k} start={start} seed {seed}: arrival {arrival:.3f} end {end:.3f} "
            f"ARI {ari:.3f} live {run.live_groups} events {events or '-'} "
            f"learn {run.learn_seconds:.1f}s",
            flush=True,
        )
    means = np.mean(np.asarray(rows, dtype=np.float64), axis=0)
    print(
        f"{args.stream} K={k} start={start} mean over seeds {args.seeds}: arrival {means[0]:.3f} "
        f"end {means[1]:.3f} ARI {means[2]:.3f} live {means[3]:.1f}",
        flush=True,
    )


if __name__ == "__main__":
    main()
