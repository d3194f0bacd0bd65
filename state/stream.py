"""The document stream: entry fields, stream-id arithmetic, decoding and skip ranges.

An entry of ``mixroute:{M}:docs`` has the fields

``id``
    the client's document id (or one we generated), unique within the idempotency window;
``text``
    UTF-8 text;
``metadata``
    a JSON object (``{}`` when none was given);
``received``
    unix time in seconds at which the service accepted it.

An entry that cannot be decoded (no ``text``, text not UTF-8, metadata not a JSON object,
received not a number) is not learned: the worker writes it to the dead-letter stream with the
reason, in the checkpoint that moves the watermark past it, and carries on.

Labelled entries (an operator's corrections and examples, and their withdrawals) carry a field
``kind`` first (an ordinary document has none):

``kind = "correction"``
    ``target`` (the document id being labelled, unique per labelled document), ``group`` (the
    stable group id, decimal), ``text`` (UTF-8), ``source`` (``"correction"`` or
    ``"example"``), ``received``;
``kind = "withdraw"``
    ``target`` (the labelled document id to remove), ``received``.

They are decoded by :func:`decode_entry` into :class:`Labelled` / :class:`Withdrawal`; one
whose fields are unusable is an :class:`Undecodable` like any other entry. Because ``kind`` is
the first field, such an entry never matches the worker's fast path for our plain layout
(``id, text, metadata, received``).
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from state.errors import OptionsError

ZERO_ID = "0-0"


# Records a labelled entry's stream id in KEYS[5] (labelled_queue) and drops the ids of
# entries trimmed from the stream (below its first entry's millisecond).
LABELLED_QUEUE_LUA = """
local function note_labelled(queue, docs, sid)
  redis.call('ZADD', queue, tonumber(string.match(sid, '^(%d+)')), sid)
  local first = redis.call('XRANGE', docs, '-', '+', 'COUNT', 1)
  if #first > 0 then
    redis.call('ZREMRANGEBYSCORE', queue, '-inf',
               '(' .. tonumber(string.match(first[1][1], '^(%d+)')))
  end
