"""Request and response bodies of the HTTP API (pydantic), shared by every router.

Range checks of model configuration are done once, by ``mixture.config.MixtureConfig`` and
``state.options.ModelOptions``; the schemas here only fix the types, so the OpenAPI document
tells clients the shape while the model core stays the single source of the limits.
"""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator


class Problem(BaseModel):
    """An error answer."""

    detail: str = Field(description="What was wrong and what to do about it.")
    field: str | None = Field(default=None, description="The offending field, when one is.")


# -- documents ------------------------------------------------------------------------------


class DocumentIn(BaseModel):
    """One document. ``id`` is optional; a given id makes queueing idempotent."""

    model_config = ConfigDict(extra="forbid")

    id: str | None = Field(default=None, min_length=1, max_length=200)
    text: str = Field(description="The message text (UTF-8; not empty).")


class DocumentsIn(BaseModel):
    """Documents to queue for learning."""

    model_config = ConfigDict(extra="forbid")

    documents: list[DocumentIn]


class QueuedOut(BaseModel):
    """Documents accepted into the model's stream (202)."""

    model: str
    queued: int = Field(description="Documents added to the stream.")
    duplicates: int = Field(description="Documents whose id was seen recently: not added again.")
    stream_ids: list[str | None] = Field(description="Stream id per document, null if duplicate.")


# -- routing --------------------------------------------------------------------------------


class RouteIn(BaseModel):
    """Documents to route: either ``text`` (one document) or ``documents`` (many)."""

    model_config = ConfigDict(extra="forbid")

    text: str | None = Field(default=None, description="A single document's text.")
    id: str | None = Field(default=None, min_length=1, max_length=200)
    documents: list[DocumentIn] | None = None
    top: int | None = Field(
        default=None, ge=1, le=10_000, description="Return only the n most probable groups."
    )
    learn: bool = Field(default=False, description="Also queue the documents for learning.")

    @model_validator(mode="after")
    def _one_form(self) -> RouteIn:
        if (self.text is None) == (self.documents is None):
            raise ValueError('give either "text" (one document) or "documents" (a list)')
        if self.documents is not None and self.id is not None:
            raise ValueError('"id" goes inside each entry of "documents"')
        return self

    def as_documents(self) -> list[DocumentIn]:
        if self.documents is not None:
            return self.documents
        return [DocumentIn(id=self.id, text=self.text or "")]


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
    review_reasons: list[
        Literal["low_posterior", "no_known_words", "mostly_unknown_words", "atypical"]
    ]
    stream_id: str | None = Field(
        default=None, description="Stream id when the document was queued for learning."
    )


class RouteOut(BaseModel):
    model: str
    version: int = Field(description="Model version whose parameters answered.")
    degraded: bool = Field(description="True when Redis is unreachable: answered from memory.")
    notice: str | None = Field(default=None, description="Why the answer is degraded, if it is.")
    queued: bool = Field(description="True when the documents were queued for learning.")
    review_threshold: float
    results: list[RouteResult]


# -- models ---------------------------------------------------------------------------------


class TokenizerIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    min_length: int | None = None
    max_length: int | None = None
    stop_words: str | None = None
    fold_urls: bool | None = None
    fold_emails: bool | None = None
    fold_numbers: bool | None = None


class ConfigIn(BaseModel):
    """MixtureConfig fields; omitted ones take the model core's defaults."""

    model_config = ConfigDict(extra="forbid")

    n_groups: int | None = None
    vocabulary_limit: int | None = None
    word_pseudocount: float | None = None
    weight_pseudocount: float | None = None
    step_exponent: float | None = None
    batch_size: int | None = None
    half_life_documents: float | None = None
    warmup_documents: int | None = None
    n_restarts: int | None = None
    max_iter: int | None = None
    tolerance: float | None = None
    tokenizer: TokenizerIn | None = None

    def to_config_dict(self) -> dict[str, Any]:
        data = self.model_dump(exclude_none=True)
        if "tokenizer" in data:
            data["tokenizer"] = {k: v for k, v in data["tokenizer"].items() if v is not None}
        return data


class ModelIn(BaseModel):
    """A model to create."""

    model_config = ConfigDict(extra="forbid")

    name: str = Field(description="1-64 letters, digits, '_', '.', '-'; starts alphanumeric.")
    config: ConfigIn = Field(default_factory=ConfigIn)
    options: dict[str, Any] = Field(
        default_factory=dict, description="state.options.ModelOptions fields (checkpointing...)."
    )


class ModelOut(BaseModel):
    name: str
    n_groups: int
    version: int = Field(description="0 until the first checkpoint.")
    documents_learned: int
    warmed_up: bool
    weights: list[float]
    review_threshold: float
    created: float
    config: dict[str, Any]
    options: dict[str, Any]
    stream: dict[str, Any] | None = Field(default=None, description="Stream length, lag, ...")


class ModelList(BaseModel):
    models: list[ModelOut]


# -- groups ---------------------------------------------------------------------------------


class TermScore(BaseModel):
    term: str
    score: float


class GroupOut(BaseModel):
    group: int
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


class GroupList(BaseModel):
    model: str
    version: int
    groups: list[GroupOut]


class LabelIn(BaseModel):
    """Operator's name for a group and where its messages go."""

    model_config = ConfigDict(extra="forbid")

    label: str | None = Field(default=None, min_length=1, max_length=200)
    destination: str | None = Field(default=None, min_length=1, max_length=200)


# -- snapshots ------------------------------------------------------------------------------


class SnapshotIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    reason: str = Field(default="requested", min_length=1, max_length=500)


class SnapshotOut(BaseModel):
    id: str
    reason: str
    kind: str
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


class RestoreIn(BaseModel):
    """Rollback to a snapshot; with ``replay`` the stream after it is learned again."""

    model_config = ConfigDict(extra="forbid")

    replay: bool = False
    skip_ids: list[tuple[str, str]] = Field(
        default_factory=list, description="Inclusive [first, last] stream-id ranges to skip."
    )
    skip_received: list[tuple[float, float]] = Field(
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


# -- drift ----------------------------------------------------------------------------------


class HistoryRowOut(BaseModel):
    time: float
    version: int
    documents_learned: int
    weights: list[float]
    log_likelihood_per_token: float | None
    no_evidence: int
    batch_documents: int


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
    word_divergence: list[float] | None
    threshold: float
    alert: bool


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
