"""Queueing documents on a model's stream, with backpressure, and reading the stream's counts.

* **Enqueue** is one Lua call per chunk of documents. It refuses a deleted model (no
  ``config``), counts the documents that are new (a client id seen within the idempotency
  window is not queued again), refuses the whole chunk when the unlearned backlog would pass
  ``options.stream_max_length`` (:class:`StreamFullError`: nothing is written), then for each
  new document: if ``id:<client id>`` does not exist, ``XADD`` (no MAXLEN: nothing is trimmed
  here, ever) and ``SET id:<client id> <stream id> PX <ttl>`` (inside the one script, so it is
  SET NX's effect), and counts it in ``entries_added``. The id key holds the entry's stream
  id, so a correction that names a queued document by its client id finds its text
  (:meth:`DocumentQueue.texts_of`: GET, then XRANGE of that one id). Keys written before this
  hold ``"1"``: their documents are not found by id (the caller then asks for the text).
* **Labelled entries** (corrections, examples, withdrawals; ``state.stream``) are queued by
  :meth:`DocumentQueue.enqueue_labelled`, one Lua call: the same model check and backlog cap,
  XADD, ``entries_added``. They set no id key: a correction is idempotent per target in the
  model itself (the same target and group twice is a no-op), and its target is the id of the
  document it labels, not an id of its own.
* **Backlog** = entries added - ``entries_read``. Entries added is Redis 7's
  ``XINFO STREAM`` ``entries-added``, or, on Redis 6.2 which has no such field, our own
  ``entries_added`` counter. ``entries_read`` is the number of entries at or below the
  watermark that the state's line has passed (learned, skipped, dead-lettered or lost); each
  checkpoint copies it from the state's metadata into ``state_meta``. A state that does not
  count it yet falls back to the stream's length, an upper bound of the backlog since
  trimming never passes the watermark.
"""

from __future__ import annotations

import math
import os
import time
from collections.abc import Sequence
from typing import Any, NoReturn

import redis

from mixture.errors import InputError
from state.errors import ModelNotFoundError, ReplicasUnconfirmedError, StreamFullError
from state.handle import ModelHandle, loads_or_none
from state.records import EnqueueResult, dumps
from state.replicas import confirm_replicas, replica_requirement
from state.stream import LABELLED_QUEUE_LUA, ZERO_ID, parse_stream_id

MAX_CLIENT_ID_LENGTH = 256
ENQUEUE_CHUNK = 10_000  # documents per Lua call: bounds how long one call holds Redis

# Entries added to KEYS[1] (docs): XINFO STREAM's entries-added (Redis 7), else the counter
# KEYS[2].
_ENTRIES_ADDED_LUA = """
local function entries_added(docs, counter)
  local info = redis.pcall('XINFO', 'STREAM', docs)
  if type(info) == 'table' and info['err'] == nil then
    for i = 1, #info, 2 do
      if info[i] == 'entries-added' then
        return tonumber(info[i + 1])
      end
    end
  end
  return tonumber(redis.call('GET', counter) or '0')
end
"""

# KEYS: docs, config, state_meta, entries_added, then one per document: its id key (docs
# again when the id was generated). ARGV: id ttl ms, cap ("" = none), received, documents
# beyond this chunk still to come (reserved against the cap), then per document: client id,
# text, metadata, "1" = check the id. Returns the new stream ids (false for a repeated id).
_ENQUEUE_LUA = (
    _ENTRIES_ADDED_LUA
    + """
if redis.call('EXISTS', KEYS[2]) == 0 then
  return redis.error_reply('NOMODEL the model does not exist')
end
local n = (#ARGV - 4) / 4
local fresh = tonumber(ARGV[4])
for i = 1, n do
  if ARGV[4 + 4 * i] ~= '1' or redis.call('EXISTS', KEYS[4 + i]) == 0 then
    fresh = fresh + 1
  end
end
if ARGV[2] ~= '' and fresh > 0 then
  local backlog
  local meta = redis.call('GET', KEYS[3])
  if meta == false then
    backlog = entries_added(KEYS[1], KEYS[4])
  else
    local ok, d = pcall(cjson.decode, meta)
    if ok and type(d) == 'table' and type(d['entries_read']) == 'number' then
      backlog = entries_added(KEYS[1], KEYS[4]) - d['entries_read']
    else
      backlog = redis.call('XLEN', KEYS[1])
    end
  end
  if backlog + fresh > tonumber(ARGV[2]) then
    return redis.error_reply('STREAMFULL ' .. backlog)
  end
end
local out = {}
local added = 0
for i = 1, n do
  local a = 4 * i
  local checked = ARGV[a + 4] == '1'
  if checked and redis.call('EXISTS', KEYS[4 + i]) == 1 then
    out[i] = false
  else
    local sid = redis.call('XADD', KEYS[1], '*', 'id', ARGV[a + 1], 'text', ARGV[a + 2],
                           'metadata', ARGV[a + 3], 'received', ARGV[3])
    if checked then
      -- the stream id, so that the text can be found by the client id (texts_of)
      redis.call('SET', KEYS[4 + i], sid, 'PX', ARGV[1])
    end
    out[i] = sid
    added = added + 1
  end
end
if added > 0 then
  redis.call('INCRBY', KEYS[4], added)
end
return out
"""
)

