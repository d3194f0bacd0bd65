"""Waiting for replicas: the durability setting of a replicated Redis (a Redis Cluster, or a
primary with replicas).

Redis replicates asynchronously: the primary answers a write before any replica has it, so
when the primary dies and a replica that had not received the write is promoted, the write is
gone although it was acknowledged. ``WAIT numreplicas timeout`` blocks the calling connection
until that many replicas have acknowledged every write the connection made before it.

With a requirement of N replicas (the settings ``MIXROUTE_REDIS_WAIT_REPLICAS`` and
``MIXROUTE_REDIS_WAIT_TIMEOUT``, given to this process by :func:`require_replicas`), the
enqueue, the checkpoint, the model creation, the snapshot (:mod:`state.snapshots`) and the
rollback (:mod:`state.rollback`) end with :func:`confirm_replicas`. It sends, on
ONE connection to the primary that owns the write's slot (in a cluster: redis-py's
``get_node_from_key`` and that node's own client, since a cluster client's WAIT would go to
every primary on other connections and confirm nothing), two commands in one round trip:

1. a script that checks that the write is on this node (a stream entry, a key, a value) and,
   only then, sets the model's ``replica_fence`` key (a propagated write of this connection);
2. ``WAIT N timeout``.

A replica's data is always a prefix of its primary's history (one ordered replication stream),
so when the write is on the node and N replicas have acknowledged the fence written after it,
the write is on N replicas. The check matters when the slot map changed between the write and
the wait: a node promoted without the write does not set the fence, and an old primary that
was demoted answers MOVED or READONLY; both are "not confirmed". When fewer than N replicas
confirm, :class:`ReplicasUnconfirmedError` is raised (the API answers 503 with Retry-After):
the write stays on the primary, which may still replicate it, so a client repeats the request
with the same client ids and the enqueue script's id check keeps the document from being
queued twice. A snapshot or a rollback is not repeatable that way (a repeat writes again), so
its 503 carries no Retry-After and its message says what to check.

Redis Cluster promotes the replica with the largest replication offset, so with one replica
per primary (or N = all of them) the promoted replica holds every confirmed write. WAIT does
not make Redis strongly consistent (a partitioned primary can still accept writes for up to
the node timeout; ``min-replicas-to-write`` bounds that, see deploy/README.md).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import redis

from state.connection import is_cluster
from state.errors import ReplicasUnconfirmedError

log = logging.getLogger(__name__)

FENCE_TTL_MS = 60_000  # the fence key is only ever written to be replicated: let it expire

ProbeKind = Literal["stream", "exists", "equals", "member"]

# What an operator checks when a write that is not simply repeated (a snapshot, a rollback) is
# not confirmed. Short, and without quotes: the API clips long or quoted pieces of a message
CHECK_REPLICAS = "check INFO replication on the primary and MIXROUTE_REDIS_WAIT_REPLICAS"


@dataclass(frozen=True)
class ReplicaRequirement:
    """How many replicas must confirm a write, and how long to wait for them.

    Attributes
    ----------
    replicas : int
        0: no waiting (a single server, or asynchronous replication accepted).
    timeout_seconds : float
        Longest wait for the replicas per write.
    """

    replicas: int = 0
    timeout_seconds: float = 0.5

    def __post_init__(self) -> None:
        if self.replicas < 0:
            raise ValueError(f"replicas must be >= 0; got {self.replicas}")
        if not self.timeout_seconds > 0:
            raise ValueError(f"timeout_seconds must be > 0; got {self.timeout_seconds}")

    @property
    def active(self) -> bool:
        """True when writes wait for replicas."""
        return self.replicas > 0

    @property
    def timeout_ms(self) -> int:
        """WAIT's timeout in milliseconds (at least 1: WAIT with 0 blocks forever)."""
        return max(1, math.ceil(self.timeout_seconds * 1000))


# The process's requirement. The service sets it from its settings before serving; worker
# processes from the same environment variables (:func:`requirement_from_environment`).
_requirement = ReplicaRequirement()


def require_replicas(replicas: int, timeout_seconds: float = 0.5) -> None:
    """Make this process's enqueues, checkpoints, model creations, snapshots and rollbacks
    wait for ``replicas``.

    Parameters
    ----------
    replicas : int
        Replicas that must confirm each write (0: none).
    timeout_seconds : float
        Longest wait per write.
    """
    global _requirement
    _requirement = ReplicaRequirement(int(replicas), float(timeout_seconds))


def replica_requirement() -> ReplicaRequirement:
    """This process's requirement (see :func:`require_replicas`)."""
    return _requirement


def requirement_from_environment(environ: Mapping[str, str]) -> ReplicaRequirement:
    """The requirement of ``MIXROUTE_REDIS_WAIT_REPLICAS`` / ``MIXROUTE_REDIS_WAIT_TIMEOUT``.

    For worker processes, which sit below the service layer and read the service's variables
    themselves (the service validates them through its settings).

    Raises
    ------
    ValueError
        When a variable is not a number or is out of range (the message names it).
    """
    values: list[float] = []
    for name, default in (
        ("MIXROUTE_REDIS_WAIT_REPLICAS", "0"),
        ("MIXROUTE_REDIS_WAIT_TIMEOUT", "0.5"),
    ):
        raw = (environ.get(name) or default).strip()
        try:
            values.append(float(raw))
        except ValueError:
            raise ValueError(f"{name} must be a number; got {raw!r}") from None
    replicas, timeout = values
    if replicas != int(replicas) or replicas < 0:
        raise ValueError(
            f"MIXROUTE_REDIS_WAIT_REPLICAS must be a whole number >= 0; got {replicas}"
        )
    if not timeout > 0:
        raise ValueError(f"MIXROUTE_REDIS_WAIT_TIMEOUT must be > 0 seconds; got {timeout}")
    return ReplicaRequirement(int(replicas), timeout)


