"""Strict HTTP input and honest errors (issue 10, items 2 and 10).

The reference for "every field is settable" is the dataclasses themselves
(``dataclasses.fields`` of MixtureConfig, TokenizerConfig and ModelOptions): the test derives a
valid non-default value for each field from the dataclass (checked by constructing it) and
expects POST /models to store exactly that. The type rules are JSON's (RFC 8259: true is not a
number, "8" is a string) and the duplicate-key rule is RFC 8259 section 4's "names within an
object SHOULD be unique", which we enforce.
"""

from __future__ import annotations

import dataclasses
import typing
import warnings
from collections.abc import Iterator
from typing import Any

import pytest
import redis

from mixture.config import MixtureConfig
from mixture.errors import ConfigError
from service.app import create_app
from service.settings import Settings
from service.testing import first_checkpoint, wait_until
from state.keys import REGISTRY_KEY, ModelKeys
from state.options import ModelOptions

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis

TokenizerConfig = typing.get_type_hints(MixtureConfig)["tokenizer"]


def candidates(annotation: Any, default: Any) -> list[Any]:
    """Values of a field's type other than its default, most modest first."""
    if default is None:
        inner = next(a for a in typing.get_args(annotation) if a is not type(None))
        return [5000] if inner is int else [5000.0]
    if isinstance(default, bool):
        return [not default]
    if isinstance(default, int):
        return [default + 1, default - 1]
    if isinstance(default, float):
        return [default * 1.25, default * 0.8, 0.75]
    if isinstance(default, str):
        return ["none", "english"]
    if isinstance(default, tuple):
        return [["marrowline", "skerry"]]  # a JSON list of words (extra_stop_words)
    raise AssertionError(f"no candidate for {annotation}")


def changed_values(cls: type, **fixed: Any) -> dict[str, Any]:
    """For every field of dataclass ``cls``: a valid value other than its default, checked
    by building ``cls`` with it (the dataclass is the judge of validity)."""
    hints = typing.get_type_hints(cls)
    values: dict[str, Any] = {}
    for item in dataclasses.fields(cls):
        if dataclasses.is_dataclass(hints[item.name]):
            continue
        default = item.default
        for value in candidates(hints[item.name], default):
            if value == default:
                continue
            try:
                cls(**{**fixed, item.name: value})
            except (ConfigError, ValueError):
                continue
            values[item.name] = value
            break
        else:
            raise AssertionError(f"{cls.__name__}.{item.name}: no valid non-default value")
    return values


@pytest.fixture
def api(redis_url: str) -> Iterator[TestClient]:
    with TestClient(create_app(Settings(redis_url=redis_url))) as client:
        yield client


def registry_of(client: redis.Redis) -> set[bytes]:
    return set(client.smembers(REGISTRY_KEY))


def test_every_dataclass_field_is_settable_through_post_models(
    api: TestClient, model_name: str
) -> None:
    # half_life_documents needs batch_size below it; every other field on its own
    config = changed_values(MixtureConfig)
    tokenizer = changed_values(TokenizerConfig)
    options = changed_values(ModelOptions)
    assert "annealing_steps" in config  # the field the hand-copied schema had lost
    body = {"name": model_name, "config": {**config, "tokenizer": tokenizer}, "options": options}
    made = api.post("/models", json=body)
    assert made.status_code == 201, made.text
    stored = api.get(f"/models/{model_name}").json()
    for name, value in config.items():
        assert stored["config"][name] == pytest.approx(value), name
    for name, value in tokenizer.items():
        assert stored["config"]["tokenizer"][name] == value, name
    for name, value in options.items():
        assert stored["options"][name] == pytest.approx(value), name
    # and the schema lists every field of each dataclass, with its default
    schemas = api.get("/openapi.json").json()["components"]["schemas"]
    for cls, schema in ((MixtureConfig, "ConfigIn"), (ModelOptions, "OptionsIn")):
        assert set(schemas[schema]["properties"]) == {f.name for f in dataclasses.fields(cls)}
    assert set(schemas["TokenizerIn"]["properties"]) == {
        f.name for f in dataclasses.fields(TokenizerConfig)
    }


