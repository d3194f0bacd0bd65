"""Request and response bodies of the HTTP API (pydantic), shared by every router.

Request bodies are strict: a JSON ``true`` is not an integer, ``"8"`` is not a number, ``"no"``
is not a boolean, and a field the schema does not name is refused (422 naming the field).

Model configuration has one source of truth: the dataclasses ``mixture.config.MixtureConfig``
(with its nested ``TokenizerConfig``) and ``state.options.ModelOptions``. Their range checks
stay in their ``__post_init__`` (pure Python, so ``mixture/`` needs no validation library and
raises ``ConfigError`` naming the field), and the request schemas :data:`ConfigIn`,
:data:`TokenizerIn` and :data:`OptionsIn` are *generated* from their fields by
:func:`schema_of_dataclass`: the same names, types, defaults and descriptions (from the numpy
docstrings), so a field added to a dataclass is in the API and its OpenAPI document with no
hand copy to keep in step. The schemas fix the types; the dataclasses own the limits.
"""

from __future__ import annotations

import dataclasses
import inspect
import re
import typing
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, create_model, model_validator

from mixture.config import MixtureConfig
from mixture.routing import REVIEW_REASONS
from state.options import ModelOptions
from state.records import SNAPSHOT_KINDS

STRICT_INPUT = ConfigDict(extra="forbid", strict=True)


class StrictIn(BaseModel):
    """Base of request bodies: no type coercion, no unknown fields."""

    model_config = STRICT_INPUT


_PARAMETER = re.compile(r"^    ([a-z_][a-z0-9_, ]*?)(?: : .*)?$")


def parameter_descriptions(cls: type) -> dict[str, str]:
    """Descriptions of a class's fields from its numpy-style "Parameters" docstring section.

    An entry naming several fields (``a, b, c``) gives its text to each of them.
    """
    doc = inspect.getdoc(cls) or ""
    found: dict[str, list[str]] = {}
    current: list[str] | None = None
    in_parameters = False
    for line in ("    " + row if row else row for row in doc.splitlines()):
        stripped = line.strip()
        if stripped == "Parameters":
            in_parameters = True
            continue
        if not in_parameters or set(stripped) <= {"-"}:
            continue
        if line.startswith("        "):
            if current is not None:
                current.append(stripped)
            continue
        match = _PARAMETER.match(line)
        if match is None:
            break  # the next section
        current = []
        for name in match.group(1).split(","):
            found[name.strip()] = current
    return {name: " ".join(text) for name, text in found.items() if text}


def schema_of_dataclass(cls: type, name: str | None = None) -> type[StrictIn]:
    """A strict request model with the fields of dataclass ``cls``.

    Each field keeps its name, type, default and docstring description; a nested dataclass
    becomes a nested model of its own. Validation fixes only the types: building ``cls`` from
    ``model_dump(exclude_unset=True)`` applies the dataclass's own range checks and defaults.

    Parameters
    ----------
    cls : dataclass type
    name : str, optional
        Name of the model and of its OpenAPI component; default the class name with
        ``Config`` replaced by ``In`` (``TokenizerConfig`` -> ``TokenizerIn``).

    Returns
    -------
    type of StrictIn
        The same class for the same ``cls`` on every call.
    """
    if cls in _GENERATED:
        return _GENERATED[cls]
    hints = typing.get_type_hints(cls)
    descriptions = parameter_descriptions(cls)
    definitions: dict[str, Any] = {}
    for item in dataclasses.fields(cls):
        annotation = hints[item.name]
        description = descriptions.get(item.name)
        if dataclasses.is_dataclass(annotation):
            nested = schema_of_dataclass(annotation)  # type: ignore[arg-type]
            definitions[item.name] = (
                nested,
                Field(default_factory=nested, description=description),
            )
            continue
        if item.default is not dataclasses.MISSING:
            default = item.default
        else:
            default = item.default_factory()  # type: ignore[misc]
        args = typing.get_args(annotation)
        if typing.get_origin(annotation) is tuple and len(args) == 2 and args[1] is Ellipsis:
            # JSON has arrays, not tuples, and strict validation refuses a list for a tuple:
            # the body takes a list and the dataclass makes it its tuple.
            annotation, default = list[args[0]], list(default)  # type: ignore[valid-type]
        definitions[item.name] = (annotation, Field(default=default, description=description))
    model_name = name or cls.__name__.removesuffix("Config") + "In"
    model = create_model(model_name, __base__=StrictIn, **definitions)
    model.__doc__ = (
        f"The fields of ``{cls.__module__}.{cls.__qualname__}``; omitted ones take its defaults."
    )
    _GENERATED[cls] = model
    return model


