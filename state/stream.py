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
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from state.errors import OptionsError

ZERO_ID = "0-0"


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


def decode_entry(stream_id: str, fields: Mapping[bytes, bytes]) -> Document | Undecodable:
    """Decode one stream entry as read with ``decode_responses=False``."""
    try:
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
        raw_received = fields.get(b"received")
        received = 0.0
        if raw_received is not None:
            try:
                received = float(raw_received)
            except ValueError:
                return _bad(stream_id, "received is not a number", fields)
            if not math.isfinite(received):
                return _bad(stream_id, "received is not finite", fields)
        raw_id = fields.get(b"id")
        client_id = raw_id.decode("utf-8", errors="replace") if raw_id else stream_id
        return Document(stream_id, client_id, text, metadata, received)
    except Exception as exc:  # never let one entry stop the loop
        return _bad(stream_id, f"cannot decode entry: {type(exc).__name__}: {exc}", fields)


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
