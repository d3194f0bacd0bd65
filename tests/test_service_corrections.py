"""Corrections and examples over HTTP: answers, errors naming the field, the text looked up by
id, seeds at creation, listing and withdrawing, and the roles.

The worker runs in this process (``WorkerThread``); what it learns is checked against the
model core in tests/test_worker_corrections.py. Here the API's figures are checked against
the loaded state itself (``state.labelled``, ``state.corrections.remaining_of``) and against
the stream's entries. The messages are invented (tests/worker_support.py's ferry inbox).
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator
from typing import Any

import pytest
import redis

from service.app import create_app
from service.settings import Settings
from service.testing import QUICK_OPTIONS, wait_until
from state.corrections import remaining_of
from state.store import ModelStore
from state.stream import Labelled, decode_entry, example_id
from tests.ops_support import ADMIN, READ, keyed_settings
from tests.worker_support import WorkerThread, ferry_texts
from worker.learner import Worker

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis

CONFIG = {"n_groups": 3, "warmup_documents": 200, "batch_size": 50, "n_restarts": 1}
OPTIONS = {**QUICK_OPTIONS, "flush_partial_seconds": None, "lease_seconds": 1.0}


@pytest.fixture
def api(redis_url: str) -> Iterator[TestClient]:
    settings = Settings(redis_url=redis_url, reload_poll_interval=0.05)
    with TestClient(create_app(settings)) as client:
        yield client


def create(api: TestClient, name: str, **extra: Any) -> dict[str, Any]:
    body = {"name": name, "config": CONFIG, "options": OPTIONS, **extra}
    made = api.post("/models", json=body)
    assert made.status_code == 201, made.text
    return made.json()


def learned_through(api: TestClient, model: str, documents: int) -> bool:
    answer = api.get(f"/models/{model}").json()
    return answer["documents_learned"] >= documents and answer["stream"]["lag"] == 0


def test_corrections_are_queued_learned_listed_and_withdrawn(
    api: TestClient, redis_client: redis.Redis, model_name: str
) -> None:
    create(api, model_name)
    texts = ferry_texts(300, seed=1)
    ids = [f"m-{i}" for i in range(300)]
    answer = api.post(
        f"/models/{model_name}/documents",
        json={"documents": [{"id": i, "text": t} for i, t in zip(ids, texts, strict=True)]},
    )
    assert answer.status_code == 202
    with WorkerThread(Worker(redis_client, model_name)):
        wait_until(lambda: learned_through(api, model_name, 300), 60, what="learned")
        # the text left out is found by id in the stream; one given is taken as given
        sent = api.post(
            f"/models/{model_name}/corrections",
            json={
                "documents": [
                    {"id": "m-10", "group": 1},
                    {"id": "new-1", "group": 2, "text": "storm delay at the harbour"},
                ]
            },
        )
        assert sent.status_code == 202, sent.text
        body = sent.json()
        assert body["queued"] == 2
        first, second = body["corrections"]
        assert first["text_from"] == "stream" and second["text_from"] == "request"
        # m-10 was learned as an unlabelled document: the answer says how much of it is left
        loaded = ModelStore(redis_client, model_name)
        state = loaded.load_state()
        sid = loaded.texts_of(["m-10"])[0][0]
        assert first["learned_as_document"] is True
        assert first["unlabelled_weight_remaining"] == pytest.approx(
            remaining_of(state.metadata, state.log_forgetting, sid), rel=1e-12
        )
        assert 0 < first["unlabelled_weight_remaining"] < 1
        assert second["learned_as_document"] is False
        assert second["unlabelled_weight_remaining"] is None
        # the entries in the stream are the corrections, with the looked-up text
        rows = redis_client.xrange(loaded.keys.docs, min=first["stream_id"], max=first["stream_id"])
        entry = decode_entry(first["stream_id"], rows[0][1])
        assert isinstance(entry, Labelled)
        assert (entry.target, entry.group, entry.text) == ("m-10", 1, texts[10])

        def listed() -> dict[str, Any]:
            return api.get(f"/models/{model_name}/corrections").json()

        wait_until(lambda: len(listed()["documents"]) == 2, 30, what="the corrections learned")
        listing = listed()
        assert [(d["id"], d["group"], d["source"]) for d in listing["documents"]] == [
            ("m-10", 1, "correction"),
            ("new-1", 2, "correction"),
        ]
        assert listing["documents"][0]["excerpt"] == texts[10][:200]
        assert listing["groups"] == {"1": 1, "2": 1} and listing["sources"] == {"correction": 2}
        assert listing["queued"] == 0 and listing["limit"] == 10_000
        only = api.get(f"/models/{model_name}/corrections", params={"group": 2}).json()
        assert [d["id"] for d in only["documents"]] == ["new-1"]
        # the dashboard asks for the flagged ids only; the counts stay the whole state's
        chosen = api.get(
            f"/models/{model_name}/corrections", params={"ids": ["m-10", "never-sent"]}
        ).json()
        assert [d["id"] for d in chosen["documents"]] == ["m-10"]
        assert chosen["sources"] == {"correction": 2}
        too_many = api.get(
            f"/models/{model_name}/corrections", params={"ids": [f"x-{i}" for i in range(101)]}
        )
        assert too_many.status_code == 422
        # confirming again is idempotent: still two labelled documents
        again = api.post(
            f"/models/{model_name}/corrections", json={"documents": [{"id": "m-10", "group": 1}]}
        )
        assert again.status_code == 202
        withdrawn = api.delete(f"/models/{model_name}/corrections/new-1")
        assert withdrawn.status_code == 202 and withdrawn.json()["held"] is True
        wait_until(
            lambda: [d["id"] for d in listed()["documents"]] == ["m-10"], 30, what="withdrawn"
        )
        assert listed()["queued"] == 0


def test_refusals_name_the_field(api: TestClient, model_name: str) -> None:
    create(api, model_name)
    url = f"/models/{model_name}/corrections"

    def refused(body: dict[str, Any], status: int = 422) -> dict[str, Any]:
        answer = api.post(url, json=body)
        assert answer.status_code == status, answer.text
        return answer.json()

    assert refused({"documents": [{"id": "x", "group": 7, "text": "a"}]})["field"] == (
        "documents.0.group"
    )
    missing = refused(
        {"documents": [{"id": "a", "group": 0, "text": "t"}, {"id": "b", "group": 0}]}
    )
    assert missing["field"] == "documents.1.text" and "send its text" in missing["detail"]
    assert refused({"documents": [{"id": "a", "group": 0, "text": "  "}]})["field"] == (
        "documents.0.text"
    )
    assert refused({"documents": [{"id": "a", "group": 0, "text": "x"}] * 2})["field"] == (
        "documents.1.id"
    )
    assert refused({"documents": []})["field"] == "documents"
    assert refused({"documents": [{"id": "a", "group": "0", "text": "x"}]})["field"] == (
        "documents.0.group"
    )
    assert (
        api.post(
            "/models/nope/corrections", json={"documents": [{"id": "a", "group": 0}]}
        ).status_code
        == 404
    )
    assert api.get("/models/nope/corrections").status_code == 404
    assert api.delete("/models/nope/corrections/a").status_code == 404
    assert api.post("/models/nope/groups/0/examples", json={"examples": ["a"]}).status_code == 404
    examples = f"/models/{model_name}/groups/0/examples"
    assert (
        api.post(f"/models/{model_name}/groups/9/examples", json={"examples": ["a"]}).status_code
        == 404
    )
    assert api.post(examples, json={"examples": ["ok", ""]}).json()["field"] == "examples.1"
    assert api.post(examples, json={"examples": []}).status_code == 422


def test_the_text_of_a_flagged_message_is_found_by_its_id(
    api: TestClient, redis_client: redis.Redis, model_name: str
) -> None:
    create(api, model_name)
    store = ModelStore(redis_client, model_name)
    store.enqueue(ferry_texts(200, seed=9))
    with WorkerThread(Worker(redis_client, model_name)):
        wait_until(lambda: learned_through(api, model_name, 200), 60, what="warm-up learned")
    # routed (not queued) with a review flag: the answer is all that knows the text; a long
    # one (over the 200 characters GET .../flagged shows) is kept whole too
    long_text = "quartz zebra " * 100 + "fog"
    unknown = ["zebra quartz", long_text, "x" * 30_000]
    answer = api.post(
        f"/models/{model_name}/route",
        json={"documents": [{"id": f"f-{i}", "text": t} for i, t in enumerate(unknown)]},
    )
    assert answer.status_code == 200
    assert [r["review"] for r in answer.json()["results"]] == [True, True, True]
    sent = api.post(
        f"/models/{model_name}/corrections",
        json={"documents": [{"id": "f-0", "group": 0}, {"id": "f-1", "group": 2}]},
    )
    assert sent.status_code == 202, sent.text
    assert [c["text_from"] for c in sent.json()["corrections"]] == ["flagged", "flagged"]
    sid = sent.json()["corrections"][1]["stream_id"]
    rows = redis_client.xrange(store.keys.docs, min=sid, max=sid)
    assert decode_entry(sid, rows[0][1]).text == long_text
    # one over the whole-text bound is only an excerpt: the text must be sent
    cut = api.post(
        f"/models/{model_name}/corrections", json={"documents": [{"id": "f-2", "group": 0}]}
    )
    assert cut.status_code == 422 and cut.json()["field"] == "documents.0.text"


def test_seeds_at_creation_give_labelled_groups_and_examples_first(
    api: TestClient, redis_client: redis.Redis, model_name: str
) -> None:
    seeds = [
        {
            "label": "Refunds",
            "destination": "refunds@ferry.invalid",
            "examples": ["refund my fare ticket", "cancel booking refund"],
        },
        {"label": "Lost property", "examples": ["lost bag on deck locker"]},
    ]
    created = create(api, model_name, seeds=seeds)
    assert created["n_groups"] == 3
    groups = api.get(f"/models/{model_name}/groups").json()["groups"]
    assert [(g["group"], g["label"], g["destination"]) for g in groups] == [
        (0, "Refunds", "refunds@ferry.invalid"),
        (1, "Lost property", None),
        (2, None, None),
    ]
    store = ModelStore(redis_client, model_name)
    entries = [decode_entry(s.decode(), f) for s, f in redis_client.xrange(store.keys.docs)]
    assert [(e.target, e.group, e.source) for e in entries] == [
        (example_id(0, "refund my fare ticket"), 0, "example"),
        (example_id(0, "cancel booking refund"), 0, "example"),
        (example_id(1, "lost bag on deck locker"), 1, "example"),
    ]
    assert api.get(f"/models/{model_name}/corrections").json()["queued"] == 3
    api.post(
        f"/models/{model_name}/documents",
        json={"documents": [{"text": t} for t in ferry_texts(200, seed=4)]},
    )
    with WorkerThread(Worker(redis_client, model_name)):
        wait_until(lambda: learned_through(api, model_name, 200), 60, what="warm-up learned")
        more = api.post(
            f"/models/{model_name}/groups/1/examples",
            json={"examples": ["found a pushchair on deck"]},
        )
        assert more.status_code == 202
        assert more.json()["examples"][0]["id"] == example_id(1, "found a pushchair on deck")

        def counts() -> dict[str, Any]:
            return api.get(f"/models/{model_name}/corrections").json()

        wait_until(lambda: counts()["groups"] == {"0": 2, "1": 2}, 30, what="examples learned")
        assert counts()["sources"] == {"example": 4}
    # without n_groups: one more group than seeds; with too few groups: 422 naming seeds
    other = model_name + "-b"
    try:
        made = api.post("/models", json={"name": other, "seeds": [seeds[0]] * 3})
        assert made.status_code == 201 and made.json()["n_groups"] == 4
    finally:
        api.delete(f"/models/{other}")
    refused = api.post(
        "/models", json={"name": other, "config": {"n_groups": 2}, "seeds": [seeds[0]] * 3}
    )
    assert refused.status_code == 422 and refused.json()["field"] == "seeds"
    empty = api.post("/models", json={"name": other, "seeds": [{"examples": [" "]}]})
    assert empty.status_code == 422 and empty.json()["field"] == "seeds.0.examples.0"
    assert api.get(f"/models/{other}").status_code == 404


def test_corrections_are_admin_and_the_list_is_read(redis_url: str, model_name: str) -> None:
    # Corrections change the model at once and are never forgotten: an operator's act (admin),
    # not an intake system's (read role: route and queue documents)
    with TestClient(create_app(keyed_settings(redis_url))) as client:
        made = client.post(
            "/models",
            json={"name": model_name, "config": CONFIG, "options": OPTIONS},
            headers=ADMIN,
        )
        assert made.status_code == 201
        body = {"documents": [{"id": "a", "group": 0, "text": "lost bag"}]}
        url = f"/models/{model_name}/corrections"
        assert client.post(url, json=body, headers=READ).status_code == 403
        assert client.post(url, json=body).status_code == 401
        assert client.post(url, json=body, headers=ADMIN).status_code == 202
        assert client.delete(f"{url}/a", headers=READ).status_code == 403
        assert client.delete(f"{url}/a", headers=ADMIN).status_code == 202
        examples = f"/models/{model_name}/groups/0/examples"
        assert client.post(examples, json={"examples": ["x"]}, headers=READ).status_code == 403
        assert client.post(examples, json={"examples": ["x"]}, headers=ADMIN).status_code == 202
        assert client.get(url, headers=READ).status_code == 200
        client.delete(f"/models/{model_name}", headers=ADMIN)
