"""Failover of the model's primary during learning, with the durability setting on.

A real Redis Cluster of three primaries with one replica each (tests/cluster_support.py), the
API in this process with MIXROUTE_REDIS_WAIT_REPLICAS=1 (every enqueue and checkpoint waits
for one replica, :mod:`state.replicas`) and one learner thread.

The loss that asynchronous replication allows is made to happen, not hoped for: the replica of
the model's primary is paused (SIGSTOP) and the primary drops its replication link
(``CLIENT KILL TYPE replica``), so what the primary accepts from then on is on the primary
only. Queueing keeps answering 503 then (WAIT unconfirmed; the client repeats one batch
meanwhile) and the worker's next checkpoint lands on the primary alone. The primary is then
made unresponsive (``DEBUG SLEEP``), the replica resumed and promoted (``CLUSTER FAILOVER
TAKEOVER``): its version is older than the worker's.
When the old primary wakes it finds itself demoted, becomes the new primary's replica and
resyncs, dropping what only it had. A client repeats every 503 with the same ids.

Checked against the cluster's own data (XRANGE of the stream on the promoted primary, the
state it holds): every acknowledged id is in the stream, no id twice, and the state learned
exactly the stream's documents. The worker had learned the documents that only the old primary
held; had it written its state over the promoted replica's instead of reloading, those
documents would be counted again when their repeats are learned (documents_learned above the
stream's length).
"""

from __future__ import annotations

import logging
import socket
import threading
import time
import uuid
import warnings
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from service.app import create_app
from service.demo_data import default_days, generate_day
from service.settings import Settings
from service.testing import QUICK_OPTIONS, wait_until
from state.connection import redis_from_url, use_cluster_client
from state.keys import ModelKeys
from state.registry import Registry
from state.replicas import require_replicas
from state.store import ModelStore
from tests.cluster_support import LocalCluster, cluster_binaries
from tests.worker_support import (
    assert_same_state,
    create_model,
    fast_options,
    ferry_texts,
    reference_state,
    small_config,
    wait_for,
)
from worker.learner import Worker

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis
needs_cluster = pytest.mark.skipif(
    cluster_binaries() is None, reason="needs redis-server and redis-cli"
)

BATCH = 5  # documents per request


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LocalCluster]:
    nodes = LocalCluster(Path(tmp_path_factory.mktemp("failover")), replicas=1).start()
    yield nodes
    nodes.stop()


@pytest.fixture
def cluster_mode() -> Iterator[None]:
    use_cluster_client(True)
    yield
    use_cluster_client(False)
    require_replicas(0)  # the app set the process's requirement


