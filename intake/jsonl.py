"""Reading documents from JSON-lines files: one object ``{"id": ..., "text": ...}`` a line.

Bad lines never crash the command line: each is reported with its line number and a reason,
then skipped (default) or, with ``--strict``, the whole file is rejected before anything is
written or queued.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO


@dataclass(frozen=True)
class JsonlDocument:
    """One valid line: its id (the given one, or ``line-N``), text and line number."""

    id: str
    text: str
    line: int
    extra: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class JsonlProblem:
    """One invalid line and why it was refused."""

    line: int
    reason: str

    def __str__(self) -> str:
        return f"line {self.line}: {self.reason}"


@dataclass
class JsonlBatch:
    """All valid documents of a file plus the problems found."""

    documents: list[JsonlDocument]
    problems: list[JsonlProblem]

    @property
    def texts(self) -> list[str]:
        return [doc.text for doc in self.documents]

    @property
    def ids(self) -> list[str]:
        return [doc.id for doc in self.documents]


def parse_line(raw: bytes, line_number: int, max_text_bytes: int | None = None) -> JsonlDocument:
    """Parse one line of a JSON-lines file.

    Parameters
    ----------
    raw
        The line's bytes, without its newline.
    line_number
        1-based line number, used for the default id and in error messages.
    max_text_bytes
        Largest accepted text, in UTF-8 bytes (None: no limit).

    Returns
    -------
    JsonlDocument

    Raises
    ------
    ValueError
        With a message saying what is wrong with the line.
    """
    try:
        decoded = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ValueError(f"not valid UTF-8 (byte {exc.start})") from None
    try:
        record = json.loads(decoded)
    except json.JSONDecodeError as exc:
        raise ValueError(f"not valid JSON ({exc.msg} at column {exc.colno})") from None
    if not isinstance(record, dict):
        raise ValueError(f'expected a JSON object {{"id": ..., "text": ...}}, got {_kind(record)}')
    if "text" not in record:
        raise ValueError('missing field "text"')
    text = record["text"]
    if not isinstance(text, str):
        raise ValueError(f'field "text" must be a string, got {_kind(text)}')
    if not text.strip():
        raise ValueError('field "text" is empty')
    if max_text_bytes is not None and len(text.encode("utf-8")) > max_text_bytes:
        raise ValueError(f'field "text" is longer than {max_text_bytes} bytes')
    raw_id = record.get("id", f"line-{line_number}")
    if isinstance(raw_id, bool) or not isinstance(raw_id, str | int):
        raise ValueError(f'field "id" must be a string or an integer, got {_kind(raw_id)}')
    doc_id = str(raw_id)
    if not doc_id:
        raise ValueError('field "id" is empty')
    extra = {key: value for key, value in record.items() if key not in ("id", "text")}
    return JsonlDocument(id=doc_id, text=text, line=line_number, extra=extra)


def iter_lines(stream: BinaryIO) -> Iterator[tuple[int, bytes]]:
    """Non-blank lines of a binary stream with their 1-based numbers."""
    for number, raw in enumerate(stream, start=1):
        line = raw.rstrip(b"\r\n")
        if line.strip():
            yield number, line


def read_jsonl(path: str | Path, max_text_bytes: int | None = None) -> JsonlBatch:
    """Read a whole JSON-lines file (``-`` reads standard input).

    Blank lines are ignored; every other invalid line becomes a :class:`JsonlProblem`.

    Raises
    ------
    OSError
        When the file cannot be opened.
    """
    documents: list[JsonlDocument] = []
    problems: list[JsonlProblem] = []
    if str(path) == "-":
        import sys

        handle: BinaryIO = sys.stdin.buffer
        close = False
    else:
        handle = open(path, "rb")  # noqa: SIM115 - closed below
        close = True
    try:
        for number, line in iter_lines(handle):
            try:
                documents.append(parse_line(line, number, max_text_bytes))
            except ValueError as exc:
                problems.append(JsonlProblem(number, str(exc)))
    finally:
        if close:
            handle.close()
    return JsonlBatch(documents, problems)


def _kind(value: object) -> str:
    return {
        dict: "an object",
        list: "an array",
        str: "a string",
        int: "a number",
        float: "a number",
        bool: "a boolean",
        type(None): "null",
    }.get(type(value), type(value).__name__)
