"""The embedded Redis never outlives its owner: real `mixroute serve` processes stopped by
SIGTERM, SIGINT and SIGKILL after queueing thousands of messages, and stale servers of a data
folder stopped by the next start.

The harsh part of each check removes the data folder as soon as the owner has exited: a
redis-server still saving then cannot write its RDB and refuses SIGTERM for good (Redis's own
documented shutdown rule: with save points configured, a failed final save aborts the
shutdown), so a server that was merely slow to stop shows up as one that never stops.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from service.demo_data import default_days, generate_day
from service.testing import free_port, wait_until
from state.connection import EmbeddedRedis, redis_from_url, redis_server_binary
from state.errors import StateError

pytestmark = pytest.mark.redis

ROOT = Path(__file__).resolve().parent.parent


def _state(pid: int) -> str | None:
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    return stat[stat.rindex(")") + 2 :].split(" ", 1)[0]


def _alive(pid: int) -> bool:
    # a zombie has exited (this machine's init may never reap orphans)
    return _state(pid) not in (None, "Z", "X")


def redis_servers_in(folder: Path) -> list[int]:
    """Live redis-server processes whose working directory is ``folder`` (read from /proc,
    independently of the code under test; redis-server changes directory to its ``dir``)."""
    found = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            cwd = os.readlink(f"/proc/{entry}/cwd")
            exe = os.readlink(f"/proc/{entry}/exe")
        except OSError:
            continue
        if Path(exe).name == "redis-server" and cwd == str(folder) and _alive(int(entry)):
            found.append(int(entry))
    return found


def wait_gone(pids: list[int], timeout: float = 20.0) -> list[int]:
    """Wait (bounded, not a timing assertion) until the processes are gone; those left."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        left = [pid for pid in pids if _alive(pid)]
        if not left:
            return []
        time.sleep(0.05)
    return [pid for pid in pids if _alive(pid)]


def kill_left(pids: list[int]) -> None:
    for pid in pids:
        if _alive(pid):
            os.kill(pid, signal.SIGKILL)


def invented_messages(n: int) -> list[dict]:
    """``n`` messages of the invented ferry-cooperative inbox."""
    messages: list[dict] = []
    for plan in default_days(1.0):
        messages += [m.to_json() for m in generate_day(plan, len(messages))]
        if len(messages) >= n:
            break
    return [{"id": f"m{i}", "text": m["text"]} for i, m in enumerate(messages[:n])]


@pytest.fixture
def serve_process(tmp_path: Path) -> Iterator[tuple[subprocess.Popen[bytes], Path, str]]:
    """`mixroute serve` on embedded Redis in a folder of this test, as its own process."""
    data = (tmp_path / "data").resolve()
    port = free_port()
    env = {k: v for k, v in os.environ.items() if k not in ("REDIS_URL", "MIXROUTE_REDIS_URL")}
    env["MIXROUTE_LOG_LEVEL"] = "warning"
    code = "import sys; from service.cli import main; sys.exit(main(sys.argv[1:]))"
    argv = ["serve", "--host", "127.0.0.1", "--port", str(port), "--data-dir", str(data)]
    log_file = (tmp_path / "serve.log").open("wb")
    process = subprocess.Popen(
        [sys.executable, "-c", code, *argv],
        cwd=ROOT,
        env=env,
        stdout=log_file,
        stderr=subprocess.STDOUT,
    )
    try:
        yield process, data, f"http://127.0.0.1:{port}"
    finally:
        if process.poll() is None:
            process.kill()
        process.wait()
        log_file.close()


def remove_while_it_dies(folder: Path) -> None:
    """Remove the data folder while its redis-server may still be exiting: a file it removes
    itself meanwhile (its redis.pid) is not an error, and a file it writes meanwhile is removed
    on the next round."""

    def vanished(function: object, name: str, excinfo: tuple) -> None:
        if not issubclass(excinfo[0], FileNotFoundError):
            raise excinfo[1]

    for _ in range(100):
        try:
            shutil.rmtree(folder, onerror=vanished)
            return
        except OSError:  # a file written after the listing: the folder is not empty yet
            time.sleep(0.02)
    shutil.rmtree(folder, onerror=vanished)


@pytest.mark.parametrize(
    "stop_signal", [signal.SIGTERM, signal.SIGINT, signal.SIGKILL], ids=["TERM", "INT", "KILL"]
)
def test_stopping_serve_never_leaves_its_redis(
    serve_process: tuple[subprocess.Popen[bytes], Path, str], stop_signal: int
) -> None:
    process, data, url = serve_process
    http = httpx.Client(base_url=url, timeout=30)

    def answers() -> bool:
        try:
            return http.get("/health").status_code == 200
        except httpx.HTTPError:
            return process.poll() is not None  # died: stop waiting, the next line says so

    wait_until(answers, timeout=60, what="mixroute serve")
    assert process.poll() is None, "mixroute serve exited at start"
    assert http.post("/models", json={"name": "ferry", "config": {"n_groups": 4}}).is_success
    messages = invented_messages(4000)
    for first in range(0, len(messages), 500):
        batch = {"documents": messages[first : first + 500]}
        assert http.post("/models/ferry/documents", json=batch).status_code == 202
    http.close()
    servers = redis_servers_in(data)
    assert len(servers) == 1, f"expected one embedded redis-server, found {servers}"

    process.send_signal(stop_signal)
    process.wait(timeout=120)
    # a stop that can run its code waits for its server; SIGKILL leaves it to the death signal
    still_running = [pid for pid in servers if _alive(pid)]
    remove_while_it_dies(data)  # at once: a server still saving now never manages to exit
    left = wait_gone(servers)
    kill_left(left)
    assert not left, f"redis-server {left} outlived `mixroute serve` stopped by {stop_signal}"
    if stop_signal != signal.SIGKILL:
        assert not still_running, "`mixroute serve` exited before its redis-server stopped"
        # SIGTERM still ends the process by the signal (as uvicorn intends); SIGINT is 130
        assert process.returncode == (-stop_signal if stop_signal == signal.SIGTERM else 130)