_GENERATED: dict[type, type[StrictIn]] = {}


class Problem(BaseModel):
    """An error answer."""

    detail: str = Field(description="What was wrong and what to do about it.")
    field: str | None = Field(default=None, description="The offending field, when one is.")
    written: bool | None = Field(
        default=None,
        description="true on a 503 whose write was done on the primary but not confirmed by "
        "the replicas (MIXROUTE_REDIS_WAIT_REPLICAS): not a failure, and not to be repeated "
        "unless the detail says a repeat is harmless.",
    )


# -- documents ------------------------------------------------------------------------------


class DocumentIn(StrictIn):
    """One document. ``id`` is optional; a given id makes queueing idempotent."""

    id: str | None = Field(default=None, min_length=1, max_length=200)
    text: str = Field(description="The message text (UTF-8; not empty).")


class OneOrManyIn(StrictIn):
    """Either ``text`` (one document, with an optional ``id``) or ``documents`` (many): the
    same two forms for queueing and for routing."""

    text: str | None = Field(default=None, description="A single document's text.")
    id: str | None = Field(default=None, min_length=1, max_length=200)
    documents: list[DocumentIn] | None = None

    @model_validator(mode="after")
    def _one_form(self) -> OneOrManyIn:
        if (self.text is None) == (self.documents is None):
            raise ValueError('give either "text" (one document) or "documents" (a list)')
        if self.documents is not None and self.id is not None:
            raise ValueError('"id" goes inside each entry of "documents"')
        return self

    def as_documents(self) -> list[DocumentIn]:
        """The documents of either form, as a list."""
        if self.documents is not None:
            return self.documents
        return [DocumentIn(id=self.id, text=self.text or "")]


class DocumentsIn(OneOrManyIn):
    """Documents to queue for learning: ``text`` (one) or ``documents`` (many)."""


class QueuedOut(BaseModel):
    """Documents accepted into the model's stream (202)."""

    model: str
    queued: int = Field(description="Documents added to the stream.")
    duplicates: int = Field(description="Documents whose id was seen recently: not added again.")
    stream_ids: list[str | None] = Field(description="Stream id per document, null if duplicate.")


# -- routing --------------------------------------------------------------------------------


class RouteIn(OneOrManyIn):
    """Documents to route: either ``text`` (one document) or ``documents`` (many)."""

    top: int | None = Field(
        default=None, ge=1, le=10_000, description="Return only the n most probable groups."
    )
    learn: bool = Field(default=False, description="Also queue the documents for learning.")


# The names come from the one table in mixture.routing; a new reason is a row there.
ReviewReason = Literal[tuple(REVIEW_REASONS)]  # type: ignore[valid-type]


class GroupProbability(BaseModel):
    group: int
    probability: float


class RouteResult(BaseModel):
    """The routing answer for one document."""

    id: str | None
    group: int = Field(description="MAP group (a large group wins a tie).")
    label: str | None = Field(description="Operator label of the group, if set.")
    destination: str | None = Field(description="Where the operator sends this group.")
    posterior: list[GroupProbability] = Field(
        description="p(group | document), most probable first (top n if requested)."
    )
    margin: float = Field(description="Best minus second-best posterior.")
    log_likelihood_per_token: float | None = Field(
        description="log p(document | MAP group) per known token; null without known tokens."
    )
    known_tokens: int
    unknown_tokens: int
    review: bool = Field(description="A person should look at this routing decision.")
    review_reasons: list[ReviewReason] = Field(  # type: ignore[valid-type]
        description="Every review rule that fired (mixture.routing.REVIEW_REASONS)."
    )
    label_stale: bool = Field(
        default=False,
        description="The MAP group's label is stale: the group's words have moved away from "
        "those the label was given to (further than the model's label_stale_threshold).",
    )
    queued: bool = Field(
        default=False,
        description="True when this document was added to the stream for learning (false for "
        "an id already queued within the model's idempotency window).",
    )
    stream_id: str | None = Field(
        default=None, description="Stream id when the document was queued for learning."
    )


class RouteOut(BaseModel):
    model: str
    version: int = Field(description="Model version whose parameters answered.")
    degraded: bool = Field(description="True when Redis is unreachable: answered from memory.")
    notice: str | None = Field(default=None, description="Why the answer is degraded, if it is.")
    queued: bool = Field(
        description="True when at least one document was added to the stream (see each "
        "result's queued: a repeated id is not queued again)."
    )
    review_threshold: float
    results: list[RouteResult]


