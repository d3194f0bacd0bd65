"""Prometheus metrics at ``/metrics`` (text format), one registry per app.

Two kinds of figures:

* counted by this API process as it answers (``mixroute_route_requests_total``, the latency
  histogram, documents routed, queued, and review flags by reason), taken from the very
  answers the clients get, so they match what the API said;
* read at scrape time from the sources the API answers from: the in-memory model
  (version, documents learned, group weights: what ``GET /models/{model}`` says) and Redis
  through ``state/`` (stream length, pending, lag and lost entries, last checkpoint time and
  age, drift divergence as ``GET /models/{model}/drift`` computes it, alerts raised, worker
  heartbeat).

The review-flag counting also keeps the most recent flagged documents of each model in memory
(:class:`FlaggedDocuments`, ``flagged_documents_kept`` per model, listed with the text cut to
200 characters) for the dashboard; they are lost when the process restarts. Each keeps an id
(the client's, else the stream id of a document queued with ``learn``, else a generated
``flagged-...`` one) and its text up to ``flagged_text_chars``, so that a correction naming
only the id (the dashboard's Confirm and Reassign) can be given its text:
:meth:`FlaggedDocuments.text_for`.
"""

from __future__ import annotations

import collections
import contextlib
import logging
import re
import threading
import time
import uuid
from collections.abc import Iterator
from typing import Any

from fastapi import APIRouter, FastAPI, Request
from fastapi.responses import Response
from prometheus_client import CollectorRegistry, Counter, Histogram
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.exposition import CONTENT_TYPE_LATEST, generate_latest
from prometheus_client.registry import Collector
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.settings import Settings

log = logging.getLogger(__name__)

_MODEL_PATH = re.compile(r"^/models/([A-Za-z0-9][A-Za-z0-9_.-]{0,63})$")
_ROUTE_PATH = re.compile(r"^/models/([A-Za-z0-9][A-Za-z0-9_.-]{0,63})/(route|documents)$")
SNIPPET_CHARACTERS = 200
# Routing latency buckets, seconds: single documents take well under a millisecond of model
# time, batches of thousands take tens of milliseconds (common practice, no source).
LATENCY_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0)


class _StatusSeen:
    """An ASGI ``send`` that passes every message on and keeps the response's status
    (500 until the response starts: an app that raised before answering)."""

    def __init__(self, send: Send) -> None:
        self.send = send
        self.status = 500

    async def __call__(self, message: Message) -> None:
        if message["type"] == "http.response.start":
            self.status = int(message["status"])
        await self.send(message)


class FlaggedDocuments:
    """The most recent documents flagged for review, per model, in this process's memory.

    Parameters
    ----------
    keep : int
        Documents kept per model (0 keeps none).
    text_chars : int
        Characters of each document's text kept for :meth:`text_for` (the listing shows the
        first 200 only).
    """

    def __init__(self, keep: int, text_chars: int = 20_000) -> None:
        self.keep = keep
        self.text_chars = text_chars
        self._by_model: dict[str, collections.deque[dict[str, Any]]] = {}
        self._lock = threading.Lock()

    def add(self, model: str, records: list[dict[str, Any]]) -> None:
        """Keep ``records`` (dicts as listed, plus ``full_text``; the newest ``keep`` stay)."""
        if self.keep <= 0 or not records:
            return
        with self._lock:
            queue = self._by_model.setdefault(model, collections.deque(maxlen=self.keep))
            queue.extend(records)

    def recent(self, model: str, count: int | None = None) -> list[dict[str, Any]]:
        """Newest first, as listed (text cut to 200 characters, no full text)."""
        with self._lock:
            items = list(self._by_model.get(model, ()))
        items.reverse()
        items = items if count is None else items[:count]
        return [{k: v for k, v in item.items() if k != "full_text"} for item in items]

    def text_for(self, model: str, doc_id: str) -> str | None:
        """The text of the newest flagged document of ``model`` with id ``doc_id`` (None when
        none is held): what a correction that leaves the text out is learned with. The text
        is the whole message; one longer than ``text_chars`` characters is not held."""
        with self._lock:
            items = list(self._by_model.get(model, ()))
        for item in reversed(items):
            if item.get("id") != doc_id:
                continue
            if item.get("full_text") is not None:
                return str(item["full_text"])
            # a record without the whole text: its listed text only when nothing was cut
            return None if item.get("truncated") else str(item.get("text") or "")
        return None

    def forget(self, model: str) -> None:
        with self._lock:
            self._by_model.pop(model, None)


