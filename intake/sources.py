"""Documents from files and folders: JSON lines, mbox, Maildir, a folder of .eml files, CSV.

:func:`read_documents` is the one door the command line uses. The format is told from the
content (:func:`detect_format`), or forced. The whole source is read before anything is done
with it, so a caller that refuses a source with problems (``--strict``) has queued nothing.
"""

from __future__ import annotations

import csv
import io
import mailbox
import os
import re
import sys
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from intake.jsonl import iter_lines, parse_line
from intake.message import MAIL_HEADERS, MessageError, parse_message
from intake.records import Document, DocumentBatch, Problem

FORMATS = ("jsonl", "mbox", "maildir", "eml", "csv")
# CSV columns tried for the text, the id and the time, in order (case-insensitive).
CSV_TEXT_COLUMNS = ("text", "body", "message", "content")
CSV_ID_COLUMNS = ("id", "message_id", "message-id")
CSV_SUBJECT_COLUMNS = ("subject", "title")
_SNIFF_BYTES = 64 * 1024


class SourceError(ValueError):
    """A source that cannot be read at all (unknown format, missing, empty folder)."""


def detect_format(path: str | Path) -> str:
    """Tell a source's format from its content.

    A folder with ``cur`` and ``new`` inside is a Maildir, any other folder a folder of .eml
    files. A file starting with an mbox ``From `` line is an mbox; one starting with mail
    header lines (``Subject:``, ``Message-ID:``, ...) is one message; one whose first lines
    hold a JSON object is JSON lines; one whose header row names a text column is CSV.

    Raises
    ------
    SourceError
        When none of these fits (pass the format explicitly then).
    """
    path = Path(path)
    if path.is_dir():
        return "maildir" if (path / "cur").is_dir() and (path / "new").is_dir() else "eml"
    with open(path, "rb") as handle:
        head = handle.read(_SNIFF_BYTES)
    return detect_bytes(head, name=str(path))


def detect_bytes(head: bytes, name: str = "input") -> str:
    """:func:`detect_format` for the first bytes of a file (or of standard input)."""
    stripped = head.lstrip(b"\xef\xbb\xbf")
    if stripped.startswith(b"From "):
        return "mbox"
    lines = [line.strip() for line in stripped.splitlines()[:40]]
    first = next((line for line in lines if line), b"")
    if _looks_like_header(first):
        return "eml"
    non_blank = [line for line in lines if line][:20]
    if any(line.startswith(b"{") for line in non_blank):
        return "jsonl"
    if first and _csv_columns(stripped) is not None:
        return "csv"
    raise SourceError(
        f"{name}: cannot tell the format from the content; pass --format ({', '.join(FORMATS)})"
    )


def _looks_like_header(line: bytes) -> bool:
    name, sep, _ = line.partition(b":")
    return bool(sep) and name.decode("ascii", "replace").strip().lower() in MAIL_HEADERS


def _csv_columns(data: bytes) -> dict[str, int] | None:
    text = data.decode("utf-8", errors="replace")
    try:
        header = next(csv.reader(io.StringIO(text)))
    except (StopIteration, csv.Error):
        return None
    columns = {name.strip().lower(): i for i, name in enumerate(header)}
    if not any(name in columns for name in CSV_TEXT_COLUMNS):
        return None
    return columns


def read_documents(
    path: str | Path,
    format: str | None = None,
    *,
    strip_quotes: bool = True,
    max_text_bytes: int | None = None,
) -> DocumentBatch:
    """Read every document of a file, folder or standard input (``-``).

    Parameters
    ----------
    path : str or Path
        The source; ``-`` reads standard input (JSON lines, CSV, one message or an mbox).
    format : str, optional
        One of :data:`FORMATS`; None tells it from the content (:func:`detect_format`).
    strip_quotes : bool
        Cut quoted replies and signatures from mail bodies (not from JSON lines or CSV).
    max_text_bytes : int, optional
        A longer text (UTF-8 bytes) is a problem, not a document.

    Returns
    -------
    DocumentBatch
        Documents in source order, each unreadable record as a :class:`Problem` with its
        position (nothing is half-read: a record is a document or a problem).

    Raises
    ------
    SourceError
        Unknown or undetectable format, or a folder with nothing to read.
    OSError
        When the source cannot be opened.
    """
    if format is not None and format not in FORMATS:
        raise SourceError(f"unknown format {format!r}; use one of {', '.join(FORMATS)}")
    if str(path) == "-":
        return _read_stdin(format, strip_quotes, max_text_bytes)
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError(2, "No such file or directory", str(path))
    fmt = format or detect_format(path)
    if fmt == "jsonl":
        with open(path, "rb") as handle:
            return _read_jsonl(handle, max_text_bytes)
    if fmt == "csv":
        with open(path, "rb") as handle:
            return _read_csv(handle.read(), max_text_bytes)
    return _read_mail(fmt, _mail_items(fmt, path), strip_quotes, max_text_bytes)