def test_word_pseudocount_zero_is_refused_naming_the_field(
    api: TestClient, redis_client: redis.Redis, model_name: str
) -> None:
    with pytest.raises(ConfigError, match="word_pseudocount"):
        MixtureConfig(word_pseudocount=0.0)
    before = registry_of(redis_client)
    for zero in (0, 0.0):
        answer = api.post(
            "/models", json={"name": model_name, "config": {"word_pseudocount": zero}}
        )
        assert answer.status_code == 422, answer.text
        assert answer.json()["field"] == "word_pseudocount"
    assert registry_of(redis_client) == before
    assert MixtureConfig(word_pseudocount=1e-9).word_pseudocount == 1e-9  # any positive value


@pytest.mark.parametrize(
    ("config", "options", "field"),
    [
        ({"n_groups": True}, {}, "config.n_groups"),
        ({"n_groups": "8"}, {}, "config.n_groups"),
        ({"n_groups": 8.0}, {}, "config.n_groups"),
        ({"n_groups": None}, {}, "config.n_groups"),
        ({"step_exponent": "0.7"}, {}, "config.step_exponent"),
        ({"tokenizer": {"fold_urls": "yes"}}, {}, "config.tokenizer.fold_urls"),
        ({"tokenizer": {"min_length": True}}, {}, "config.tokenizer.min_length"),
        ({"tokenizer": {"case": "lower"}}, {}, "config.tokenizer.case"),
        ({}, {"read_count": True}, "options.read_count"),
        ({}, {"checkpoint_seconds": "5"}, "options.checkpoint_seconds"),
        ({}, {"snapshot_every": 5}, "options.snapshot_every"),
    ],
)
def test_wrong_json_types_are_refused_not_coerced(
    api: TestClient,
    redis_client: redis.Redis,
    model_name: str,
    config: dict[str, Any],
    options: dict[str, Any],
    field: str,
) -> None:
    before = registry_of(redis_client)
    answer = api.post("/models", json={"name": model_name, "config": config, "options": options})
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field, answer.json()
    assert registry_of(redis_client) == before


def raw_post(client: TestClient, path: str, body: bytes) -> Any:
    return client.post(path, content=body, headers={"content-type": "application/json"})


def test_duplicate_keys_are_refused_naming_the_key(
    api: TestClient, redis_client: redis.Redis, model_name: str
) -> None:
    before = registry_of(redis_client)
    name = model_name.encode()
    cases = [
        ("/models", b'{"name": "' + name + b'", "config": {"n_groups": 3, "n_groups": 1}}',
         "n_groups"),
        ("/models", b'{"name": "' + name + b'", "name": "other"}', "name"),
        ("/models/any/route", b'{"text": "ferry", "learn": false, "learn": true}', "learn"),
        ("/models/any/documents", b'{"documents": [{"text": "a", "id": "1", "id": "2"}]}', "id"),
    ]  # fmt: skip
    for path, body, key in cases:
        answer = raw_post(api, path, body)
        assert answer.status_code == 422, (path, answer.text)
        assert answer.json()["field"] == key and f'"{key}"' in answer.json()["detail"]
    assert registry_of(redis_client) == before
    # NaN and Infinity are not JSON
    answer = raw_post(api, "/models", b'{"name": "' + name + b'", "config": {"tolerance": NaN}}')
    assert answer.status_code == 422 and "not valid JSON" in answer.json()["detail"]


def test_every_error_body_has_detail_and_field(api: TestClient) -> None:
    answers = {
        "unknown path": api.get("/no/such/path"),
        "method not allowed": api.delete("/health"),
        "body not readable": raw_post(api, "/models/any/documents", b'{\x00"'),
        "empty body": raw_post(api, "/models", b""),
    }
    for name, answer in answers.items():
        assert 400 <= answer.status_code < 500, (name, answer.status_code)
        payload = answer.json()
        assert set(payload) == {"detail", "field"} and isinstance(payload["detail"], str), name
    assert answers["unknown path"].status_code == 404
    assert answers["method not allowed"].status_code == 405
    assert "GET" in answers["method not allowed"].headers["allow"]


