"""The model's lease: one learner at a time holds the ``heartbeat`` key (its name, with a TTL).

Other workers wait on standby and take over when the TTL runs out. Renewal is a
compare-and-expire script, so a worker never extends a lease someone else took.
"""

from __future__ import annotations

import json
import os
import socket

from state.handle import ModelHandle
from state.records import WorkerStatus, dumps

# KEYS: heartbeat, worker_status. ARGV: worker, ttl ms, status JSON. 1 = holds the lease.
_LEASE_LUA = """
local holder = redis.call('GET', KEYS[1])
if holder == false then
  redis.call('SET', KEYS[1], ARGV[1], 'PX', ARGV[2])
elseif holder ~= ARGV[1] then
  return 0
else
  redis.call('PEXPIRE', KEYS[1], ARGV[2])
end
redis.call('SET', KEYS[2], ARGV[3], 'PX', ARGV[2])
return 1
"""

_RELEASE_LUA = """
if redis.call('GET', KEYS[1]) == ARGV[1] then
  redis.call('DEL', KEYS[1], KEYS[2])
  return 1
end
return 0
"""


class Lease:
    """Take, renew, release and read the lease of one model."""

    def __init__(self, handle: ModelHandle) -> None:
        self.handle = handle
        self._hold = handle.redis.register_script(_LEASE_LUA)
        self._release = handle.redis.register_script(_RELEASE_LUA)

    def hold(self, status: WorkerStatus) -> bool:
        """Take or renew the lease for ``status.worker``; False if another holds it."""
        keys = self.handle.keys
        ttl_ms = str(int(self.handle.options.lease_seconds * 1000))
        held = self._hold(
            keys=[keys.heartbeat, keys.worker_status],
            args=[status.worker, ttl_ms, dumps(status.to_dict())],
        )
        return bool(held)

    def release(self, worker: str) -> bool:
        """Give the lease up if ``worker`` holds it."""
        keys = self.handle.keys
        return bool(self._release(keys=[keys.heartbeat, keys.worker_status], args=[worker]))

    def holder(self) -> str | None:
        """Name of the worker holding the model, or None."""
        raw = self.handle.redis.get(self.handle.keys.heartbeat)
        return raw.decode() if raw else None

    def worker_status(self) -> WorkerStatus | None:
        """What the worker holding the model last reported, or None when none holds it."""
        raw = self.handle.redis.get(self.handle.keys.worker_status)
        return None if raw is None else WorkerStatus.from_dict(json.loads(raw))


def default_worker_name() -> str:
    """``<host>:<pid>``, unique enough among live workers."""
    return f"{socket.gethostname()}:{os.getpid()}"


# KEYS: roster. ARGV: member, ttl ms. Drops expired members, renews this one; the live names.
# The clock is the server's (TIME), so members on machines with skewed clocks agree.
_ROSTER_BEAT_LUA = """
local t = redis.call('TIME')
local now = tonumber(t[1]) * 1000 + math.floor(tonumber(t[2]) / 1000)
redis.call('ZREMRANGEBYSCORE', KEYS[1], '-inf', now)
redis.call('ZADD', KEYS[1], now + tonumber(ARGV[2]), ARGV[1])
return redis.call('ZRANGEBYSCORE', KEYS[1], now, '+inf')
"""


class PoolRoster:
    """Membership of the worker pool: each live member renews its entry before it expires.

    One sorted set (:data:`state.keys.POOL_MEMBERS_KEY`), member name scored by its expiry in
    the server's milliseconds; a member that stops renewing (killed, cut off) drops out after
    ``ttl_seconds`` and its share is divided among the others.

    Parameters
    ----------
    redis : redis.Redis
        Client (a cluster client works: the roster is one key).
    ttl_seconds : float
        How long an entry lives without renewal.
    """

    def __init__(self, redis: object, ttl_seconds: float) -> None:
        from state.keys import POOL_MEMBERS_KEY

        self.redis = redis
        self.key = POOL_MEMBERS_KEY
        self.ttl_ms = max(1, int(ttl_seconds * 1000))
        self._beat = redis.register_script(_ROSTER_BEAT_LUA)  # type: ignore[attr-defined]

    def beat(self, member: str) -> list[str]:
        """Renew ``member``'s entry; the names of every live member (itself included), sorted."""
        live = self._beat(keys=[self.key], args=[member, str(self.ttl_ms)])
        return sorted(name.decode() if isinstance(name, bytes) else str(name) for name in live)

    def leave(self, member: str) -> None:
        """Remove ``member`` at once (a clean stop), so the others need not wait for its TTL."""
        self.redis.zrem(self.key, member)  # type: ignore[attr-defined]


def lease_holders(redis: object, models: list[str]) -> dict[str, str | None]:
    """The lease holder of each model (None when free), in one pipelined round trip.

    Parameters
    ----------
    redis : redis.Redis
        Client (on a cluster the pipeline is split by slot by redis-py).
    models : list of str
        Model names.

    Returns
    -------
    dict
        Model name to the holder's name, or None.
    """
    from state.keys import ModelKeys

    if not models:
        return {}
    pipe = redis.pipeline(transaction=False)  # type: ignore[attr-defined]
    for model in models:
        pipe.get(ModelKeys(model).heartbeat)
    raw = pipe.execute()
    return {m: (r.decode() if r else None) for m, r in zip(models, raw, strict=True)}
