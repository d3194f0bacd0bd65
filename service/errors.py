"""Errors raised by the service layer itself (the app maps each to its HTTP status), and the
bound on how much of a request an error answer may repeat."""

from __future__ import annotations

import re

from fastapi import HTTPException

# An error answer repeats at most this many characters of any one piece of the request (a
# name, a key, a value), so a 10,000-character path or field is not sent back whole.
# Common practice, no source: long enough to recognise what was sent.
ECHO_LIMIT = 200


class PayloadTooLargeError(Exception):
    """A request over one of the size limits (answered with 413)."""

    def __init__(self, detail: str, field: str | None = None) -> None:
        super().__init__(detail)
        self.field = field


class InvalidFieldError(ValueError):
    """A request field with a value the service refuses (answered with 422 naming it)."""

    def __init__(self, detail: str, field: str) -> None:
        super().__init__(detail)
        self.field = field


class DuplicateKeyError(HTTPException):
    """A JSON object in the request body names the same key twice (answered with 422).

    A subclass of FastAPI's HTTPException so that FastAPI's body reader passes it on as it
    is, rather than turning it into a generic 400.
    """

    def __init__(self, key: str) -> None:
        self.field = clip(key, 60)
        super().__init__(
            status_code=422,
            detail=f'duplicate key "{self.field}" in a JSON object of the request body: '
            "send each key once",
        )


def clip(text: str, limit: int = ECHO_LIMIT) -> str:
    """``text`` cut to ``limit`` characters, saying how long it was when cut."""
    if len(text) <= limit:
        return text
    return f"{text[:limit]}... ({len(text)} characters)"


# a quoted piece (as repr() writes strings) or a run without white space, over the limit
_OVER = ECHO_LIMIT + 1
_LONG_PIECE = re.compile(rf"'[^']{{{_OVER},}}'|\"[^\"]{{{_OVER},}}\"|\S{{{_OVER},}}")
# an error message of ours is far shorter; past this it can only be repeating input
DETAIL_LIMIT = 2 * ECHO_LIMIT


def clip_echoes(detail: str) -> str:
    """An error message with every long piece of echoed input cut to :data:`ECHO_LIMIT`.

    Our messages quote what they repeat (``got 'x'``, ``no model named 'x'``) or repeat a
    single token (a path, a name); either kind of piece over the limit is cut, and a message
    still longer than :data:`DETAIL_LIMIT` is cut at that length.
    """
    if len(detail) <= ECHO_LIMIT:
        return detail
    clipped = _LONG_PIECE.sub(lambda m: clip(m.group(0)), detail)
    return clip(clipped, DETAIL_LIMIT)
