"""What the intake doors routed: one stream entry per message (no text) and a count per group
per UTC day, for ``mixroute export`` and the API's daily counts.

Retention: the stream is capped near :data:`ROUTED_KEEP` entries (XADD MAXLEN ~), the daily
counts expire :data:`DAY_TTL_SECONDS` after their day was last written. Both go with the model.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

import redis

from state.keys import ModelKeys

ROUTED_KEEP = 100_000
DAY_TTL_SECONDS = 400 * 86400


@dataclass(frozen=True)
class RoutedRecord:
    """One routed message as kept: where it went and how sure the model was."""

    id: str
    time: float
    group: int
    label: str | None
    posterior: float
    review: bool
    filed_to: str | None = None
    stream_id: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def day_of(moment: float) -> str:
    """The UTC day (``YYYY-MM-DD``) of a unix time."""
    return datetime.fromtimestamp(moment, tz=UTC).strftime("%Y-%m-%d")


class RoutedLog:
    """Record and read the routed messages of one model."""

    def __init__(self, client: redis.Redis, model: str) -> None:
        self.redis = client
        self.keys = ModelKeys(model)

    def record(self, record: RoutedRecord) -> None:
        """Append one record and count it for the UTC day it was routed (today; the record's
        ``time`` is the message's own); one round trip."""
        fields = {
            "id": record.id,
            "time": repr(float(record.time)),
            "group": str(int(record.group)),
            "label": record.label or "",
            "posterior": repr(float(record.posterior)),
            "review": "1" if record.review else "0",
            "filed_to": record.filed_to or "",
        }
        day_key = self.keys.routed_day(day_of(time.time()))
        with self.redis.pipeline(transaction=True) as pipe:
            pipe.xadd(self.keys.routed, fields, maxlen=ROUTED_KEEP, approximate=True)
            pipe.hincrby(day_key, str(int(record.group)), 1)
            pipe.expire(day_key, DAY_TTL_SECONDS)
            pipe.execute()

    def read(self, after: str = "-", count: int = 1000) -> list[RoutedRecord]:
        """Records after stream id ``after`` (exclusive; ``-`` from the start), oldest first."""
        start = "-" if after == "-" else f"({after}"
        out = []
        for stream_id, raw in self.redis.xrange(self.keys.routed, min=start, count=count):
            f = {k.decode(): v.decode() for k, v in raw.items()}
            out.append(
                RoutedRecord(
                    id=f["id"],
                    time=float(f["time"]),
                    group=int(f["group"]),
                    label=f.get("label") or None,
                    posterior=float(f["posterior"]),
                    review=f.get("review") == "1",
                    filed_to=f.get("filed_to") or None,
                    stream_id=stream_id.decode(),
                )
            )
        return out

    def daily(self, days: int = 30, now: float | None = None) -> dict[str, dict[int, int]]:
        """Messages routed per group on each of the last ``days`` UTC days (oldest first;
        days without any are present with an empty dict)."""
        today = datetime.fromtimestamp(time.time() if now is None else now, tz=UTC).date()
        names = [(today - timedelta(days=i)).isoformat() for i in range(days - 1, -1, -1)]
        with self.redis.pipeline(transaction=False) as pipe:
            for name in names:
                pipe.hgetall(self.keys.routed_day(name))
            replies = pipe.execute()
        return {
            name: {int(k): int(v) for k, v in sorted(reply.items(), key=lambda kv: int(kv[0]))}
            for name, reply in zip(names, replies, strict=True)
        }
