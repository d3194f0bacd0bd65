"""PATCH changes only the fields given, PUT replaces the whole label (both as the README says),
the label history per group (bounded, generation-checked, deleted with the model), the
command line's ``label`` (PATCH by default, ``--replace`` for PUT), and the flagged-message
memory that keeps an id and the whole text for corrections (``FlaggedDocuments.text_for``)."""

from __future__ import annotations

import json
from collections.abc import Iterator

import httpx
import pytest
import redis

from service.app import create_app
from service.cli import main
from service.metrics import FlaggedDocuments
from service.settings import Settings
from service.testing import first_checkpoint, uvicorn_thread, wait_until
from state.errors import ModelNotFoundError
from state.keys import ModelKeys
from state.labels import LABEL_HISTORY_LIMIT
from state.store import ModelStore

pytestmark = pytest.mark.redis


@pytest.fixture
def served(redis_url: str) -> Iterator[str]:
    settings = Settings(redis_url=redis_url, reload_poll_interval=0.05)
    with uvicorn_thread(create_app(settings)) as url:
        yield url


def test_patch_changes_only_the_fields_given_and_put_replaces_both(
    served: str, redis_client: redis.Redis, redis_url: str, model_name: str
) -> None:
    http = httpx.Client(base_url=served)
    store, worker, _ = first_checkpoint(http, redis_client, redis_url, model_name, 3, 4)
    worker.stop()
    version = store.version()
    wait_until(lambda: http.get(f"/models/{model_name}").json()["version"] == version)
    path = f"/models/{model_name}/groups/1/label"

    put = http.put(path, json={"label": "Lost property", "destination": "lost@example.invalid"})
    assert put.status_code == 200, put.text
    assert put.json()["label_words_version"] == version  # a set records the group's words
    # PATCH: only the destination changes; the label and the recorded words stay
    patched = http.patch(path, json={"destination": "found@example.invalid"}).json()
    assert (patched["label"], patched["destination"]) == ("Lost property", "found@example.invalid")
    # PATCH null clears one field
    patched = http.patch(path, json={"destination": None}).json()
    assert (patched["label"], patched["destination"]) == ("Lost property", None)
    # PUT is a whole replacement: the label left out is cleared
    put = http.put(path, json={"destination": "desk@example.invalid"}).json()
    assert (put["label"], put["destination"]) == (None, "desk@example.invalid")
    # routing answers carry the result
    routed = http.post(f"/models/{model_name}/route", json={"text": "ferry ticket"}).json()
    assert "label_stale" in routed["results"][0]

    history = http.get(f"{path}/history").json()
    assert history["group"] == 1
    rows = history["history"]
    assert [r["action"] for r in rows] == ["set", "patch", "patch", "set"]
    assert rows[1]["fields"] == {"destination": "found@example.invalid"}
    assert rows[2]["fields"] == {"destination": None}
    assert [r["words_recorded"] for r in rows] == [True, False, False, True]
    assert all(r["version"] == version for r in rows)
    assert [r["label"] for r in rows] == ["Lost property"] * 3 + [None]
    # both empty is a clear, and is recorded as one
    cleared = http.patch(path, json={"destination": None}).json()
    assert (cleared["label"], cleared["destination"]) == (None, None)
    assert cleared["label_divergence"] is None and cleared["label_stale"] is False
    assert http.get(f"{path}/history").json()["history"][-1]["action"] == "clear"


def test_bad_patches_are_refused_naming_the_field(
    served: str, redis_client: redis.Redis, model_name: str
) -> None:
    http = httpx.Client(base_url=served)
    made = http.post("/models", json={"name": model_name, "config": {"n_groups": 3}})
    assert made.status_code == 201, made.text
    path = f"/models/{model_name}/groups/0/label"
    empty = http.patch(path, json={})
    assert empty.status_code == 422 and empty.json()["field"] == "body"
    assert "refresh" in empty.json()["detail"]
    unknown = http.patch(path, json={"colour": "red"})
    assert unknown.status_code == 422 and "colour" in unknown.text
    blank = http.patch(path, json={"label": ""})
    assert blank.status_code == 422 and "label" in blank.text
    assert (
        http.patch(f"/models/{model_name}/groups/9/label", json={"label": "x"}).status_code == 404
    )
    assert http.get(f"/models/{model_name}/groups/9/label/history").status_code == 404
    # before any checkpoint there are no words to record: never stale, still labelled
    ok = http.patch(path, json={"label": "Timetables"}).json()
    assert ok["label"] == "Timetables" and ok["label_words_version"] is None
    assert http.get(f"{path}/history").json()["history"][0]["words_recorded"] is False


