"""``python -m worker`` writes the log lines MIXROUTE_LOG_FORMAT asks for (a real process)."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import redis

from tests.worker_support import create_model, ferry_texts, learned_all, wait_for

pytestmark = pytest.mark.redis

ROOT = Path(__file__).resolve().parent.parent


def _run_worker(redis_url: str, model: str, log_format: str, store) -> list[str]:  # type: ignore[no-untyped-def]
    """Start a worker process, let it learn what is queued, stop it; its stderr lines."""
    env = {
        **os.environ,
        "REDIS_URL": redis_url,
        "MIXROUTE_LOG_FORMAT": log_format,
        "MIXROUTE_LOG_LEVEL": "INFO",
    }
    process = subprocess.Popen(
        [sys.executable, "-m", "worker", "--model", model, "--name", f"logs-{log_format}"],
        cwd=ROOT,
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        wait_for(learned_all(store, 300), timeout=60, what="the worker process learned")
    finally:
        process.send_signal(signal.SIGTERM)
        _, err = process.communicate(timeout=30)
    assert process.returncode == 0, err
    return [line for line in err.splitlines() if line.strip()]


def test_worker_process_writes_json_lines_when_asked(
    redis_url: str, redis_client: redis.Redis, model_name: str
) -> None:
    # Before: plain text whatever MIXROUTE_LOG_FORMAT said.
    store = create_model(redis_client, model_name)
    store.enqueue(ferry_texts(300, seed=41))
    lines = _run_worker(redis_url, model_name, "json", store)
    records = [json.loads(line) for line in lines]  # every line is one JSON object
    assert records, "the worker logged nothing"
    for record in records:
        assert {"time", "level", "logger", "message"} <= record.keys()
    ours = [r for r in records if r["logger"] == "worker.learner"]
    assert any("loaded model" in r["message"] for r in ours)
    assert all(r["model"] == model_name and r["worker"] == "logs-json" for r in ours)
    assert any(r["message"].startswith("signal 15") for r in records)


def test_worker_process_writes_text_lines_when_asked(
    redis_url: str, redis_client: redis.Redis, model_name: str
) -> None:
    store = create_model(redis_client, model_name)
    store.enqueue(ferry_texts(300, seed=42))
    lines = _run_worker(redis_url, model_name, "text", store)
    assert any("INFO worker.learner: worker logs-text loaded model" in line for line in lines)
    for line in lines:
        with pytest.raises(json.JSONDecodeError):
            json.loads(line)


def test_worker_process_refuses_an_unknown_log_format() -> None:
    env = {**os.environ, "MIXROUTE_LOG_FORMAT": "xml"}
    done = subprocess.run(
        [sys.executable, "-m", "worker", "--model", "x", "--redis-url", "redis://127.0.0.1:1/0"],
        cwd=ROOT,
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert done.returncode == 2 and "MIXROUTE_LOG_FORMAT" in done.stderr
