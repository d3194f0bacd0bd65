"""The model as the intake sees it: its latest checkpoint and group labels, re-read from Redis
only when their version counters move (two GETs per look otherwise)."""

from __future__ import annotations

from typing import Any

from intake.decide import Decision, decide
from mixture.stats import MixtureState
from state.store import ModelStore


class ModelView:
    """Latest state and labels of one model, cached by version.

    Parameters
    ----------
    store : ModelStore
    review_unknown_share : float
        The ``mostly_unknown_words`` review rule's share (the API's setting of that name).
    """

    def __init__(self, store: ModelStore, review_unknown_share: float = 0.5) -> None:
        self.store = store
        self.review_unknown_share = review_unknown_share
        self.state: MixtureState | None = None
        self.labels: dict[int, Any] = {}
        self._state_version = -1
        self._labels_version = -1

    def refresh(self) -> MixtureState | None:
        """Re-read what changed; the current state (None before the first checkpoint).

        Raises
        ------
        redis.ConnectionError
            When Redis is unreachable (nothing cached is changed).
        """
        version = self.store.version()
        if version != self._state_version:
            self.state = self.store.load_state() if version > 0 else None
            self._state_version = version
        labels_version = self.store.labels_version()
        if labels_version != self._labels_version:
            self.labels = self.store.group_labels()
            self._labels_version = labels_version
        return self.state

    def decide(self, text: str, state: MixtureState | None = None) -> Decision:
        """Route one text with ``state`` (default: the cached one, which must exist)."""
        state = state or self.state
        if state is None:
            raise RuntimeError("the model has no checkpoint yet")
        return decide(
            state,
            text,
            self.labels,
            threshold=self.store.options.review_threshold,
            unknown_share=self.review_unknown_share,
        )