def _read_stdin(
    format: str | None, strip_quotes: bool, max_text_bytes: int | None
) -> DocumentBatch:
    data = sys.stdin.buffer.read()
    fmt = format or detect_bytes(data[:_SNIFF_BYTES], name="standard input")
    if fmt == "jsonl":
        return _read_jsonl(io.BytesIO(data), max_text_bytes)
    if fmt == "csv":
        return _read_csv(data, max_text_bytes)
    if fmt == "eml":
        return _read_mail(fmt, iter([("message 1", data)]), strip_quotes, max_text_bytes)
    if fmt == "mbox":  # mailbox wants a file: spool standard input into a temporary one
        with tempfile.TemporaryDirectory() as folder:
            spool = Path(folder) / "stdin.mbox"
            spool.write_bytes(data)
            return _read_mail(fmt, _mail_items(fmt, spool), strip_quotes, max_text_bytes)
    raise SourceError(f"standard input cannot be read as {fmt}: give a folder path instead")


def _read_jsonl(handle: Any, max_text_bytes: int | None) -> DocumentBatch:
    documents: list[Document] = []
    problems: list[Problem] = []
    for number, line in iter_lines(handle):
        try:
            documents.append(parse_line(line, number, max_text_bytes))
        except ValueError as exc:
            problems.append(Problem(f"line {number}", str(exc)))
    return DocumentBatch(documents, problems, "jsonl")


def _read_csv(data: bytes, max_text_bytes: int | None) -> DocumentBatch:
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise SourceError(f"CSV is not valid UTF-8 (byte {exc.start})") from None
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        header = next(reader)
    except StopIteration:
        return DocumentBatch([], [], "csv")
    columns = {name.strip().lower(): i for i, name in enumerate(header)}
    text_col = _first_column(columns, CSV_TEXT_COLUMNS)
    if text_col is None:
        raise SourceError(f"CSV has no text column (one of {', '.join(CSV_TEXT_COLUMNS)})")
    id_col = _first_column(columns, CSV_ID_COLUMNS)
    subject_col = _first_column(columns, CSV_SUBJECT_COLUMNS)
    known = {text_col, id_col, subject_col}
    documents: list[Document] = []
    problems: list[Problem] = []
    for row in reader:
        position = f"line {reader.line_num}"
        if not any(cell.strip() for cell in row):
            continue
        if len(row) != len(header):
            problems.append(Problem(position, f"{len(row)} fields, the header has {len(header)}"))
            continue
        body = row[text_col].strip()
        subject = row[subject_col].strip() if subject_col is not None else ""
        value = f"{subject}\n\n{body}" if subject and body else (subject or body)
        if not value:
            problems.append(Problem(position, "the text is empty"))
            continue
        if max_text_bytes is not None and len(value.encode("utf-8")) > max_text_bytes:
            problems.append(Problem(position, f"the text is longer than {max_text_bytes} bytes"))
            continue
        doc_id = row[id_col].strip() if id_col is not None else ""
        extra = {name: row[i] for name, i in columns.items() if i not in known}
        documents.append(
            Document(
                doc_id or f"row-{len(documents) + len(problems) + 1}", value, position, None, extra
            )
        )
    return DocumentBatch(documents, problems, "csv")


def _first_column(columns: dict[str, int], names: tuple[str, ...]) -> int | None:
    return next((columns[name] for name in names if name in columns), None)


def _mail_items(fmt: str, path: Path) -> Iterator[tuple[str, bytes]]:
    """(position, raw bytes) of every message of a mail source, in a stable order."""
    if fmt == "eml":
        if path.is_file():
            yield f"file {path.name}", path.read_bytes()
            return
        files = sorted(p for p in path.iterdir() if p.is_file() and p.suffix.lower() == ".eml")
        if not files:
            raise SourceError(f"{path}: no .eml files in this folder")
        for file in files:
            yield f"file {file.name}", file.read_bytes()
    elif fmt == "mbox":
        box = mailbox.mbox(path, create=False)
        try:
            for number, key in enumerate(box.iterkeys(), start=1):
                yield f"message {number}", box.get_bytes(key)
        finally:
            box.close()
    elif fmt == "maildir":
        if not (path / "cur").is_dir():
            raise SourceError(f"{path}: not a Maildir (no cur/new/tmp folders)")
        box = mailbox.Maildir(path, factory=None, create=False)
        # Maildir keys are "<seconds>.M<microseconds>P<pid>Q<count>.<host>" (or similar):
        # their numbers compared as numbers give the delivery order
        for key in sorted(box.iterkeys(), key=_natural_key):
            yield f"message {os.path.basename(key)}", box.get_bytes(key)
    else:  # pragma: no cover - callers check the format
        raise SourceError(f"not a mail format: {fmt}")


def _natural_key(text: str) -> list[tuple[int, int | str]]:
    return [(0, int(part)) if part.isdigit() else (1, part) for part in re.split(r"(\d+)", text)]


def _read_mail(
    fmt: str,
    items: Iterator[tuple[str, bytes]],
    strip_quotes: bool,
    max_text_bytes: int | None,
) -> DocumentBatch:
    documents: list[Document] = []
    problems: list[Problem] = []
    attachments = 0
    for position, raw in items:
        try:
            mail = parse_message(raw, strip_quotes=strip_quotes)
        except MessageError as exc:
            problems.append(Problem(position, str(exc)))
            continue
        if max_text_bytes is not None and len(mail.text.encode("utf-8")) > max_text_bytes:
            problems.append(Problem(position, f"the text is longer than {max_text_bytes} bytes"))
            continue
        attachments += mail.attachments_skipped
        documents.append(Document(mail.id, mail.text, position, mail.received, mail.metadata))
    return DocumentBatch(documents, problems, fmt, attachments)
