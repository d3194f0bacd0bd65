"""The API reloads a model on its checkpoint notice (pub/sub), and the version poll, one
pipelined round trip for every loaded model, still catches what the notices miss."""

from __future__ import annotations

import os
import time
import warnings
from collections.abc import Iterator

import numpy as np
import pytest
import redis

from mixture.config import MixtureConfig
from mixture.em import fit_texts
from mixture.serialize import state_from_bytes
from mixture.stats import MixtureState
from service.app import create_app
from service.runtime import ServiceRuntime
from service.settings import Settings
from service.testing import first_checkpoint, wait_until
from state.keys import NOTIFY_PATTERN, ModelKeys, model_of_notify_channel
from state.records import WorkerStatus
from state.registry import Registry
from state.store import Checkpoint, ModelStore

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis


def test_notify_channel_names_round_trip() -> None:
    channel = ModelKeys("inbox-2.a").notify
    assert model_of_notify_channel(channel) == "inbox-2.a"
    assert model_of_notify_channel(channel.encode()) == "inbox-2.a"
    assert model_of_notify_channel(ModelKeys("inbox").version) is None
    assert model_of_notify_channel("mixroute:{a}b}:notify") is None


def test_the_pattern_hears_every_model_and_nothing_else(redis_client: redis.Redis) -> None:
    pubsub = redis_client.pubsub(ignore_subscribe_messages=True)
    pubsub.psubscribe(NOTIFY_PATTERN)  # Redis's own glob matching decides
    try:
        wait_until(lambda: redis_client.pubsub_numpat() >= 1, what="the subscription")
        redis_client.publish(ModelKeys("inbox").version, "1")  # not a notify channel
        redis_client.publish(ModelKeys("inbox").notify, "7")
        message = wait_until(lambda: pubsub.get_message(timeout=0.1), what="the notice")
        assert model_of_notify_channel(message["channel"]) == "inbox" and message["data"] == b"7"
        assert pubsub.get_message(timeout=0.2) is None
    finally:
        pubsub.close()


@pytest.fixture
def api(
    redis_url: str, request: pytest.FixtureRequest
) -> Iterator[tuple[TestClient, ServiceRuntime]]:
    overrides = getattr(request, "param", {})
    settings = Settings(redis_url=redis_url, **{"reload_poll_interval": 60.0, **overrides})
    app = create_app(settings)
    with TestClient(app) as client:
        yield client, app.state.runtime


def test_a_checkpoint_is_served_through_its_notice_not_the_poll(
    api: tuple[TestClient, ServiceRuntime],
    redis_client: redis.Redis,
    redis_url: str,
    model_name: str,
) -> None:
    client, runtime = api
    wait_until(lambda: runtime.subscribed and runtime.last_poll, what="the subscription")
    polled_at = runtime.last_poll  # the one poll that follows the subscription
    first_checkpoint(client, redis_client, redis_url, model_name, 3, seed=4)
    # the fallback poll is 60 s away: only the notice can bring version 1 within the wait
    wait_until(lambda: runtime.models[model_name].version >= 1, timeout=30, what="the reload")
    assert runtime.notices >= 1 and runtime.last_poll == polled_at
    assert runtime.models[model_name].state is not None
    assert client.post(f"/models/{model_name}/route", json={"text": "ferry late"}).is_success


def test_a_lost_subscription_is_made_again_and_misses_nothing(
    api: tuple[TestClient, ServiceRuntime],
    redis_client: redis.Redis,
    redis_url: str,
    model_name: str,
) -> None:
    client, runtime = api
    wait_until(lambda: runtime.subscribed, what="the subscription")
    redis_client.client_kill_filter(_type="pubsub")  # every subscriber of this test Redis
    first_checkpoint(client, redis_client, redis_url, model_name, 3, seed=5)
    wait_until(lambda: runtime.models[model_name].version >= 1, timeout=30, what="the reload")
    wait_until(lambda: runtime.subscribed, what="the new subscription")


