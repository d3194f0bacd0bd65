"""A worker pool that shares the models: N member processes divide M models between them.

Each member (one process: ``python -m worker.pool``, or ``mixroute work``, or several with
``mixroute work --processes P``) renews its entry in the pool's roster
(:class:`state.lease.PoolRoster`, a TTL per member) every tick, reads which member holds which
model's lease (:func:`state.lease.lease_holders`, one pipelined round trip) and aims at its
share, ``ceil(M / N)`` leases, N being the live members:

- under its share, it starts a learner thread (:class:`worker.learner.Worker`) for free models;
  the lease (SET NX) decides when two members reach for the same one, and the loser's thread is
  stopped at the next tick;
- over its share (a member joined), it stops learners until it is at its share: each stop is
  the learner's own shutdown (finish the step, checkpoint, release the lease), so the model is
  free at once and the newcomer takes it at its next tick: learning pauses for a tick or two,
  never for a whole lease;
- a dead member's leases run out after the model's ``lease_seconds``; its models are then free,
  and its roster entry may still count it (the roster TTL). A model seen free for two ticks in a
  row is an orphan: the least loaded member among those holding leases (and this one) takes it
  even beyond its share, so a dead member's models are taken over within the lease time and a
  tick or two, whatever the roster TTL; once the roster forgets the dead member the shares are
  even again.

Every model has its own learner thread, so a model with a long backlog does not hold back the
others of its member (its steps are one page each, and numpy's work releases the GIL); across
members there is no shared GIL at all. The lease holder's name is the member's name, which is
how members count each other's leases. Exactly-once learning is the learner's own (the watermark
and the checkpoint's WATCH of version and lease); the pool only decides who tries.
"""

from __future__ import annotations

import argparse
import hashlib
import logging
import math
import os
import signal
import sys
import threading
import time
from dataclasses import dataclass, field
from types import FrameType
from typing import Any

from state.connection import redis_from_url, use_cluster_client
from state.errors import ModelNotFoundError
from state.lease import PoolRoster, default_worker_name, lease_holders
from state.registry import Registry
from state.replicas import require_replicas, requirement_from_environment
from worker.learner import Worker

log = logging.getLogger(__name__)

ORPHAN_TICKS = 2  # ticks a model must be seen free before anyone may take it beyond its share


@dataclass(frozen=True)
class SharePlan:
    """What one member does this tick: models to start learners for, learners to stop."""

    take: list[str] = field(default_factory=list)
    release: list[str] = field(default_factory=list)
    share: int = 0


def _rank(member: str, model: str) -> str:
    """A per-member order of the models, so members reaching for free models spread out."""
    return hashlib.blake2b(f"{member}\0{model}".encode(), digest_size=8).hexdigest()


def plan_share(
    me: str,
    members: list[str],
    models: list[str],
    holders: dict[str, str | None],
    mine: set[str],
    orphans: set[str] = frozenset(),  # type: ignore[assignment]
) -> SharePlan:
    """Decide what member ``me`` takes and releases so every member holds about M/N leases.

    Parameters
    ----------
    me : str
        This member's name (also the lease holder name of its learners).
    members : list of str
        Live members of the roster (``me`` is counted even when missing).
    models : list of str
        Registered models.
    holders : dict
        Model to lease holder (None: free), as read this tick.
    mine : set of str
        Models this member runs a learner for (not counting learners being stopped).
    orphans : set of str
        Free models seen free for :data:`ORPHAN_TICKS` ticks in a row.

    Returns
    -------
    SharePlan
        ``take``: free models to start learners for; ``release``: learners to stop (their
        shutdown checkpoints and releases the lease); ``share``: ``ceil(M / N)``.
    """
    live = set(members) | {me}
    share = math.ceil(len(models) / len(live)) if models else 0
    mine = {m for m in mine if m in holders}
    if len(mine) > share:
        extra = sorted(mine, key=lambda m: _rank(me, m), reverse=True)[: len(mine) - share]
        return SharePlan(release=sorted(extra), share=share)
    # a model held under my name with no learner of mine (a learner of mine that died) is free
    free = sorted(
        (m for m in models if m not in mine and holders.get(m) in (None, me)),
        key=lambda m: _rank(me, m),
    )
    if not free:
        return SharePlan(share=share)
    if len(mine) < share:
        return SharePlan(take=free[: share - len(mine)], share=share)
    ready = [m for m in free if m in orphans]
    if not ready:
        return SharePlan(share=share)
    # every member seems at its share: the rest belongs to a member that is gone. The least
    # loaded of those that hold leases (a live member with none would have taken it) takes one.
    counts: dict[str, int] = {}
    for model, holder in holders.items():
        if holder is not None and holder != me and holder in live and model in models:
            counts[holder] = counts.get(holder, 0) + 1
    mine_count = len(mine)
    if all((mine_count, me) <= (n, other) for other, n in counts.items()):
        return SharePlan(take=ready[:1], share=share)
    return SharePlan(share=share)