class Traffic(threading.Thread):
    """A client queueing documents with ids, 5 a request (``POST .../documents``, and every
    other request ``POST .../route`` with learn once ``route_too`` is set), repeating every 503
    with the same ids until it is acknowledged (a 409 from route: queued instead)."""

    def __init__(self, http: Any, model: str, texts: list[str]) -> None:
        super().__init__(name="failover-traffic", daemon=True)
        self.http, self.model, self.texts = http, model, texts
        self.acknowledged: list[str] = []
        self.refusals: Counter[int] = Counter()
        self.stop_event = threading.Event()
        self.route_too = threading.Event()
        self.sent = 0

    def run(self) -> None:
        n = 0
        while not self.stop_event.is_set():
            ids = [f"m{n + j}" for j in range(BATCH)]
            docs = [
                {"id": i, "text": self.texts[(n + j) % len(self.texts)]} for j, i in enumerate(ids)
            ]
            n += BATCH
            self.sent = n
            # every other request routes with learn: true once the model answers
            route = self.route_too.is_set() and (n // BATCH) % 2 == 0
            while True:
                if route:
                    path, body = "route", {"documents": docs, "learn": True}
                else:
                    path, body = "documents", {"documents": docs}
                answer = self.http.post(f"/models/{self.model}/{path}", json=body)
                if answer.status_code in (200, 202):
                    break
                assert answer.status_code in (409, 503), answer.text
                self.refusals[answer.status_code] += 1
                if answer.status_code == 409:
                    route = False  # no fit to route with yet: queue them (same ids) instead
                    continue
                assert answer.headers.get("retry-after"), "a 503 says when to retry"
                time.sleep(0.05)  # shorter than Retry-After, to keep the test short
            self.acknowledged.extend(ids)
            time.sleep(0.01)


def stream_ids(client: Any, keys: ModelKeys) -> list[str]:
    """The client id of every entry of the model's stream, in order."""
    return [fields[b"id"].decode() for _, fields in client.xrange(keys.docs)]


@needs_cluster
def test_failover_loses_nothing_acknowledged_and_learns_nothing_twice(
    cluster: LocalCluster, cluster_mode: None, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.INFO, logger="worker.learner")
    model = f"fo-{uuid.uuid4().hex[:10]}"
    keys = ModelKeys(model)
    settings = Settings(
        redis_url=cluster.url,
        redis_cluster=True,
        redis_wait_replicas=1,
        redis_wait_timeout=0.3,
        redis_timeout=1.5,
    )
    texts = [m.text for m in generate_day(default_days(0.1)[0], seed=3)]
    client = redis_from_url(cluster.url)
    with TestClient(create_app(settings)) as http:
        options = {**QUICK_OPTIONS, "flush_partial_seconds": 0.2, "checkpoint_documents": 50}
        config = {"n_groups": 3, "warmup_documents": 60, "n_restarts": 1}
        made = http.post("/models", json={"name": model, "config": config, "options": options})
        # Under load the replica may confirm after the 0.3 s wait: the 503 then says the model
        # was written ("written": true), which is all this test needs from the create.
        assert made.status_code == 201 or (
            made.status_code == 503 and made.json().get("written") is True
        ), made.text
        worker = Worker(redis_from_url(cluster.url), model)
        learner = threading.Thread(target=worker.run, name="failover-worker", daemon=True)
        traffic = Traffic(http, model, texts)
        learner.start()
        traffic.start()
        try:
            store = ModelStore(client, model)
            wait_until(lambda: store.version() >= 2, 60, what="two checkpoints")
            traffic.route_too.set()
            primary = cluster.primary_of(keys.version)
            (replica,) = cluster.replicas_of(primary)
            old_primary = cluster.node(primary, socket_timeout=5)

            # from here on, writes reach the primary only
            cluster.pause(replica)
            old_primary.execute_command("CLIENT KILL TYPE replica")
            cut_version = int(old_primary.get(keys.version))
            acknowledged_at_cut = len(traffic.acknowledged)
            wait_until(
                lambda: int(old_primary.get(keys.version)) > cut_version,
                60,
                what="a checkpoint on the primary alone",
            )
            refused_after_cut = traffic.refusals[503]
            wait_until(lambda: traffic.refusals[503] > refused_after_cut, 30, what="a 503")
            lost_version = int(old_primary.get(keys.version))

            # the primary stops answering; its replica resumes and takes over
            asleep = threading.Thread(target=_sleep, args=(cluster, primary, 3), daemon=True)
            asleep.start()
            wait_until(lambda: not _answers(primary), 10, what="the primary asleep")
            cluster.resume(replica)
            promoted = cluster.node(replica, socket_timeout=5)
            promoted.execute_command("CLUSTER FAILOVER TAKEOVER")
            wait_until(
                lambda: promoted.info("replication")["role"] == "master", 30, what="promotion"
            )
            promoted_version = int(promoted.get(keys.version))
            # the failover did lose checkpoints the primary had acknowledged
            assert promoted_version < lost_version
            assert len(traffic.acknowledged) <= acknowledged_at_cut + BATCH  # 503s meanwhile

            # the old primary wakes as a replica of the new one; traffic goes on
            asleep.join(30)
            wait_until(lambda: cluster.topology().get(primary) == replica, 60, what="rejoin")
            after = len(traffic.acknowledged)
            wait_until(lambda: len(traffic.acknowledged) >= after + 100, 60, what="more traffic")
        finally:
            traffic.stop_event.set()
            traffic.join(60)
        acknowledged = list(traffic.acknowledged)

        def learned_everything() -> bool:
            # the watermark passes an entry only once it is learned
            summary = ModelStore(client, model).summary() or {}
            return summary.get("watermark") == ModelStore(client, model).last_stream_id()

        wait_until(learned_everything, 60, what="the worker to learn every document")
        worker.stop()
        learner.join(30)

    ids = stream_ids(client, keys)
    repeated = [i for i, n in Counter(ids).items() if n > 1]
    assert not repeated, f"queued twice: {repeated[:10]}"
    missing = set(acknowledged) - set(ids)
    assert not missing, f"acknowledged but lost: {sorted(missing)[:10]}"
    state = ModelStore(client, model).load_state()
    assert state is not None
    summary = ModelStore(client, model).summary() or {}
    assert summary["entries_read"] == ModelStore(client, model).stream_info()["entries_added"]
    # every entry learned once: the documents the worker had learned from the old primary only
    # are not in this state twice (nor at all, but as their repeats)
    assert state.documents_learned == len(ids)
    assert set(ids) <= {f"m{n}" for n in range(traffic.sent)}
    # the worker found the older version and reloaded it (the fence), never wrote over it
    reloads = [r.getMessage() for r in caplog.records if "reloading" in r.getMessage()]
    assert reloads, "the worker never reloaded after the failover"
    # MOVED, TRYAGAIN, CLUSTERDOWN or READONLY while the slots changed hands are a transient
    # refusal (retried as a lost connection), not an unexpected error with a traceback
    assert worker.errors == 0, [r.getMessage() for r in caplog.records if r.exc_info]
    Registry(client).delete(model)
    client.close()


def _sleep(cluster: LocalCluster, port: int, seconds: int) -> None:
    """DEBUG SLEEP the node on ``port`` (it answers nothing meanwhile)."""
    cluster.node(port, socket_timeout=seconds + 10).execute_command("DEBUG", "SLEEP", str(seconds))


def _answers(port: int) -> bool:
    """True when the node on ``port`` answers PING within 0.2 s (a raw socket: redis-py's
    client would retry a timeout until the node answers)."""
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=0.2) as sock:
            sock.sendall(b"PING\r\n")
            return sock.recv(16).startswith(b"+PONG")
    except OSError:
        return False


