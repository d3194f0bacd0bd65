"""Degraded mode: stop the (private) Redis mid-test. Routing keeps answering from memory and
says so; queueing answers 503; readiness says degraded. After Redis is back, queueing works
again and every document accepted before, during and after the outage is in the stream."""

from __future__ import annotations

import warnings
from collections.abc import Iterator

import numpy as np
import pytest

from service.app import DEGRADED_HEADER, create_app
from service.settings import Settings
from service.testing import first_checkpoint, free_port, wait_until
from state.connection import EmbeddedRedis, redis_from_url
from state.keys import ModelKeys

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis

MODEL = "degraded-inbox"


@pytest.fixture
def own_redis(tmp_path) -> Iterator[tuple[EmbeddedRedis, int]]:
    """A Redis of this test alone (it gets stopped), on a fixed loopback port so the same
    address works after the restart; fsync on every write so nothing accepted is lost."""
    port = free_port()
    server = EmbeddedRedis(tmp_path / "redis", port=port, appendfsync="always").start()
    yield server, port
    server.stop()


def queue(client: TestClient, ids: list[str]) -> tuple[int, dict]:
    response = client.post(
        f"/models/{MODEL}/documents",
        json={"documents": [{"id": i, "text": f"is the {i} ferry delayed"} for i in ids]},
    )
    return response.status_code, response.json()


def test_outage_keeps_routing_refuses_queueing_and_loses_nothing(
    own_redis: tuple[EmbeddedRedis, int], tmp_path
) -> None:
    server, port = own_redis
    url = f"redis://127.0.0.1:{port}/0"
    settings = Settings(redis_url=url, redis_timeout=0.5, reload_poll_interval=0.05)
    app = create_app(settings)
    with TestClient(app) as client:
        runtime = app.state.runtime
        _, worker, messages = first_checkpoint(client, redis_from_url(url), url, MODEL, 4, seed=2)
        worker.stop()
        wait_until(lambda: client.get(f"/models/{MODEL}").json()["version"] > 0)

        probe = {"documents": [{"text": m.text} for m in messages[:5]]}
        healthy = client.post(f"/models/{MODEL}/route", json=probe)
        assert healthy.status_code == 200 and healthy.json()["degraded"] is False
        accepted: list[str] = []
        status, body = queue(client, ["before-1", "before-2"])
        assert status == 202 and body["queued"] == 2
        accepted += ["before-1", "before-2"]

        server.stop()
        runtime.poll_once()  # the poller notices (called here so the test needs no timing)
        assert runtime.redis_ok is False

        degraded = client.post(f"/models/{MODEL}/route", json=probe)
        assert degraded.status_code == 200
        answer = degraded.json()
        assert answer["degraded"] is True and "unreachable" in answer["notice"]
        assert degraded.headers[DEGRADED_HEADER].startswith("redis-unreachable")
        assert answer["version"] == healthy.json()["version"]
        np.testing.assert_array_equal(
            [[p["probability"] for p in r["posterior"]] for r in answer["results"]],
            [[p["probability"] for p in r["posterior"]] for r in healthy.json()["results"]],
        )

        status, body = queue(client, ["during-1"])
        assert status == 503
        assert "Redis is unreachable" in body["detail"] and "nothing was changed" in body["detail"]
        learn = client.post(f"/models/{MODEL}/route", json={**probe, "learn": True}).json()
        assert learn["queued"] is False and "NOT queued" in learn["notice"]

        ready = client.get("/ready")
        assert ready.status_code == 200  # still serving from memory
        assert ready.json()["status"] == "degraded" and ready.json()["redis"] == "unreachable"
        snap = client.post(f"/models/{MODEL}/snapshots", json={"reason": "x"})
        assert snap.status_code == 503

        restarted = EmbeddedRedis(tmp_path / "redis", port=port, appendfsync="always").start()
        try:
            runtime.poll_once()
            assert runtime.redis_ok is True
            status, body = queue(client, ["after-1", "after-2"])
            assert status == 202 and body["queued"] == 2
            accepted += ["after-1", "after-2"]
            back = client.post(f"/models/{MODEL}/route", json=probe).json()
            assert back["degraded"] is False and back["notice"] is None

            raw = redis_from_url(url)
            entries = raw.xrange(ModelKeys(MODEL).docs)
            ids_in_stream = [fields[b"id"].decode() for _, fields in entries]
            # every accepted document is there exactly once; the refused one is not
            assert [i for i in ids_in_stream if i in [*accepted, "during-1"]] == accepted
            assert len(ids_in_stream) == len(messages) + len(accepted)
            raw.close()
        finally:
            restarted.stop()