class ServiceMetrics:
    """The counters this process keeps, registered in its own registry."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self.route_requests = Counter(
            "mixroute_route_requests",
            "Routing requests answered, by model and HTTP status.",
            ["model", "status"],
            registry=registry,
        )
        self.route_latency = Histogram(
            "mixroute_route_latency_seconds",
            "Time to answer a routing request (whole request, in this process).",
            ["model"],
            buckets=LATENCY_BUCKETS,
            registry=registry,
        )
        self.documents_routed = Counter(
            "mixroute_documents_routed",
            "Documents routed (answered with a group).",
            ["model"],
            registry=registry,
        )
        self.documents_queued = Counter(
            "mixroute_documents_queued",
            "Documents this process added to a model's stream (duplicates not counted).",
            ["model"],
            registry=registry,
        )
        self.review_flags = Counter(
            "mixroute_review_flags",
            "Routed documents answered with review=true, by reason (one document may have "
            "several reasons; reason=any counts each flagged document once).",
            ["model", "reason"],
            registry=registry,
        )


def _known_model(app: Any, model: str) -> bool:
    runtime = getattr(app.state, "runtime", None)
    return runtime is not None and model in runtime.models


class RoutingMeter:
    """Pure ASGI middleware: counts routing and queueing answers from their own bodies.

    Only ``POST /models/{model}/route`` and ``POST /models/{model}/documents`` are looked at;
    every other request passes straight through. A model label is only used for models this
    process has loaded (a typo in a URL must not create a new time series).
    """

    def __init__(
        self, app: ASGIApp, metrics: ServiceMetrics, flagged: FlaggedDocuments, owner: Any
    ) -> None:
        self.app = app
        self.metrics = metrics
        self.flagged = flagged
        self.owner = owner

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http" and scope["method"] == "DELETE":
            await self._deleting(scope, receive, send)
            return
        match = _ROUTE_PATH.match(scope.get("path", "")) if scope["type"] == "http" else None
        if match is None or scope["method"] != "POST":
            await self.app(scope, receive, send)
            return
        model, kind = match.group(1), match.group(2)
        seen = _StatusSeen(send)
        started = time.perf_counter()
        try:
            await self.app(scope, receive, seen)
        finally:
            elapsed = time.perf_counter() - started
            try:
                self._count(model, kind, seen.status, elapsed, scope)
            except Exception:  # a metric must never break an answer
                log.exception("counting a %s answer failed", kind)

    async def _deleting(self, scope: Scope, receive: Receive, send: Send) -> None:
        """A deleted model's flagged documents (message text) leave memory with it."""
        match = _MODEL_PATH.match(scope.get("path", ""))
        seen = _StatusSeen(send)
        await self.app(scope, receive, seen)
        if match is not None and seen.status == 204:
            self.flagged.forget(match.group(1))

    def _count(self, model: str, kind: str, status: int, elapsed: float, scope: Scope) -> None:
        """Count one answer from what the routers left in the ASGI scope (no JSON parsing)."""
        if not _known_model(self.owner, model):
            model = "_unknown"
        if kind == "documents":
            if status == 202:
                self.metrics.documents_queued.labels(model).inc(scope.get("mixroute.queued", 0))
            return
        self.metrics.route_requests.labels(model, str(status)).inc()
        self.metrics.route_latency.labels(model).observe(elapsed)
        answer = scope.get("mixroute.answer")
        if status != 200 or answer is None:
            return
        results = answer["results"]
        self.metrics.documents_routed.labels(model).inc(len(results))
        queued = sum(1 for r in results if r.get("stream_id") is not None)
        if queued:
            self.metrics.documents_queued.labels(model).inc(queued)
        if not any(r.get("review") for r in results):
            return
        texts = scope.get("mixroute.texts") or []
        records = []
        now = time.time()
        for i, result in enumerate(results):
            if not result.get("review"):
                continue
            self.metrics.review_flags.labels(model, "any").inc()
            for reason in result.get("review_reasons", ()):
                self.metrics.review_flags.labels(model, str(reason)).inc()
            posterior = result.get("posterior") or []
            best = max((p["probability"] for p in posterior), default=None)
            text = texts[i] if i < len(texts) else ""
            doc_id = result.get("id") or result.get("stream_id") or _generated_id()
            records.append(
                {
                    "time": now,
                    "id": doc_id,
                    "group": result.get("group"),
                    "label": result.get("label"),
                    "reasons": list(result.get("review_reasons", ())),
                    "probability": best,
                    "version": answer.get("version"),
                    "text": text[:SNIPPET_CHARACTERS],
                    "truncated": len(text) > SNIPPET_CHARACTERS,
                    # a text over the bound is not kept: a correction must never learn a cut message
                    "full_text": text if len(text) <= self.flagged.text_chars else None,
                }
            )
        if model != "_unknown":
            self.flagged.add(model, records)