def test_a_checkpoint_lost_without_an_error_is_reloaded_never_written_over(
    redis_client: Any, model_name: str
) -> None:
    """The fence alone, with no connection error to warn the worker (on one private server).

    What a promotion does to the model is done by hand: every key of the model is put back to
    what it held at an earlier checkpoint (DUMP, then RESTORE: the promoted replica's copy),
    after the worker has checkpointed more on top. The worker, which saw no error, still holds
    the newer state; the client repeats the documents the loss took. Reference: the state
    that mixture/ learns from the surviving stream fed directly, in the same units
    (tests/worker_support.reference_state); a worker that wrote its state over the older one
    would have learned the repeated documents twice and differ from it.
    """
    store = create_model(redis_client, model_name, small_config(), fast_options())
    keys = ModelKeys(model_name)
    texts = ferry_texts(700, seed=4)
    ids = [f"doc-{i}" for i in range(700)]
    store.enqueue(texts[:400], ids=ids[:400])
    worker = Worker(redis_client, model_name)
    wait_for(lambda: worker.run_once() >= 0 and _learned(store, 400), what="400 learned")
    kept = {
        key: (redis_client.dump(key), redis_client.pttl(key))
        for key in redis_client.scan_iter(match=keys.pattern())
    }
    version_kept = store.version()
    store.enqueue(texts[400:600], ids=ids[400:600])
    wait_for(lambda: worker.run_once() >= 0 and _learned(store, 600), what="600 learned")
    assert store.version() > version_kept and worker.version == store.version()

    # the failover: the model's keys as the promoted replica holds them
    pipe = redis_client.pipeline(transaction=True)
    pipe.delete(*redis_client.scan_iter(match=keys.pattern()))
    for key, (dumped, ttl) in kept.items():
        pipe.restore(key, max(int(ttl), 0), dumped)
    pipe.execute()
    assert store.version() == version_kept and redis_client.xlen(keys.docs) == 400
    # the client repeats what the loss took (same ids, queued again: their id keys went too)
    again = store.enqueue(texts[400:700], ids=ids[400:700])
    assert again.duplicates == 0
    wait_for(lambda: worker.run_once() >= 0 and _learned(store, None), what="the stream learned")

    state = store.load_state()
    assert state is not None and state.documents_learned == 700
    assert_same_state(state, reference_state(texts, store.info.config))