def test_serve_prints_its_addresses_and_the_client_commands_find_it(
    serve_process: tuple[subprocess.Popen[bytes], Path, str], tmp_path: Path, monkeypatch, capsys
) -> None:
    from service.cli import main

    process, data, url = serve_process
    http = httpx.Client(base_url=url, timeout=30)
    wait_until(lambda: (data / "serve.json").exists() or process.poll() is not None,
               timeout=60, what="the address file")  # fmt: skip

    def answers() -> bool:
        try:
            return http.get("/health").status_code == 200
        except httpx.HTTPError:
            return process.poll() is not None

    wait_until(answers, timeout=60, what="mixroute serve")
    assert process.poll() is None, "mixroute serve exited at start"
    printed = (tmp_path / "serve.log").read_text()
    for address in (url, f"{url}/docs", f"{url}/dashboard"):
        assert address in printed
    assert http.post("/models", json={"name": "ferry", "config": {"n_groups": 2}}).is_success
    http.close()
    # no --api, no MIXROUTE_API_URL, a port that is not the default: found through serve.json
    monkeypatch.delenv("MIXROUTE_API_URL", raising=False)
    monkeypatch.delenv("MIXROUTE_PORT", raising=False)
    monkeypatch.setenv("MIXROUTE_DATA_DIR", str(data))
    assert main(["models", "list"]) == 0
    assert capsys.readouterr().out.startswith("ferry\t")
    process.send_signal(signal.SIGTERM)
    process.wait(timeout=60)
    assert not (data / "serve.json").exists()  # a stopped serve is not found any more


def test_a_start_stops_a_stale_server_of_its_folder(tmp_path: Path) -> None:
    folder = (tmp_path / "data").resolve()
    first = EmbeddedRedis(folder).start()
    first.client().set("before", b"1")
    socket_path = first.socket_path
    first.stop()
    # a server of that folder that nobody owns any more (an earlier owner's orphan)
    stale = subprocess.Popen(
        [redis_server_binary(), str(folder / "redis.conf")],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        start_new_session=True,
    )
    try:

        def stale_answers() -> bool:
            try:
                return bool(redis_from_url(f"unix://{socket_path}").set("stale", b"2"))
            except Exception:
                return False

        wait_until(stale_answers, timeout=20, what="the stale server")
        again = EmbeddedRedis(folder).start()
        try:
            stale.wait(timeout=20)  # bounded: TimeoutExpired when nobody stopped it
            assert again.pid != stale.pid and again.running
            client = again.client()
            # what the stale server accepted survived: it fsynced its AOF on SIGTERM
            assert client.get("before") == b"1" and client.get("stale") == b"2"
        finally:
            again.stop()
    finally:
        if stale.poll() is None:
            stale.kill()
        stale.wait()


def test_a_pid_file_naming_another_process_kills_nothing(tmp_path: Path) -> None:
    folder = (tmp_path / "data").resolve()
    folder.mkdir()
    bystander = subprocess.Popen(["sleep", "60"])
    try:
        (folder / "redis.pid").write_text(f"{bystander.pid}\n")  # a reused pid
        with EmbeddedRedis(folder) as server:
            assert server.client().ping()
        assert bystander.poll() is None
    finally:
        bystander.kill()
        bystander.wait()


def test_two_owners_of_one_folder_are_refused(tmp_path: Path) -> None:
    folder = tmp_path / "data"
    with EmbeddedRedis(folder) as server:
        with pytest.raises(StateError, match="in use by another running mixroute"):
            EmbeddedRedis(folder, port=0).start()
        assert server.client().ping()
    with EmbeddedRedis(folder) as again:  # released by the stop
        assert again.client().ping()


def test_a_server_started_from_another_thread_dies_with_its_killed_owner(tmp_path: Path) -> None:
    folder = (tmp_path / "data").resolve()
    script = (
        "import threading, time\n"
        "from state.connection import EmbeddedRedis\n"
        f"server = EmbeddedRedis({str(folder)!r})\n"
        "starter = threading.Thread(target=server.start)\n"
        "starter.start(); starter.join()\n"
        "print(server.pid, flush=True)\n"
        "time.sleep(60)\n"
    )
    owner = subprocess.Popen(
        [sys.executable, "-c", script], cwd=ROOT, stdout=subprocess.PIPE, text=True
    )
    assert owner.stdout is not None
    server_pid = int(owner.stdout.readline())
    owner.stdout.close()
    owner.send_signal(signal.SIGKILL)
    owner.wait()
    left = wait_gone([server_pid])
    kill_left(left)
    assert not left, "the server started from a thread outlived its killed owner"


def test_start_and_stop_from_many_threads_share_one_launcher(tmp_path: Path) -> None:
    servers = [EmbeddedRedis(tmp_path / f"d{i}") for i in range(3)]
    threads = [threading.Thread(target=s.start) for s in servers]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    try:
        assert all(s.client().ping() for s in servers)
    finally:
        for server in servers:
            server.stop()