# KEYS[1]: the fence (a key of the write's slot), KEYS[2]: where the write is. ARGV[1]: kind,
# ARGV[2]: fence TTL ms, ARGV[3..]: stream ids that must all be in KEYS[2] ('stream'), the
# value KEYS[2] must hold ('equals'), a member of the set KEYS[2] ('member'); 'exists' takes
# none. Sets the fence and returns 1 only when the write is here.
_CONFIRM_LUA = """
local present = true
local kind = ARGV[1]
if kind == 'stream' then
  for i = 3, #ARGV do
    if #redis.call('XRANGE', KEYS[2], ARGV[i], ARGV[i]) == 0 then
      present = false
    end
  end
elseif kind == 'exists' then
  present = redis.call('EXISTS', KEYS[2]) == 1
elseif kind == 'equals' then
  present = redis.call('GET', KEYS[2]) == ARGV[3]
elseif kind == 'member' then
  present = redis.call('SISMEMBER', KEYS[2], ARGV[3]) == 1
else
  return redis.error_reply('unknown probe kind ' .. kind)
end
if not present then
  return 0
end
redis.call('SET', KEYS[1], '1', 'PX', ARGV[2])
return 1
"""


def _node_client(client: Any, key: str) -> Any:
    """The client of the primary that owns ``key`` (the client itself outside a cluster)."""
    if is_cluster(client):
        return client.get_redis_connection(client.get_node_from_key(key))
    return client


def confirm_replicas(
    client: Any,
    fence_key: str,
    probe_key: str,
    kind: ProbeKind,
    values: Sequence[str] = (),
    *,
    what: str,
    retry_hint: str = "retry with the same client ids (a document already queued is not "
    "queued twice)",
    repeatable: bool = True,
    requirement: ReplicaRequirement | None = None,
) -> int:
    """Wait until the requirement's replicas hold a write that the primary has acknowledged.

    Parameters
    ----------
    client : redis.Redis or redis.cluster.RedisCluster
        The client the write was made with.
    fence_key : str
        A key of the write's slot that this call may set (``ModelKeys.replica_fence``).
    probe_key, kind, values
        Where the write is: ``"stream"``: every id of ``values`` is an entry of the stream
        ``probe_key``; ``"exists"``: the key exists; ``"equals"``: it holds ``values[0]``;
        ``"member"``: the set holds ``values[0]``.
    what : str
        The write, for the error message ("3 documents of model 'inbox'").
    retry_hint : str
        What the caller should do, for the error message.
    repeatable : bool
        Whether repeating the request is safe (an enqueue with client ids, a create): the
        error then carries a retry delay (the API's Retry-After). False for a write whose
        repeat is a second write (a snapshot, a rollback): no delay, the hint says what to
        check instead.
    requirement : ReplicaRequirement, optional
        Default: this process's (:func:`replica_requirement`).

    Returns
    -------
    int
        Replicas that confirmed (0 when nothing is required).

    Raises
    ------
    ReplicasUnconfirmedError
        When fewer replicas confirmed within the timeout, the write is no longer on the node
        that owns its slot (a failover), or that node cannot be reached.
    """
    need = requirement or _requirement
    if not need.active:
        return 0
    node = _node_client(client, probe_key)
    pipe = node.pipeline(transaction=False)
    pipe.eval(_CONFIRM_LUA, 2, fence_key, probe_key, kind, str(FENCE_TTL_MS), *values)
    pipe.execute_command("WAIT", need.replicas, need.timeout_ms)
    try:
        present, acknowledged = pipe.execute(raise_on_error=False)
    except (redis.ConnectionError, redis.TimeoutError, OSError) as exc:
        raise _unconfirmed(
            what, retry_hint, repeatable, need, f"the primary could not be reached ({exc})"
        ) from exc
    if isinstance(present, Exception):
        # MOVED or READONLY: the node no longer owns the slot (a failover moved it)
        raise _unconfirmed(
            what, retry_hint, repeatable, need, f"the primary refused the check ({present})"
        )
    if int(present) != 1:
        raise _unconfirmed(
            what,
            retry_hint,
            repeatable,
            need,
            "the write is not on the slot's primary any more (a failover lost it)",
        )
    if isinstance(acknowledged, Exception):
        raise _unconfirmed(what, retry_hint, repeatable, need, f"WAIT failed ({acknowledged})")
    if int(acknowledged) < need.replicas:
        raise _unconfirmed(
            what,
            retry_hint,
            repeatable,
            need,
            f"{int(acknowledged)} of {need.replicas} replicas confirmed",
            int(acknowledged),
        )
    return int(acknowledged)


def _unconfirmed(
    what: str,
    hint: str,
    repeatable: bool,
    need: ReplicaRequirement,
    why: str,
    acknowledged: int = 0,
) -> ReplicasUnconfirmedError:
    return ReplicasUnconfirmedError(
        f"{what}: not confirmed by {need.replicas} replica(s) within {need.timeout_seconds:g} s "
        f"({why}), so a failover could lose it: {hint}",
        retry_after_seconds=1 if repeatable else None,
        acknowledged=acknowledged,
    )
