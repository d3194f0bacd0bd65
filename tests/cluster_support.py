"""A real Redis Cluster for the tests: three masters (and optionally one replica each) of the
machine's ``redis-server`` in cluster mode on free loopback ports, joined by
``redis-cli --cluster create`` (Debian's redis-server and redis-tools; ``make test`` installs
them where missing).

Each node also listens on its port + 10000 (the cluster bus), so a port is taken only when both
it and its bus port are free.
"""

from __future__ import annotations

import contextlib
import shutil
import signal
import socket
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path

BUS_OFFSET = 10_000  # the cluster bus port is the client port + 10000 (Redis's fixed rule)


def _port_free(port: int) -> bool:
    with socket.socket() as sock:
        try:
            sock.bind(("127.0.0.1", port))
        except OSError:
            return False
    return True


def free_cluster_ports(count: int, start: int = 21000) -> list[int]:
    """``count`` ports below 55535 whose bus ports (port + 10000) are free as well."""
    found: list[int] = []
    port = start
    while len(found) < count and port < 55535 - BUS_OFFSET:
        if _port_free(port) and _port_free(port + BUS_OFFSET):
            found.append(port)
        port += 1
    if len(found) < count:
        raise RuntimeError("no free loopback ports for a Redis Cluster")
    return found


def cluster_binaries() -> tuple[str, str] | None:
    """(redis-server, redis-cli) when both are installed, else None."""
    server, cli = shutil.which("redis-server"), shutil.which("redis-cli")
    return (server, cli) if server and cli else None


@dataclass
class LocalCluster:
    """Nodes of a loopback Redis Cluster started from ``folder``."""

    folder: Path
    masters: int = 3
    replicas: int = 0
    ports: list[int] = field(default_factory=list)
    processes: dict[int, subprocess.Popen[bytes]] = field(default_factory=dict)

    @property
    def url(self) -> str:
        """URL of the first node (any node will do for the cluster client)."""
        return f"redis://127.0.0.1:{self.ports[0]}/0"

    def start(self, timeout: float = 30.0) -> LocalCluster:
        binaries = cluster_binaries()
        if binaries is None:
            raise RuntimeError(
                "redis-server and redis-cli are needed (apt-get install redis-tools)"
            )
        server, cli = binaries
        self.ports = free_cluster_ports(self.masters * (1 + self.replicas))
        for port in self.ports:
            self._launch(server, port)
        for port in self.ports:
            self._wait_ping(cli, port, timeout)
        subprocess.run(
            [
                cli,
                "--cluster",
                "create",
                *(f"127.0.0.1:{p}" for p in self.ports),
                "--cluster-replicas",
                str(self.replicas),
                "--cluster-yes",
            ],
            check=True,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
            timeout=timeout,
        )
        deadline = time.monotonic() + timeout
        while not all(self._cluster_ok(cli, p) for p in self.ports):
            if time.monotonic() > deadline:
                raise RuntimeError("the Redis Cluster did not become ok")
            time.sleep(0.1)
        return self

    def _launch(self, server: str, port: int) -> None:
        node_dir = self.folder / str(port)
        node_dir.mkdir(parents=True, exist_ok=True)
        self.processes[port] = subprocess.Popen(
            [
                server,
                "--port",
                str(port),
                "--bind",
                "127.0.0.1",
                "--cluster-enabled",
                "yes",
                "--cluster-config-file",
                "nodes.conf",
                "--cluster-node-timeout",
                "1000",
                # a replica may always take over: with a 1 s node timeout the default validity
                # window (10 x timeout plus the ping period) refuses replicas of a busy test
                "--cluster-replica-validity-factor",
                "0",
                "--dir",
                str(node_dir),
                "--appendonly",
                "yes",
                "--appendfsync",
                "always",
                "--save",
                "",
                "--logfile",
                str(node_dir / "redis.log"),
            ],
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )

    @staticmethod
    def _wait_ping(cli: str, port: int, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        while True:
            done = subprocess.run(
                [cli, "-p", str(port), "ping"], capture_output=True, text=True, check=False
            )
            if done.stdout.strip() == "PONG":
                return
            if time.monotonic() > deadline:
                raise RuntimeError(f"redis-server on port {port} did not start")
            time.sleep(0.05)

    @staticmethod
    def _cluster_ok(cli: str, port: int) -> bool:
        done = subprocess.run(
            [cli, "-p", str(port), "cluster", "info"], capture_output=True, text=True, check=False
        )
        return "cluster_state:ok" in done.stdout

    def kill(self, port: int) -> None:
        """SIGKILL the node on ``port`` (a crash)."""
        process = self.processes.pop(port)
        process.send_signal(signal.SIGKILL)
        process.wait()

    def stop(self) -> None:
        """SIGTERM every node still running and wait for it."""
        for process in self.processes.values():
            with contextlib.suppress(ProcessLookupError):
                process.terminate()
        for process in self.processes.values():
            try:
                process.wait(10)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()
        self.processes.clear()
