"""Exceptions raised by the model core; every message names what to fix."""


class MixrouteError(Exception):
    """Base class of every error raised by mixroute's own code."""


class ConfigError(MixrouteError, ValueError):
    """A configuration value is out of range or unknown; the message names the field."""


class InputError(MixrouteError, ValueError):
    """Documents or counts that the model cannot use (empty, negative, non-finite, ...)."""


class StateFormatError(MixrouteError, ValueError):
    """State bytes that are corrupt, truncated, tampered with or not ours."""
