"""The IMAP intake's watermark: per mailbox folder, its UIDVALIDITY and the last UID filed.

It lives with the model (``mixroute:{<model>}:intake:<source>``, see :mod:`state.keys`), so it
goes when the model is deleted, and one Lua call moves it: forward only, and never into a
deleted model. A UID is "filed" when its message was queued for learning and moved, marked or
left in place as the filing setting says; a restart resumes after it (RFC 3501 section 2.3.1.1:
UIDs grow strictly within one UIDVALIDITY, so "greater than the mark" is exactly "not yet
handled").
"""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass

import redis

from state.errors import ModelNotFoundError
from state.keys import ModelKeys

# KEYS: mark, config. ARGV: uidvalidity, uid, source label, now, reset ("1": a new UIDVALIDITY
# replaces the old one). Returns 1 moved, 0 not forward, -1 other UIDVALIDITY, -2 no model.
_ADVANCE_LUA = """
if redis.call('EXISTS', KEYS[2]) == 0 then return -2 end
local validity = redis.call('HGET', KEYS[1], 'uidvalidity')
if validity and validity ~= ARGV[1] and ARGV[5] ~= '1' then return -1 end
if validity == ARGV[1] then
  local last = tonumber(redis.call('HGET', KEYS[1], 'last_uid') or '0')
  if tonumber(ARGV[2]) <= last and ARGV[5] ~= '1' then return 0 end
end
redis.call('HSET', KEYS[1], 'uidvalidity', ARGV[1], 'last_uid', ARGV[2], 'source', ARGV[3],
  'updated', ARGV[4])
return 1
"""


class MarkConflictError(RuntimeError):
    """The stored mark belongs to another UIDVALIDITY (the folder was renumbered)."""


@dataclass(frozen=True)
class IntakeMark:
    """Where the intake of one folder stands."""

    uidvalidity: int
    last_uid: int
    source: str
    updated: float


def source_id(label: str) -> str:
    """A short key-safe digest of a source label such as ``user@host:993/INBOX``."""
    return hashlib.sha256(label.encode("utf-8")).hexdigest()[:16]


class IntakeMarks:
    """Read and move the watermark of one mailbox folder for one model.

    Parameters
    ----------
    client : redis.Redis
    model : str
        The model the intake routes with (the mark is one of its keys).
    label : str
        Names the mailbox folder (user, host, port, folder); stored beside the mark so an
        operator can tell marks apart. Never holds a credential.
    """

    def __init__(self, client: redis.Redis, model: str, label: str) -> None:
        self.redis = client
        self.keys = ModelKeys(model)
        self.label = label
        self.key = self.keys.intake_mark(source_id(label))
        self._advance = client.register_script(_ADVANCE_LUA)

    def get(self) -> IntakeMark | None:
        """The stored mark, or None before the first message of this folder was filed."""
        raw = self.redis.hgetall(self.key)
        if not raw:
            return None
        values = {k.decode(): v.decode() for k, v in raw.items()}
        return IntakeMark(
            int(values.get("uidvalidity", 0)),
            int(values.get("last_uid", 0)),
            values.get("source", ""),
            float(values.get("updated", 0.0)),
        )

    def advance(self, uidvalidity: int, uid: int) -> bool:
        """Record ``uid`` as filed; False when the mark is already at or past it.

        Raises
        ------
        MarkConflictError
            When the stored mark has another UIDVALIDITY (call :meth:`reset` first).
        ModelNotFoundError
            When the model was deleted (nothing is written).
        """
        return self._call(uidvalidity, uid, reset=False)

    def reset(self, uidvalidity: int) -> None:
        """Start over for a (new) UIDVALIDITY: nothing of it filed yet."""
        self._call(uidvalidity, 0, reset=True)

    def _call(self, uidvalidity: int, uid: int, *, reset: bool) -> bool:
        reply = int(
            self._advance(
                keys=[self.key, self.keys.config],
                args=[
                    str(int(uidvalidity)),
                    str(int(uid)),
                    self.label,
                    repr(time.time()),
                    "1" if reset else "0",
                ],
            )
        )
        if reply == -2:
            raise ModelNotFoundError(f"model {self.keys.model!r} was deleted")
        if reply == -1:
            raise MarkConflictError(
                f"intake mark of {self.label} belongs to another UIDVALIDITY than {uidvalidity}"
            )
        return reply == 1
