"""API idle cost with many models, and how soon a checkpoint is served.

Set-up: an embedded Redis holds ``N_MODELS`` registered models; one of them (``MODEL``) has
learned a small invented ferry-inbox day, so it has checkpoints. Each API runs under uvicorn
in its own process. Figures, all measured in this run:

1. CPU seconds (user + system, from /proc) of the API process and of redis-server over
   ``IDLE_SECONDS`` of idle time with every model loaded, for
   - the reference: the former version poll re-enacted in a bare process (three round trips
     per model, one after another, every 0.2 s). It skips the former runtime's own Python
     work around each call, so it is a lower bound of what the former API spent;
   - the API with the notices off and its pipelined poll every 0.2 s;
   - the API as configured by default (checkpoint notices, pipelined poll every 5 s);
2. reload latency: from the end of a worker's checkpoint (its MULTI includes the PUBLISH) to
   the first ``GET /models/{m}`` of the API that shows the new version (median of
   ``CHECKPOINTS`` checkpoints), for the two API configurations.

Run: ``python -m bench.bench_api_models [idle seconds]`` (or ``make bench``). Prints, never
asserts.
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

N_MODELS = 200
IDLE_SECONDS = 20.0
CHECKPOINTS = 5
MODEL = "bench-reload"
ROOT = Path(__file__).resolve().parents[1]

# the former poll, re-enacted: per model EXISTS config, GET version, GET labels_version
FORMER_POLL = """
import sys, time
from state.connection import redis_from_url
from state.keys import ModelKeys
client = redis_from_url(sys.argv[1], socket_timeout=1.0)
names = sys.argv[2].split(",")
print("ready", flush=True)
while True:
    time.sleep(0.2)
    for name in names:
        keys = ModelKeys(name)
        client.exists(keys.config)
        client.get(keys.version)
        client.get(keys.labels_version)
"""


def cpu_seconds(pid: int) -> float:
    """User + system CPU time of ``pid`` (Linux /proc)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def prepare(redis_url: str) -> tuple[list[str], Any, Any]:
    """Register the models; give ``MODEL`` its first checkpoint. Returns names, worker, store."""
    from mixture.config import MixtureConfig
    from service.demo_data import default_days, generate_day
    from service.testing import QUICK_OPTIONS
    from state.connection import redis_from_url
    from state.options import ModelOptions
    from state.registry import Registry
    from state.store import ModelStore
    from worker.learner import Worker

    client = redis_from_url(redis_url)
    registry = Registry(client)
    names = [f"bench-idle-{i:03d}" for i in range(N_MODELS - 1)]
    for name in names:
        registry.create(name, MixtureConfig(n_groups=4))
    config = MixtureConfig(n_groups=4, warmup_documents=60, n_restarts=1, batch_size=60)
    registry.create(MODEL, config, ModelOptions.from_dict(QUICK_OPTIONS))
    store = ModelStore(client, MODEL)
    messages = generate_day(default_days(0.1)[0], seed=3)
    store.enqueue([m.text for m in messages], ids=[m.id for m in messages])
    worker = Worker(redis_url, MODEL)
    deadline = time.time() + 120
    while store.version() < 1:
        worker.run_once()
        if time.time() > deadline:
            raise RuntimeError("the worker did not reach its first checkpoint")
    return [*names, MODEL], worker, store


def start_api(redis_url: str, port: int, notices: bool, poll: float) -> subprocess.Popen[bytes]:
    import httpx

    env = {
        **os.environ,
        "MIXROUTE_REDIS_URL": redis_url,
        "MIXROUTE_LOG_LEVEL": "warning",
        "MIXROUTE_HOST": "127.0.0.1",
        "MIXROUTE_API_KEYS_READ": "",
        "MIXROUTE_API_KEYS_ADMIN": "",
        "MIXROUTE_RELOAD_NOTIFICATIONS": "true" if notices else "false",
        "MIXROUTE_RELOAD_POLL_INTERVAL": str(poll),
    }
    command = [
        sys.executable, "-m", "uvicorn", "--factory", "service.app:create_app",
        "--host", "127.0.0.1", "--port", str(port), "--log-level", "warning",
        "--no-access-log",
    ]  # fmt: skip
    process = subprocess.Popen(command, env=env, cwd=ROOT)
    deadline = time.time() + 60
    while time.time() < deadline:
        try:
            response = httpx.get(f"http://127.0.0.1:{port}/models", timeout=2)
            if response.status_code == 200 and len(response.json()["models"]) == N_MODELS:
                return process
        except httpx.TransportError:
            pass
        if process.poll() is not None:
            raise RuntimeError("uvicorn exited during start-up")
        time.sleep(0.1)
    process.terminate()
    raise RuntimeError("the API did not start")


