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