# -- models ---------------------------------------------------------------------------------


TokenizerIn = schema_of_dataclass(typing.get_type_hints(MixtureConfig)["tokenizer"])
ConfigIn = schema_of_dataclass(MixtureConfig, "ConfigIn")
OptionsIn = schema_of_dataclass(ModelOptions, "OptionsIn")


class SeedIn(StrictIn):
    """A group the model starts from: seed i is group id i."""

    label: str | None = Field(default=None, min_length=1, max_length=200)
    destination: str | None = Field(default=None, min_length=1, max_length=200)
    examples: list[str] = Field(
        default_factory=list,
        max_length=10_000,
        description="Example messages of this group, learned as labelled documents (source "
        '"example") before any other document.',
    )


class ModelIn(StrictIn):
    """A model to create."""

    name: str = Field(description="1-64 letters, digits, '_', '.', '-'; starts alphanumeric.")
    config: ConfigIn = Field(  # type: ignore[valid-type]
        default_factory=ConfigIn, description="mixture.config.MixtureConfig fields."
    )
    options: OptionsIn = Field(  # type: ignore[valid-type]
        default_factory=OptionsIn,
        description="state.options.ModelOptions fields (checkpointing, stream, review...).",
    )
    max_groups: int | None = Field(
        default=None,
        ge=1,
        le=10_000,
        description="Ceiling on the number of groups (config.lifecycle.max_groups). With "
        "config.n_groups left out the model starts with 2 groups, the lifecycle on, and "
        "grows by births up to this (default 32).",
    )
    seeds: list[SeedIn] = Field(
        default_factory=list,
        max_length=1000,
        description="Groups to start from, each with a label, destination and example "
        "messages: seed i is group id i. Without config.n_groups the model starts with one "
        "more group than seeds (at least 2), for the messages no seed describes.",
    )


class ModelOut(BaseModel):
    name: str
    n_groups: int = Field(description="Current number of groups (they change with births...).")
    group_ids: list[int] = Field(default_factory=list, description="Id of each weight.")
    version: int = Field(description="0 until the first checkpoint.")
    documents_learned: int
    warmed_up: bool
    provisional: bool = Field(
        default=False,
        description="True while routing answers come from a provisional fit of the warm-up.",
    )
    status: str = Field(
        default="",
        description='"warmed up", or the warm-up\'s progress: "warming up: N of M tokens '
        'buffered (...)".',
    )
    weights: list[float]
    review_threshold: float
    created: float
    config: dict[str, Any]
    options: dict[str, Any]
    stream: dict[str, Any] | None = Field(default=None, description="Stream length, lag, ...")
    served_watermark: str = Field(
        default="",
        description="Stream id of the last entry the state this process serves has learned "
        "(its checkpoint's watermark; empty before the first). The stream's watermark can be "
        "ahead of it until this process has loaded the newest checkpoint.",
    )


class ModelList(BaseModel):
    models: list[ModelOut]


# -- groups ---------------------------------------------------------------------------------


class TermScore(BaseModel):
    term: str
    score: float


class GroupOut(BaseModel):
    group: int = Field(description="Stable group id (never given to another group).")
    born: bool = Field(default=False, description="Born while learning (not a starting group).")
    merged_labels: list[dict[str, Any]] = Field(
        default_factory=list, description="Labels of the groups this one absorbed by merges."
    )
    weight: float
    expected_documents: float
    label: str | None
    destination: str | None
    top_terms: list[TermScore] = Field(description="Most probable words, score = p(w | group).")
    distinctive_terms: list[TermScore] = Field(
        description="Most over-represented words, score = lift p(w | group) / p(w)."
    )
    typicality: dict[str, float] | None = Field(
        default=None, description="Recent mean and spread of log-likelihood per token."
    )
    label_stale: bool = Field(
        default=False,
        description="The label is stale: label_divergence is above label_stale_threshold.",
    )
    label_divergence: float | None = Field(
        default=None,
        description="JS divergence (bits) of the group's words now from those its label was "
        "given to, on the recorded words (null: no words recorded).",
    )
    label_stale_threshold: float | None = Field(
        default=None, description="The model's label_stale_threshold (bits)."
    )
    label_words_version: int | None = Field(
        default=None, description="Model version the label's words were recorded at."
    )


class GroupList(BaseModel):
    model: str
    version: int
    groups: list[GroupOut]


class LabelIn(StrictIn):
    """Operator's name for a group and where its messages go (PUT: both replaced; a field
    left out is cleared)."""

    label: str | None = Field(default=None, min_length=1, max_length=200)
    destination: str | None = Field(default=None, min_length=1, max_length=200)


