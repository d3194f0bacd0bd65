"""mixroute on a real Redis Cluster of three masters (started here on loopback ports).

The cluster is redis-server 7 in cluster mode joined by ``redis-cli --cluster create`` (see
tests/cluster_support.py); the client is redis-py's ``RedisCluster``, chosen by the setting
MIXROUTE_REDIS_CLUSTER. Checked against the cluster itself: ``CLUSTER KEYSLOT`` (Redis's own
hash of the key, the tag rule of the Redis Cluster specification) says where each key lives,
and a SCAN of every primary node says which keys exist.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import uuid
import warnings
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from mixture.routing import route_texts
from service.app import create_app
from service.runner import WorkerPool
from service.settings import Settings
from service.testing import first_checkpoint, wait_until
from state.connection import is_cluster, primary_clients, redis_from_url, use_cluster_client
from state.keys import GENERATION_KEY, REGISTRY_KEY, ModelKeys
from state.registry import Registry
from state.store import ModelStore
from tests.cluster_support import LocalCluster, cluster_binaries

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = [
    pytest.mark.redis,
    pytest.mark.skipif(cluster_binaries() is None, reason="needs redis-server and redis-cli"),
]


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LocalCluster]:
    nodes = LocalCluster(Path(tmp_path_factory.mktemp("cluster"))).start()
    yield nodes
    nodes.stop()


@pytest.fixture
def cluster_mode() -> Iterator[None]:
    """Clients made from URLs are cluster clients for the test (as the setting makes them)."""
    use_cluster_client(True)
    yield
    use_cluster_client(False)


@pytest.fixture
def client(cluster: LocalCluster, cluster_mode: None) -> Iterator[object]:
    made = redis_from_url(cluster.url)
    yield made
    made.close()


def keys_on_primaries(client: object, pattern: str) -> dict[str, list[bytes]]:
    """Every key matching ``pattern`` on each primary node (a SCAN of each node)."""
    return {
        f"{c.connection_pool.connection_kwargs['port']}": list(c.scan_iter(match=pattern))
        for c in primary_clients(client)
    }


def test_cluster_client_is_chosen_and_global_keys_share_one_slot(client: object) -> None:
    assert is_cluster(client)
    assert len(primary_clients(client)) == 3
    # the server's own hash: the registry and the generation counter in one slot ...
    slot = client.cluster_keyslot(REGISTRY_KEY)  # type: ignore[attr-defined]
    assert client.cluster_keyslot(GENERATION_KEY) == slot  # type: ignore[attr-defined]
    # ... and every key of one model in that model's slot
    keys = ModelKeys("inbox")
    slots = {client.cluster_keyslot(k) for k in [*keys.fixed(), keys.snapshot("7")]}  # type: ignore[attr-defined]
    assert len(slots) == 1 and slot not in slots


def test_models_on_every_node_listed_and_deleted(client: object) -> None:
    registry = Registry(client)
    names = [f"spread-{i}" for i in range(12)]
    from mixture.config import MixtureConfig

    for name in names:
        registry.create(name, MixtureConfig(n_groups=2, warmup_documents=10))
        ModelStore(client, name).enqueue(["ferry late again", "ticket refund please"])
    where = keys_on_primaries(client, "mixroute:{spread-*")
    assert sum(1 for found in where.values() if found) >= 2  # the models span nodes
    assert set(names) <= set(registry.list())
    for name in names:
        assert registry.delete(name) > 0
    assert not any(keys_on_primaries(client, "mixroute:{spread-*").values())
    assert not set(names) & set(registry.list())


def test_api_worker_snapshot_rollback_delete(cluster: LocalCluster, client: object) -> None:
    model_name = f"t-{uuid.uuid4().hex[:12]}"  # deleted through the API at the end
    # the fallback poll is slow here so the notice, not the poll, is what is checked
    settings = Settings(redis_url=cluster.url, redis_cluster=True, reload_poll_interval=30)
    pool = lambda _runtime: WorkerPool(cluster.url, 0.1, models=[])  # noqa: E731
    app = create_app(settings, background_factories=[pool])
    with TestClient(app) as http:
        runtime = app.state.runtime
        assert is_cluster(runtime.redis)
        store, worker, messages = first_checkpoint(http, client, cluster.url, model_name, 3, 5)
        assert is_cluster(worker.redis)
        first = store.version()
        assert first > 0
        texts = [m.text for m in messages[:20]]
        wait_until(
            lambda: http.get(f"/models/{model_name}").json()["version"] >= first,
            what="the API to load the checkpoint",
        )
        routed = http.post(
            f"/models/{model_name}/route", json={"documents": [{"text": t} for t in texts]}
        )
        assert routed.status_code == 200, routed.text
        state = ModelStore(client, model_name).load_state()
        reference = route_texts(state, texts)
        groups = [r["group"] for r in routed.json()["results"]]
        assert groups == reference.group.tolist()

        snap = http.post(f"/models/{model_name}/snapshots", json={"reason": "cluster"})
        assert snap.status_code == 201, snap.text
        snap_body = snap.json()
        more = http.post(
            f"/models/{model_name}/documents",
            json={"documents": [{"text": m.text} for m in messages[:150]]},
        )
        assert more.status_code == 202, more.text
        wait_until(lambda: runtime.subscribed, what="the notice subscription on the cluster")
        notices = runtime.notices
        wait_until(lambda: worker.run_once() >= 0 and store.version() > first, what="learning")
        # the checkpoint's notice, published from inside the cluster MULTI, reaches the API
        wait_until(lambda: runtime.notices > notices, what="the checkpoint notice")
        restored = http.post(
            f"/models/{model_name}/snapshots/{snap_body['id']}/restore", json={"replay": False}
        )
        assert restored.status_code == 200, restored.text
        back = ModelStore(client, model_name).load_state()
        np.testing.assert_array_equal(
            route_texts(back, texts).posterior, route_texts(state, texts).posterior
        )
        ready = http.get("/ready").json()
        assert ready["redis"] == "reachable"
        gone = http.delete(f"/models/{model_name}")
        assert gone.status_code in (200, 204), gone.text
    assert not any(keys_on_primaries(client, ModelKeys(model_name).pattern()).values())


def test_legacy_global_keys_are_adopted_on_a_single_server(redis_client: object) -> None:
    """A single server written before the global keys shared a slot keeps its models."""
    from state.keys import LEGACY_GLOBAL_KEYS
    from state.registry import adopt_legacy_keys

    old_registry, old_counter = LEGACY_GLOBAL_KEYS
    before = set(redis_client.smembers(REGISTRY_KEY))  # type: ignore[attr-defined]
    counter = int(redis_client.get(GENERATION_KEY) or 0)  # type: ignore[attr-defined]
    redis_client.sadd(old_registry, "legacy-model")  # type: ignore[attr-defined]
    redis_client.set(old_counter, counter + 1000)  # type: ignore[attr-defined]
    try:
        assert adopt_legacy_keys(redis_client)
        assert not adopt_legacy_keys(redis_client)  # once per client
        assert set(redis_client.smembers(REGISTRY_KEY)) == before | {b"legacy-model"}  # type: ignore[attr-defined]
        assert int(redis_client.get(GENERATION_KEY)) == counter + 1000  # type: ignore[attr-defined]
        assert not redis_client.exists(old_registry, old_counter)  # type: ignore[attr-defined]
    finally:
        redis_client.srem(REGISTRY_KEY, "legacy-model")  # type: ignore[attr-defined]
        redis_client.delete(old_registry, old_counter)  # type: ignore[attr-defined]


def test_worker_pool_of_two_processes_shares_four_models_on_the_cluster(
    cluster: LocalCluster, client: object
) -> None:
    """``mixroute work --processes 2`` with MIXROUTE_REDIS_CLUSTER: the two pool members hold
    two of the four models each, and every model is learned once. Reference: mixture/ fed each
    model's documents directly in stream order (tests/worker_support.reference_state); two
    members learning one model, or a hand-over that re-learned entries, would differ from it.
    """
    from state.lease import lease_holders
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

    config = small_config()
    models = [f"pool-{uuid.uuid4().hex[:8]}-{i}" for i in range(4)]
    texts = {m: ferry_texts(600, seed=70 + i) for i, m in enumerate(models)}
    stores = {}
    for model in models:
        stores[model] = create_model(client, model, config, fast_options())  # type: ignore[arg-type]
        stores[model].enqueue(texts[model], ids=[f"d{j}" for j in range(600)])
    env = {
        **os.environ,
        "REDIS_URL": cluster.url,
        "MIXROUTE_REDIS_CLUSTER": "true",
        "MIXROUTE_LOG_LEVEL": "WARNING",
    }
    pool = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "work", "--processes", "2"],
        cwd=Path(__file__).resolve().parent.parent,
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )
    try:

        def two_each() -> bool:
            holders = lease_holders(client, models)  # type: ignore[arg-type]
            counts = Counter(holders.values())
            return None not in counts and sorted(counts.values()) == [2, 2]

        wait_for(two_each, timeout=90, what="4 leases held 2 and 2 by the two members")
        for model in models:
            wait_for(learned_all(stores[model], 600), timeout=120, what=f"{model} learned")
        assert two_each()
    finally:
        pool.send_signal(signal.SIGTERM)
        code = pool.wait(90)
        err = pool.stderr.read().decode() if pool.stderr else ""
        if pool.stderr:
            pool.stderr.close()
    assert code == 0, err
    for model in models:
        state = stores[model].load_state()
        assert state.documents_learned == 600
        assert_same_state(state, reference_state(texts[model], config))
        Registry(client).delete(model)