def test_the_history_is_bounded_generation_checked_and_deleted_with_the_model(
    redis_client: redis.Redis, model_name: str
) -> None:
    from mixture.config import MixtureConfig
    from state.registry import Registry

    registry = Registry(redis_client)
    registry.create(model_name, MixtureConfig(n_groups=2))
    store = ModelStore(redis_client, model_name)
    for i in range(LABEL_HISTORY_LIMIT + 7):
        store.patch_group_label(0, {"label": f"name {i}"})
    rows = store.label_history(0)
    assert len(rows) == LABEL_HISTORY_LIMIT
    assert rows[-1]["label"] == f"name {LABEL_HISTORY_LIMIT + 6}"
    assert rows[0]["label"] == "name 7"  # the oldest went first
    keys = ModelKeys(model_name)
    assert redis_client.exists(keys.label_history)

    registry.delete(model_name)
    assert not redis_client.exists(keys.label_history, keys.label_words, keys.labels)
    # a handle of the deleted model writes nothing into the one created again under its name
    registry.create(model_name, MixtureConfig(n_groups=2))
    with pytest.raises(ModelNotFoundError):
        store.patch_group_label(0, {"label": "late"})
    assert ModelStore(redis_client, model_name).label_history(0) == []


def test_the_command_line_label_patches_and_replaces(
    served: str, redis_client: redis.Redis, model_name: str, capsys: pytest.CaptureFixture[str]
) -> None:
    http = httpx.Client(base_url=served)
    assert (
        http.post("/models", json={"name": model_name, "config": {"n_groups": 3}}).status_code
        == 201
    )
    common = ["--api", served, "--model", model_name]
    assert (
        main(["label", "2", "--label", "Pets", "--destination", "pets@example.invalid", *common])
        == 0
    )
    assert main(["label", "2", "--destination", "animals@example.invalid", *common]) == 0
    group = http.get(f"/models/{model_name}/groups/2").json()
    assert (group["label"], group["destination"]) == ("Pets", "animals@example.invalid")
    assert main(["label", "2", "--clear-destination", *common]) == 0
    assert http.get(f"/models/{model_name}/groups/2").json()["destination"] is None
    assert main(["label", "2", "--replace", "--destination", "desk@example.invalid", *common]) == 0
    group = http.get(f"/models/{model_name}/groups/2").json()
    assert (group["label"], group["destination"]) == (None, "desk@example.invalid")
    capsys.readouterr()
    assert main(["label", "2", "--history", "--json", *common]) == 0
    rows = json.loads(capsys.readouterr().out)["history"]
    assert [r["action"] for r in rows] == ["patch", "patch", "patch", "set"]
    assert main(["label", "2", *common]) != 0  # nothing to change: refused, nothing sent
    assert len(http.get(f"/models/{model_name}/groups/2/label/history").json()["history"]) == 4


def test_flagged_memory_keeps_an_id_and_the_whole_text_for_corrections() -> None:
    flagged = FlaggedDocuments(keep=3, text_chars=1000)
    long_text = "lost rucksack " * 40  # 560 characters: more than the listing's 200
    flagged.add(
        "m",
        [
            {"id": "a", "text": long_text[:200], "truncated": True, "full_text": long_text},
            {"id": "b", "text": "short", "truncated": False, "full_text": "short"},
        ],
    )
    assert flagged.text_for("m", "a") == long_text
    assert flagged.text_for("m", "b") == "short"
    assert flagged.text_for("m", "zzz") is None and flagged.text_for("other", "a") is None
    listed = flagged.recent("m")
    assert [d["id"] for d in listed] == ["b", "a"]
    assert all("full_text" not in d for d in listed) and len(listed[1]["text"]) == 200
    flagged.add("m", [{"id": x, "text": x, "full_text": x} for x in ("c", "d", "e")])
    assert flagged.text_for("m", "a") is None  # bounded: the oldest left memory


def test_a_flagged_message_without_a_client_id_gets_one_the_listing_shows(
    served: str, redis_client: redis.Redis, redis_url: str, model_name: str
) -> None:
    http = httpx.Client(base_url=served)
    store, worker, _ = first_checkpoint(http, redis_client, redis_url, model_name, 3, 6)
    worker.stop()
    wait_until(lambda: http.get(f"/models/{model_name}").json()["version"] == store.version())
    junk = "qqzx vvkq zzyxw " * 30  # no known word: flagged; 480 characters
    queued = http.post(f"/models/{model_name}/route", json={"text": junk, "learn": True}).json()
    not_queued = http.post(f"/models/{model_name}/route", json={"text": "zzyq qqvx"}).json()
    assert queued["results"][0]["review"] and not_queued["results"][0]["review"]
    listed = http.get(f"/models/{model_name}/flagged").json()["documents"]
    ids = [d["id"] for d in listed]
    assert ids[1] == queued["results"][0]["stream_id"]  # the id the answer gave: its stream id
    assert ids[0].startswith("flagged-")  # neither: a generated one
    assert listed[1]["truncated"] is True and len(listed[1]["text"]) == 200
