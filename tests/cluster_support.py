"""A real Redis Cluster for the tests: three masters (and optionally one replica each) of the
machine's ``redis-server`` in cluster mode on free loopback ports, joined by
``redis-cli --cluster create`` (Debian's redis-server and redis-tools; ``make test`` installs
them where missing).

Each node also listens on its port + 10000 (the cluster bus), so a port is taken only when both
it and its bus port are free. Nodes are kept small (``maxmemory`` 64 MB, refusing writes past
it rather than evicting) and allow ``DEBUG`` from loopback (``DEBUG SLEEP`` makes a primary
unresponsive for the failover tests).

:class:`LocalReplicated` is the small case: one primary with one replica, no cluster (the
replica waits of snapshots and rollbacks, tests/test_replica_rollback.py).
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

import redis

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


def required_binaries() -> tuple[str, str]:
    """(redis-server, redis-cli), or RuntimeError saying what to install."""
    binaries = cluster_binaries()
    if binaries is None:
        raise RuntimeError("redis-server and redis-cli are needed (apt-get install redis-tools)")
    return binaries


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
        server, cli = required_binaries()
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
        if self.replicas:
            self.wait_replicas_in_sync(timeout)
        return self

    def wait_replicas_in_sync(self, timeout: float = 30.0) -> None:
        """Wait until every running replica's link to its primary is up (its first sync done)."""
        deadline = time.monotonic() + timeout
        while True:
            replicas = [p for p, of in self.topology().items() if of is not None]
            if replicas and all(self._link_up(p) for p in replicas if p in self.processes):
                return
            if time.monotonic() > deadline:
                raise RuntimeError("the replicas did not finish their sync")
            time.sleep(0.1)

    def _link_up(self, port: int) -> bool:
        try:
            info = self.node(port, socket_timeout=2).info("replication")
        except redis.RedisError:
            return False
        return info.get("master_link_status") == "up"

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
                "--maxmemory",
                "64mb",
                "--maxmemory-policy",
                "noeviction",
                "--enable-debug-command",
                "local",
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

    def restart(self, port: int, timeout: float = 30.0) -> None:
        """Start the node on ``port`` again from its folder (its nodes.conf and AOF): it
        rejoins the cluster (a primary that was failed over comes back as a replica)."""
        binaries = cluster_binaries()
        assert binaries is not None
        self._launch(binaries[0], port)
        self._wait_ping(binaries[1], port, timeout)

    def pause(self, port: int) -> None:
        """SIGSTOP the node on ``port``: it answers nothing and reads nothing."""
        self.processes[port].send_signal(signal.SIGSTOP)

    def resume(self, port: int) -> None:
        """SIGCONT a paused node."""
        self.processes[port].send_signal(signal.SIGCONT)

    def node(self, port: int, **kwargs: object) -> redis.Redis:
        """A plain client of the one node on ``port`` (not the cluster client)."""
        return redis.Redis(host="127.0.0.1", port=port, **kwargs)  # type: ignore[arg-type]

    def _ask(self, *command: str) -> str:
        """A command's reply as redis-cli prints it, from the first running node that answers."""
        binaries = cluster_binaries()
        assert binaries is not None
        for port in self.processes:
            try:
                done = subprocess.run(
                    [binaries[1], "-p", str(port), *command],
                    capture_output=True,
                    text=True,
                    check=False,
                    timeout=3,
                )
            except subprocess.TimeoutExpired:
                continue  # a paused or sleeping node
            if done.returncode == 0 and done.stdout.strip() and "ERR" not in done.stdout[:5]:
                return done.stdout
        raise RuntimeError(f"no node of the cluster answers {' '.join(command)}")

    def topology(self) -> dict[int, int | None]:
        """Port -> the port of its primary (None for a primary), from CLUSTER NODES (the
        cluster's own view; failed nodes left out)."""
        rows = [line.split() for line in self._ask("cluster", "nodes").splitlines() if line]
        port_of = {r[0]: int(r[1].split("@")[0].rsplit(":", 1)[1]) for r in rows}
        out: dict[int, int | None] = {}
        for r in rows:
            flags = r[2].split(",")
            if "fail" in flags or "noaddr" in flags:
                continue
            out[port_of[r[0]]] = None if "master" in flags else port_of.get(r[3])
        return out

    def primary_of(self, key: str) -> int:
        """Port of the primary serving ``key``'s slot (CLUSTER KEYSLOT, then CLUSTER NODES)."""
        slot = int(self._ask("cluster", "keyslot", key).strip())
        for line in self._ask("cluster", "nodes").splitlines():
            r = line.split()
            if not r or "master" not in r[2].split(",") or "fail" in r[2].split(","):
                continue
            for part in r[8:]:
                if part.startswith("["):
                    continue  # a slot being migrated
                low, _, high = part.partition("-")
                if int(low) <= slot <= int(high or low):
                    return int(r[1].split("@")[0].rsplit(":", 1)[1])
        raise RuntimeError(f"no primary serves the slot of {key!r}")

    def replicas_of(self, primary: int) -> list[int]:
        """Ports of the replicas of the primary on ``primary``."""
        return [port for port, of in self.topology().items() if of == primary]

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


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@dataclass
class LocalReplicated:
    """One primary and one replica (``--replicaof``) of the machine's ``redis-server`` on free
    loopback ports, no cluster: WAIT is the same command on a cluster's primary, and a pair
    starts in a fraction of a second. No persistence (the tests never restart them)."""

    folder: Path
    primary_port: int = 0
    replica_port: int = 0
    processes: dict[str, subprocess.Popen[bytes]] = field(default_factory=dict)

    @property
    def url(self) -> str:
        """URL of the primary."""
        return f"redis://127.0.0.1:{self.primary_port}/0"

    def start(self, timeout: float = 30.0) -> LocalReplicated:
        server, cli = required_binaries()
        self.primary_port = _free_port()
        self.replica_port = _free_port()
        for name, port, extra in (
            # no 5 s wait for more replicas before the first (diskless) sync
            ("primary", self.primary_port, ["--repl-diskless-sync-delay", "0"]),
            ("replica", self.replica_port, ["--replicaof", "127.0.0.1", str(self.primary_port)]),
        ):
            folder = self.folder / name
            folder.mkdir(parents=True, exist_ok=True)
            self.processes[name] = subprocess.Popen(
                [
                    server,
                    *("--port", str(port), "--bind", "127.0.0.1", "--dir", str(folder)),
                    *("--save", "", "--appendonly", "no", "--logfile", str(folder / "redis.log")),
                    *extra,
                ],
                stdin=subprocess.DEVNULL,
                stdout=subprocess.DEVNULL,
                stderr=subprocess.DEVNULL,
            )
        for port in (self.primary_port, self.replica_port):
            LocalCluster._wait_ping(cli, port, timeout)
        self.wait_in_sync(timeout)
        return self

    def wait_in_sync(self, timeout: float = 30.0) -> None:
        """Wait until the replica's link to the primary is up (its sync done)."""
        deadline = time.monotonic() + timeout
        while True:
            try:
                info = self.node(self.replica_port, socket_timeout=2).info("replication")
                if info.get("master_link_status") == "up":
                    return
            except redis.RedisError:
                pass
            if time.monotonic() > deadline:
                raise RuntimeError("the replica did not finish its sync")
            time.sleep(0.05)

    def pause_replica(self) -> None:
        """SIGSTOP the replica: connected still, it acknowledges nothing."""
        self.processes["replica"].send_signal(signal.SIGSTOP)

    def resume_replica(self) -> None:
        """SIGCONT the paused replica."""
        self.processes["replica"].send_signal(signal.SIGCONT)

    def node(self, port: int, **kwargs: object) -> redis.Redis:
        """A plain client of the server on ``port``."""
        return redis.Redis(host="127.0.0.1", port=port, **kwargs)  # type: ignore[arg-type]

    def stop(self) -> None:
        """SIGCONT (a paused replica ignores SIGTERM otherwise), SIGTERM, wait."""
        for process in self.processes.values():
            with contextlib.suppress(ProcessLookupError):
                process.send_signal(signal.SIGCONT)
                process.terminate()
        for process in self.processes.values():
            try:
                process.wait(10)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()
        self.processes.clear()