end
"""


def parse_stream_id(stream_id: str | bytes) -> tuple[int, int]:
    """Split a stream id ``"<ms>-<seq>"`` into integers (``"<ms>"`` means seq 0).

    Raises
    ------
    OptionsError
        When the text is not a stream id.
    """
    if isinstance(stream_id, bytes):
        stream_id = stream_id.decode()
    head, _, tail = stream_id.partition("-")
    try:
        ms = int(head)
        seq = int(tail) if tail else 0
    except ValueError:
        raise OptionsError(f"{stream_id!r} is not a stream id ('<ms>-<seq>')") from None
    if ms < 0 or seq < 0:
        raise OptionsError(f"{stream_id!r} is not a stream id ('<ms>-<seq>')")
    return ms, seq


def format_stream_id(parts: tuple[int, int]) -> str:
    """Inverse of :func:`parse_stream_id`."""
    return f"{parts[0]}-{parts[1]}"


def max_stream_id(a: str, b: str) -> str:
    """The later of two stream ids."""
    return a if parse_stream_id(a) >= parse_stream_id(b) else b


@dataclass(frozen=True)
class Document:
    """A decoded stream entry."""

    stream_id: str
    client_id: str
    text: str
    metadata: dict[str, Any]
    received: float


KIND_CORRECTION = "correction"
KIND_WITHDRAW = "withdraw"
LABELLED_SOURCES = ("correction", "example")


@dataclass(frozen=True)
class Labelled:
    """A decoded correction (or example) entry: learn ``text`` as a document of ``group``."""

    stream_id: str
    target: str
    group: int
    text: str
    source: str
    received: float

    def fields(self) -> dict[str, str]:
        """A printable copy of the entry (for a dead letter), the text cut to 512 characters."""
        return {
            "kind": KIND_CORRECTION,
            "target": self.target,
            "group": str(self.group),
            "source": self.source,
            "text": self.text[:512],
        }


@dataclass(frozen=True)
class Withdrawal:
    """A decoded withdraw entry: remove the labelled document ``target``."""

    stream_id: str
    target: str
    received: float

    def fields(self) -> dict[str, str]:
        """A printable copy of the entry (for a dead letter)."""
        return {"kind": KIND_WITHDRAW, "target": self.target}


def correction_fields(
    target: str, group: int, text: str, source: str, received: float
) -> list[str | bytes]:
    """The XADD field list of a correction entry (``kind`` first; see the module docstring)."""
    return [
        "kind",
        KIND_CORRECTION,
        "target",
        target,
        "group",
        str(int(group)),
        "source",
        source,
        "text",
        text,
        "received",
        repr(float(received)),
    ]


def example_id(group: int, text: str) -> str:
    """The labelled-document id of an example text of ``group``: the same example given twice
    is one labelled document (learning it again is a no-op)."""
    digest = hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]
    return f"example-{int(group)}-{digest}"


def withdraw_fields(target: str, received: float) -> list[str | bytes]:
    """The XADD field list of a withdraw entry."""
    return ["kind", KIND_WITHDRAW, "target", target, "received", repr(float(received))]


@dataclass(frozen=True)
class Undecodable:
    """A stream entry that cannot be learned, with the reason."""

    stream_id: str
    reason: str
    fields: dict[str, str]  # a printable, truncated copy of what was there

    def dead_letter_fields(self) -> dict[str, str]:
        """Fields of its dead-letter stream entry."""
        return {
            "source_id": self.stream_id,
            "reason": self.reason,
            "fields": json.dumps(self.fields),
        }


def decode_entry(
    stream_id: str, fields: Mapping[bytes, bytes]
) -> Document | Labelled | Withdrawal | Undecodable:
    """Decode one stream entry as read with ``decode_responses=False``."""
    try:
        if b"kind" in fields:
            return _decode_labelled(stream_id, fields)
        raw_text = fields.get(b"text")
        if raw_text is None:
            return _bad(stream_id, "no 'text' field", fields)
        try:
            text = raw_text.decode("utf-8")
        except UnicodeDecodeError as exc:
            return _bad(stream_id, f"text is not UTF-8 ({exc.reason} at byte {exc.start})", fields)
        raw_meta = fields.get(b"metadata")
        metadata: dict[str, Any] = {}
        if raw_meta and raw_meta != b"{}":  # the common case needs no parse
            try:
                metadata = json.loads(raw_meta)
            except (ValueError, UnicodeDecodeError) as exc:
                return _bad(stream_id, f"metadata is not JSON ({exc})", fields)
            if not isinstance(metadata, dict):
                return _bad(stream_id, "metadata is not a JSON object", fields)
        try:
            received = _received(fields)
        except ValueError as exc:
            return _bad(stream_id, str(exc), fields)
        raw_id = fields.get(b"id")
        client_id = raw_id.decode("utf-8", errors="replace") if raw_id else stream_id
        return Document(stream_id, client_id, text, metadata, received)
    except Exception as exc:  # never let one entry stop the loop
        return _bad(stream_id, f"cannot decode entry: {type(exc).__name__}: {exc}", fields)


def _decode_labelled(
    stream_id: str, fields: Mapping[bytes, bytes]
) -> Labelled | Withdrawal | Undecodable:
    """A correction or withdraw entry (``kind`` present), or why it cannot be used."""
    kind = fields[b"kind"]
    raw_target = fields.get(b"target")
    if not raw_target:
        return _bad(stream_id, f"{kind!r} entry has no 'target'", fields)
    try:
        target = raw_target.decode("utf-8")
    except UnicodeDecodeError:
        return _bad(stream_id, "target is not UTF-8", fields)
    try:
        received = _received(fields)
    except ValueError as exc:
        return _bad(stream_id, str(exc), fields)
    if kind == KIND_WITHDRAW.encode():
        return Withdrawal(stream_id, target, received)
    if kind != KIND_CORRECTION.encode():
        return _bad(stream_id, f"unknown entry kind {kind!r}", fields)
    try:
        group = int(fields.get(b"group", b""))
    except ValueError:
        return _bad(stream_id, "correction has no integer 'group'", fields)
    raw_text = fields.get(b"text")
    if raw_text is None:
        return _bad(stream_id, "correction has no 'text'", fields)
    try:
        text = raw_text.decode("utf-8")
    except UnicodeDecodeError as exc:
        return _bad(stream_id, f"text is not UTF-8 ({exc.reason} at byte {exc.start})", fields)
    source = fields.get(b"source", KIND_CORRECTION.encode()).decode("utf-8", errors="replace")
    if source not in LABELLED_SOURCES:
        return _bad(stream_id, f"unknown correction source {source!r}", fields)
    return Labelled(stream_id, target, group, text, source, received)


def _received(fields: Mapping[bytes, bytes]) -> float:
    """The entry's ``received`` unix seconds (0.0 when absent).

    Raises
    ------
    ValueError
        With the reason the entry is dead-lettered: not a number, or not finite.
    """
    raw_received = fields.get(b"received")
    if raw_received is None:
        return 0.0
    try:
        received = float(raw_received)
    except ValueError:
        raise ValueError("received is not a number") from None
    if not math.isfinite(received):
        raise ValueError("received is not finite")
    return received


def _bad(stream_id: str, reason: str, fields: Mapping[bytes, bytes]) -> Undecodable:
    shown: dict[str, str] = {}
    for key, value in list(fields.items())[:16]:
        k = key.decode("utf-8", errors="replace") if isinstance(key, bytes) else str(key)
        v = value.decode("utf-8", errors="replace") if isinstance(value, bytes) else str(value)
        shown[k[:64]] = v[:512]
    return Undecodable(stream_id, reason, shown)


@dataclass(frozen=True)
class SkipRule:
    """The ranges one rollback asked a replay to pass over.

    An entry is skipped when its stream id is at or below ``until`` and either its id lies in
    one of ``ids`` (inclusive) or its received time lies in one of ``received`` (inclusive).
    Bounding by ``until`` (the stream's last id when the rollback ran) keeps the ranges from
    ever cutting out traffic that arrived after that rollback.
    """

    ids: tuple[tuple[tuple[int, int], tuple[int, int]], ...] = ()
    received: tuple[tuple[float, float], ...] = ()
    until: tuple[int, int] = (0, 0)
    version: int = 0

    @property
    def raw_ids(self) -> tuple[tuple[str, str], ...]:
        """The id ranges as stream-id strings."""
        return tuple((format_stream_id(a), format_stream_id(b)) for a, b in self.ids)

    def __bool__(self) -> bool:
        return bool(self.ids or self.received)

    def skips(self, sid: tuple[int, int], received: float | None) -> bool:
        """True when the entry of parsed id ``sid`` falls in one of the ranges."""
        if sid > self.until:
            return False
        for first, last in self.ids:
            if first <= sid <= last:
                return True
        if received is not None:
            for start, end in self.received:
                if start <= received <= end:
                    return True
        return False

    def trimmed(self, first_entry: tuple[int, int]) -> SkipRule:
        """The rule without what lies wholly below the stream's first entry (already gone)."""
        if self.until < first_entry:
            return SkipRule(until=self.until, version=self.version)
        ids = tuple((a, b) for a, b in self.ids if b >= first_entry)
        return SkipRule(ids, self.received, self.until, self.version)

    def to_dict(self) -> dict[str, Any]:
        return {
            "ids": [list(pair) for pair in self.raw_ids],
            "received": [[a, b] for a, b in self.received],
            "until": format_stream_id(self.until),
            "version": self.version,
        }


@dataclass(frozen=True)
class SkipRanges:
    """Stream entries a replay must not learn: the rules of every rollback still in force.

    A rollback adds its own :class:`SkipRule`; earlier rules stay (an earlier rollback's skipped
    burst must not come back on a later replay) until the entries they cover are trimmed from
    the stream (:meth:`trimmed`). An entry is skipped when any rule skips it.
    """

    rules: tuple[SkipRule, ...] = ()

    @classmethod
    def build(
        cls,
        ids: Iterable[Sequence[str]] = (),
        received: Iterable[Sequence[float]] = (),
        until: str = ZERO_ID,
        version: int = 0,
    ) -> SkipRanges:
        """Validate and build one rule; :class:`OptionsError` names a bad range."""
        id_ranges = []
        for pair in ids:
            if len(pair) != 2:
                raise OptionsError(f"skip id range {pair!r} must be [first, last]")
            first, last = parse_stream_id(str(pair[0])), parse_stream_id(str(pair[1]))
            if first > last:
                raise OptionsError(f"skip id range {list(pair)!r}: first is after last")
            id_ranges.append((first, last))
        time_ranges = []
        for pair in received:
            if len(pair) != 2:
                raise OptionsError(f"skip received range {pair!r} must be [start, end]")
            start, end = float(pair[0]), float(pair[1])
            if not (math.isfinite(start) and math.isfinite(end)) or start > end:
                raise OptionsError(f"skip received range {list(pair)!r} is not a valid interval")
            time_ranges.append((start, end))
        rule = SkipRule(tuple(id_ranges), tuple(time_ranges), parse_stream_id(until), version)
        return cls((rule,) if rule else ())

    def __bool__(self) -> bool:
        return bool(self.rules)

    @property
    def newest(self) -> SkipRule:
        """The rule added last (an empty rule when there is none)."""
        return self.rules[-1] if self.rules else SkipRule()

    def skips(self, stream_id: str, received: float | None) -> bool:
        """True when the entry must not be learned."""
        if not self.rules:
            return False
        sid = parse_stream_id(stream_id)
        return any(rule.skips(sid, received) for rule in self.rules)

    def plus(self, other: SkipRanges) -> SkipRanges:
        """Both sets of rules, this one's first."""
        return SkipRanges(self.rules + other.rules)

    def trimmed(self, first_entry: str | None) -> SkipRanges:
        """Drop the ranges wholly below the stream's first entry (None: the stream is empty,
        so every range is gone)."""
        if first_entry is None:
            return SkipRanges()
        first = parse_stream_id(first_entry)
        return SkipRanges(tuple(r for r in (rule.trimmed(first) for rule in self.rules) if r))

    def to_dict(self) -> dict[str, Any]:
        return {"rules": [rule.to_dict() for rule in self.rules]}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SkipRanges:
        """Read :meth:`to_dict`'s form, or a single rule as stored before rules accumulated."""
        if "rules" not in d:
            d = {"rules": [d]} if d else {"rules": []}
        rules: tuple[SkipRule, ...] = ()
        for r in d["rules"]:
            built = cls.build(
                r.get("ids", ()),
                r.get("received", ()),
                r.get("until", ZERO_ID),
                int(r.get("version", 0)),
            )
            rules += built.rules
        return cls(rules)