class LabelPatchIn(StrictIn):
    """PATCH: only the fields given change (null clears one); ``refresh`` records the group's
    words now as those the label is given to (so is any new label text)."""

    label: str | None = Field(default=None, min_length=1, max_length=200)
    destination: str | None = Field(default=None, min_length=1, max_length=200)
    refresh: bool = Field(
        default=False,
        description="Record the group's words now as what the label describes (clears "
        "label_stale until the words move again).",
    )

    def changes(self) -> dict[str, str | None]:
        """The label fields the request gave (null included), by name."""
        return {
            name: getattr(self, name)
            for name in ("label", "destination")
            if name in self.model_fields_set
        }


class LabelChange(BaseModel):
    time: float
    action: Literal["set", "patch", "clear"] = Field(
        description="set: PUT (whole replacement); patch: PATCH; clear: both fields now empty."
    )
    fields: dict[str, str | None] = Field(description="The fields the request gave.")
    label: str | None = Field(description="The label after the change.")
    destination: str | None = Field(description="The destination after the change.")
    version: int = Field(description="Model version at the time.")
    words_recorded: bool = Field(description="The group's words were recorded anew.")


class LabelHistory(BaseModel):
    model: str
    group: int
    history: list[LabelChange] = Field(description="Oldest first (the newest 50 are kept).")


# -- corrections and examples (labelled documents) -------------------------------------------


class CorrectionIn(StrictIn):
    """One message an operator labels: ``id`` learned as a document of ``group``."""

    id: str = Field(
        min_length=1,
        max_length=200,
        description="The message's id (the id it was queued or routed with).",
    )
    group: int = Field(description="Stable id of the group it belongs to.")
    text: str | None = Field(
        default=None,
        description="The message text; left out, it is looked up by id (the stream entry "
        "of that id, or a message this API process flagged for review).",
    )


class CorrectionsIn(StrictIn):
    """Corrections to queue (confirming a routing is a correction to the same group)."""

    documents: list[CorrectionIn] = Field(min_length=1)


class CorrectionOut(BaseModel):
    id: str
    group: int
    stream_id: str = Field(description="Stream id of the queued correction entry.")
    text_from: Literal["request", "stream", "flagged"] = Field(
        description="Where the text came from: the request, the message's stream entry, or "
        "this process's memory of flagged messages."
    )
    learned_as_document: bool = Field(
        default=False,
        description="The message was already learned as an unlabelled document.",
    )
    unlabelled_weight_remaining: float | None = Field(
        default=None,
        description="When it was learned as an unlabelled document: the share of the model's "
        "running average its unlabelled copy still holds (it fades as stepwise EM forgets; "
        "null when unknown).",
    )


class CorrectionsOut(BaseModel):
    model: str
    queued: int = Field(description="Correction entries added to the stream.")
    corrections: list[CorrectionOut]


class WithdrawOut(BaseModel):
    model: str
    id: str
    stream_id: str = Field(description="Stream id of the queued withdraw entry.")
    held: bool = Field(
        description="The loaded state holds a labelled document of that id (a withdraw of an "
        "id it does not hold, or not yet, removes nothing)."
    )


class LabelledDocumentOut(BaseModel):
    id: str
    group: int
    source: Literal["correction", "example"]
    excerpt: str = Field(description="The first 200 characters of its text.")
    tokens: int = Field(description="Known tokens it was learned with.")


class CorrectionList(BaseModel):
    model: str
    version: int = Field(description="Version of the state listed.")
    documents: list[LabelledDocumentOut]
    groups: dict[str, int] = Field(description="Labelled documents per group id.")
    sources: dict[str, int] = Field(description="Labelled documents per source.")
    queued: int = Field(
        description="Corrections, examples and withdrawals queued but not learned yet."
    )
    limit: int = Field(description="The most labelled documents the model holds.")


class ExamplesIn(StrictIn):
    examples: list[str] = Field(min_length=1, description="Example message texts.")


class ExampleOut(BaseModel):
    id: str = Field(description="Labelled-document id of the example (from its text).")
    stream_id: str


class ExamplesOut(BaseModel):
    model: str
    group: int
    queued: int
    examples: list[ExampleOut]


class EventOut(BaseModel):
    kind: Literal["birth", "merge", "retire"]
    groups: list[int] = Field(description="[new], [survivor, absorbed] or [retired].")
    reason: str
    documents: list[int] = Field(description="Stream positions of a birth's founding documents.")
    position: int = Field(description="Documents learned when it happened.")
    time: float
    version: int = Field(description="The version that holds the change.")
    snapshot_id: str | None = Field(description="Snapshot of the state just before it.")
    evidence: dict[str, float]
    undone: bool = Field(description="A rollback left the version behind.")