def _generated_id() -> str:
    """An id for a flagged document that came without one and was not queued."""
    return f"flagged-{uuid.uuid4().hex[:16]}"


class ModelCollector(Collector):
    """Gauges read at scrape time from the app's runtime (memory first, then Redis)."""

    def __init__(self, app: Any) -> None:
        self.app = app

    def collect(self) -> Iterator[Metric]:
        runtime = getattr(self.app.state, "runtime", None)
        if runtime is None:
            return
        from service.runtime import REDIS_DOWN_ERRORS

        version = GaugeMetricFamily(
            "mixroute_model_version", "Checkpoint version this process serves.", labels=["model"]
        )
        learned = GaugeMetricFamily(
            "mixroute_documents_learned",
            "Documents learned by the state this process serves (falls after a rollback).",
            labels=["model"],
        )
        weight = GaugeMetricFamily(
            "mixroute_group_weight", "Mixture weight of each group.", labels=["model", "group"]
        )
        label_divergence = GaugeMetricFamily(
            "mixroute_label_divergence",
            "JS divergence (bits) of each labelled group's words now from those its label was "
            "given to; the label is stale above mixroute_label_stale_threshold.",
            labels=["model", "group"],
        )
        label_threshold = GaugeMetricFamily(
            "mixroute_label_stale_threshold",
            "The model's label_stale_threshold (bits).",
            labels=["model"],
        )
        from_redis = {
            key: family(name, documentation, labels=["model"])
            for key, (family, name, documentation) in _REDIS_FAMILIES.items()
        }
        group_events = CounterMetricFamily(
            "mixroute_group_events",
            "Group events written (births, merges, retirements), by kind.",
            labels=["model", "kind"],
        )
        from_redis["group_events"] = group_events
        redis_up = GaugeMetricFamily(
            "mixroute_redis_up", "1 when Redis answered this scrape, else 0 (degraded)."
        )
        reachable = True
        now = time.time()
        for name, loaded in sorted(runtime.models.items()):
            version.add_metric([name], loaded.version)
            state = loaded.state
            learned.add_metric([name], state.documents_learned if state is not None else 0)
            ids = loaded.group_ids  # the label is the stable group id, not the position
            k = len(ids)
            weights = state.weights().tolist() if state is not None else [1.0 / k] * k
            for group, value in zip(ids, weights, strict=True):
                weight.add_metric([name, str(group)], value)
            for group, value in sorted(loaded.label_divergence.items()):
                label_divergence.add_metric([name, str(group)], value)
            label_threshold.add_metric([name], loaded.label_stale_threshold)
            if not reachable:
                continue
            try:
                self._from_redis(runtime, name, loaded, now, from_redis)
            except REDIS_DOWN_ERRORS:
                reachable = False
        if reachable and not runtime.models:
            try:
                runtime.redis.ping()
            except REDIS_DOWN_ERRORS:
                reachable = False
        redis_up.add_metric([], 1.0 if reachable else 0.0)
        yield from (version, learned, weight, label_divergence, label_threshold)
        yield from (*from_redis.values(), redis_up)

    @staticmethod
    def _from_redis(
        runtime: Any, name: str, loaded: Any, now: float, families: dict[str, Metric]
    ) -> None:
        from state.errors import StateError

        def add(key: str, value: float) -> None:
            families[key].add_metric([name], value)  # type: ignore[attr-defined]

        store = loaded.store
        info = store.stream_info()
        add("length", info["length"])
        add("pending", info.get("pending", 0))
        lag, lost = _entry_counts(runtime.redis, store, loaded)
        if lag is not None:  # Redis 7 and later count the entries ever added
            add("lag", lag)
        add("lost", lost)
        add("lag_age", _unlearned_age(runtime.redis, store.keys.docs, info, now))
        rows = store.history(limit=1)
        if rows:
            add("checkpoint_time", rows[-1].time)
            add("checkpoint_age", max(0.0, now - rows[-1].time))
        add("threshold", store.options.drift_threshold)
        with contextlib.suppress(StateError):  # no checkpoint yet: no divergence to report
            add("divergence", store.drift().js_divergence)
        add("alerts", store.alert_count())
        counts = store.event_counts()
        for kind in ("birth", "merge", "retire"):
            families["group_events"].add_metric([name, kind], counts.get(kind, 0))  # type: ignore[attr-defined]
        status = store.worker_status()
        if status is not None:
            add("heartbeat", max(0.0, now - status.time))


