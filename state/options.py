"""Service-level options of one model, stored beside its :class:`~mixture.config.MixtureConfig`.

Defaults are operating choices, not results: they are common practice for a stream service
(checkpoint every second or so of traffic, keep a week of stream), no source.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields
from typing import Any

from state.errors import OptionsError


@dataclass(frozen=True)
class ModelOptions:
    """How the state layer and the worker treat one model.

    Parameters
    ----------
    checkpoint_documents : int
        Checkpoint after this many documents read since the last checkpoint ...
    checkpoint_seconds : float
        ... or when this much time has passed since it (whichever comes first).
    flush_partial_seconds : float or None
        The worker learns in units of ``batch_size`` documents. A partial unit is learned when
        no new entry has arrived for this long (bounds latency at low traffic); None learns
        only full units, which makes the state a function of the stream alone (reproducible
        whatever the read sizes, crashes and restarts).
    read_count : int
        XREAD COUNT: entries per page the worker reads after its cursor.
    read_block_ms : int
        XREAD BLOCK in milliseconds (how long a read waits for new entries).
    stream_max_length : int or None
        Cap on the unlearned backlog (entries added minus entries read): queueing that would
        pass it is refused whole (``StreamFullError``, answered 503 with Retry-After), so no
        entry is ever trimmed before it is learned; None for no cap.
    stream_max_age_seconds : float or None
        Learned entries older than this are trimmed at checkpoints (XTRIM MINID ~), never
        past the watermark.
    id_ttl_seconds : float
        How long a client-given id stays known: the idempotency window.
    snapshot_every_documents : int or None
        Automatic snapshot after this many documents learned since the last one.
    snapshot_every_seconds : float or None
        Automatic snapshot after this much time since the last one.
    snapshot_keep : int
        Automatic snapshots kept (the newest); requested ones are never removed by retention.
    history_limit : int
        Drift-history rows kept.
    lineage_limit : int
        Version records kept.
    drift_threshold : float
        Alert when the Jensen-Shannon divergence (base 2) of the weights crosses this.
    drift_window : int
        Checkpoints back to the "window before" reference.
    lease_seconds : float
        TTL of the heartbeat key: a worker silent this long loses the model.
    seed : int
        Seed of the learner's random initialisation.
    review_threshold : float
        Routing answers ask for human review when the MAP posterior is below this (0, 1].
    word_drift_threshold : float
        Alert when a group's word distribution has moved this far (Jensen-Shannon divergence,
        base 2, over its top words) from the reference checkpoint's, for groups present in
        both. 0.1 bit: one word then tells a tenth of a bit about which of the two windows it
        came from, the same principle as the lifecycle's merge threshold (there: too close to
        keep apart; here: too far to be the same topic); rule of thumb, no source.
    event_limit : int
        Group-event records kept (births, merges, retirements; the newest).
    label_stale_threshold : float
        A label is stale when its group's words have moved this far (Jensen-Shannon
        divergence, base 2, on the compact record of the words the label was given to:
        ``state.label_words``) from when it was set. 0.25 bit, on principle: a label is no
        longer true when about half of its group is something else. A group a share f of
        whose words come from a distribution disjoint from the labelled one P, i.e.
        (1 - f) P + f J, is at JS h(f) = f/2 - log2(1 - f/2)/2 + (1 - f)/2 log2((1 - f) /
        (1 - f/2)) from P; h(1/2) = 1.5 - 0.75 log2 3 = 0.311 bit over every word and at
        least 0.276 on the compact record (its error bound), so 0.25 fires on any such half
        take-over (h(0.4) = 0.236 does not), while the content drift alert
        (``word_drift_threshold``) already fires at 0.1 bit for ordinary drift. Measured on
        the invented ferry week (seeds 0-5 at 0.4 of its size, 0-2 at full size): the storm
        day moves no group past 0.053, the junk burst takes the groups it lands in to 0.27-0.58
        and leaves the others under 0.14 (tests/test_label_stale.py runs three of these).
    """

    checkpoint_documents: int = 1000
    checkpoint_seconds: float = 5.0
    flush_partial_seconds: float | None = 1.0
    read_count: int = 500
    read_block_ms: int = 1000
    stream_max_length: int | None = 1_000_000
    stream_max_age_seconds: float | None = 7 * 86400.0
    id_ttl_seconds: float = 7 * 86400.0
    snapshot_every_documents: int | None = 50_000
    snapshot_every_seconds: float | None = 3600.0
    snapshot_keep: int = 10
    history_limit: int = 10_000
    lineage_limit: int = 10_000
    drift_threshold: float = 0.05
    drift_window: int = 10
    lease_seconds: float = 15.0
    seed: int = 0
    review_threshold: float = 0.6
    word_drift_threshold: float = 0.1
    event_limit: int = 1000
    label_stale_threshold: float = 0.25

    def __post_init__(self) -> None:
        positive_int = (
            "checkpoint_documents",
            "read_count",
            "history_limit",
            "lineage_limit",
            "drift_window",
            "event_limit",
        )
        for name in positive_int:
            _check_int(name, getattr(self, name), minimum=1)
        _check_int("read_block_ms", self.read_block_ms, minimum=0)
        _check_int("snapshot_keep", self.snapshot_keep, minimum=0)
        _check_int("seed", self.seed, minimum=0)
        for name in ("stream_max_length", "snapshot_every_documents"):
            value = getattr(self, name)
            if value is not None:
                _check_int(name, value, minimum=1)
        for name in ("checkpoint_seconds", "id_ttl_seconds", "lease_seconds"):
            _check_float(name, getattr(self, name), minimum=0.0, strict=True)
        if self.flush_partial_seconds is not None:
            _check_float(
                "flush_partial_seconds", self.flush_partial_seconds, minimum=0.0, strict=False
            )
        for name in ("stream_max_age_seconds", "snapshot_every_seconds"):
            value = getattr(self, name)
            if value is not None:
                _check_float(name, value, minimum=0.0, strict=True)
        _check_float("drift_threshold", self.drift_threshold, minimum=0.0, strict=False)
        _check_float("review_threshold", self.review_threshold, minimum=0.0, strict=True)
        _check_float("word_drift_threshold", self.word_drift_threshold, minimum=0.0, strict=False)
        if self.word_drift_threshold > 1.0:
            raise OptionsError(
                f"word_drift_threshold must be in [0, 1] (JS divergence, base 2), got "
                f"{self.word_drift_threshold!r}"
            )
        _check_float("label_stale_threshold", self.label_stale_threshold, minimum=0.0, strict=True)
        if self.label_stale_threshold > 1.0:
            raise OptionsError(
                f"label_stale_threshold must be in (0, 1] (JS divergence, base 2), got "
                f"{self.label_stale_threshold!r}"
            )
        if self.review_threshold > 1.0:
            raise OptionsError(f"review_threshold must be in (0, 1], got {self.review_threshold!r}")
        if self.drift_threshold > 1.0:
            raise OptionsError(
                f"drift_threshold must be in [0, 1] (JS divergence, base 2), got "
                f"{self.drift_threshold!r}"
            )

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dict of every field."""
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> ModelOptions:
        """Build from a dict; unknown keys and bad values raise :class:`OptionsError`."""
        if not isinstance(d, dict):
            raise OptionsError(f"model options must be an object, got {type(d).__name__}")
        known = {f.name for f in fields(cls)}
        # options that no longer exist, kept readable in models stored before their removal
        d = {k: v for k, v in d.items() if k not in _RETIRED_OPTIONS}
        unknown = sorted(set(d) - known)
        if unknown:
            raise OptionsError(f"unknown model option(s): {', '.join(unknown)}")
        return cls(**d)


_RETIRED_OPTIONS = frozenset({"claim_idle_seconds"})  # the consumer group's XAUTOCLAIM


def _check_int(name: str, value: Any, *, minimum: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int):
        raise OptionsError(f"{name} must be an integer, got {value!r}")
    if value < minimum:
        raise OptionsError(f"{name} must be >= {minimum}, got {value!r}")


def _check_float(name: str, value: Any, *, minimum: float, strict: bool) -> None:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise OptionsError(f"{name} must be a number, got {value!r}")
    if not math.isfinite(value):
        raise OptionsError(f"{name} must be finite, got {value!r}")
    if (strict and value <= minimum) or (not strict and value < minimum):
        op = ">" if strict else ">="
        raise OptionsError(f"{name} must be {op} {minimum}, got {value!r}")
