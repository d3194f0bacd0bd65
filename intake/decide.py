"""Routing one message for filing: its group, whether a person should look, where it goes.

The review rules are the API's (``service/runtime.py`` documents them) minus the typicality
rule, whose running statistics live in each API process: ``low_posterior`` (MAP posterior
under the model's ``review_threshold``), ``no_known_words`` and ``mostly_unknown_words``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from mixture.routing import route_texts
from mixture.stats import MixtureState


@dataclass(frozen=True)
class Decision:
    """The routing of one message as filing needs it."""

    group: int
    posterior: float
    review: bool
    review_reasons: tuple[str, ...]
    label: str | None
    destination: str | None


def review_reasons(
    posterior: float,
    no_evidence: bool,
    known_tokens: int,
    unknown_tokens: int,
    *,
    threshold: float,
    unknown_share: float,
) -> list[str]:
    """The review rules that fire for one routed document (empty: no review)."""
    reasons = []
    if posterior < threshold:
        reasons.append("low_posterior")
    if no_evidence:
        reasons.append("no_known_words")
    elif unknown_tokens > unknown_share * (known_tokens + unknown_tokens):
        reasons.append("mostly_unknown_words")
    return reasons


def decide(
    state: MixtureState,
    text: str,
    labels: dict[int, Any],
    *,
    threshold: float,
    unknown_share: float,
) -> Decision:
    """Route one text and attach its group's label and destination.

    ``labels`` maps a group to an object with ``label`` and ``destination`` attributes
    (:class:`state.records.GroupLabel`).
    """
    routing = route_texts(state, [text])
    group = int(routing.group[0])
    posterior = float(routing.posterior[0, group])
    reasons = review_reasons(
        posterior,
        bool(routing.no_evidence[0]),
        int(routing.known_tokens[0]),
        int(routing.unknown_tokens[0]),
        threshold=threshold,
        unknown_share=unknown_share,
    )
    entry = labels.get(group)
    return Decision(
        group,
        posterior,
        bool(reasons),
        tuple(reasons),
        getattr(entry, "label", None),
        getattr(entry, "destination", None),
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
