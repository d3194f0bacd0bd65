"""What a source read gives: its documents, the records it could not read, and both together.

One record class for every format (JSON lines, CSV, mail): :mod:`intake.jsonl` and
:mod:`intake.sources` both build :class:`Document`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any


@dataclass(frozen=True)
class Document:
    """One document read from a source.

    ``position`` says where it came from (``line 12``, ``message 3``, ``file a.eml``);
    ``received`` is unix seconds when the source says (a message's Date), else None.
    """

    id: str
    text: str
    position: str
    received: float | None = None
    metadata: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Problem:
    """One record or message that was not read, where it is and why."""

    position: str
    reason: str

    def __str__(self) -> str:
        return f"{self.position}: {self.reason}"


@dataclass
class DocumentBatch:
    """Every readable document of a source and every problem, in source order."""

    documents: list[Document]
    problems: list[Problem]
    format: str
    attachments_skipped: int = 0

    @property
    def texts(self) -> list[str]:
        return [doc.text for doc in self.documents]

    @property
    def ids(self) -> list[str]:
        return [doc.id for doc in self.documents]

    @property
    def unit(self) -> str:
        """What one record of this format is called in messages (``line``, ``message``)."""
        return {"jsonl": "line", "csv": "row"}.get(self.format, "message")