def idle_cpu(process_pid: int, redis_pid: int, seconds: float) -> tuple[float, float]:
    time.sleep(2.0)  # let start-up work finish
    api0, redis0 = cpu_seconds(process_pid), cpu_seconds(redis_pid)
    time.sleep(seconds)
    return cpu_seconds(process_pid) - api0, cpu_seconds(redis_pid) - redis0


def reload_latency(port: int, worker: Any, store: Any, seed: int) -> float:
    """Median seconds from a checkpoint's commit to the API serving its version."""
    import httpx

    from service.demo_data import default_days, generate_day

    http = httpx.Client(base_url=f"http://127.0.0.1:{port}", timeout=5)
    delays = []
    for round_ in range(CHECKPOINTS):
        messages = generate_day(default_days(0.1)[1], seed=seed * 100 + round_)
        store.enqueue([m.text for m in messages], ids=[f"{seed}-{round_}-{m.id}" for m in messages])
        before = store.version()
        while store.version() == before:
            worker.run_once()
        committed, target = time.perf_counter(), store.version()
        while http.get(f"/models/{MODEL}").json()["version"] < target:
            time.sleep(0.0005)
        delays.append(time.perf_counter() - committed)
    http.close()
    return statistics.median(delays)


def main() -> None:
    """Measure and print."""
    from service.testing import free_port
    from state.connection import EmbeddedRedis

    idle = float(sys.argv[1]) if len(sys.argv) > 1 else IDLE_SECONDS
    rows: list[tuple[str, float, float, float | None]] = []
    with tempfile.TemporaryDirectory(prefix="mixroute-bench-") as folder:
        server = EmbeddedRedis(folder, appendfsync="no").start()
        assert server.pid is not None
        try:
            names, worker, store = prepare(server.url)
            former = subprocess.Popen(
                [sys.executable, "-c", FORMER_POLL, server.url, ",".join(names)],
                cwd=ROOT,
                stdout=subprocess.PIPE,
            )
            assert former.stdout is not None and former.stdout.readline().strip() == b"ready"
            try:
                api_cpu, redis_cpu = idle_cpu(former.pid, server.pid, idle)
            finally:
                former.terminate()
                former.wait()
            rows.append(("former poll, re-enacted (reference)", api_cpu, redis_cpu, None))
            for label, notices, poll in (
                ("API, notices off, poll 0.2 s", False, 0.2),
                ("API, notices + poll 5 s (default)", True, 5.0),
            ):
                port = free_port()
                api = start_api(server.url, port, notices, poll)
                try:
                    api_cpu, redis_cpu = idle_cpu(api.pid, server.pid, idle)
                    latency = reload_latency(port, worker, store, seed=len(rows))
                finally:
                    api.terminate()
                    api.wait(timeout=30)
                rows.append((label, api_cpu, redis_cpu, latency))
            worker.stop()
        finally:
            server.stop()
    reference = rows[0][1]
    print(f"{N_MODELS} models, {idle:.0f} s idle; cores: {os.cpu_count()}")
    print(f"{'':38s} {'API CPU s':>10s} {'ratio':>7s} {'Redis CPU s':>12s} {'reload ms':>10s}")
    for label, api_cpu, redis_cpu, latency in rows:
        ratio = api_cpu / reference if reference > 0 else float("nan")
        shown = f"{latency * 1e3:10.1f}" if latency is not None else f"{'':>10s}"
        print(f"{label:38s} {api_cpu:10.2f} {ratio:7.3f} {redis_cpu:12.2f} {shown}")


if __name__ == "__main__":
    main()