def test_no_error_repeats_more_than_200_characters_of_input(api: TestClient) -> None:
    long = "a" * 10_000
    twice = b'{"' + long.encode() + b'": 1, "' + long.encode() + b'": 2}'
    answers = [
        api.get(f"/models/{long}"),
        api.post(f"/models/{long}/route", json={"text": "ferry"}),
        api.get(f"/models/{long}/snapshots/{long}"),
        api.post("/models", json={"name": long}),
        api.post("/models", json={"name": "fine", "config": {long: 1}}),
        api.post("/models", json={"name": "fine", "config": {"tokenizer": {"stop_words": long}}}),
        api.post("/models", json={"name": "fine", long: 1, "b" * 500: 2, "c" * 500: 3}),
        raw_post(api, "/models/x/route", twice),
    ]  # fmt: skip
    for answer in answers:
        assert 400 <= answer.status_code < 500, answer.text[:300]
        assert "a" * 201 not in answer.text, answer.text[:300]
        assert len(answer.json()["detail"]) <= 400 and len(answer.json()["field"] or "") <= 200


@pytest.fixture
def warm(redis_url: str, redis_client: redis.Redis, model_name: str) -> Iterator[TestClient]:
    """A client of an app whose model has one checkpoint and one snapshot."""
    settings = Settings(redis_url=redis_url, reload_poll_interval=0.05)
    with TestClient(create_app(settings)) as client:
        _, worker, _ = first_checkpoint(client, redis_client, redis_url, model_name, 3, seed=2)
        worker.checkpoint()
        worker.stop()
        wait_until(lambda: client.get(f"/models/{model_name}").json()["version"] > 0)
        yield client


def test_restore_needs_an_explicit_replay(
    warm: TestClient, redis_client: redis.Redis, model_name: str
) -> None:
    made = warm.post(f"/models/{model_name}/snapshots", json={"reason": "before"})
    assert made.status_code == 201, made.text
    path = f"/models/{model_name}/snapshots/{made.json()['id']}/restore"
    version = redis_client.get(ModelKeys(model_name).version)
    for body in (None, b"null", b"{}", b'{"skip_ids": []}', b'{"replay": "no"}'):
        answer = warm.post(path) if body is None else raw_post(warm, path, body)
        assert answer.status_code == 422, (body, answer.text)
        assert answer.json()["field"] in (None, "replay"), answer.json()
        assert redis_client.get(ModelKeys(model_name).version) == version, body
    restored = warm.post(path, json={"replay": False})
    assert restored.status_code == 200, restored.text
    assert restored.json()["replay"] is False


def test_route_with_learn_says_per_document_what_was_queued(
    warm: TestClient, redis_client: redis.Redis, model_name: str
) -> None:
    route = f"/models/{model_name}/route"
    stream = ModelKeys(model_name).docs
    first = warm.post(route, json={"text": "my ferry was late", "id": "q-1", "learn": True})
    assert first.status_code == 200, first.text
    assert first.json()["queued"] is True and first.json()["results"][0]["queued"] is True
    length = redis_client.xlen(stream)
    again = warm.post(route, json={"text": "my ferry was late", "id": "q-1", "learn": True})
    body = again.json()
    assert redis_client.xlen(stream) == length  # the repeated id was not queued ...
    assert body["queued"] is False  # ... and the answer says so
    assert body["results"][0]["queued"] is False and body["results"][0]["stream_id"] is None
    mixed = warm.post(
        route,
        json={
            "documents": [{"id": "q-1", "text": "again"}, {"id": "q-2", "text": "new"}],
            "learn": True,
        },
    ).json()
    assert mixed["queued"] is True
    assert [r["queued"] for r in mixed["results"]] == [False, True]
    assert redis_client.xlen(stream) == length + 1
    # learn must be a boolean, top an integer
    for bad in ({"text": "ferry", "learn": "no"}, {"text": "ferry", "top": True}):
        answer = warm.post(route, json=bad)
        assert answer.status_code == 422 and answer.json()["field"] in ("learn", "top")
    assert redis_client.xlen(stream) == length + 1


def test_an_unexpected_failure_is_answered_in_the_same_shape(redis_url: str) -> None:
    from fastapi import APIRouter

    broken = APIRouter()

    @broken.get("/broken")
    def fail() -> None:
        raise RuntimeError("internal detail that must not be sent")

    app = create_app(Settings(redis_url=redis_url), extra_routers=[broken])
    with TestClient(app, raise_server_exceptions=False) as client:
        answer = client.get("/broken")
    assert answer.status_code == 500
    assert set(answer.json()) == {"detail", "field"} and "internal detail" not in answer.text