def _learned(store: ModelStore, documents: int | None) -> bool:
    """The current checkpoint's watermark is the stream's end (and it holds ``documents``)."""
    summary = store.summary() or {}
    return summary.get("watermark") == store.last_stream_id() and (
        documents is None or summary.get("documents_learned") == documents
    )


def test_the_durability_settings_are_checked() -> None:
    from pydantic import ValidationError

    from state.replicas import ReplicaRequirement, requirement_from_environment

    env = {"MIXROUTE_REDIS_WAIT_REPLICAS": "2", "MIXROUTE_REDIS_WAIT_TIMEOUT": "0.25"}
    assert requirement_from_environment(env) == ReplicaRequirement(2, 0.25)
    assert not requirement_from_environment({}).active
    for bad, name in (
        ({"MIXROUTE_REDIS_WAIT_REPLICAS": "one"}, "MIXROUTE_REDIS_WAIT_REPLICAS"),
        ({"MIXROUTE_REDIS_WAIT_REPLICAS": "1.5"}, "MIXROUTE_REDIS_WAIT_REPLICAS"),
        ({"MIXROUTE_REDIS_WAIT_TIMEOUT": "0"}, "MIXROUTE_REDIS_WAIT_TIMEOUT"),
    ):
        with pytest.raises(ValueError, match=name):
            requirement_from_environment(bad)
    # WAIT blocks the connection: a wait as long as the socket timeout would time out instead
    with pytest.raises(ValidationError, match="redis_wait_timeout"):
        Settings(redis_wait_replicas=1, redis_wait_timeout=1.0, redis_timeout=1.0)
    assert ReplicaRequirement(1, 0.0001).timeout_ms == 1  # WAIT 0 would block forever


def test_without_replicas_a_required_wait_is_a_503_and_the_repeat_queues_nothing_twice(
    redis_url: str, model_name: str
) -> None:
    """One server with no replica: a wait for one can never be confirmed, so queueing answers
    503 with Retry-After; the document is on the server, and the repeat with its id is a
    duplicate, not a second entry (the enqueue script's id check)."""
    settings = Settings(redis_url=redis_url, redis_wait_replicas=1, redis_wait_timeout=0.05)
    try:
        with TestClient(create_app(settings)) as http:
            made = http.post("/models", json={"name": model_name, "config": {"n_groups": 2}})
            assert made.status_code == 503, made.text  # creation waits too
            body = {"documents": [{"id": "only-once", "text": "ferry late again"}]}
            for _ in range(2):
                answer = http.post(f"/models/{model_name}/documents", json=body)
                assert answer.status_code == 503 and answer.headers["retry-after"] == "1"
                assert "not confirmed by 1 replica" in answer.json()["detail"]
    finally:
        require_replicas(0)
    client = redis_from_url(redis_url)
    assert client.xlen(ModelKeys(model_name).docs) == 1
    client.close()
