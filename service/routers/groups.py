"""Groups: weights, top and distinctive terms, and the operator's label and destination."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Query

from mixture.describe import describe_groups
from service.errors import InvalidFieldError
from service.routers import COMMON_RESPONSES, Runtime, StrictJsonRoute
from service.runtime import GroupNotFoundError, LoadedModel
from service.schemas import GroupList, GroupOut, LabelHistory, LabelIn, LabelPatchIn, Problem

router = APIRouter(tags=["groups"], responses=COMMON_RESPONSES, route_class=StrictJsonRoute)

NOT_FOUND = {404: {"model": Problem, "description": "Unknown model or group"}}
KEEP_COURTESY = "Keep greetings and closings (thanks, regards, ...) in the term lists"


def group_dicts(
    loaded: LoadedModel, top: int, min_count: float, keep_courtesy_terms: bool = False
) -> list[dict[str, Any]]:
    """Every group of a loaded model as JSON-able dicts."""
    ids = loaded.group_ids
    k = len(ids)
    typicality = loaded.typicality.to_dict()
    if loaded.state is None:
        summaries: list[Any] = []
    else:
        summaries = describe_groups(
            loaded.state, top_n=top, min_count=min_count, keep_courtesy_terms=keep_courtesy_terms
        )
    by_position = {int(s.group): s for s in summaries}  # describe_groups numbers by position
    out = []
    for g, group_id in enumerate(ids):
        summary = by_position.get(g)
        label = loaded.labels.get(group_id) or {}
        sketch = loaded.label_words.get(group_id)
        out.append(
            {
                "group": group_id,
                "born": group_id >= loaded.starting_groups,
                "merged_labels": label.get("merged_labels") or [],
                "weight": float(summary.weight) if summary else 1.0 / k,
                "expected_documents": float(summary.expected_documents) if summary else 0.0,
                "label": label.get("label"),
                "destination": label.get("destination"),
                "top_terms": [
                    {"term": t, "score": float(s)}
                    for t, s in (summary.top_terms if summary else [])
                ],
                "distinctive_terms": [
                    {"term": t, "score": float(s)}
                    for t, s in (summary.distinctive_terms if summary else [])
                ],
                "typicality": {
                    "effective_documents": typicality["effective_documents"][g],
                    "mean": typicality["mean"][g],
                    "std": typicality["std"][g],
                },
                "label_stale": loaded.label_stale(group_id),
                "label_divergence": loaded.label_divergence.get(group_id),
                "label_stale_threshold": loaded.label_stale_threshold,
                "label_words_version": sketch.version if sketch is not None else None,
            }
        )
    return out


@router.get(
    "/models/{model}/groups", response_model=GroupList, responses=NOT_FOUND, summary="All groups"
)
def list_groups(
    model: str,
    runtime: Runtime,
    top: Annotated[int, Query(ge=1, le=200, description="Terms per list")] = 10,
    min_count: Annotated[float, Query(ge=0.0, le=1e9, description="Distinctive-term floor")] = 3.0,
    keep_courtesy_terms: Annotated[bool, Query(description=KEEP_COURTESY)] = False,
) -> dict[str, Any]:
    """Weights, top terms p(w | k), distinctive terms (lift) and labels of every group."""
    loaded = runtime.model(model)
    return {
        "model": model,
        "version": loaded.version,
        "groups": group_dicts(loaded, top, min_count, keep_courtesy_terms),
    }


@router.get(
    "/models/{model}/groups/{group}",
    response_model=GroupOut,
    responses=NOT_FOUND,
    summary="One group",
)
def get_group(
    model: str,
    runtime: Runtime,
    group: int,
    top: Annotated[int, Query(ge=1, le=200)] = 10,
    min_count: Annotated[float, Query(ge=0.0, le=1e9)] = 3.0,
    keep_courtesy_terms: Annotated[bool, Query(description=KEEP_COURTESY)] = False,
) -> dict[str, Any]:
    loaded = runtime.model(model)
    return group_dicts(loaded, top, min_count, keep_courtesy_terms)[loaded.position_of(group)]


@router.put(
    "/models/{model}/groups/{group}/label",
    response_model=GroupOut,
    responses=NOT_FOUND,
    summary="Set a group's label and destination",
)
def set_label(model: str, group: int, body: LabelIn, runtime: Runtime) -> dict[str, Any]:
    """Name a group and say where its messages go; routing answers carry both from now on.

    A whole replacement: a field left out is cleared (PATCH changes only the fields given).
    The group's words now are recorded as what the label is given to."""
    runtime.set_label(model, group, body.label, body.destination)
    loaded = runtime.model(model)
    return group_dicts(loaded, 10, 3.0)[loaded.position_of(group)]


@router.patch(
    "/models/{model}/groups/{group}/label",
    response_model=GroupOut,
    responses=NOT_FOUND,
    summary="Change some fields of a group's label",
)
def patch_label(model: str, group: int, body: LabelPatchIn, runtime: Runtime) -> dict[str, Any]:
    """Change only the fields given (``null`` clears one). A new label text or
    ``refresh: true`` records the group's words now as what the label is given to (clearing
    ``label_stale``); a change of destination alone keeps the words recorded before."""
    changes = body.changes()
    if not changes and not body.refresh:
        raise InvalidFieldError(
            "give at least one of label, destination (null clears it) or refresh: true", "body"
        )
    runtime.patch_label(model, group, changes, body.refresh)
    loaded = runtime.model(model)
    return group_dicts(loaded, 10, 3.0)[loaded.position_of(group)]


@router.get(
    "/models/{model}/groups/{group}/label/history",
    response_model=LabelHistory,
    responses=NOT_FOUND,
    summary="A group's label changes",
)
def label_history(model: str, group: int, runtime: Runtime) -> dict[str, Any]:
    """Every PUT and PATCH of the group's label, oldest first (the newest 50): time, action,
    the fields given, the label and destination after it, the model version at the time.
    A retired or absorbed group's history stays readable."""
    loaded = runtime.model(model)
    history = runtime.call(lambda: loaded.store.label_history(group))
    if not history and group not in loaded.group_ids:
        raise GroupNotFoundError(
            f"model {model!r} has groups {loaded.group_ids} and no label history for group {group}"
        )
    return {"model": model, "group": group, "history": history}
