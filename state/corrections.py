"""Where each learned document went: a bounded record of recent learning units, kept in the
state's metadata, and what a correction of an already-learned document can say about it.

A correction names a document by its client id. When that document was already learned as an
ordinary (unlabelled) document, its unlabelled contribution is not taken out of the stepwise
statistics (they are a running average; a single document's share cannot be subtracted once
later updates have mixed it in); it fades as the model forgets. How much of it remains is
``mixture.labelled.remaining_weight``: a document learned in a unit of m documents at step
size eta had weight eta / m in the running average, multiplied since by (1 - eta_j) for every
later update j, i.e. ``exp(log_forgetting_now - log_forgetting_after_its_unit)``; a warm-up
document had 1 / n_warm at the warm-up fit.

To answer that the worker records, per learning unit, the stream id of its last document, its
number of documents, its eta and the state's ``log_forgetting`` after it
(:func:`record_unit`), and once the stream id of the warm-up's last document with the warm-up
size and ``log_forgetting`` at the fit (:func:`record_warm_up`). The record holds the newest
:data:`UNITS_KEPT` units (about 40 bytes each in the state's JSON metadata); a document learned
before them has an unknown remainder (``None``), which after 512 updates of stepwise EM is in
any case a small share (common practice, no source: the bound is a size choice).
"""

from __future__ import annotations

import bisect
from collections.abc import MutableMapping
from typing import Any

from mixture.errors import InputError
from mixture.labelled import remaining_weight
from state.stream import parse_stream_id

UNITS_KEPT = 512
UNITS_KEY = "units"  # metadata key: {"last": [...], "documents": [...], "eta": [...], "lf": [...]}
WARM_UP_KEY = "warm_up_unit"  # metadata key: {"last", "documents", "lf"}


def record_unit(
    metadata: MutableMapping[str, Any],
    last_stream_id: str,
    documents: int,
    eta: float,
    log_forgetting_after: float,
) -> None:
    """Append one stepwise unit to the record (dropping the oldest beyond :data:`UNITS_KEPT`).

    Parameters
    ----------
    metadata : dict
        The state's metadata (carried by every checkpoint).
    last_stream_id : str
        Stream id of the unit's last document (units follow each other in stream order, so
        the unit of a document is the first whose last id is at or after the document's).
    documents : int
        Documents in the unit.
    eta : float
        Its step size.
    log_forgetting_after : float
        ``state.log_forgetting`` right after the unit's update.
    """
    units = metadata.setdefault(UNITS_KEY, {"last": [], "documents": [], "eta": [], "lf": []})
    units["last"].append(last_stream_id)
    units["documents"].append(int(documents))
    units["eta"].append(float(eta))
    units["lf"].append(float(log_forgetting_after))
    extra = len(units["last"]) - UNITS_KEPT
    if extra > 0:
        units["floor"] = units["last"][extra - 1]  # documents up to it: not in the record
        for name in ("last", "documents", "eta", "lf"):
            del units[name][:extra]


def record_warm_up(
    metadata: MutableMapping[str, Any],
    last_stream_id: str,
    documents: int,
    log_forgetting_at_fit: float,
) -> None:
    """Note the warm-up: its last document's stream id, its size and the forgetting at the fit."""
    metadata[WARM_UP_KEY] = {
        "last": last_stream_id,
        "documents": int(documents),
        "lf": float(log_forgetting_at_fit),
    }


def unit_of(metadata: MutableMapping[str, Any], stream_id: str) -> dict[str, Any] | None:
    """The recorded unit that learned the document of ``stream_id``: ``{"documents", "eta",
    "lf", "warm_up"}`` (``eta`` None for the warm-up), or None when it is not in the record
    (learned before the units kept, or not learned yet).

    A document a rollback's replay skipped lies inside a unit's range all the same: the record
    knows units, not each document.
    """
    target = parse_stream_id(stream_id)
    warm = metadata.get(WARM_UP_KEY)
    if warm is not None and target <= parse_stream_id(warm["last"]):
        return {"documents": warm["documents"], "eta": None, "lf": warm["lf"], "warm_up": True}
    units = metadata.get(UNITS_KEY)
    if not units or not units["last"]:
        return None
    floor = units.get("floor")
    if floor is not None and target <= parse_stream_id(floor):
        return None  # in a unit dropped from the record
    at = bisect.bisect_left([parse_stream_id(s) for s in units["last"]], target)
    if at == len(units["last"]):
        return None
    return {
        "documents": units["documents"][at],
        "eta": units["eta"][at],
        "lf": units["lf"][at],
        "warm_up": False,
    }


def weight_remaining(
    documents: int, eta: float | None, log_forgetting_then: float, log_forgetting_now: float
) -> float:
    """Share of the running average an unlabelled document still holds: the core's
    :func:`mixture.labelled.remaining_weight` (``eta`` None: a warm-up document, which had
    weight 1 / documents at the fit)."""
    return remaining_weight(
        1.0 if eta is None else eta, documents, log_forgetting_then, log_forgetting_now
    )


def remaining_of(
    metadata: MutableMapping[str, Any], log_forgetting_now: float, stream_id: str
) -> float | None:
    """How much unlabelled weight the document of ``stream_id`` still holds in a state whose
    metadata is ``metadata`` and whose ``log_forgetting`` is ``log_forgetting_now`` (None when
    its unit is not in the record)."""
    unit = unit_of(metadata, stream_id)
    if unit is None:
        return None
    try:
        return weight_remaining(unit["documents"], unit["eta"], unit["lf"], log_forgetting_now)
    except InputError:  # a record that does not fit the state (hand-edited metadata)
        return None
