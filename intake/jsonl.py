"""Reading documents from JSON-lines files: one object ``{"id": ..., "text": ...}`` a line.

Bad lines never crash the command line: each is reported with its line number and a reason,
then skipped (default) or, with ``--strict``, the whole file is rejected before anything is
written or queued. Whole files are read by :func:`intake.sources.read_documents`.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import BinaryIO

from intake.records import Document


def parse_line(raw: bytes, line_number: int, max_text_bytes: int | None = None) -> Document:
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
    Document
        Positioned ``line N``; the object's other fields are its metadata.

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
    return Document(doc_id, text, f"line {line_number}", None, extra)


def iter_lines(stream: BinaryIO) -> Iterator[tuple[int, bytes]]:
    """Non-blank lines of a binary stream with their 1-based numbers."""
    for number, raw in enumerate(stream, start=1):
        line = raw.rstrip(b"\r\n")
        if line.strip():
            yield number, line


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
