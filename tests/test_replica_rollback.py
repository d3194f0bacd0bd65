"""Snapshots and rollbacks wait for replicas like the other writes (MIXROUTE_REDIS_WAIT_REPLICAS,
state.replicas).

A real primary with one replica (tests/cluster_support.py ``LocalReplicated``, the machine's
redis-server on loopback ports), and the session's single server (no replica at all) for the
API. The references are Redis's own: the replica's copy of the keys, read from the replica, and
the primary's ``INFO commandstats`` count of WAIT calls (Redis documentation of WAIT: "blocks
the current client until all the previous write commands are successfully transferred and
acknowledged by at least the number of replicas specified"; of INFO: ``cmdstat_<command>``
``calls``). Each test takes about a second.
"""

from __future__ import annotations

import logging
import os
import socket
import time
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest
import redis

from mixture.online import OnlineLearner
from service.app import create_app
from service.errors import clip_echoes
from service.settings import Settings
from state.connection import redis_from_url
from state.errors import ReplicasUnconfirmedError
from state.records import WorkerStatus
from state.replicas import require_replicas
from state.store import Checkpoint, ModelStore
from tests.cluster_support import LocalReplicated, cluster_binaries
from tests.worker_support import create_model, ferry_texts, small_config

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis
needs_server = pytest.mark.skipif(cluster_binaries() is None, reason="needs redis-server")

WORKER = "replica-test-worker"


@pytest.fixture(scope="module")
def pair(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LocalReplicated]:
    servers = LocalReplicated(Path(tmp_path_factory.mktemp("replicated"))).start()
    yield servers
    servers.stop()


@pytest.fixture
def unset() -> Iterator[None]:
    """The process's requirement is put back to none after the test (the app sets it too)."""
    require_replicas(0)
    yield
    require_replicas(0)


@contextmanager
def replica_paused(pair: LocalReplicated, wait_seconds: float | None = 0.05) -> Iterator[None]:
    """The replica SIGSTOPped (and, with ``wait_seconds``, writes waiting that long for it);
    afterwards no requirement, the replica resumed and in sync again."""
    pair.pause_replica()
    try:
        if wait_seconds is not None:
            require_replicas(1, wait_seconds)
        yield
    finally:
        require_replicas(0)
        pair.resume_replica()
        pair.wait_in_sync()


def checkpoint(store: ModelStore, seed: int, snapshot_reason: str | None = None) -> int:
    """Commit a learned state as the next version (as the worker would), its number."""
    learner = OnlineLearner(store.info.config, seed=seed)
    learner.learn(ferry_texts(250, seed=seed))  # past the 200-document warm-up
    status = WorkerStatus(WORKER, os.getpid(), socket.gethostname(), time.time(), 0, 0)
    assert store.hold_lease(status)
    return store.commit_checkpoint(
        Checkpoint(
            worker=WORKER,
            expected_version=store.version(),
            state=learner.state,
            watermark=store.last_stream_id(),
            snapshot_reason=snapshot_reason,
        )
    )


def wait_calls(client: redis.Redis) -> int:
    """WAIT commands the server has run (INFO commandstats)."""
    return int(client.info("commandstats").get("cmdstat_wait", {}).get("calls", 0))


@needs_server
def test_with_a_live_replica_a_snapshot_and_a_rollback_wait_and_are_on_the_replica(
    pair: LocalReplicated, unset: None
) -> None:
    primary = redis_from_url(pair.url)
    replica = pair.node(pair.replica_port)
    store = create_model(primary, "confirmed", small_config())
    keys = store.keys
    checkpoint(store, seed=1)
    require_replicas(1, 2.0)  # a live replica on loopback answers in well under a millisecond
    waits = wait_calls(primary)
    snap = store.create_snapshot("before the burst")
    assert wait_calls(primary) == waits + 1  # the snapshot waited
    # confirmed means the replica holds it: read it there
    assert replica.hget(keys.snapshot(snap.id), "meta") == primary.hget(
        keys.snapshot(snap.id), "meta"
    )
    checkpoint(store, seed=2)
    waits = wait_calls(primary)
    result = store.rollback(snap.id)
    assert wait_calls(primary) == waits + 1  # the rollback waited
    assert int(replica.get(keys.version)) == result.version == 3
    assert replica.get(keys.replay) == primary.get(keys.replay)
    assert replica.get(keys.state_checksum) == primary.get(keys.state_checksum)
    assert replica.exists(keys.snapshot(str(result.safety_snapshot_id))) == 1
    primary.close()
    replica.close()