class EventList(BaseModel):
    model: str
    events: list[EventOut] = Field(description="Newest first.")


# -- snapshots ------------------------------------------------------------------------------


SnapshotKind = Literal[SNAPSHOT_KINDS]  # type: ignore[valid-type]


class SnapshotIn(StrictIn):
    reason: str = Field(default="requested", min_length=1, max_length=500)


class SnapshotOut(BaseModel):
    id: str
    reason: str
    kind: SnapshotKind = Field(  # type: ignore[valid-type]
        description="requested (kept until deleted), automatic (pruned by retention) or "
        "pre-rollback (the copy a rollback took of the state it replaced)."
    )
    automatic: bool
    created: float
    version: int
    documents_learned: int
    weights: list[float]
    checksum: str
    watermark: str
    size: int


class SnapshotList(BaseModel):
    model: str
    snapshots: list[SnapshotOut]


class RestoreIn(StrictIn):
    """Rollback to a snapshot; with ``replay`` the stream after it is learned again."""

    replay: bool = Field(
        description="Required: true learns the stream after the snapshot again (minus the "
        "skipped ranges); false drops everything learned after the snapshot."
    )
    skip_ids: list[Annotated[list[str], Field(min_length=2, max_length=2)]] = Field(
        default_factory=list, description="Inclusive [first, last] stream-id ranges to skip."
    )
    skip_received: list[Annotated[list[float], Field(min_length=2, max_length=2)]] = Field(
        default_factory=list, description="Inclusive [from, to] receive-time ranges (unix s)."
    )


class RestoreOut(BaseModel):
    version: int
    parent: int
    replaced_version: int
    snapshot_id: str
    safety_snapshot_id: str | None
    replay: bool
    watermark: str
    skip_ids: list[list[str]]
    skip_received: list[list[float]]
    until: str
    labels_restored: bool = Field(
        description="The labels became the snapshot's (false: a snapshot written before "
        "snapshots kept labels; the labels were left as they were)."
    )
    label_words_restored: bool = Field(
        description="The words each restored label was given to (the stale-label check's "
        "reference) became the snapshot's (false: a snapshot written before snapshots kept "
        "them; only recorded words older than the snapshot were kept)."
    )


# -- drift ----------------------------------------------------------------------------------


class HistoryRowOut(BaseModel):
    time: float
    version: int
    documents_learned: int
    weights: list[float]
    log_likelihood_per_token: float | None
    no_evidence: int
    batch_documents: int
    group_ids: list[int] | None = Field(default=None, description="Id of each weight.")
    kind: Literal["checkpoint", "rollback"] = Field(
        default="checkpoint", description="What wrote this version."
    )
    snapshot_id: str | None = Field(default=None, description="A rollback's restored snapshot.")
    replay: bool | None = Field(
        default=None, description="A rollback's: whether the stream after the snapshot is re-read."
    )


class HistoryOut(BaseModel):
    model: str
    rows: list[HistoryRowOut]


class DriftOut(BaseModel):
    model: str
    reference: str
    js_divergence: float
    weights_now: list[float]
    weights_reference: list[float]
    weight_change: list[float]
    word_divergence: list[float | None] | None = Field(
        description="Per reference group (snapshot reference): JS of its words against the "
        "group of the same id now; null for a group gone since."
    )
    threshold: float
    alert: bool
    group_ids: list[int] | None = Field(
        default=None, description="Ids of the groups present at both points (the weights')."
    )
    groups_born: list[int] | None = Field(default=None, description="Present now only.")
    groups_gone: list[int] | None = Field(default=None, description="At the reference only.")


class AlertOut(BaseModel):
    id: str
    time: float
    kind: str
    reason: str
    value: float
    threshold: float
    version: int


class AlertList(BaseModel):
    model: str
    alerts: list[AlertOut]


# -- health ---------------------------------------------------------------------------------


class HealthOut(BaseModel):
    status: Literal["ok"]


class ModelReadiness(BaseModel):
    name: str
    version: int
    routable: bool
    worker_heartbeat_age_seconds: float | None


class ReadinessOut(BaseModel):
    status: Literal["ready", "degraded", "unavailable"]
    redis: Literal["reachable", "unreachable"]
    redis_error: str | None
    models_loaded: int
    models: list[ModelReadiness]
    reasons: list[str] = Field(description="Why the status is not 'ready'.")
