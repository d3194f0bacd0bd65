"""The worker pool: member processes share the models, a dead member's share is taken over.

Reference for the final states: mixture/ fed the same documents directly, in stream order, in
units of batch_size (``reference_state``, as tests/test_worker_crash.py): exactly-once learning
through kills and hand-overs means equal states. "Within one of even" is the arithmetic of
dividing M leases among N members: every count is floor(M/N) or ceil(M/N).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest
import redis

from state.keys import POOL_MEMBERS_KEY, REGISTRY_KEY, ModelKeys
from state.lease import lease_holders
from state.store import ModelStore
from tests.worker_support import (
    assert_same_state,
    create_model,
    fast_options,
    ferry_texts,
    learned_all,
    reference_state,
    small_config,
    wait_for,
)
from worker.pool import plan_share

ROOT = Path(__file__).resolve().parent.parent


# -- the plan alone -----------------------------------------------------------------------------
def test_plan_takes_the_share_and_releases_the_excess() -> None:
    models = [f"m{i}" for i in range(6)]
    free = dict.fromkeys(models)
    plan = plan_share("a", ["a", "b", "c"], models, free, set())
    assert plan.share == 2 and len(plan.take) == 2 and not plan.release
    # a newcomer makes three members: the one holding all six hands four back
    held = dict.fromkeys(models, "a")
    plan = plan_share("a", ["a", "b", "c"], models, held, set(models))
    assert len(plan.release) == 4 and not plan.take
    # at its share with nothing free: nothing to do
    split = {m: ("a" if i < 2 else "b") for i, m in enumerate(models)}
    assert plan_share("a", ["a", "b", "c"], models, split, set(models[:2])).take == []


def test_plan_takes_an_orphan_beyond_the_share_when_every_live_member_is_full() -> None:
    models = [f"m{i}" for i in range(6)]
    # c died: its two models are free while the roster still counts it
    holders = {"m0": "a", "m1": "a", "m2": "b", "m3": "b", "m4": None, "m5": None}
    not_yet = plan_share("a", ["a", "b", "c"], models, holders, {"m0", "m1"})
    assert not_yet.take == []  # not free long enough: a live member under its share may come
    orphans = {"m4", "m5"}
    a = plan_share("a", ["a", "b", "c"], models, holders, {"m0", "m1"}, orphans)
    b = plan_share("b", ["a", "b", "c"], models, holders, {"m2", "m3"}, orphans)
    assert len(a.take) == 1 and b.take == []  # a tie: the smaller name takes one a tick


# -- real processes -----------------------------------------------------------------------------
def _start_member(redis_url: str, name: str) -> subprocess.Popen[bytes]:
    env = {**os.environ, "REDIS_URL": redis_url, "MIXROUTE_LOG_LEVEL": "WARNING"}
    return subprocess.Popen(
        [
            sys.executable,
            "-m",
            "worker.pool",
            "--name",
            name,
            "--tick",
            "0.2",
            "--roster-ttl",
            "1.0",
            "--threads",
            "1",
        ],
        cwd=ROOT,
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )


def _spread_even(client: redis.Redis, models: list[str], members: list[str]) -> bool:
    holders = lease_holders(client, models)
    if any(holders[m] not in members for m in models):
        return False  # a model free, or held by someone else
    counts = [sum(1 for h in holders.values() if h == name) for name in members]
    return max(counts) - min(counts) <= 1


@pytest.mark.redis
def test_six_models_three_members_kill_one_restart_it(
    redis_url: str, redis_client: redis.Redis, model_name: str, pool_cleanup: None
) -> None:
    models = [f"{model_name}-{i}" for i in range(6)]
    config = small_config()
    stores: dict[str, ModelStore] = {}
    texts: dict[str, list[str]] = {}
    for i, model in enumerate(models):
        stores[model] = create_model(
            redis_client, model, config, fast_options(checkpoint_documents=150, read_count=100)
        )
        texts[model] = ferry_texts(3000, seed=40 + i)
    sent = dict.fromkeys(models, 0)

    def send(count: int) -> None:
        for model in models:
            start = sent[model]
            chunk = texts[model][start : start + count]
            stores[model].enqueue(chunk, ids=[f"d{start + j}" for j in range(len(chunk))])
            sent[model] = start + len(chunk)

    members = {name: _start_member(redis_url, name) for name in ("pool-a", "pool-b", "pool-c")}
    try:
        send(600)
        wait_for(
            lambda: _spread_even(redis_client, models, list(members)),
            timeout=60,
            what="6 leases spread over 3 members",
        )
        for model in models:
            wait_for(learned_all(stores[model], 600), timeout=120, what=f"{model} learned")

        # SIGKILL a member while every model has a backlog
        send(1200)
        victim = "pool-c"
        victims_models = [m for m, h in lease_holders(redis_client, models).items() if h == victim]
        assert victims_models
        wait_for(
            lambda: all(
                (stores[m].summary() or {}).get("documents_learned", 0) > 600
                for m in victims_models
            ),
            timeout=60,
            what="the victim learning",
        )
        members[victim].send_signal(signal.SIGKILL)
        members[victim].wait()
        members[victim].stderr.close()
        del members[victim]
        survivors = list(members)
        wait_for(
            lambda: _spread_even(redis_client, models, survivors),
            timeout=60,
            what="the survivors holding every model",
        )
        for model in models:  # every model keeps learning, the victim's too
            wait_for(learned_all(stores[model], 1800), timeout=120, what=f"{model} learned")

        # a member starts again: the shares become even again
        members["pool-d"] = _start_member(redis_url, "pool-d")
        send(1200)
        wait_for(
            lambda: _spread_even(redis_client, models, list(members)),
            timeout=60,
            what="6 leases spread over 3 members again",
        )
        holders = lease_holders(redis_client, models)
        assert sorted(sum(1 for h in holders.values() if h == n) for n in members) == [2, 2, 2]
        for model in models:
            wait_for(learned_all(stores[model], 3000), timeout=120, what=f"{model} learned")
    finally:
        errors = {}
        for name, process in members.items():
            process.send_signal(signal.SIGTERM)
            code = process.wait(60)
            errors[name] = (code, process.stderr.read().decode())
            process.stderr.close()
    for name, (code, err) in errors.items():
        assert code == 0, f"{name}: {err}"
    # none learned twice or lost: each state equals mixture/ fed its documents directly
    for model in models:
        state = stores[model].load_state()
        assert state.documents_learned == 3000
        assert state.metadata["entries_read"] == 3000
        assert_same_state(state, reference_state(texts[model], config))
        versions = [r.version for r in stores[model].lineage(10_000)]
        assert versions == list(range(1, len(versions) + 1))


@pytest.fixture
def pool_cleanup(redis_client: redis.Redis, model_name: str) -> Iterator[None]:
    """Remove the pool test's six models and the roster entries after the test."""
    yield
    redis_client.zrem(POOL_MEMBERS_KEY, "pool-a", "pool-b", "pool-c", "pool-d")
    for i in range(6):
        model = f"{model_name}-{i}"
        keys = list(redis_client.scan_iter(match=ModelKeys(model).pattern(), count=1000))
        if keys:
            redis_client.delete(*keys)
        redis_client.srem(REGISTRY_KEY, model)
