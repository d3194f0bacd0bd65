"""Models per API process: memory with and without a budget, and memory per model.

1. Memory of one model in an API process (service.runtime.state_memory: its arrays, the
   vocabulary's words and index, the derived parameters) for K groups and V words, from
   states made by MixtureState.from_counts over an invented vocabulary.
2. One API runtime (service.runtime.ServiceRuntime, as the API process holds it) in a child
   process over an embedded Redis with ``N_MODELS`` models, each with a checkpoint (the same
   fitted state, K = 8, an invented vocabulary of ``VOCABULARY`` words): every model routed
   once, round-robin, then again; printed: the process's resident memory (VmRSS) after start
   and after the requests, the bytes the cache holds, the evictions, and the time of a request
   that finds its model in memory against one that loads it from Redis. Without a budget and
   with a budget of a tenth of the models.

Run: ``python -m bench.bench_model_memory`` (or ``make bench``). Prints, never asserts.
"""

from __future__ import annotations

import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from mixture.stats import MixtureState

N_MODELS = 200
VOCABULARY = 20_000
ROOT = Path(__file__).resolve().parents[1]


def state_of(n_groups: int, n_words: int, seed: int = 0) -> MixtureState:
    """A warmed-up state over ``n_words`` invented words with random expected counts."""
    from mixture.config import MixtureConfig
    from mixture.stats import MixtureState
    from mixture.vocabulary import Vocabulary

    rng = np.random.default_rng(seed)
    vocabulary = Vocabulary()
    for i in range(n_words):
        vocabulary.add(f"w{i:06d}")
    word_counts = rng.gamma(0.3, 2.0, size=(n_words, n_groups))
    doc_counts = rng.uniform(100, 1000, size=n_groups)
    config = MixtureConfig(n_groups=n_groups, vocabulary_limit=max(n_words, 1000))
    state = MixtureState.from_counts(config, vocabulary, word_counts, doc_counts, 10_000)
    state.warmed_up = True
    state.parameters()
    return state


def rss_mib() -> float:
    """Resident memory of this process (Linux /proc), MiB."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def _runtime_child(url: str, budget_mb: str, out: str) -> None:
    from service.runtime import ServiceRuntime
    from service.settings import Settings
    from state.connection import redis_from_url

    budget = None if budget_mb == "none" else float(budget_mb)
    settings = Settings(redis_url=url, model_memory_mb=budget, reload_notifications=False)
    client = redis_from_url(url)
    runtime = ServiceRuntime(settings, client)
    before = rss_mib()
    runtime.start()
    after_start = rss_mib()
    names = [f"bench-mem-{i:03d}" for i in range(N_MODELS)]
    texts = ["ferry late w000001 w000002 w000003", "refund w000010 w000011"]
    hit, miss = [], []
    for _round in range(2):
        for name in names:
            cached = name in runtime.models
            start = time.perf_counter()
            runtime.route(runtime.model(name), texts)
            (hit if cached else miss).append(time.perf_counter() - start)
    runtime.stop()
    Path(out).write_text(
        json.dumps(
            {
                "rss_before": before,
                "rss_after_start": after_start,
                "rss_after": rss_mib(),
                "loaded": len(runtime.models),
                "cache_mib": runtime.memory_in_use() / 2**20,
                "evictions": runtime.evictions,
                "hit_ms": 1000 * statistics.median(hit) if hit else None,
                "miss_ms": 1000 * statistics.median(miss) if miss else None,
            }
        )
    )


def main() -> None:
    from mixture.serialize import state_to_bytes
    from service.runtime import state_memory
    from state.connection import EmbeddedRedis
    from state.keys import ModelKeys
    from state.registry import Registry
    from state.store import ModelStore
    from state.versions import Checkpoint

    print("memory per loaded model (state_memory), MiB")
    print("        " + "".join(f"V={v:>9,}" for v in (1_000, 10_000, 100_000)))
    for k in (4, 16, 64):
        row = [state_memory(state_of(k, v)) / 2**20 for v in (1_000, 10_000, 100_000)]
        print(f"K={k:<4}  " + "".join(f"{m:11.2f}" for m in row))

    state = state_of(8, VOCABULARY)
    per_model = state_memory(state) / 2**20
    with tempfile.TemporaryDirectory() as folder, EmbeddedRedis(folder, appendonly=False) as server:
        client = server.client()
        registry = Registry(client)
        for i in range(N_MODELS):
            name = f"bench-mem-{i:03d}"
            registry.create(name, state.config)
            store = ModelStore(client, name)
            client.set(ModelKeys(name).heartbeat, "bench")
            store.commit_checkpoint(
                Checkpoint(worker="bench", expected_version=0, state=state, watermark="0-1")
            )
        print(
            f"\n{N_MODELS} models, K = 8, V = {VOCABULARY:,}: {per_model:.2f} MiB each loaded, "
            f"{len(state_to_bytes(state)) / 2**20:.2f} MiB of state bytes in Redis"
        )
        for budget in ("none", f"{per_model * N_MODELS / 10:.1f}"):
            with tempfile.NamedTemporaryFile(suffix=".json") as out:
                subprocess.run(
                    [
                        sys.executable,
                        "-m",
                        "bench.bench_model_memory",
                        "--child",
                        server.url,
                        budget,
                        out.name,
                    ],
                    check=True,
                    cwd=ROOT,
                )
                f = json.loads(Path(out.name).read_text())
            label = "no budget" if budget == "none" else f"budget {budget} MiB"
            hit = f"{f['hit_ms']:.2f} ms" if f["hit_ms"] is not None else "-"
            miss = f"{f['miss_ms']:.2f} ms" if f["miss_ms"] is not None else "-"
            print(
                f"{label:>20}: RSS {f['rss_before']:.0f} MiB at start, "
                f"{f['rss_after_start']:.0f} after load_all, {f['rss_after']:.0f} after "
                f"{2 * N_MODELS} requests; {f['loaded']} loaded ({f['cache_mib']:.0f} MiB), "
                f"{f['evictions']} evictions; request in memory {hit}, loading {miss}"
            )


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        _runtime_child(sys.argv[2], sys.argv[3], sys.argv[4])
    else:
        main()
