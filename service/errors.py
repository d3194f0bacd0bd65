"""Errors raised by the service layer itself (the app maps each to its HTTP status)."""

from __future__ import annotations


class PayloadTooLargeError(Exception):
    """A request over one of the size limits (answered with 413)."""

    def __init__(self, detail: str, field: str | None = None) -> None:
        super().__init__(detail)
        self.field = field
