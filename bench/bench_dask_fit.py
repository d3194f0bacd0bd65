"""The archive fit on a Dask LocalCluster of 2 workers against the single-process fit.

A synthetic archive (invented: K topics, each a Zipf-weighted slice of a made-up vocabulary of
"w<id>" tokens, 8-40 tokens a message) is counted once per run; each fit then runs in its own
child process so its peak memory is its own:

- single: mixture.em's batch EM, blocked on this machine's threads (mixture.sweep.EMSweep);
- dask: the same fit with every E-step on a LocalCluster of 2 worker processes, one thread
  each (archive.dask_fit), the M-step in the client.

Printed: wall time of the EM (counting excluded, it is the same serial step for both), the
ratio dask / single, peak resident memory (VmHWM) of the client process and of the
largest Dask worker, and whether the two states agree (max relative difference of the
expected word counts).

Run: ``python -m bench.bench_dask_fit [messages]`` (default 100,000). Prints, never asserts.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

DEFAULT_MESSAGES = 100_000
N_GROUPS = 8
VOCABULARY = 20_000
ROOT = Path(__file__).resolve().parents[1]


def synthetic_archive(n: int, seed: int = 0) -> list[str]:
    """Invented messages: topic k draws from words [k * V / K, (k + 1) * V / K) by Zipf."""
    rng = np.random.default_rng(seed)
    per_topic = VOCABULARY // N_GROUPS
    ranks = np.arange(1, per_topic + 1)
    zipf = 1.0 / ranks
    zipf /= zipf.sum()
    lengths = rng.integers(8, 41, size=n)
    topics = rng.integers(0, N_GROUPS, size=n)
    words = np.array([f"w{i}" for i in range(VOCABULARY)])
    draws = rng.choice(per_topic, size=int(lengths.sum()), p=zipf)
    texts = []
    at = 0
    for length, topic in zip(lengths, topics, strict=True):
        ids = draws[at : at + length] + topic * per_topic
        at += length
        texts.append(" ".join(words[ids]))
    return texts


def peak_kib() -> int:
    """This process's peak resident memory, KiB: VmHWM of /proc (its own address space; the
    rusage maximum would carry a forking parent's over an exec)."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1])
    return 0


def _one(kind: str, n: int, out: str) -> None:
    """Child process: count the archive, run one fit, write its figures and state."""
    from mixture.config import MixtureConfig
    from mixture.counting import count_texts
    from mixture.em import fit_pending
    from mixture.serialize import state_to_bytes
    from mixture.stats import MixtureState

    texts = synthetic_archive(n)
    config = MixtureConfig(n_groups=N_GROUPS, n_restarts=2, max_iter=50, vocabulary_limit=50_000)
    state = MixtureState.empty(config, 0)
    batch = count_texts(texts, state.tokenizer, state.vocabulary, grow=True)
    state.pending = batch.counts
    state.documents_learned = len(texts)
    del texts, batch
    worker_peak = 0
    if kind == "single":
        start = time.perf_counter()
        report = fit_pending(state)
        seconds = time.perf_counter() - start
    else:
        from archive.dask_fit import DaskSweep, dask_session

        with dask_session("local:2") as client:
            factory = DaskSweep.factory(client)
            start = time.perf_counter()
            report = fit_pending(state, sweep_factory=factory)
            seconds = time.perf_counter() - start
            factory.partition_set.release()  # type: ignore[attr-defined]
            worker_peak = max(client.run(peak_kib).values())
    Path(out).with_suffix(".state").write_bytes(state_to_bytes(state))
    Path(out).write_text(
        json.dumps(
            {
                "seconds": seconds,
                "iterations": sum(r.n_iter for r in report.restarts),
                "client_peak_kib": peak_kib(),
                "worker_peak_kib": worker_peak,
            }
        )
    )


def main(n: int = DEFAULT_MESSAGES) -> None:
    import tempfile

    from mixture.serialize import state_from_bytes

    figures = {}
    with tempfile.TemporaryDirectory() as folder:
        for kind in ("single", "dask"):
            out = str(Path(folder) / f"{kind}.json")
            subprocess.run(
                [sys.executable, "-m", "bench.bench_dask_fit", "--one", kind, str(n), out],
                check=True,
                cwd=ROOT,
            )
            figures[kind] = json.loads(Path(out).read_text())
            figures[kind]["state"] = state_from_bytes(Path(out).with_suffix(".state").read_bytes())
    single, dask = figures["single"], figures["dask"]
    a = single["state"].expected_word_counts()
    b = dask["state"].expected_word_counts()
    difference = float(np.max(np.abs(a - b)) / max(float(np.max(np.abs(a))), 1e-300))
    print(f"synthetic archive: {n:,} invented messages, K = {N_GROUPS}, 2 restarts")
    for kind in ("single", "dask"):
        f = figures[kind]
        worker = (
            f" worker peak {f['worker_peak_kib'] / 1024:7.0f} MiB" if f["worker_peak_kib"] else ""
        )
        print(
            f"{kind:>6}: EM {f['seconds']:7.2f} s ({f['iterations']} iterations)  "
            f"client peak {f['client_peak_kib'] / 1024:7.0f} MiB{worker}"
        )
    print(f"dask / single wall time: {dask['seconds'] / single['seconds']:.2f}")
    print(f"max relative difference of the expected word counts: {difference:.1e}")


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--one":
        _one(sys.argv[2], int(sys.argv[3]), sys.argv[4])
    else:
        main(int(sys.argv[1]) if len(sys.argv) > 1 else DEFAULT_MESSAGES)
