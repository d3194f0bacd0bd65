"""Helpers for driving the service from tests and benchmarks (not used in production paths)."""

from __future__ import annotations

import socket
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any, TypeVar

T = TypeVar("T")

# Model options that make a worker checkpoint often and never wait long: small test streams.
QUICK_OPTIONS: dict[str, Any] = {
    "checkpoint_documents": 100,
    "checkpoint_seconds": 0.3,
    "read_count": 200,
    "read_block_ms": 50,
    "snapshot_every_documents": None,
    "snapshot_every_seconds": None,
}


def free_port() -> int:
    """A free TCP port on the loopback interface."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def wait_until(
    probe: Callable[[], T | None], timeout: float = 60.0, interval: float = 0.05, what: str = ""
) -> T:
    """Call ``probe`` until it returns something truthy; AssertionError after ``timeout``.

    Used to wait for the worker (a bounded wait, not a timing assertion).
    """
    deadline = time.monotonic() + timeout
    while True:
        value = probe()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"gave up after {timeout:.0f} s waiting for {what or probe}")
        time.sleep(interval)


def learned(client: Any, model: str, target: int) -> dict[str, Any] | None:
    """The model's JSON once it has learned ``target`` documents and caught up with its stream."""
    response = client.get(f"/models/{model}")
    if response.status_code != 200:
        return None
    body = response.json()
    stream = body.get("stream") or {}
    if body["documents_learned"] >= target and stream.get("watermark") == stream.get("last_id"):
        return body  # type: ignore[no-any-return]
    return None


def first_checkpoint(
    http: Any, redis: Any, redis_url: str, model: str, n_groups: int, seed: int
) -> tuple[Any, Any, list[Any]]:
    """Create ``model`` through the API, queue one small invented demo day and run a worker
    in this thread until the model's first checkpoint.

    Parameters
    ----------
    http : TestClient or httpx.Client
        Talks to the API (with whatever key it needs).
    redis : redis.Redis
        Client of the same Redis, for queueing.
    redis_url, model, n_groups, seed
        Where the worker connects, the model's name, its K, the demo day's seed.

    Returns
    -------
    (ModelStore, Worker, list of DemoMessage)
        The model's store on ``redis``, the worker (still open: stop or checkpoint it) and
        the queued messages.
    """
    from service.demo_data import default_days, generate_day
    from state.store import ModelStore
    from worker.learner import Worker

    config = {"n_groups": n_groups, "warmup_documents": 60, "n_restarts": 1}
    made = http.post("/models", json={"name": model, "config": config, "options": QUICK_OPTIONS})
    assert made.status_code == 201, made.text
    store = ModelStore(redis, model)
    messages = generate_day(default_days(0.1)[0], seed=seed)
    store.enqueue([m.text for m in messages], ids=[m.id for m in messages])
    worker = Worker(redis_url, model)
    wait_until(lambda: worker.run_once() >= 0 and store.version() > 0, what="a checkpoint")
    return store, worker, messages


@contextmanager
def uvicorn_thread(app: Any, port: int | None = None) -> Iterator[str]:
    """Serve ``app`` with uvicorn in a thread on loopback; yields the base URL."""
    import uvicorn

    port = port or free_port()
    server = uvicorn.Server(
        uvicorn.Config(app, host="127.0.0.1", port=port, log_level="warning", lifespan="on")
    )
    thread = threading.Thread(target=server.run, name="mixroute-test-api", daemon=True)
    thread.start()
    try:
        wait_until(lambda: server.started or not thread.is_alive(), 20, 0.02, "uvicorn start")
        if not thread.is_alive():
            raise RuntimeError("uvicorn did not start")
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=30)