# KEYS: docs, config, state_meta, entries_added, labelled_queue. ARGV: cap ("" = none), then
# per entry: the number of its fields and the fields (name, value, ...). Returns the new
# stream ids.
_ENQUEUE_LABELLED_LUA = (
    _ENTRIES_ADDED_LUA
    + LABELLED_QUEUE_LUA
    + """
if redis.call('EXISTS', KEYS[2]) == 0 then
  return redis.error_reply('NOMODEL the model does not exist')
end
local entries = {}
local i = 2
while i <= #ARGV do
  local n = tonumber(ARGV[i])
  entries[#entries + 1] = {i + 1, i + n}
  i = i + n + 1
end
if ARGV[1] ~= '' then
  local backlog
  local meta = redis.call('GET', KEYS[3])
  local ok, d = false, nil
  if meta ~= false then ok, d = pcall(cjson.decode, meta) end
  if meta == false then
    backlog = entries_added(KEYS[1], KEYS[4])
  elseif ok and type(d) == 'table' and type(d['entries_read']) == 'number' then
    backlog = entries_added(KEYS[1], KEYS[4]) - d['entries_read']
  else
    backlog = redis.call('XLEN', KEYS[1])
  end
  if backlog + #entries > tonumber(ARGV[1]) then
    return redis.error_reply('STREAMFULL ' .. backlog)
  end
end
local out = {}
for j, span in ipairs(entries) do
  out[j] = redis.call('XADD', KEYS[1], '*', unpack(ARGV, span[1], span[2]))
  note_labelled(KEYS[5], KEYS[1], out[j])
end
if #entries > 0 then
  redis.call('INCRBY', KEYS[4], #entries)
end
return out
"""
)

# KEYS: docs, entries_added. Returns {entries added, last stream id or false}, read at once.
_COUNTS_LUA = (
    _ENTRIES_ADDED_LUA
    + """
local last = redis.call('XREVRANGE', KEYS[1], '+', '-', 'COUNT', 1)
local last_id = false
if #last > 0 then
  last_id = last[1][1]
end
return {entries_added(KEYS[1], KEYS[2]), last_id}
"""
)


