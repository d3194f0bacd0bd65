"""Cost of one correction as the labelled set grows (the model core, and the worker).

Core: a warmed-up state (invented short ferry-inbox messages, K = 4, batch 256) holding L
labelled documents learns a stepwise unit of 256 messages, then one correction plus the same
unit again; the reference is the unit alone, measured in the same loop, alternating. Printed:
the ratio (correction + unit) / unit and the correction's cost in milliseconds and in
documents' worth. With per-group sums kept beside the labelled set the cost does not grow with
L; summing the labelled set again after each change made it O(L).

``--worker`` also runs ``bench_worker.correction_cost`` (the worker on an embedded Redis, 1%
corrections, three runs) at about 600, 1,800 and 9,000 labelled documents held at the end.
"""

from __future__ import annotations

import argparse
import random
import statistics
import tempfile
import time

from bench.bench_worker import correction_cost, short_messages
from mixture.config import MixtureConfig
from mixture.labelled import LabelledItem
from mixture.online import OnlineLearner
from mixture.stats import MixtureState

CONFIG = MixtureConfig(
    n_groups=4,
    warmup_documents=1000,
    batch_size=256,
    n_restarts=2,
    max_iter=50,
    vocabulary_limit=100_000,
)


def core_correction_cost(held: int, repeats: int) -> None:
    """One correction next to one stepwise unit, with ``held`` labelled documents."""
    rng = random.Random(3)
    learner = OnlineLearner.from_state(MixtureState.empty(CONFIG, seed=0))
    learner.learn(short_messages(CONFIG.warmup_documents, seed=1))
    held = min(held, CONFIG.labelled_limit - repeats)
    texts = short_messages(held, seed=2)
    for start in range(0, held, 500):
        learner.learn_labelled(
            [
                LabelledItem(f"h{i}", text, rng.randrange(CONFIG.n_groups))
                for i, text in enumerate(texts[start : start + 500], start)
            ]
        )
    plain, corrected = [], []
    for rep in range(repeats):
        unit = short_messages(CONFIG.batch_size, seed=100 + rep)
        start = time.perf_counter()
        learner.learn(unit)
        plain.append(time.perf_counter() - start)
        item = LabelledItem(f"c{rep}", unit[0], rng.randrange(CONFIG.n_groups))
        start = time.perf_counter()
        learner.learn_labelled([item])
        learner.learn(unit)
        corrected.append(time.perf_counter() - start)
    unit_s, both_s = statistics.median(plain), statistics.median(corrected)
    extra = max(both_s - unit_s, 0.0)
    print(
        f"  {len(learner.state.labelled):6,d} held: unit {unit_s * 1e3:6.2f} ms, "
        f"correction + unit {both_s * 1e3:6.2f} ms, ratio {both_s / unit_s:5.2f}, "
        f"one correction {extra * 1e3:5.2f} ms "
        f"({extra / (unit_s / CONFIG.batch_size):.0f} documents' worth)"
    )


def main(argv: list[str] | None = None) -> None:
    """Print the core's cost of a correction at 600, 1,800 and 10,000 labelled held."""
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--worker", action="store_true", help="also the worker (minutes)")
    parser.add_argument("--quick", action="store_true", help="fewer repeats")
    args = parser.parse_args(argv)
    repeats = 30 if args.quick else 100
    print(
        f"one correction in the core, K={CONFIG.n_groups}, batch {CONFIG.batch_size}, "
        f"medians of {repeats}"
    )
    for held in (600, 1800, 10_000):
        core_correction_cost(held, repeats)
    if args.worker:
        from state.connection import EmbeddedRedis

        with tempfile.TemporaryDirectory() as folder, EmbeddedRedis(folder) as server:
            for n_docs in (20_000, 60_000, 300_000):
                correction_cost(server, n_docs, 3, 0.01)


if __name__ == "__main__":
    main()
