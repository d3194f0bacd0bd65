"""The group lifecycle's cost per learning unit in mixture/ alone (no Redis), on short messages.

Two learners, lifecycle off and on, warmed up on the same 1,000 messages, learn the same
short messages (bench.bench_worker ``short_messages``, eight invented topics, K = 8, units of
256 as the worker learns them) unit by unit, in alternating order, so each pair of units
shares the same moment of a shared machine. Printed, as medians over windows of four units
(a window of the lifecycle's decisions holds about four units):

1. the time of a unit, off and on, and on / off (the reference is the off unit of the same
   run): what the worker's learning pays for the lifecycle;
2. the on unit's lifecycle parts: the evidence hook (``unit_observer``, mixture.novelty
   ``observe_unit``) and the decisions (``run_due_decisions``), each as a share of the off unit;
3. ``state_to_bytes`` of the two states at the end, on / off (the checkpoint's encoding cost
   of the lifecycle's evidence).

Run ``python -m bench.bench_lifecycle_unit [--quick]``.
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable
from typing import Any

import mixture.online as online
from bench.bench_worker import EIGHT_TOPICS, short_messages
from mixture.config import MixtureConfig
from mixture.lifecycle import run_due_decisions, unit_observer
from mixture.lifecycle_config import LifecycleConfig
from mixture.online import OnlineLearner
from mixture.serialize import state_to_bytes

UNIT = 256


def _learner(lifecycle: bool) -> OnlineLearner:
    config = MixtureConfig(
        n_groups=8,
        warmup_documents=1000,
        batch_size=UNIT,
        n_restarts=2,
        max_iter=50,
        vocabulary_limit=100_000,
        lifecycle=LifecycleConfig(enabled=lifecycle),
    )
    learner = OnlineLearner(config, seed=0)
    learner.learn(short_messages(1000, seed=1, topics=EIGHT_TOPICS))
    return learner


def _window_medians(seconds: list[float], size: int = 4) -> float:
    """Median over consecutive windows of ``size`` units of the mean unit time, in us."""
    means = [sum(seconds[i : i + size]) / size for i in range(0, len(seconds) - size + 1, size)]
    return statistics.median(means) * 1e6


def unit_costs(n_docs: int, repeats: int) -> dict[str, float]:
    """Per-unit times (us) off and on and of the on unit's lifecycle parts; see the module."""
    learners = {False: _learner(False), True: _learner(True)}
    times: dict[str, list[float]] = {"off": [], "on": [], "observe": [], "decide": []}
    parts = {"observe": 0.0, "decide": 0.0}

    def timed_observer(state: Any, unit: Any) -> Callable[..., Any]:
        observe = unit_observer(state, unit)

        def run(step: Any) -> Any:
            began = time.perf_counter()
            try:
                return observe(step)
            finally:
                parts["observe"] += time.perf_counter() - began

        return run

    def timed_decisions(state: Any) -> Any:
        began = time.perf_counter()
        try:
            return run_due_decisions(state)
        finally:
            parts["decide"] += time.perf_counter() - began

    hooks = (online.unit_observer, online.run_due_decisions)
    online.unit_observer, online.run_due_decisions = timed_observer, timed_decisions
    try:
        for rep in range(repeats):
            texts = short_messages(n_docs, seed=100 + rep, topics=EIGHT_TOPICS)
            for j, start in enumerate(range(0, n_docs - UNIT + 1, UNIT)):
                for enabled in (False, True) if j % 2 == 0 else (True, False):
                    parts.update(observe=0.0, decide=0.0)
                    began = time.perf_counter()
                    learners[enabled].learn(texts[start : start + UNIT])
                    times["on" if enabled else "off"].append(time.perf_counter() - began)
                    if enabled:
                        times["observe"].append(parts["observe"])
                        times["decide"].append(parts["decide"])
    finally:
        online.unit_observer, online.run_due_decisions = hooks
    out = {name: _window_medians(values) for name, values in times.items()}
    encode = {}
    for enabled, learner in learners.items():
        runs = []
        for _ in range(50):
            began = time.perf_counter()
            state_to_bytes(learner.state)
            runs.append(time.perf_counter() - began)
        encode[enabled] = statistics.median(runs) * 1e6
    out["bytes_off"], out["bytes_on"] = encode[False], encode[True]
    return out


def main(argv: list[str] | None = None) -> None:
    """Measure and print the figures (see the module docstring)."""
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--quick", action="store_true", help="fewer units")
    args = parser.parse_args(argv)
    n_docs, repeats = (20_480, 1) if args.quick else (59_904, 3)
    c = unit_costs(n_docs, repeats)
    print(
        f"lifecycle per unit, mixture/ alone: short messages, K=8, units of {UNIT}, "
        f"{n_docs // UNIT} units x {repeats} runs, off and on alternating (medians over windows "
        "of 4 units)"
    )
    print(f"  unit, lifecycle off       : {c['off']:10.1f} us")
    print(f"  unit, lifecycle on        : {c['on']:10.1f} us   on / off {c['on'] / c['off']:.3f}")
    print(
        f"  evidence hook (on)        : {c['observe']:10.1f} us   "
        f"{c['observe'] / c['off']:.3f} of the off unit"
    )
    print(
        f"  decisions (on)            : {c['decide']:10.1f} us   "
        f"{c['decide'] / c['off']:.3f} of the off unit"
    )
    print(
        f"  state_to_bytes off / on   : {c['bytes_off']:7.0f} / {c['bytes_on']:.0f} us   "
        f"on / off {c['bytes_on'] / c['bytes_off']:.3f}"
    )


if __name__ == "__main__":
    main()