# Per-model families read from Redis at scrape time (label: model): key -> (family type, name,
# help), in the order they are exposed.
_REDIS_FAMILIES: dict[str, tuple[Any, str, str]] = {
    "length": (
        GaugeMetricFamily,
        "mixroute_stream_length_entries",
        "Entries in the model's stream.",
    ),
    "pending": (
        GaugeMetricFamily,
        "mixroute_stream_pending_entries",
        "Stream entries not yet learned, as GET /models/{model} reports them (stream.pending).",
    ),
    "lag": (
        GaugeMetricFamily,
        "mixroute_stream_lag_entries",
        "Stream entries not yet passed by the learner: entries ever added minus the state's "
        "entries counter (only where Redis counts them, version 7 and later).",
    ),
    "lost": (
        CounterMetricFamily,
        "mixroute_stream_lost_entries",
        "Stream entries removed before the learner read them (a gap: XDEL or a trim outside "
        "mixroute), as recorded by the served state's line; each gap also raises an alert "
        "of kind stream-gap.",
    ),
    "lag_age": (
        GaugeMetricFamily,
        "mixroute_stream_lag_seconds",
        "Age of the oldest stream entry not yet learned (after the watermark); 0 when "
        "the model has caught up with its stream.",
    ),
    "checkpoint_time": (
        GaugeMetricFamily,
        "mixroute_last_checkpoint_timestamp_seconds",
        "Unix time of the newest checkpoint (its drift-history row).",
    ),
    "checkpoint_age": (
        GaugeMetricFamily,
        "mixroute_checkpoint_age_seconds",
        "Seconds since the newest checkpoint at scrape time.",
    ),
    "divergence": (
        GaugeMetricFamily,
        "mixroute_drift_divergence",
        "Jensen-Shannon divergence (base 2) of the weights now against the drift window "
        "(as GET /models/{model}/drift answers).",
    ),
    "threshold": (
        GaugeMetricFamily,
        "mixroute_drift_threshold",
        "Divergence above which an alert is raised.",
    ),
    "alerts": (
        CounterMetricFamily,
        "mixroute_drift_alerts",
        "Drift alerts raised by checkpoints (entries of the model's alerts stream).",
    ),
    "heartbeat": (
        GaugeMetricFamily,
        "mixroute_worker_heartbeat_age_seconds",
        "Seconds since the learning worker last reported.",
    ),
}


def _entry_counts(client: Any, store: Any, loaded: Any) -> tuple[int | None, int]:
    """(lag in entries, entries lost) of a model.

    Lag = the stream's ``entries-added`` (Redis >= 7, else None) minus the entries counter
    of the current state (``entries_read``: the state layer's summary, else the served
    state's metadata; 0 before the first checkpoint). Lost = the served state's
    ``entries_lost``.
    """
    from state.reader import stream_counts

    summary = store.summary() or {}
    metadata = loaded.state.metadata if loaded.state is not None else {}
    entries_read = summary.get("entries_read", metadata.get("entries_read", 0))
    lost = int(summary.get("entries_lost", metadata.get("entries_lost", 0)))
    added = stream_counts(client, store.keys.docs).entries_added
    if added is None:
        return None, lost
    return max(int(added) - int(entries_read), 0), lost


def _unlearned_age(client: Any, stream_key: str, info: dict[str, Any], now: float) -> float:
    """Seconds since the first entry after the watermark was added (stream ids start with
    their time in milliseconds); 0 when nothing is left to learn."""
    from state.stream import parse_stream_id

    last, watermark = info.get("last_id"), info.get("watermark") or "0-0"
    if last is None or parse_stream_id(last) <= parse_stream_id(watermark):
        return 0.0
    entries = client.xrange(stream_key, min=f"({watermark}", count=1)
    if not entries:
        return 0.0
    first_ms = parse_stream_id(entries[0][0])[0]
    return max(0.0, now - first_ms / 1000.0)


router = APIRouter(tags=["metrics"])


@router.get(
    "/metrics",
    summary="Prometheus metrics (text format)",
    response_class=Response,
    responses={200: {"content": {CONTENT_TYPE_LATEST: {}}, "description": "Metrics"}},
)
def metrics(request: Request) -> Response:
    """Every metric of this process in the Prometheus text exposition format."""
    registry: CollectorRegistry = request.app.state.metrics_registry
    return Response(generate_latest(registry), media_type=CONTENT_TYPE_LATEST)


def install(app: FastAPI, settings: Settings) -> ServiceMetrics:
    """Give the app its own registry, the ``/metrics`` route and the counting middleware."""
    registry = CollectorRegistry(auto_describe=True)
    service_metrics = ServiceMetrics(registry)
    registry.register(ModelCollector(app))
    flagged = FlaggedDocuments(settings.flagged_documents_kept, settings.flagged_text_chars)
    app.state.metrics_registry = registry
    app.state.metrics = service_metrics
    app.state.flagged = flagged
    app.include_router(router)
    app.add_middleware(RoutingMeter, metrics=service_metrics, flagged=flagged, owner=app)
    return service_metrics
