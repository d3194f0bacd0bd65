"""Range checks of the configuration records: each raises ConfigError naming the field."""

from __future__ import annotations

import math
from typing import Any

from mixture.errors import ConfigError


def check_int(cfg: Any, name: str, low: int, high: int, *, prefix: str = "") -> None:
    """``cfg.<name>`` must be an int (not a bool) in ``[low, high]``.

    ``prefix`` names the record inside its parent (``"lifecycle."``) in the message.
    """
    value = getattr(cfg, name)
    if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
        raise ConfigError(f"{prefix}{name} must be an integer in [{low}, {high}]; got {value!r}")


def check_float(
    cfg: Any, name: str, low: float, high: float, *, low_open: bool = False, prefix: str = ""
) -> None:
    """``cfg.<name>`` must be a finite number (not a bool) in ``[low, high]`` (``(low,`` when
    ``low_open``)."""
    value = getattr(cfg, name)
    if (
        isinstance(value, bool)
        or not isinstance(value, int | float)
        or not math.isfinite(value)
        or not (value > low if low_open else value >= low)
        or value > high
    ):
        bracket = "(" if low_open else "["
        raise ConfigError(
            f"{prefix}{name} must be a finite number in {bracket}{low}, {high}]; got {value!r}"
        )
