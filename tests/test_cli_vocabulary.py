"""One vocabulary: the offline command line and the API use the same names for the same
condition (review reasons, posterior shape, snapshot kinds), and both accept the same two
forms of a body ({"text"} or {"documents"}) for routing and for queueing."""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from mixture.routing import REVIEW_REASONS, route_texts
from mixture.serialize import state_to_bytes
from service.app import create_app
from service.cli import main
from service.schemas import RouteResult, SnapshotOut
from service.settings import Settings
from service.testing import first_checkpoint, uvicorn_thread, wait_until
from state.records import SNAPSHOT_KINDS

pytestmark = pytest.mark.redis


@pytest.fixture
def served(redis_url: str) -> Iterator[str]:
    settings = Settings(redis_url=redis_url, reload_poll_interval=0.05)
    with uvicorn_thread(create_app(settings)) as url:
        yield url


def test_the_schema_names_come_from_the_tables() -> None:
    reasons = RouteResult.model_json_schema()["properties"]["review_reasons"]["items"]["enum"]
    assert reasons == list(REVIEW_REASONS)
    kinds = SnapshotOut.model_json_schema()["properties"]["kind"]["enum"]
    assert kinds == list(SNAPSHOT_KINDS)


def test_offline_and_api_name_the_same_conditions_alike(
    served: str, redis_client, redis_url: str, model_name: str, tmp_path: Path, capsys
) -> None:
    http = httpx.Client(base_url=served)
    store, worker, messages = first_checkpoint(http, redis_client, redis_url, model_name, 4, 3)
    worker.stop()
    state = store.load_state()
    model_file = tmp_path / "same.model"
    model_file.write_bytes(state_to_bytes(state))
    known_word = next(
        token
        for m in messages
        for token in state.tokenizer.tokenize(m.text)
        if state.vocabulary.lookup(token) >= 0
    )
    documents = [
        {"id": "no-words", "text": "qqzx vvkq zzyxw"},  # nothing the model knows
        {"id": "mostly-unknown", "text": f"{known_word} qqzx vvkq zzyxw wqqz"},
        {"id": "plain", "text": messages[0].text},
    ]
    docs = tmp_path / "docs.jsonl"
    docs.write_text("".join(json.dumps(d) + "\n" for d in documents))

    version = store.version()
    body = {"documents": documents}
    wait_until(
        lambda: (
            http.post(f"/models/{model_name}/route", json=body).json().get("version") == version
        ),
        what="the API to serve the checkpoint",
    )
    api = http.post(f"/models/{model_name}/route", json=body).json()["results"]
    assert main(["route", str(docs), "--model-file", str(model_file)]) == 0
    offline = [json.loads(line) for line in capsys.readouterr().out.splitlines()]

    by_condition = {row["id"]: row for row in offline}
    assert "no_known_words" in by_condition["no-words"]["review_reasons"]
    assert "mostly_unknown_words" in by_condition["mostly-unknown"]["review_reasons"]
    reference = route_texts(state, [d["text"] for d in documents])  # the model core itself
    for i, (ours, theirs) in enumerate(zip(offline, api, strict=True)):
        assert ours["id"] == theirs["id"]
        # same names for the same condition; `atypical` needs the API's recent statistics
        assert ours["review_reasons"] == [r for r in theirs["review_reasons"] if r != "atypical"]
        assert ours["review"] == bool(ours["review_reasons"])
        # same posterior shape: [{group, probability}], most probable first
        assert [p["group"] for p in ours["posterior"]] == [p["group"] for p in theirs["posterior"]]
        for mine, served_entry in zip(ours["posterior"], theirs["posterior"], strict=True):
            assert mine["probability"] == pytest.approx(served_entry["probability"], abs=1e-12)
            assert mine["probability"] == pytest.approx(
                reference.posterior[i, mine["group"]], abs=1e-12
            )
        shared = set(ours) - {"review_reasons", "posterior"}
        assert shared <= set(theirs)
    http.close()


def test_documents_accept_text_like_route(
    served: str, redis_client, redis_url: str, model_name: str
) -> None:
    http = httpx.Client(base_url=served)
    made = http.post("/models", json={"name": model_name, "config": {"n_groups": 2}})
    assert made.status_code == 201, made.text
    one = http.post(f"/models/{model_name}/documents", json={"text": "my bicycle", "id": "b1"})
    assert one.status_code == 202, one.text
    assert one.json()["queued"] == 1 and one.json()["stream_ids"][0] is not None
    again = http.post(f"/models/{model_name}/documents", json={"text": "my bicycle", "id": "b1"})
    assert again.json()["duplicates"] == 1  # the id makes it idempotent, as in the list form
    both = http.post(
        f"/models/{model_name}/documents",
        json={"text": "x", "documents": [{"text": "y"}]},
    )
    assert both.status_code == 422  # one form at a time, the same rule as /route
    http.close()


def test_snapshot_list_names_the_rollback_copy_as_the_api_does(
    served: str, redis_client, redis_url: str, model_name: str, capsys
) -> None:
    http = httpx.Client(base_url=served)
    store, worker, _ = first_checkpoint(http, redis_client, redis_url, model_name, 3, 5)
    worker.stop()
    snap = store.create_snapshot("before the test")
    restored = http.post(
        f"/models/{model_name}/snapshots/{snap.id}/restore", json={"replay": False}
    ).json()
    api_kinds = {
        s["id"]: s["kind"] for s in http.get(f"/models/{model_name}/snapshots").json()["snapshots"]
    }
    assert api_kinds[restored["safety_snapshot_id"]] == "pre-rollback"
    assert main(["snapshot", "list", "--model", model_name, "--api", served]) == 0
    lines = capsys.readouterr().out.splitlines()
    row = next(line for line in lines if line.startswith(restored["safety_snapshot_id"]))
    assert row.split()[3] == "pre-rollback"
    assert main(["snapshot", "delete", restored["safety_snapshot_id"], "--model", model_name,
                 "--api", served]) == 0  # fmt: skip
    assert restored["safety_snapshot_id"] not in {
        s["id"] for s in http.get(f"/models/{model_name}/snapshots").json()["snapshots"]
    }
    http.close()
