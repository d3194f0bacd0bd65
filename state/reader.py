"""Reading a model's stream after a cursor: pages by XREAD.

The learning worker is the only reader of a model's stream (the lease makes it so), and it
knows exactly where it is: its cursor, the last entry it has taken. So it reads with plain
``XREAD COUNT n BLOCK ms STREAMS docs <cursor>``; the next page starts after the last id of
the current one.

:class:`PageReader` keeps its own connection, made from the client pool's connection class
and arguments (``pool.connection_class(**pool.connection_kwargs)``): it needs no
``get_connection`` call, whose signature changed across redis-py 5.x, and its replies are
read as Redis sent them (``[[id, [field, value, ...]], ...]``): redis-py's conversion to a
dict per entry costs more than the read itself. With the cluster client the connection is made
the same way from the pool of the node that serves the stream's slot; after a failure (a node
down, a MOVED reply after a failover) the cluster client's slot map is refreshed and the next
read connects to whichever node serves the slot then.

A read sent ahead (:meth:`PageReader.send_ahead`): after a full page the worker sends the
next page's XREAD (after that page's last id, without BLOCK) before it learns the page, so
Redis builds and sends the reply while Python learns; :meth:`PageReader.read` takes that reply
only when it asks for the same cursor, and drops the connection (discarding the reply)
otherwise. An XREAD changes nothing in Redis, so a page read ahead and never used costs a
read and nothing else: what is learned and checkpointed is decided by the worker's cursor
alone, as before. (It measured no gain once, when learning cost far more than reading: see
bench/README.md for the figures since.) :meth:`PageReader.pump`, called between units, keeps
that reply coming in while Python learns; ``give_up`` bounds a blocking read by this process's
clock.

:func:`stream_counts` reads ``XINFO STREAM``'s counters (``entries-added`` and
``max-deleted-entry-id`` exist from Redis 7 on; None before), which tell whether entries
were removed after a position and how many entries the stream ever held.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import redis

from state.connection import is_cluster
from state.stream import ZERO_ID, parse_stream_id

RawEntry = tuple[bytes, list[bytes]]  # really [id, [field, value, ...]] as sent by Redis
# PageReader.pump reads at most this many pieces a call, so one call stays short.
_PUMP_PIECES = 16


@dataclass(frozen=True)
class StreamCounts:
    """A stream's counters at one moment (``XINFO STREAM``).

    Attributes
    ----------
    length : int
        Entries in the stream now.
    last_generated_id : str
        The newest id ever added ("0-0" for a stream never written).
    entries_added : int or None
        Entries ever added (Redis >= 7; None before).
    max_deleted_id : str or None
        The largest id ever removed by XDEL or a trim (Redis >= 7; None before).
    """

    length: int
    last_generated_id: str
    entries_added: int | None
    max_deleted_id: str | None


def _text(value: Any) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


def stream_counts(client: redis.Redis, key: str) -> StreamCounts:
    """``XINFO STREAM`` of ``key`` as :class:`StreamCounts` (zeros for a missing stream)."""
    try:
        raw = client.xinfo_stream(key)
    except redis.ResponseError as exc:
        if "no such key" in str(exc).lower():
            return StreamCounts(0, ZERO_ID, 0, ZERO_ID)
        raise
    info = {_text(k): v for k, v in raw.items()}
    added = info.get("entries-added")
    deleted = info.get("max-deleted-entry-id")
    return StreamCounts(
        length=int(info.get("length", 0)),
        last_generated_id=_text(info.get("last-generated-id", ZERO_ID)),
        entries_added=None if added is None else int(added),
        max_deleted_id=None if deleted is None else _text(deleted),
    )


def count_entries_after(
    client: redis.Redis, key: str, after: str, through: str = "+", page: int = 10_000
) -> int:
    """Entries with ids in ``(after, through]`` (XRANGE page by page; O(entries counted))."""
    total = 0
    start = f"({after}"
    while True:
        entries = client.xrange(key, min=start, max=through, count=page)
        total += len(entries)
        if len(entries) < page:
            return total
        start = f"({_text(entries[-1][0])}"


class PageReader:
    """XREAD pages after a cursor over a dedicated connection.

    Parameters
    ----------
    client : redis.Redis
        The client whose pool's connection class and arguments the reader copies.
    key : str
        The stream.
    count : int
        Entries per page (XREAD COUNT).

    Notes
    -----
    Any failure, and :meth:`drop`, disconnect the connection, so a half-read reply never
    reaches a later read (the next command reconnects).
    """

    def __init__(self, client: Any, key: str, count: int) -> None:
        self._client = client
        self._cluster = is_cluster(client)
        self._stale_map = False  # a cluster read failed: refresh the slot map first
        self.key = key
        self.count = int(count)
        self._connection: Any = None
        self._connection = self._connect()
        self._ahead: str | None = None  # the cursor of a read sent ahead, its reply unread
        self._pumping = True  # False once the parser refused pump's call (see pump)

    def _connect(self) -> Any:
        """A new connection to the server of the stream (for a cluster: of its slot now)."""
        client = self._client
        if self._cluster:
            if self._stale_map:
                client.nodes_manager.initialize()
                self._stale_map = False
            client = client.get_redis_connection(client.get_node_from_key(self.key))
        pool = client.connection_pool
        return pool.connection_class(**pool.connection_kwargs)

    def send_ahead(self, after: str) -> None:
        """Send the read of the page after ``after`` now, its reply read by :meth:`read`.

        Without BLOCK: when nothing follows ``after`` the reply is empty at once and
        :meth:`read` then reads (and waits) as usual. Nothing is sent while a read sent ahead
        is outstanding.
        """
        if self._ahead is not None:
            return
        if self._connection is None:
            self._connection = self._connect()
        try:
            self._connection.send_command("XREAD", "COUNT", self.count, "STREAMS", self.key, after)
        except BaseException:
            self._failed()
            raise
        self._ahead = after

    def pump(self) -> int:
        """Take what the server has sent so far of the read sent ahead, without waiting.

        The bytes go into the connection's reply parser, where :meth:`read` finds them; the
        reply is still taken (or discarded) as a whole by :meth:`read` and :meth:`drop`. Why:
        the server writes a reply of a few hundred kilobytes in pieces of 64 KiB and, over a
        unix socket, writes the next piece only once the client has read most of the last
        (the socket counts a small send buffer), so a reply read ahead but left unread stalls
        after its first piece while Python learns. Calling this between units keeps it
        flowing. A connection whose parser cannot read without waiting (not hiredis) is left
        alone; a failure drops the connection (the read sent ahead with it), so the next
        :meth:`read` starts afresh from its cursor.

        Returns
        -------
        int
            The pieces taken from the socket (0 when nothing was waiting).
        """
        if self._ahead is None or self._connection is None:
            return 0
        parser = getattr(self._connection, "_parser", None)
        read_some = getattr(parser, "read_from_socket", None)  # hiredis' parser only
        if not self._pumping or read_some is None or getattr(parser, "_sock", None) is None:
            return 0
        pieces = 0
        try:
            # at most a reply's worth of pieces (each up to the parser's read size)
            while pieces < _PUMP_PIECES and read_some(timeout=0, raise_on_timeout=False):
                pieces += 1
        except TypeError:  # a redis-py whose parser reads otherwise: no pumping, as before
            self._pumping = False
        except (redis.RedisError, OSError):  # a broken connection: read() reconnects
            self._failed()
        return pieces

    @property
    def ahead(self) -> bool:
        """True while a read sent ahead waits to be taken (or discarded)."""
        return self._ahead is not None

    def take_ahead(self, after: str) -> list[RawEntry]:
        """The page of the read sent ahead for ``after`` ([] when none was, or it found none).

        Never waits for new entries: that XREAD had no BLOCK, so Redis answered it at once (the
        wait is at most for the rest of its reply to arrive). A read sent ahead for another
        cursor is discarded with the connection.
        """
        if self._ahead is None:
            return []
        if self._ahead != after:
            self.drop()
            return []
        self._ahead = None
        return self._reply(self._response())

    def read(self, after: str, block: int, give_up: float | None = None) -> list[RawEntry]:
        """The next page after ``after`` (waiting up to ``block`` ms; [] when none came).

        A read sent ahead for the same cursor answers, if it found entries; one sent for
        another cursor is discarded with the connection.

        ``give_up`` (seconds, by this process's clock) bounds the wait more tightly: Redis
        ends a BLOCK that saw nothing only at its next timer tick (every 1000/hz ms, 100 ms
        at the default hz of 10), so a 50 ms BLOCK can last 150 ms. When the reply has not
        come by then, the connection is dropped with the read unanswered (an XREAD changes
        nothing, so nothing is lost: the next read asks again from its cursor) and [] is
        returned.
        """
        entries = self.take_ahead(after)
        if entries:
            return entries
        args: list[Any] = ["XREAD", "COUNT", self.count]
        if block > 0:
            args += ["BLOCK", block]
        args += ["STREAMS", self.key, after]
        if self._connection is None:
            self._connection = self._connect()
        try:
            self._connection.send_command(*args)
        except BaseException:
            self._failed()
            raise
        if give_up is None or block <= 0:
            return self._reply(self._response())
        connection = self._connection
        sock = connection._sock  # connected by send_command
        sock.settimeout(max(give_up, 0.001))
        try:
            reply = connection.read_response()
        except redis.TimeoutError:  # our own bound, not a failure of the server
            self.drop()
            return []
        except BaseException:
            self._failed()
            raise
        sock.settimeout(connection.socket_timeout)
        return self._reply(reply)

    def _response(self) -> Any:
        """The reply of the command sent last (a failure drops the connection)."""
        try:
            return self._connection.read_response()
        except BaseException:
            self._failed()
            raise

    def _failed(self) -> None:
        self.drop()
        if self._cluster:  # the slot may have moved (failover): re-learn the map
            self._stale_map = True
            self._connection = None

    @staticmethod
    def _reply(reply: Any) -> list[RawEntry]:
        if not reply:
            return []
        # RESP3: {stream: entries}; RESP2: [[stream, entries]]
        return next(iter(reply.values())) if isinstance(reply, dict) else reply[0][1]

    def close(self) -> None:
        """Disconnect (the next read reconnects); a read sent ahead is discarded with it."""
        self._ahead = None
        if self._connection is not None:
            self._connection.disconnect()

    drop = close


def last_id_of(entries: list[RawEntry]) -> str:
    """The id of a page's last entry, as text."""
    return _text(entries[-1][0])


def count_through(entries: list[RawEntry], through: str) -> int:
    """How many of a page's entries (sorted by id) have ids at or below ``through``."""
    limit = parse_stream_id(through)
    low, high = 0, len(entries)
    while low < high:
        middle = (low + high) // 2
        if parse_stream_id(entries[middle][0]) <= limit:
            low = middle + 1
        else:
            high = middle
    return low


__all__ = [
    "PageReader",
    "StreamCounts",
    "count_entries_after",
    "count_through",
    "last_id_of",
    "stream_counts",
]
