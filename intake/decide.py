"""Routing one message for filing: its group, whether a person should look, where it goes.

The review rules are the API's (:func:`mixture.routing.review_reasons`, the one table) minus
the typicality rule, whose running statistics live in each API process: ``low_posterior``,
``no_known_words``, ``mostly_unknown_words``, ``provisional_model`` (the warm-up's provisional
fit answered), ``new_group`` (a group born while learning that nobody has named) and
``label_stale`` (the group's words moved away from those its label was given to).

Groups are named by their stable id (``state.group_ids``), never by array position: after a
birth, merge or retirement the two differ, and labels, destinations and folders are kept by id.
"""

from __future__ import annotations

from collections.abc import Collection
from dataclasses import dataclass
from typing import Any

import numpy as np

from mixture.routing import review_reasons, route_texts
from mixture.stats import MixtureState


@dataclass(frozen=True)
class Decision:
    """The routing of one message as filing needs it (``group`` is the stable group id)."""

    group: int
    posterior: float
    review: bool
    review_reasons: tuple[str, ...]
    label: str | None
    destination: str | None


def decide(
    state: MixtureState,
    text: str,
    labels: dict[int, Any],
    *,
    threshold: float,
    unknown_share: float,
    provisional: bool = False,
    starting_groups: int | None = None,
    stale_groups: Collection[int] = (),
) -> Decision:
    """Route one text and attach its group's label and destination.

    Parameters
    ----------
    state : MixtureState
        The state to route with (the provisional fit while the model warms up).
    text : str
    labels : dict
        Group id to an object with ``label`` and ``destination`` attributes
        (:class:`state.records.GroupLabel`).
    threshold, unknown_share : float
        The ``low_posterior`` and ``mostly_unknown_words`` rules' settings.
    provisional : bool
        ``state`` is the warm-up's provisional fit: the answer is flagged for review.
    starting_groups : int, optional
        Ids below this were given at creation; a group at or above it without a label or
        destination is a newborn nobody has named (None: no ``new_group`` rule).
    stale_groups : collection of int
        Ids of the groups whose label is stale.
    """
    routing = route_texts(state, [text])
    position = int(routing.group[0])
    group = int(state.group_ids[position])
    entry = labels.get(group)
    label = getattr(entry, "label", None)
    destination = getattr(entry, "destination", None)
    born = starting_groups is not None and group >= starting_groups
    newborn = born and not (label or destination)
    reasons = review_reasons(
        routing,
        threshold,
        unknown_share,
        provisional=provisional,
        new_group=np.array([newborn]),
        label_stale=np.array([group in stale_groups]),
    )[0]
    return Decision(
        group,
        float(routing.posterior[0, position]),
        bool(reasons),
        tuple(reasons),
        label,
        destination,
    )


def folder_name(decision: Decision, *, prefix: str = "", review_folder: str | None) -> str:
    """The folder a decision files into: the review folder for review, else the group's
    destination (when it is not a mail address), its label, or ``group-<k>``."""
    if decision.review and review_folder:
        return review_folder
    destination = decision.destination
    if destination and "@" not in destination:
        name = destination
    else:
        name = decision.label or f"group-{decision.group}"
    return prefix + name


def address_of(decision: Decision) -> str | None:
    """The group's destination when it is a mail address (for forwarding), else None."""
    destination = decision.destination
    return destination if destination and "@" in destination else None