@needs_server
def test_with_the_replica_stopped_a_snapshot_and_a_rollback_raise_and_stay_done(
    pair: LocalReplicated, unset: None
) -> None:
    primary = redis_from_url(pair.url)
    # the longest model name: the API answers the message whole (service.errors.clip_echoes)
    store = create_model(primary, "paused-" + "x" * 57, small_config())
    checkpoint(store, seed=3)
    kept = store.create_snapshot("taken while the replica was up")
    with replica_paused(pair):
        with pytest.raises(ReplicasUnconfirmedError, match="0 of 1 replicas confirmed") as caught:
            store.create_snapshot("taken while the replica was stopped")
        message = str(caught.value)
        assert "it is written and listed" in message and "INFO replication" in message
        assert clip_echoes(message) == message, len(message)
        assert caught.value.acknowledged == 0
        assert caught.value.retry_after_seconds is None  # not to be repeated
        reasons = [s.reason for s in store.list_snapshots()]
        assert reasons.count("taken while the replica was stopped") == 1  # the write stands
        version = store.version()
        with pytest.raises(ReplicasUnconfirmedError, match="0 of 1 replicas confirmed") as caught:
            store.rollback(kept.id)
        message = str(caught.value)
        assert f"to {kept.id!r}, version {version + 1}:" in message
        assert "it is done and served, do not repeat it" in message
        assert caught.value.retry_after_seconds is None
        assert "INFO replication" in message and clip_echoes(message) == message, len(message)
        assert store.version() == version + 1  # the rollback stands
        assert store.lineage(1)[0].kind == "rollback"
    primary.close()


@needs_server
def test_an_unconfirmed_checkpoint_names_the_automatic_snapshot_it_wrote(
    pair: LocalReplicated, unset: None, caplog: pytest.LogCaptureFixture
) -> None:
    """The worker cannot answer a 503: its checkpoint is logged as unconfirmed, and the log
    names the snapshot written with it (a failover could lose it with the version)."""
    primary = redis_from_url(pair.url)
    store = create_model(primary, "automatic", small_config())
    checkpoint(store, seed=6)
    with replica_paused(pair):
        caplog.set_level(logging.WARNING, logger="state.versions")
        checkpoint(store, seed=7, snapshot_reason="due")
        (automatic,) = [s.id for s in store.list_snapshots() if s.kind == "automatic"]
        warned = [r.getMessage() for r in caplog.records if "not confirmed" in r.getMessage()]
        assert len(warned) == 1 and f"(with snapshot {automatic})" in warned[0], warned
    primary.close()


@needs_server
def test_unset_a_snapshot_and_a_rollback_send_no_wait_even_with_the_replica_stopped(
    pair: LocalReplicated, unset: None
) -> None:
    """Expected to pass on the code before the waits too: nothing changes without the
    variable."""
    primary = redis_from_url(pair.url)
    store = create_model(primary, "unset", small_config())
    checkpoint(store, seed=4)
    with replica_paused(pair, wait_seconds=None):
        waits = wait_calls(primary)
        snap = store.create_snapshot("no requirement")
        result = store.rollback(snap.id)
        assert wait_calls(primary) == waits
        assert store.version() == result.version
    primary.close()


def test_without_a_replica_the_api_answers_503_for_a_snapshot_and_a_rollback_both_done(
    redis_url: str, model_name: str, unset: None
) -> None:
    """The session's single server has no replica, so a wait for one never confirms: both
    answer 503 saying the write is done and what to check; the snapshot is listed once, and
    this process serves the rolled-back version at once."""
    client = redis_from_url(redis_url)
    store = create_model(client, model_name, small_config())
    checkpoint(store, seed=5)
    kept = store.create_snapshot("before")
    settings = Settings(
        redis_url=redis_url,
        redis_wait_replicas=1,
        redis_wait_timeout=0.05,
        # no pub/sub notice and no poll: only the route's own reload can serve the rollback
        reload_notifications=False,
        reload_poll_interval=60,
    )
    with TestClient(create_app(settings)) as http:
        version = http.get(f"/models/{model_name}").json()["version"]
        answer = http.post(f"/models/{model_name}/snapshots", json={"reason": "unconfirmed"})
        assert answer.status_code == 503, answer.text
        assert answer.json()["written"] is True
        assert "retry-after" not in answer.headers  # a repeat would take a second snapshot
        detail = answer.json()["detail"]
        assert "not confirmed by 1 replica(s)" in detail
        assert "it is written and listed" in detail and "INFO replication" in detail
        assert detail.endswith("see that it is listed")  # whole, not clipped
        snaps = http.get(f"/models/{model_name}/snapshots").json()["snapshots"]
        assert [s["reason"] for s in snaps].count("unconfirmed") == 1
        answer = http.post(
            f"/models/{model_name}/snapshots/{kept.id}/restore", json={"replay": False}
        )
        assert answer.status_code == 503, answer.text
        assert "retry-after" not in answer.headers  # a repeat would roll back a second time
        detail = answer.json()["detail"]
        assert "not confirmed by 1 replica(s)" in detail and "do not repeat it" in detail
        assert f"version {version + 1}:" in detail and "INFO replication" in detail
        assert detail.endswith(f"see that the version is {version + 1} or later")
        assert http.get(f"/models/{model_name}").json()["version"] == version + 1
        # Queueing is repeatable (the client ids keep a repeat from queueing twice): its 503
        # says when to repeat it.
        answer = http.post(
            f"/models/{model_name}/documents", json={"documents": [{"id": "q-1", "text": "x y"}]}
        )
        assert answer.status_code == 503, answer.text
        assert answer.headers["retry-after"] == "1"
        assert answer.json()["written"] is True
    client.close()
