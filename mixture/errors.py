"""Exceptions raised by the model package.

Every error raised on purpose by ``mixture`` derives from :class:`MixrouteError`, so callers
(the worker, the HTTP layer) can catch one type. The concrete classes also derive from
``ValueError`` because each one describes a bad value handed in from outside.
"""

from __future__ import annotations

__all__ = ["ConfigError", "InputError", "MixrouteError", "StateFormatError"]


class MixrouteError(Exception):
    """Base class of every error raised on purpose by mixroute."""


class ConfigError(MixrouteError, ValueError):
    """A configuration value is missing, unknown or out of range; the message names the field."""


class InputError(MixrouteError, ValueError):
    """Documents or counts handed to the model are malformed (wrong type, negative, non-finite)."""


class StateFormatError(MixrouteError, ValueError):
    """Serialised model state is corrupt, truncated, foreign or of an unsupported version."""
