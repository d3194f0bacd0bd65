"""The token-budget learner of bench.bench_units (an experiment the benchmarks measure).

Checked against brute force (a greedy cut written out row by row) and against the product's
own learner: a budget that no unit reaches must leave the state bit for bit as
``OnlineLearner`` leaves it, and a budget that cuts must take the steps it says.
Invented data (tests/lifecycle_streams.py).
"""

from __future__ import annotations

import numpy as np

from bench.bench_units import step_bounds, token_step_learner
from mixture.config import MixtureConfig
from mixture.lifecycle_config import LifecycleConfig
from mixture.online import OnlineLearner
from mixture.serialize import state_to_bytes
from tests.lifecycle_streams import TopicStream


def _greedy(lengths: list[int], batch_size: int, budget: int) -> list[tuple[int, int]]:
    """Row by row: close a step when the next row would pass the budget or the unit ends."""
    bounds = []
    for unit in range(0, len(lengths), batch_size):
        stop = min(unit + batch_size, len(lengths))
        start, tokens = unit, 0
        for row in range(unit, stop):
            if row > start and tokens + lengths[row] > budget:
                bounds.append((start, row))
                start, tokens = row, 0
            tokens += lengths[row]
        bounds.append((start, stop))
    return bounds


def test_step_bounds_match_a_greedy_cut_row_by_row() -> None:
    rng = np.random.default_rng(0)
    for _ in range(50):
        lengths = rng.integers(0, 40, size=int(rng.integers(1, 120))).tolist()
        for batch_size, budget in ((16, 60), (50, 30), (7, 1000), (10, 5)):
            got = step_bounds(np.asarray(lengths), batch_size, budget)
            assert got == _greedy(lengths, batch_size, budget)
    assert step_bounds(np.asarray([5, 5, 5]), 2, 0) == [(0, 2), (2, 3)]


def _learn(learner: OnlineLearner, texts: list[str], size: int) -> int:
    steps = 0
    for start in range(0, len(texts), size):
        steps += learner.learn(texts[start : start + size]).steps
    return steps


def test_a_budget_no_unit_reaches_changes_nothing_and_a_smaller_one_cuts() -> None:
    stream = TopicStream(3, seed=4)
    labels = np.repeat(np.arange(3), 200)
    texts = stream.messages(labels, mean_length=12.0)
    config = MixtureConfig(
        n_groups=3, warmup_tokens=1500, batch_size=50, n_restarts=1, max_iter=30,
        lifecycle=LifecycleConfig(enabled=True),
    )  # fmt: skip
    base = OnlineLearner(config, seed=0)
    base_steps = _learn(base, texts, 50)
    wide = token_step_learner(10_000)(config, seed=0)
    assert _learn(wide, texts, 50) == base_steps
    assert state_to_bytes(wide.state) == state_to_bytes(base.state)
    narrow = token_step_learner(200)(config, seed=0)  # a unit of 50 holds about 600 tokens
    narrow_steps = _learn(narrow, texts, 50)
    assert narrow_steps >= 2 * base_steps
    assert narrow.state.documents_learned == base.state.documents_learned
    # Partial steps move the schedule by their share of a unit: the same documents, the same
    # units counted (up to the rounding of the fractions).
    assert abs(narrow.state.step - base.state.step) < 1e-9
