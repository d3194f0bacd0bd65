"""/metrics: parsed with prometheus-client's own text parser, values equal the API's answers."""

from __future__ import annotations

import math
import warnings
from collections.abc import Iterator

import pytest
from prometheus_client.parser import text_string_to_metric_families

from service.app import create_app
from service.settings import Settings
from tests.ops_support import READ, route_examples, trained_client

pytestmark = pytest.mark.redis


def samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """Every sample of an exposition as {(name, sorted labels): value}.

    Parsed by prometheus_client.parser.text_string_to_metric_families, the library's own
    reader of the Prometheus text format (source: prometheus-client, the format's reference
    Python implementation), so a malformed line fails here.
    """
    out = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            out[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
    return out


@pytest.fixture
def client(redis_url: str, model_name: str) -> Iterator[object]:
    with trained_client(redis_url, model_name) as c:
        yield c


def scrape_when_still(client, model: str):  # type: ignore[no-untyped-def]
    """The model's JSON, /metrics and the drift answers taken while no checkpoint happens
    between them (the worker is idle once everything is learned; retried if it was not)."""
    for _ in range(5):
        before = client.get(f"/models/{model}").json()
        text = client.get("/metrics", headers=READ).text
        drift = client.get(f"/models/{model}/drift").json()
        alerts = client.get(f"/models/{model}/drift/alerts", params={"count": 10_000}).json()
        history = client.get(f"/models/{model}/drift/history", params={"limit": 1}).json()
        after = client.get(f"/models/{model}").json()
        if before["version"] == after["version"]:
            return before, text, drift, alerts, history
    raise AssertionError("the model kept checkpointing while idle")


def test_metrics_match_the_api(client, model_name: str) -> None:  # type: ignore[no-untyped-def]
    answers = [route_examples(client, model_name) for _ in range(2)]
    model, text, drift, alerts, history = scrape_when_still(client, model_name)
    values = samples(text)
    m = (("model", model_name),)

    assert values[("mixroute_model_version", m)] == model["version"]
    assert values[("mixroute_documents_learned", m)] == model["documents_learned"]
    for group, weight in enumerate(model["weights"]):
        # the text format writes floats with repr(), which round-trips exactly
        assert values[("mixroute_group_weight", (("group", str(group)), *m))] == weight
    assert values[("mixroute_stream_length_entries", m)] == model["stream"]["length"]
    assert values[("mixroute_stream_pending_entries", m)] == model["stream"]["pending"]
    # everything learned and checkpointed: nothing waits for a worker
    assert values[("mixroute_stream_lag_seconds", m)] == 0.0
    assert values.get(("mixroute_stream_lag_entries", m), 0) == 0
    assert values[("mixroute_drift_divergence", m)] == drift["js_divergence"]
    assert values[("mixroute_drift_threshold", m)] == drift["threshold"]
    assert values[("mixroute_drift_alerts_total", m)] == len(alerts["alerts"])
    last_row = history["rows"][-1]
    assert values[("mixroute_last_checkpoint_timestamp_seconds", m)] == last_row["time"]
    assert values[("mixroute_checkpoint_age_seconds", m)] >= 0.0
    assert values[("mixroute_redis_up", ())] == 1.0

    # counted from the answers the clients got
    results = [r for a in answers for r in a["results"]]
    flagged = [r for r in results if r["review"]]
    assert flagged, "the two documents without a known word must be flagged"
    assert values[("mixroute_route_requests_total", (*m, ("status", "200")))] == 2
    assert values[("mixroute_route_latency_seconds_count", m)] == 2
    assert values[("mixroute_documents_routed_total", m)] == len(results)
    assert values[("mixroute_review_flags_total", (*m, ("reason", "any")))] == len(flagged)
    for reason in {x for r in flagged for x in r["review_reasons"]}:
        expected = sum(reason in r["review_reasons"] for r in flagged)
        assert values[("mixroute_review_flags_total", (*m, ("reason", reason)))] == expected
    queued = values[("mixroute_documents_queued_total", m)]
    assert queued == model["stream"]["length"] == model["documents_learned"]

    # the dashboard's list of flagged documents holds the same documents, newest first
    listed = client.get(f"/models/{model_name}/flagged", params={"count": 100}).json()
    assert [d["id"] for d in listed["documents"]] == [r["id"] for r in reversed(flagged)]
    junk = next(d for d in listed["documents"] if d["id"] == "junk-2")
    assert junk["text"] == "zzyzx quuxle frobnic" and "no_known_words" in junk["reasons"]


def test_unknown_model_in_a_url_makes_no_new_series(client, model_name: str) -> None:  # type: ignore[no-untyped-def]
    assert client.post("/models/no-such-model/route", json={"text": "ferry"}).status_code == 404
    values = samples(client.get("/metrics").text)
    names = {dict(labels).get("model") for _, labels in values}
    assert "no-such-model" not in names
    assert values[("mixroute_route_requests_total", (("model", "_unknown"), ("status", "404")))]


def test_each_app_has_its_own_registry() -> None:
    """Two apps in one process: no duplicate-metric error, and counts do not mix."""
    first = create_app(Settings())
    second = create_app(Settings())
    assert first.state.metrics_registry is not second.state.metrics_registry
    first.state.metrics.route_requests.labels("x", "200").inc()
    sample = second.state.metrics_registry.get_sample_value(
        "mixroute_route_requests_total", {"model": "x", "status": "200"}
    )
    assert sample is None or math.isclose(sample, 0.0)


def test_a_model_nobody_learns_shows_its_lag(client, model_name: str) -> None:  # type: ignore[no-untyped-def]
    idle = f"{model_name}-idle"  # the test's worker pool follows model_name only
    created = client.post("/models", json={"name": idle, "config": {"n_groups": 3}})
    assert created.status_code == 201, created.text
    try:
        docs = [{"id": f"d{i}", "text": f"ferry ticket refund number {i}"} for i in range(3)]
        assert client.post(f"/models/{idle}/documents", json={"documents": docs}).status_code == 202
        values = samples(client.get("/metrics").text)
        m = (("model", idle),)
        assert values[("mixroute_stream_length_entries", m)] == 3
        assert values[("mixroute_documents_queued_total", m)] == 3
        assert values[("mixroute_documents_learned", m)] == 0
        assert values[("mixroute_model_version", m)] == 0
        assert values[("mixroute_stream_lag_seconds", m)] > 0.0
        assert ("mixroute_last_checkpoint_timestamp_seconds", m) not in values
        flagged = client.post(f"/models/{idle}/route", json={"text": "qwxz vbnmk"})
        assert flagged.status_code == 409  # no checkpoint yet: nothing routed, nothing kept
    finally:
        assert client.delete(f"/models/{idle}").status_code == 204


def test_deleting_a_model_forgets_its_flagged_documents(client, model_name: str) -> None:  # type: ignore[no-untyped-def]
    route_examples(client, model_name)
    flagged = client.app.state.flagged
    assert flagged.recent(model_name)
    assert client.delete(f"/models/{model_name}").status_code == 204
    assert flagged.recent(model_name) == []


def test_metrics_answer_from_memory_when_redis_is_gone(tmp_path) -> None:  # type: ignore[no-untyped-def]
    from state.connection import EmbeddedRedis
    from tests.ops_support import ADMIN, WithKey, make_app, train

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        from fastapi.testclient import TestClient

    server = EmbeddedRedis(tmp_path / "redis", appendfsync="no").start()
    try:
        app = make_app(server.url, "gone", redis_timeout=0.5)
        with TestClient(app) as raw:
            client = WithKey(raw, ADMIN)
            model = train(client, "gone", days=1, snapshot_after=0)
            up = samples(client.get("/metrics").text)
            assert up[("mixroute_redis_up", ())] == 1.0
            server.stop()
            answer = client.get("/metrics")
            assert answer.status_code == 200
            down = samples(answer.text)
            m = (("model", "gone"),)
            assert down[("mixroute_redis_up", ())] == 0.0
            assert down[("mixroute_model_version", m)] == model["version"]
            assert down[("mixroute_documents_learned", m)] == model["documents_learned"]
            assert ("mixroute_stream_length_entries", m) not in down
    finally:
        server.stop()
