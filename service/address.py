"""Where a running ``mixroute serve`` can be reached: a small JSON file in its data folder.

``serve`` writes ``serve.json`` (the API's base URL, and the embedded Redis URL when it runs
one) once it knows both, and removes it when it stops. The client commands read it when
neither ``--api`` nor ``MIXROUTE_API_URL`` is given, so ``serve --port X`` reaches them; a
``work`` without ``REDIS_URL`` reads the Redis URL from it. A file left by a process that
is gone (a SIGKILL) is ignored: it names the writer's pid.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path

ADDRESS_FILE = "serve.json"


@dataclass(frozen=True)
class ServeAddress:
    """The addresses of one running ``serve``."""

    api_url: str
    redis_url: str | None
    pid: int

    @property
    def docs_url(self) -> str:
        return f"{self.api_url}/docs"

    @property
    def dashboard_url(self) -> str:
        return f"{self.api_url}/dashboard"


def api_url_for(host: str, port: int) -> str:
    """The URL a client on this machine uses for an API listening on ``host:port``.

    A wildcard address (``0.0.0.0``, ``::``) listens everywhere; a client dials loopback.
    """
    if host in ("", "0.0.0.0"):
        host = "127.0.0.1"
    elif host == "::":
        host = "[::1]"
    elif ":" in host and not host.startswith("["):
        host = f"[{host}]"
    return f"http://{host}:{port}"


def write_address(data_dir: Path, address: ServeAddress) -> Path:
    """Write the address file atomically (a reader never sees half a file); its path."""
    data_dir.mkdir(parents=True, exist_ok=True)
    path = data_dir / ADDRESS_FILE
    tmp = path.with_name(f".{ADDRESS_FILE}.{os.getpid()}")
    tmp.write_text(
        json.dumps({"api_url": address.api_url, "redis_url": address.redis_url, "pid": address.pid})
    )
    os.replace(tmp, path)
    return path


def remove_address(data_dir: Path, pid: int) -> None:
    """Remove the address file if it is this process's (another serve may have replaced it)."""
    address = read_address(data_dir, check_alive=False)
    if address is not None and address.pid == pid:
        (data_dir / ADDRESS_FILE).unlink(missing_ok=True)


def read_address(data_dir: Path, *, check_alive: bool = True) -> ServeAddress | None:
    """The address of the serve running on ``data_dir``; None without one (or a stale file)."""
    try:
        raw = json.loads((data_dir / ADDRESS_FILE).read_text())
        address = ServeAddress(
            api_url=str(raw["api_url"]),
            redis_url=None if raw.get("redis_url") is None else str(raw["redis_url"]),
            pid=int(raw["pid"]),
        )
    except (OSError, ValueError, KeyError, TypeError):
        return None
    if check_alive and not _alive(address.pid):
        return None
    return address


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, someone else's
        return True
    return True
