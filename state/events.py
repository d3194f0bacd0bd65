"""Group events: the record of each birth, merge and retirement, in a capped per-model list.

A checkpoint that carries events (``Checkpoint.events``) writes their records in the same
MULTI as the version they belong to (:meth:`state.versions.Versions.commit`), so an event is
recorded exactly once: a crash before the MULTI leaves neither the version nor the record, and
the worker's replay from the unchanged watermark makes the same change again. The records are
read newest first; each names the version that made the change, and whether that version is
still on the current line of versions (a rollback past it undid the change).
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field, replace
from typing import Any

import redis

from state.handle import ModelHandle
from state.records import dumps


@dataclass(frozen=True)
class EventRecord:
    """One change of a model's groups, as stored.

    Attributes
    ----------
    kind : str
        "birth", "merge" or "retire".
    groups : list of int
        Group ids: [new] for a birth, [survivor, absorbed] for a merge, [retired].
    reason : str
        Why, with the decisive numbers (the model core's words).
    documents : list of int
        Stream positions (documents learned) of a birth's founding documents.
    position : int
        Documents learned when the change happened.
    time : float
        Unix time of the checkpoint that wrote it.
    version : int
        The version that holds the change.
    snapshot_id : str or None
        The automatic snapshot of the state just before the change (the pre-change snapshot).
    evidence : dict
        The numbers the decision used.
    """

    kind: str
    groups: list[int]
    reason: str
    documents: list[int]
    position: int
    time: float
    version: int
    snapshot_id: str | None = None
    evidence: dict[str, float] = field(default_factory=dict)
    undone: bool = False  # computed on read: a rollback left this version's line

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> EventRecord:
        return cls(
            kind=str(d["kind"]),
            groups=[int(g) for g in d.get("groups", [])],
            reason=str(d.get("reason", "")),
            documents=[int(p) for p in d.get("documents", [])],
            position=int(d.get("position", 0)),
            time=float(d.get("time", 0.0)),
            version=int(d["version"]),
            snapshot_id=d.get("snapshot_id"),
            evidence={str(k): float(v) for k, v in dict(d.get("evidence", {})).items()},
        )


def event_record(event: Any, *, version: int, time: float, snapshot_id: str | None) -> EventRecord:
    """The stored record of a :class:`mixture.lifecycle.GroupEvent` written in ``version``."""
    return EventRecord(
        kind=str(event.kind),
        groups=[int(g) for g in event.groups],
        reason=str(event.reason),
        documents=[int(p) for p in event.documents],
        position=int(event.position),
        time=time,
        version=version,
        snapshot_id=snapshot_id,
        evidence={str(k): float(v) for k, v in dict(event.evidence).items()},
    )


def event_alert(record: EventRecord) -> dict[str, Any]:
    """The alert a group event raises (kinds ``group-birth``, ``group-merge``,
    ``group-retire``), so that a change of the groups shows beside the drift alerts."""
    return {
        "time": record.time,
        "kind": f"group-{record.kind}",
        "reason": f"groups {record.groups}: {record.reason}",
        "value": float(len(record.groups)),
        "threshold": 0,
        "version": record.version,
    }


class GroupEvents:
    """Write (inside a checkpoint's MULTI) and read the group events of one model."""

    def __init__(self, handle: ModelHandle) -> None:
        self.handle = handle

    def write(self, pipe: redis.client.Pipeline, records: list[EventRecord]) -> None:
        """Queue the records on ``pipe`` (the caller's MULTI) and cap the list."""
        keys = self.handle.keys
        for record in records:
            pipe.rpush(keys.events, dumps(record.to_dict()))
            pipe.hincrby(keys.event_counts, record.kind, 1)
        if records:
            pipe.ltrim(keys.events, -self.handle.options.event_limit, -1)

    def list(self, limit: int = 100, line: set[int] | None = None) -> list[EventRecord]:
        """The newest ``limit`` records, newest first; with ``line`` (the versions of the
        current line), a record whose version is not on it is marked ``undone``."""
        rows = self.handle.redis.lrange(self.handle.keys.events, -limit, -1)
        out = []
        for raw in reversed(rows):
            record = EventRecord.from_dict(json.loads(raw))
            if line is not None and record.version not in line:
                record = replace(record, undone=True)
            out.append(record)
        return out

    def counts(self) -> dict[str, int]:
        """Events ever written, by kind (a counter: neither the list's cap nor a rollback
        lowers it)."""
        raw = self.handle.redis.hgetall(self.handle.keys.event_counts)
        return {k.decode(): int(v) for k, v in raw.items()}
