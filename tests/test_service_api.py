"""End to end through HTTP on a real Redis: create, learn the invented demo days, route, label,
snapshot, roll back; routing answers equal the model core's and scikit-learn's."""

from __future__ import annotations

import warnings
from collections.abc import Iterator

import numpy as np
import pytest

from mixture.counting import count_texts
from mixture.routing import route_texts
from service.app import create_app
from service.demo_data import default_days, fresh_examples, generate_day
from service.runner import WorkerPool
from service.runtime import ServiceRuntime
from service.settings import Settings
from service.testing import QUICK_OPTIONS, learned, wait_until
from state.connection import redis_from_url
from state.store import ModelStore

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis

SCALE = 0.5  # 300 invented messages a day


@pytest.fixture
def api(redis_url: str, model_name: str) -> Iterator[TestClient]:
    settings = Settings(redis_url=redis_url, reload_poll_interval=0.05)
    pool = lambda _runtime: WorkerPool(redis_url, 0.1, models=[model_name])  # noqa: E731
    app = create_app(settings, background_factories=[pool])
    with TestClient(app) as client:
        yield client


def sklearn_posterior(state, texts: list[str]) -> np.ndarray:
    """The posterior from scikit-learn's MultinomialNB given our parameters.

    Source: scikit-learn, sklearn.naive_bayes.MultinomialNB.predict_proba, which computes
    softmax(X @ feature_log_prob_.T + class_log_prior_); with the mixture's log weights and log
    word probabilities it is the mixture posterior p(k | d) of Bayes' rule.
    """
    from sklearn.naive_bayes import MultinomialNB

    params = state.parameters()
    active = np.flatnonzero(params.active)
    batch = count_texts(texts, state.tokenizer, state.vocabulary, grow=False)
    nb = MultinomialNB()
    nb.classes_ = np.arange(params.log_weights.shape[0])
    nb.class_log_prior_ = params.log_weights
    nb.feature_log_prob_ = params.log_word_prob[active].T
    nb.n_features_in_ = active.size
    nb.feature_count_ = np.zeros_like(nb.feature_log_prob_)
    nb.class_count_ = np.zeros(params.log_weights.shape[0])
    return nb.predict_proba(batch.counts[:, active])


def posterior_matrix(results: list[dict], k: int) -> np.ndarray:
    out = np.zeros((len(results), k))
    for i, result in enumerate(results):
        for entry in result["posterior"]:
            out[i, entry["group"]] = entry["probability"]
    return out