class DocumentQueue:
    """The model's document stream as the service sees it: enqueue, counts, dead letters."""

    def __init__(self, handle: ModelHandle) -> None:
        self.handle = handle
        self._enqueue = handle.redis.register_script(_ENQUEUE_LUA)
        self._counts = handle.redis.register_script(_COUNTS_LUA)
        self._enqueue_labelled = handle.redis.register_script(_ENQUEUE_LABELLED_LUA)

    def enqueue(
        self,
        texts: Sequence[str],
        *,
        ids: Sequence[str | None] | None = None,
        metadata: Sequence[dict[str, Any] | None] | None = None,
        received: float | None = None,
    ) -> EnqueueResult:
        """Append documents to the stream; a client id already seen is not added again.

        Parameters
        ----------
        texts : sequence of str
            The documents.
        ids : sequence of (str or None), optional
            Client ids, idempotent within ``options.id_ttl_seconds``; None generates one.
        metadata : sequence of (dict or None), optional
            JSON-able objects stored with each document.
        received : float, optional
            Unix time to record (default: now).

        Raises
        ------
        InputError
            When an argument is malformed; nothing is written then.
        StreamFullError
            When the unlearned backlog would pass ``options.stream_max_length``; nothing is
            written (a batch above :data:`ENQUEUE_CHUNK` documents is checked as a whole in
            its first chunk).
        ModelNotFoundError
            When the model was deleted.
        ReplicasUnconfirmedError
            When replicas are required (:mod:`state.replicas`) and did not confirm the
            documents in time: they are on the primary, and a repeat with the same client
            ids does not queue them twice.
        """
        encoded = _encode(texts, ids, metadata)
        handle = self.handle
        keys, options = handle.keys, handle.options
        now = repr(time.time() if received is None else float(received))
        ttl_ms = str(int(options.id_ttl_seconds * 1000))
        cap = "" if options.stream_max_length is None else str(options.stream_max_length)
        stream_ids: list[str | None] = []
        chunk_ends: list[str] = []  # the last new entry of each chunk (for the replicas)
        for start in range(0, len(encoded), ENQUEUE_CHUNK):
            chunk = encoded[start : start + ENQUEUE_CHUNK]
            later = len(encoded) - start - len(chunk) if start == 0 else 0
            id_keys = [keys.client_id(c) if given else keys.docs for c, _, _, given in chunk]
            args: list[str | bytes] = [ttl_ms, cap if start == 0 else "", now, str(later)]
            for client_id, text, meta_json, given in chunk:
                args += [client_id, text, meta_json, "1" if given else "0"]
            try:
                reply = self._enqueue(
                    keys=[keys.docs, keys.config, keys.state_meta, keys.entries_added, *id_keys],
                    args=args,
                )
            except redis.ResponseError as exc:
                self._raise_refusal(exc, len(encoded))
            stream_ids += [None if r is None else r.decode() for r in reply]
            last_new = next((r for r in reversed(reply) if r is not None), None)
            if last_new is not None:
                chunk_ends.append(last_new.decode())
        if replica_requirement().active:
            self._confirm(encoded, chunk_ends)
        return EnqueueResult(stream_ids, sum(1 for r in stream_ids if r is None))

    def enqueue_labelled(self, entries: Sequence[Sequence[str | bytes]]) -> list[str]:
        """Append labelled entries (corrections, examples, withdrawals) in one Lua call.

        Parameters
        ----------
        entries : sequence of field lists
            Each entry's fields as ``state.stream.correction_fields`` or ``withdraw_fields``
            give them.

        Returns
        -------
        list of str
            The new stream id of each entry, in order.

        Raises
        ------
        StreamFullError
            When the unlearned backlog would pass ``options.stream_max_length`` (nothing is
            written: an operator's corrections wait for the worker like every input).
        ModelNotFoundError
            When the model was deleted.
        """
        if not entries:
            return []
        options = self.handle.options
        cap = "" if options.stream_max_length is None else str(options.stream_max_length)
        args: list[str | bytes] = [cap]
        for fields in entries:
            if len(fields) % 2:
                raise InputError(f"entry fields {list(fields)[:4]!r} are not name/value pairs")
            args += [str(len(fields)), *fields]
        keys = self.handle.keys
        try:
            reply = self._enqueue_labelled(
                keys=[
                    keys.docs,
                    keys.config,
                    keys.state_meta,
                    keys.entries_added,
                    keys.labelled_queue,
                ],
                args=args,
            )
        except redis.ResponseError as exc:
            self._raise_refusal(exc, len(entries))
        stream_ids = [r.decode() for r in reply]
        if stream_ids and replica_requirement().active:
            # acknowledged corrections are as durable as acknowledged documents
            confirm_replicas(
                self.handle.redis,
                keys.replica_fence,
                keys.docs,
                "stream",
                [stream_ids[-1]],
                what=f"{len(entries)} labelled entries for model {self.handle.model!r}",
                retry_hint="retry: a repeated correction is learned once (same id, same group)",
            )
        return stream_ids

    def labelled_queued(self) -> int:
        """Labelled entries (corrections, examples, withdrawals) after the watermark: queued
        and not learned yet (two cheap reads of ``labelled_queue``, no scan of the stream)."""
        keys = self.handle.keys
        watermark = self.handle.redis.get(keys.watermark)
        ms, seq = parse_stream_id(watermark.decode() if watermark else ZERO_ID)
        pipe = self.handle.redis.pipeline(transaction=True)
        pipe.zcount(keys.labelled_queue, f"({ms}", "+inf")
        pipe.zrangebyscore(keys.labelled_queue, ms, ms)
        later, same_ms = pipe.execute()
        return int(later) + sum(1 for sid in same_ms if parse_stream_id(sid)[1] > seq)

    def stream_ids_of(self, client_ids: Sequence[str]) -> list[str | None]:
        """The stream id of the document queued under each client id (None when not known:
        never queued, its idempotency window passed, or queued before ids kept stream ids)."""
        if not client_ids:
            return []
        keys = self.handle.keys
        raw = self.handle.redis.mget([keys.client_id(c) for c in client_ids])
        out: list[str | None] = []
        for value in raw:
            text = value.decode() if value else ""
            out.append(text if "-" in text else None)
        return out

    def texts_of(self, client_ids: Sequence[str]) -> list[tuple[str | None, str | None]]:
        """(stream id, text) of the document queued under each client id; (None, None) when
        its id key is gone or holds no stream id, (stream id, None) when the entry itself was
        trimmed from the stream (retention)."""
        stream_ids = self.stream_ids_of(client_ids)
        wanted = [s for s in stream_ids if s is not None]
        if not wanted:
            return [(None, None)] * len(client_ids)
        pipe = self.handle.redis.pipeline(transaction=False)
        for sid in wanted:
            pipe.xrange(self.handle.keys.docs, min=sid, max=sid, count=1)
        found: dict[str, str | None] = {}
        for sid, rows in zip(wanted, pipe.execute(), strict=True):
            text: str | None = None
            if rows:
                raw = rows[0][1].get(b"text")
                if raw is not None and b"kind" not in rows[0][1]:
                    text = raw.decode("utf-8", errors="replace")
            found[sid] = text
        return [(None, None) if s is None else (s, found.get(s)) for s in stream_ids]

    def _confirm(self, encoded: list[tuple[str, str, bytes, bool]], chunk_ends: list[str]) -> None:
        """Wait for the replicas: the last new entry of every chunk, or (all repeats) the
        last client id's key, must be on the slot's primary and confirmed."""
        keys = self.handle.keys
        what = f"{len(encoded)} documents for model {self.handle.model!r}"
        if chunk_ends:
            confirm_replicas(
                self.handle.redis, keys.replica_fence, keys.docs, "stream", chunk_ends, what=what
            )
            return
        given = [client_id for client_id, _, _, was_given in encoded if was_given]
        if given:  # every document was a repeat: its first enqueue must be on the replicas
            confirm_replicas(
                self.handle.redis,
                keys.replica_fence,
                keys.client_id(given[-1]),
                "exists",
                what=what,
            )

    def _raise_refusal(self, exc: redis.ResponseError, n: int) -> NoReturn:
        text = str(exc)
        model = self.handle.model
        if "NOMODEL" in text:
            raise ModelNotFoundError(f"model {model!r} does not exist") from exc
        if text.startswith("NOREPLICAS"):  # the primary's min-replicas-to-write refused it
            raise ReplicasUnconfirmedError(
                f"model {model!r}: the primary refused the documents: {text}; nothing was "
                "queued, retry after 1 s",
                retry_after_seconds=1,
            ) from exc
        if "STREAMFULL" in text:
            backlog = text.rsplit(" ", 1)[-1]
            cap = self.handle.options.stream_max_length
            # the counted backlog shrinks only when a checkpoint moves entries_read
            retry = max(1, math.ceil(self.handle.options.checkpoint_seconds))
            raise StreamFullError(
                f"model {model!r} has {backlog} documents waiting to be learned and queueing "
                f"{n} more would pass its cap of {cap} (stream_max_length); nothing was "
                f"queued, retry after {retry} s",
                retry_after_seconds=retry,
            ) from exc
        raise exc

    def counts(self) -> tuple[int, str]:
        """Entries ever added to the stream and its last id, read atomically."""
        keys = self.handle.keys
        added, last = self._counts(keys=[keys.docs, keys.entries_added])
        return int(added), last.decode() if last else ZERO_ID

    def entries_added(self) -> int:
        """Entries ever added to the stream (Redis 7's entries-added, else our counter)."""
        return self.counts()[0]

    def stream_info(self) -> dict[str, Any]:
        """Length, first and last ids, entries added and read, the backlog (``lag``), watermark.

        ``pending`` repeats ``lag`` for readers of the consumer-group era (delivered-but-not-
        checkpointed no longer exists: reads are from the watermark). ``entries_read`` and
        ``lag`` are None while the state does not count entries read.
        """
        keys = self.handle.keys
        pipe = self.handle.redis.pipeline(transaction=True)
        pipe.xlen(keys.docs)
        pipe.xrange(keys.docs, count=1)
        pipe.xrevrange(keys.docs, count=1)
        pipe.get(keys.watermark)
        pipe.get(keys.state_meta)
        length, first, last, watermark, raw_meta = pipe.execute()
        added = self.entries_added()
        meta = loads_or_none(raw_meta)
        entries_read: int | None = 0 if meta is None else meta.get("entries_read")
        lag = None if entries_read is None else max(added - int(entries_read), 0)
        return {
            "length": int(length),
            "first_id": first[0][0].decode() if first else None,
            "last_id": last[0][0].decode() if last else None,
            "entries_added": added,
            "entries_read": entries_read,
            "lag": lag,
            "pending": lag if lag is not None else int(length),
            "watermark": watermark.decode() if watermark else ZERO_ID,
        }

    def first_stream_id(self) -> str | None:
        """Id of the oldest stream entry (None when the stream is empty)."""
        first = self.handle.redis.xrange(self.handle.keys.docs, count=1)
        return first[0][0].decode() if first else None

    def last_stream_id(self) -> str:
        """Id of the newest stream entry ("0-0" when empty)."""
        last = self.handle.redis.xrevrange(self.handle.keys.docs, count=1)
        return last[0][0].decode() if last else ZERO_ID

    def dead_letters(self, count: int = 100) -> list[dict[str, Any]]:
        """The newest dead letters, oldest first: id, source_id, reason, fields."""
        entries = self.handle.redis.xrevrange(self.handle.keys.dead_letters, count=count)
        return [
            {
                "id": entry_id.decode(),
                "source_id": fields.get(b"source_id", b"").decode(),
                "reason": fields.get(b"reason", b"").decode(),
                "fields": loads_or_none(fields.get(b"fields", b"{}")),
            }
            for entry_id, fields in reversed(entries)
        ]


