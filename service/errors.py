"""Errors raised by the service layer itself (the app maps each to its HTTP status)."""

from __future__ import annotations


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