class PoolMember:
    """One member of the worker pool: learner threads for its share of the models.

    Parameters
    ----------
    redis_url : str
        Redis (or a Redis Cluster node, with :func:`state.connection.use_cluster_client`).
    name : str, optional
        Member name, also the lease holder name (default ``<host>:<pid>:<random>``).
    tick_seconds : float
        How often the roster is renewed and the share recomputed.
    roster_ttl_seconds : float
        How long the member counts as live without renewing (several ticks).
    """

    def __init__(
        self,
        redis_url: str,
        *,
        name: str | None = None,
        tick_seconds: float = 0.5,
        roster_ttl_seconds: float = 5.0,
    ) -> None:
        if tick_seconds <= 0 or roster_ttl_seconds <= tick_seconds:
            raise ValueError("need 0 < tick_seconds < roster_ttl_seconds")
        self.redis_url = redis_url
        self.name = name or f"{default_worker_name()}:{os.urandom(3).hex()}"
        self.tick_seconds = tick_seconds
        self.redis = redis_from_url(redis_url, socket_timeout=5.0)
        self.roster = PoolRoster(self.redis, roster_ttl_seconds)
        self.registry = Registry(self.redis)
        self.learners: dict[str, tuple[Worker, threading.Thread]] = {}
        self.stopping: dict[str, tuple[Worker, threading.Thread]] = {}
        self._free_ticks: dict[str, int] = {}
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.last_plan = SharePlan()

    # -- one tick --------------------------------------------------------------------------
    def tick(self) -> SharePlan:
        """Renew the roster entry, read the leases, start and stop learners; the plan."""
        members = self.roster.beat(self.name)
        models = self.registry.list()
        holders = lease_holders(self.redis, models)
        self._reap(set(models), holders)
        for model in list(self._free_ticks):
            if holders.get(model) is not None or model not in holders:
                del self._free_ticks[model]
        for model, holder in holders.items():
            if holder is None:
                self._free_ticks[model] = self._free_ticks.get(model, 0) + 1
        orphans = {m for m, n in self._free_ticks.items() if n >= ORPHAN_TICKS}
        plan = plan_share(self.name, members, models, holders, set(self.learners), orphans)
        for model in plan.release:
            self._stop_learner(model, "over the share")
        for model in plan.take:
            if model not in self.stopping:  # the old learner still shutting down: next tick
                self._start_learner(model)
        self.last_plan = plan
        return plan

    def _reap(self, models: set[str], holders: dict[str, str | None]) -> None:
        for model, (_, thread) in list(self.stopping.items()):
            if not thread.is_alive():
                del self.stopping[model]
        for model, (worker, thread) in list(self.learners.items()):
            if not thread.is_alive():
                del self.learners[model]  # crashed or stopped for a deletion
            elif model not in models:
                self._stop_learner(model, "model deleted")
            elif holders.get(model) not in (None, self.name) and not worker.holding:
                self._stop_learner(model, "held by another member")

    def _start_learner(self, model: str) -> None:
        try:
            worker = Worker(self.redis_url, model, name=self.name)
        except ModelNotFoundError:
            return
        thread = threading.Thread(
            target=_run_logged, args=(worker,), name=f"mixroute-learner-{model}", daemon=True
        )
        thread.start()
        self.learners[model] = (worker, thread)
        log.info("pool member %s learns model %s", self.name, model)

    def _stop_learner(self, model: str, why: str) -> None:
        worker, thread = self.learners.pop(model)
        worker.stop()  # its shutdown checkpoints and releases the lease
        self.stopping[model] = (worker, thread)
        log.info("pool member %s hands model %s back (%s)", self.name, model, why)

    # -- running ---------------------------------------------------------------------------
    def held(self) -> list[str]:
        """Models whose lease a learner of this member holds now."""
        return sorted(m for m, (w, _) in self.learners.items() if w.holding)

    def run(self) -> None:
        """Tick until :meth:`stop`, then stop every learner (each checkpoints) and leave."""
        while not self._stop.is_set():
            try:
                self.tick()
            except Exception as exc:  # Redis away: the learners retry on their own
                log.warning("pool member %s cannot tick: %s", self.name, exc)
            self._stop.wait(self.tick_seconds)
        self._shutdown()

    def start(self) -> None:
        """Run the member in a background thread."""
        if self._thread is None:
            self._thread = threading.Thread(target=self.run, name="mixroute-pool", daemon=True)
            self._thread.start()

    def stop(self) -> None:
        """Ask the member to stop (thread-safe); joins the background thread if started."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(60)
            self._thread = None

    def _shutdown(self) -> None:
        for model in list(self.learners):
            self._stop_learner(model, "stopping")
        for _, thread in self.stopping.values():
            thread.join(30)
        self.stopping.clear()
        try:
            self.roster.leave(self.name)
        except Exception as exc:  # the entry expires on its own
            log.warning("pool member %s could not leave the roster: %s", self.name, exc)
        self.redis.close()
        log.info("pool member %s stopped", self.name)


def _run_logged(worker: Worker) -> None:
    """Run a learner; a crash is logged (the member starts a new one at a later tick)."""
    try:
        worker.run()
    except Exception as exc:
        log.error("learner of model %s stopped on %s: %s", worker.model, type(exc).__name__, exc)


def main(argv: list[str] | None = None) -> int:
    """``python -m worker.pool``: one pool member until SIGTERM/SIGINT; the exit status."""
    from mixture.sweep import set_worker_threads
    from state.logs import configure_logging
    from worker.__main__ import _configured_keys

    parser = argparse.ArgumentParser(prog="python -m worker.pool", description=__doc__)
    parser.add_argument(
        "--redis-url", default=os.environ.get("REDIS_URL"), help="Redis URL (default: $REDIS_URL)"
    )
    parser.add_argument("--name", default=None, help="member name (default <host>:<pid>:<random>)")
    parser.add_argument("--tick", type=float, default=0.5, help="seconds between share checks")
    parser.add_argument(
        "--roster-ttl", type=float, default=5.0, help="seconds a silent member still counts"
    )
    parser.add_argument(
        "--threads", type=int, default=None, help="threads of the model core for batch EM fits"
    )
    args = parser.parse_args(argv)
    configure_logging(
        os.environ.get("MIXROUTE_LOG_LEVEL", "INFO"),
        os.environ.get("MIXROUTE_LOG_FORMAT", "json").strip().lower(),
        secrets=_configured_keys(),
    )
    if not args.redis_url:
        parser.error("no Redis: set REDIS_URL or pass --redis-url")
    if args.threads is not None:
        set_worker_threads(max(1, args.threads))
    use_cluster_client(
        os.environ.get("MIXROUTE_REDIS_CLUSTER", "").strip().lower() in ("1", "true", "yes", "on")
    )
    try:
        requirement = requirement_from_environment(os.environ)
    except ValueError as exc:
        parser.error(str(exc))
    require_replicas(requirement.replicas, requirement.timeout_seconds)
    member = PoolMember(
        args.redis_url, name=args.name, tick_seconds=args.tick, roster_ttl_seconds=args.roster_ttl
    )

    def on_signal(signum: int, frame: FrameType | None) -> None:
        member._stop.set()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    member.run()
    return 0


def spawn_members(
    redis_url: str, processes: int, *, threads: int | None = None, extra_args: list[str] = ()
) -> list[Any]:
    """Start ``processes`` member processes (``python -m worker.pool``); their Popen objects."""
    import subprocess

    env = {**os.environ, "REDIS_URL": redis_url}
    command = [sys.executable, "-m", "worker.pool", *extra_args]
    if threads is not None:
        command += ["--threads", str(threads)]
    return [subprocess.Popen(command, env=env) for _ in range(processes)]


def supervise(
    redis_url: str, processes: int, done: threading.Event, *, threads: int | None = None
) -> int:
    """Run ``processes`` members until ``done``; a member that dies is started again.

    At ``done`` every member gets SIGTERM (its learners checkpoint and release) and is waited
    for. Returns 0.
    """
    children = spawn_members(redis_url, processes, threads=threads)
    try:
        while not done.wait(1.0):
            for i, child in enumerate(children):
                if child.poll() is not None:
                    log.warning(
                        "pool member pid %d ended (%s); starting another",
                        child.pid,
                        child.returncode,
                    )
                    children[i] = spawn_members(redis_url, 1, threads=threads)[0]
    finally:
        for child in children:
            if child.poll() is None:
                child.send_signal(signal.SIGTERM)
        deadline = time.monotonic() + 60
        for child in children:
            try:
                child.wait(max(0.1, deadline - time.monotonic()))
            except Exception:
                child.kill()
                child.wait()
    return 0


if __name__ == "__main__":
    sys.exit(main())