def test_create_learn_route_label_snapshot_rollback(
    api: TestClient, redis_url: str, model_name: str
) -> None:
    plans = default_days(SCALE)
    k = 8
    config = {"n_groups": k, "warmup_documents": plans[0].messages, "batch_size": 100}
    options = {**QUICK_OPTIONS, "review_threshold": 0.75}
    created = api.post("/models", json={"name": model_name, "config": config, "options": options})
    assert created.status_code == 201, created.text
    assert created.json()["version"] == 0

    # routing before the first checkpoint is refused with a reason, not answered from nothing
    early = api.post(f"/models/{model_name}/route", json={"text": "is the ferry late"})
    assert early.status_code == 409 and "warm-up" in early.json()["detail"]

    fed = 0
    for plan in plans[:3]:
        messages = generate_day(plan, seed=3)
        answer = api.post(
            f"/models/{model_name}/documents",
            json={"documents": [{"id": m.id, "text": m.text} for m in messages]},
        )
        assert answer.status_code == 202, answer.text
        assert answer.json()["queued"] == len(messages)
        fed += len(messages)
    model = wait_until(lambda: learned(api, model_name, fed), what="the first three days")
    assert model["warmed_up"] and model["version"] >= 1
    assert model["documents_learned"] == fed

    examples = fresh_examples(seed=5)
    texts = [m.text for m in examples]
    routed = api.post(
        f"/models/{model_name}/route",
        json={"documents": [{"id": m.id, "text": m.text} for m in examples]},
    )
    assert routed.status_code == 200, routed.text
    body = routed.json()
    assert body["version"] == model["version"] and body["degraded"] is False
    assert body["review_threshold"] == 0.75  # the model's own option
    results = body["results"]
    assert [r["id"] for r in results] == [m.id for m in examples]

    store = ModelStore(redis_from_url(redis_url), model_name)
    state = store.load_state()
    reference = route_texts(state, texts)
    served = posterior_matrix(results, k)
    # the HTTP answer is the model core's posterior, serialised without loss
    np.testing.assert_allclose(served, reference.posterior, rtol=0, atol=1e-12)
    assert [r["group"] for r in results] == reference.group.tolist()
    # ... and scikit-learn's MultinomialNB with the same parameters agrees (see sklearn_posterior)
    np.testing.assert_allclose(served, sklearn_posterior(state, texts), rtol=0, atol=1e-10)
    for result, margin, top_p in zip(
        results, reference.margin, reference.posterior.max(axis=1), strict=True
    ):
        assert ("low_posterior" in result["review_reasons"]) == (top_p < 0.75)
        assert result["margin"] == pytest.approx(float(margin), abs=1e-12)
        ordered = [p["probability"] for p in result["posterior"]]
        assert ordered == sorted(ordered, reverse=True)
        assert sum(ordered) == pytest.approx(1.0, abs=1e-9)

    # the junk example has words the model never saw: review, whatever its group
    junk = results[-1]
    assert junk["unknown_tokens"] > 0

    # routing can also queue the documents for learning, answering with their stream ids
    before = store.stream_info()["length"]
    learn = api.post(
        f"/models/{model_name}/route", json={"text": texts[1], "id": "learn-1", "learn": True}
    ).json()
    assert learn["queued"] is True and learn["results"][0]["stream_id"]
    assert store.stream_info()["length"] == before + 1
    fed += 1
    model = wait_until(lambda: learned(api, model_name, fed), what="the queued document")

    # top n on request
    top = api.post(f"/models/{model_name}/route", json={"text": texts[0], "top": 2}).json()
    assert len(top["results"][0]["posterior"]) == 2

    # an operator names the group of the lost-property example
    lost = next(r for r in results if r["id"] == "fresh-lost_property")
    group = lost["group"]
    labelled = api.put(
        f"/models/{model_name}/groups/{group}/label",
        json={"label": "Lost property", "destination": "lost-and-found@saltgrass.invalid"},
    )
    assert labelled.status_code == 200, labelled.text
    again = api.post(f"/models/{model_name}/route", json={"text": examples[2].text}).json()
    assert again["results"][0]["group"] == group
    assert again["results"][0]["label"] == "Lost property"
    # the label lives in Redis: another API replica serves it too
    replica = ServiceRuntime(Settings(redis_url=redis_url), redis_from_url(redis_url))
    assert replica.model(model_name).labels[group]["label"] == "Lost property"
    groups = api.get(f"/models/{model_name}/groups", params={"top": 5}).json()["groups"]
    assert len(groups) == k and groups[group]["label"] == "Lost property"
    assert sum(g["weight"] for g in groups) == pytest.approx(1.0, abs=1e-9)
    assert all(len(g["top_terms"]) == 5 for g in groups)

    snap = api.post(f"/models/{model_name}/snapshots", json={"reason": "before the storm"})
    assert snap.status_code == 201, snap.text
    snap_body = snap.json()
    assert snap_body["version"] == model["version"]
    assert api.get(f"/models/{model_name}/snapshots/{snap_body['id']}").status_code == 200

    storm = generate_day(plans[3], seed=3)
    api.post(
        f"/models/{model_name}/documents",
        json={"documents": [{"id": m.id, "text": m.text} for m in storm]},
    )
    fed += len(storm)
    after_storm = wait_until(lambda: learned(api, model_name, fed), what="the storm day")
    # the API reloaded the new checkpoints by itself (version poll)
    assert after_storm["version"] > snap_body["version"]
    history = api.get(f"/models/{model_name}/drift/history").json()["rows"]
    assert [row["version"] for row in history] == sorted(row["version"] for row in history)
    drift = api.get(f"/models/{model_name}/drift", params={"reference": snap_body["id"]}).json()
    assert 0.0 <= drift["js_divergence"] <= 1.0
    assert drift["word_divergence"] is not None and len(drift["word_divergence"]) == k

    restored = api.post(
        f"/models/{model_name}/snapshots/{snap_body['id']}/restore", json={"replay": False}
    )
    assert restored.status_code == 200, restored.text
    rollback = restored.json()
    assert rollback["parent"] == snap_body["version"]
    assert rollback["replaced_version"] == after_storm["version"]

    after = api.post(
        f"/models/{model_name}/route", json={"documents": [{"text": t} for t in texts]}
    )
    after_body = after.json()
    # the routing answer after the rollback comes from the restored version ...
    assert after_body["version"] == rollback["version"]
    snapshot_state = store.snapshot_state(snap_body["id"])
    np.testing.assert_allclose(
        posterior_matrix(after_body["results"], k),
        route_texts(snapshot_state, texts).posterior,
        rtol=0,
        atol=1e-12,
    )
    # ... and the operator's label survived it
    assert after_body["results"][2]["label"] == "Lost property"
    listed = api.get(f"/models/{model_name}/snapshots").json()["snapshots"]
    assert {snap_body["id"], rollback["safety_snapshot_id"]} <= {s["id"] for s in listed}

    # clearing a label (both fields null) removes it from routing answers
    assert api.put(f"/models/{model_name}/groups/{group}/label", json={}).status_code == 200
    cleared = api.post(f"/models/{model_name}/route", json={"text": examples[2].text}).json()
    assert cleared["results"][0]["label"] is None

    deleted = api.delete(f"/models/{model_name}/snapshots/{snap_body['id']}")
    assert deleted.status_code == 204
    assert api.get(f"/models/{model_name}/snapshots/{snap_body['id']}").status_code == 404


def test_health_ready_and_openapi(api: TestClient, model_name: str) -> None:
    assert api.get("/health").json() == {"status": "ok"}
    ready = api.get("/ready")
    assert ready.status_code == 200
    assert ready.json()["redis"] == "reachable"
    schema = api.get("/openapi.json").json()
    paths = set(schema["paths"])
    for path in (
        "/models",
        "/models/{model}",
        "/models/{model}/route",
        "/models/{model}/documents",
        "/models/{model}/groups",
        "/models/{model}/groups/{group}/label",
        "/models/{model}/snapshots",
        "/models/{model}/snapshots/{snapshot_id}/restore",
        "/models/{model}/drift",
        "/models/{model}/drift/history",
        "/models/{model}/drift/alerts",
        "/health",
        "/ready",
    ):
        assert path in paths, path
    assert api.get("/docs").status_code == 200
