"""The model as the intake sees it: its latest checkpoint, group labels and which labels are
stale, re-read from Redis only when their version counters move (two GETs per look otherwise).

It answers with what the API answers with: the state once warmed up, the warm-up's
provisional fit before that (each answer flagged ``provisional_model``), nothing before the
provisional fit exists.
"""

from __future__ import annotations

from typing import Any

from intake.decide import Decision, decide
from mixture.stats import MixtureState
from state.label_words import WordSketch, label_divergences, routing_state_of
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
        self.stale_groups: frozenset[int] = frozenset()
        self._sketches: dict[int, WordSketch] = {}
        self._state_version = -1
        self._labels_version = -1

    @property
    def routing_state(self) -> MixtureState | None:
        """The state answers come from (the provisional fit while warming up), or None."""
        return None if self.state is None else routing_state_of(self.state)

    def refresh(self) -> MixtureState | None:
        """Re-read what changed; the state to route with (None while there is none).

        Raises
        ------
        redis.ConnectionError
            When Redis is unreachable (nothing cached is changed).
        """
        version = self.store.version()
        moved = False
        if version != self._state_version:
            self.state = self.store.load_state() if version > 0 else None
            self._state_version = version
            moved = True
        labels_version = self.store.labels_version()
        if labels_version != self._labels_version:
            self.labels = self.store.group_labels()
            self._sketches = self.store.label_sketches()
            self._labels_version = labels_version
            moved = True
        if moved:
            threshold = self.store.options.label_stale_threshold
            divergences = label_divergences(self._sketches, self.routing_state)
            self.stale_groups = frozenset(g for g, v in divergences.items() if v > threshold)
        return self.routing_state

    def decide(self, text: str, state: MixtureState | None = None) -> Decision:
        """Route one text with ``state`` (default: the cached routing state, which must exist)."""
        state = state or self.routing_state
        if state is None:
            raise RuntimeError("the model has no checkpoint to route with yet")
        return decide(
            state,
            text,
            self.labels,
            threshold=self.store.options.review_threshold,
            unknown_share=self.review_unknown_share,
            provisional=state is not self.state,
            starting_groups=self.store.info.config.n_groups,
            stale_groups=self.stale_groups,
        )