@pytest.mark.parametrize(
    "api",
    [{"reload_poll_interval": 0.1}, {"reload_poll_interval": 0.1, "reload_notifications": False}],
    indirect=True,
    ids=["notices-dropped", "notices-off"],
)
def test_the_poll_reloads_what_the_notices_miss(
    api: tuple[TestClient, ServiceRuntime],
    redis_client: redis.Redis,
    redis_url: str,
    model_name: str,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    client, runtime = api
    if runtime.settings.reload_notifications:
        monkeypatch.setattr(runtime, "on_notice", lambda channel, data: None)  # all dropped
    first_checkpoint(client, redis_client, redis_url, model_name, 3, seed=6)
    wait_until(lambda: runtime.models[model_name].version >= 1, timeout=30, what="the reload")
    assert runtime.notices == 0


def test_the_poll_is_one_round_trip_for_every_model(
    redis_url: str, redis_client: redis.Redis, model_name: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    registry = Registry(redis_client)
    names = [f"{model_name}-{i}" for i in range(6)]
    settings = Settings(redis_url=redis_url, reload_poll_interval=60.0)
    runtime = ServiceRuntime(settings, redis_client)
    try:
        for name in names:
            registry.create(name, MixtureConfig(n_groups=2))
            runtime.model(name)
        registry.delete(names[-1])  # another replica deleted one
        sent: list[int] = []
        original = redis.connection.AbstractConnection.send_packed_command

        def counting(self, command, check_health=True):  # type: ignore[no-untyped-def]
            sent.append(1)
            return original(self, command, check_health)

        monkeypatch.setattr(redis.connection.AbstractConnection, "send_packed_command", counting)
        runtime.poll_once()
        monkeypatch.undo()
        assert len(sent) == 1, f"the poll took {len(sent)} round trips for {len(names)} models"
        assert sorted(runtime.models) == names[:-1] and runtime.redis_ok
    finally:
        for name in names[:-1]:
            registry.delete(name)


def _commit(store: ModelStore, state: MixtureState) -> None:
    status = WorkerStatus("failover-test", os.getpid(), "test", time.time(), 0, 0)
    assert store.hold_lease(status)
    store.commit_checkpoint(Checkpoint("failover-test", store.version(), state, "0-0"))
    store.release_lease("failover-test")


def _fitted(seed: int) -> MixtureState:
    # invented ferry-inbox messages; two seeds give two different states of one config
    texts = [
        "ferry late storm harbour",
        "refund ticket booking fare",
        "lost bag cabin deck",
        "storm delay crossing wind",
        "ticket refund voucher payment",
        "bag locker lost found",
    ] * 3
    state, _ = fit_texts(texts, MixtureConfig(n_groups=2), seed=seed)
    return state


def test_a_version_number_remade_after_a_failover_is_reloaded(
    redis_url: str, redis_client: redis.Redis, model_name: str
) -> None:
    """A failover can lose version 1 after the API loaded it; the worker then makes another
    version 1 from the stream. The number alone would hide the change: the checksum shows it."""
    registry = Registry(redis_client)
    registry.create(model_name, MixtureConfig(n_groups=2))
    runtime = ServiceRuntime(Settings(redis_url=redis_url, reload_poll_interval=60.0), redis_client)
    try:
        store = ModelStore(redis_client, model_name)
        _commit(store, _fitted(seed=0))
        lost = runtime.model(model_name)
        assert lost.version == 1
        # what the promoted replica holds: version 1 never arrived; then a new version 1
        keys = ModelKeys(model_name)
        redis_client.delete(keys.state, keys.version, keys.state_checksum, keys.state_meta)
        remade_state = _fitted(seed=3)
        _commit(store, remade_state)
        remade = store.current()
        assert remade is not None and remade.version == 1 and remade.checksum != lost.checksum
        # a notice carrying the old form (the number only) cannot tell them apart
        runtime.on_notice(keys.notify, b"1")
        assert runtime.models[model_name].checksum == lost.checksum
        # the notice a checkpoint now sends carries the checksum: reloaded
        runtime.on_notice(keys.notify, f"1 {remade.checksum}".encode())
        assert runtime.models[model_name].checksum == remade.checksum
        # and the poll, for the notices that never arrive
        redis_client.delete(keys.state, keys.version, keys.state_checksum, keys.state_meta)
        _commit(store, _fitted(seed=5))
        third = store.current()
        assert third is not None and third.version == 1 and third.checksum != remade.checksum
        runtime.poll_once()
        assert runtime.models[model_name].checksum == third.checksum
        assert np.array_equal(
            runtime.models[model_name].state.weights(), state_from_bytes(third.data).weights()
        )
    finally:
        registry.delete(model_name)