def _encode(
    texts: Sequence[str],
    ids: Sequence[str | None] | None,
    metadata: Sequence[dict[str, Any] | None] | None,
) -> list[tuple[str, str, bytes, bool]]:
    """Check the arguments and give (client id, text, metadata JSON, id given) per document."""
    if isinstance(texts, str):
        raise InputError("texts must be a sequence of strings, not one string")
    n = len(texts)
    if ids is not None and len(ids) != n:
        raise InputError(f"ids has {len(ids)} entries for {n} texts")
    if metadata is not None and len(metadata) != n:
        raise InputError(f"metadata has {len(metadata)} entries for {n} texts")
    encoded: list[tuple[str, str, bytes, bool]] = []
    for i, text in enumerate(texts):
        if not isinstance(text, str):
            raise InputError(f"texts[{i}] is {type(text).__name__}, expected str")
        client_id = None if ids is None else ids[i]
        given = client_id is not None
        if given:
            if not isinstance(client_id, str) or not client_id:
                raise InputError(f"ids[{i}] must be a non-empty string")
            if len(client_id) > MAX_CLIENT_ID_LENGTH:
                raise InputError(f"ids[{i}] is longer than {MAX_CLIENT_ID_LENGTH} characters")
        else:
            client_id = os.urandom(12).hex()
        meta = {} if metadata is None or metadata[i] is None else metadata[i]
        if not isinstance(meta, dict):
            raise InputError(f"metadata[{i}] must be an object")
        try:
            meta_json = dumps(meta)
        except (TypeError, ValueError) as exc:
            raise InputError(f"metadata[{i}] is not JSON-able: {exc}") from exc
        encoded.append((client_id, text, meta_json, given))
    return encoded
