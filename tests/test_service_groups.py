"""Groups that change, as the API, the metrics and the model creation show them: groups are
named by their stable ids (never by array position), a newborn group without a label asks for
review, the events are listed, counted and undone by rollback.

Streams are invented (tests/lifecycle_streams.py). The outside check of the routing itself is
the model core's (mixture.routing against scikit-learn in tests/test_service_api.py); here the
answers are checked against route_texts on the same state, mapped through state.group_ids.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator

import numpy as np
import pytest
import redis

from mixture.config import MixtureConfig
from mixture.routing import route_texts
from service.app import create_app
from service.settings import Settings
from state.store import ModelStore
from tests.test_worker_groups import LIFECYCLE_ON, birth_stream, learn_all, merge_stream
from tests.worker_support import create_model, fast_options

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis


@pytest.fixture
def api(redis_url: str) -> Iterator[TestClient]:
    settings = Settings(redis_url=redis_url, reload_poll_interval=0.05)
    with TestClient(create_app(settings)) as client:
        yield client


def route(api: TestClient, model: str, texts: list[str]) -> list[dict]:
    body = {"documents": [{"id": str(i), "text": t} for i, t in enumerate(texts)]}
    response = api.post(f"/models/{model}/route", json=body)
    assert response.status_code == 200, response.text
    return response.json()["results"]


def test_after_a_merge_answers_name_groups_by_id_not_by_position(
    api: TestClient, redis_client: redis.Redis, model_name: str
) -> None:
    config = MixtureConfig(n_groups=4, lifecycle=LIFECYCLE_ON)
    texts = merge_stream()
    store = create_model(redis_client, model_name, config, fast_options(checkpoint_documents=500))
    learn_all(redis_client, store, texts)
    state = store.load_state()
    ids = [int(g) for g in state.group_ids]
    assert len(ids) == 3 and ids != [0, 1, 2]  # an id is gone: positions and ids differ
    sample = texts[-200:]
    results = route(api, model_name, sample)
    expected = state.group_ids[route_texts(state, sample).group]
    assert [r["group"] for r in results] == expected.tolist()
    assert all({p["group"] for p in r["posterior"]} == set(ids) for r in results)
    # the groups, the model and the metrics speak of the same ids
    groups = api.get(f"/models/{model_name}/groups").json()["groups"]
    assert [g["group"] for g in groups] == ids
    absorbed = next(g for g in range(4) if g not in ids)
    assert api.get(f"/models/{model_name}/groups/{absorbed}").status_code == 404
    assert api.get(f"/models/{model_name}/groups/{ids[-1]}").json()["group"] == ids[-1]
    model = api.get(f"/models/{model_name}").json()
    assert model["n_groups"] == 3 and model["group_ids"] == ids
    metrics = api.get("/metrics").text
    for g in ids:
        assert f'mixroute_group_weight{{group="{g}",model="{model_name}"}}' in metrics
    assert f'mixroute_group_events_total{{kind="merge",model="{model_name}"}} 1.0' in metrics
    events = api.get(f"/models/{model_name}/events").json()["events"]
    assert [(e["kind"], e["undone"]) for e in events] == [("merge", False)]
    # a label on a current id works; on the absorbed id it is refused
    assert (
        api.put(f"/models/{model_name}/groups/{ids[-1]}/label", json={"label": "x"}).status_code
        == 200
    )
    assert (
        api.put(f"/models/{model_name}/groups/{absorbed}/label", json={"label": "x"}).status_code
        == 404
    )


def test_a_newborn_group_asks_for_review_until_it_is_named_and_a_rollback_undoes_it(
    api: TestClient, redis_client: redis.Redis, model_name: str
) -> None:
    config = MixtureConfig(n_groups=4, lifecycle=LIFECYCLE_ON)
    texts, labels = birth_stream()
    store = create_model(redis_client, model_name, config, fast_options(checkpoint_documents=2000))
    learn_all(redis_client, store, texts)
    new_topic = [t for t, label in zip(texts, labels, strict=True) if label == 4][-50:]
    old_topic = [t for t, label in zip(texts, labels, strict=True) if label == 0][-50:]
    results = route(api, model_name, new_topic + old_topic)
    born = [r for r in results[:50] if r["group"] == 4]
    assert len(born) >= 45  # the new topic's messages go to the new group (purity >= 0.9)
    assert all("new_group" in r["review_reasons"] and r["review"] for r in born)
    assert not any("new_group" in r["review_reasons"] for r in results if r["group"] != 4)
    response = api.put(f"/models/{model_name}/groups/4/label", json={"label": "cycle racks"})
    assert response.status_code == 200 and response.json()["born"] is True
    again = route(api, model_name, new_topic)
    assert not any("new_group" in r["review_reasons"] for r in again)
    assert all(r["label"] == "cycle racks" for r in again if r["group"] == 4)
    # rollback to the pre-change snapshot: the event is undone, routing has 4 groups again
    event = api.get(f"/models/{model_name}/events").json()["events"][0]
    response = api.post(
        f"/models/{model_name}/snapshots/{event['snapshot_id']}/restore", json={"replay": False}
    )
    assert response.status_code == 200, response.text
    assert api.get(f"/models/{model_name}/events").json()["events"][0]["undone"] is True
    assert {r["group"] for r in route(api, model_name, new_topic)} <= {0, 1, 2, 3}


def test_a_model_created_without_n_groups_starts_small_with_the_lifecycle_on(
    api: TestClient, model_name: str
) -> None:
    created = api.post("/models", json={"name": model_name})
    assert created.status_code == 201, created.text
    config = created.json()["config"]
    assert config["n_groups"] == 2
    assert config["lifecycle"]["enabled"] is True and config["lifecycle"]["max_groups"] == 32
    api.delete(f"/models/{model_name}")
    created = api.post("/models", json={"name": model_name, "max_groups": 12}).json()
    assert created["config"]["lifecycle"]["max_groups"] == 12
    api.delete(f"/models/{model_name}")
    created = api.post("/models", json={"name": model_name, "config": {"n_groups": 5}}).json()
    assert created["config"]["n_groups"] == 5
    assert created["config"]["lifecycle"]["enabled"] is False  # the default stays off
    assert np.isclose(sum(created["weights"]), 1.0) and created["group_ids"] == [0, 1, 2, 3, 4]


def test_the_events_command_lists_the_changes_and_models_create_may_leave_out_groups(
    redis_url: str, redis_client: redis.Redis, model_name: str, capsys
) -> None:
    from service.cli import main
    from service.testing import uvicorn_thread

    config = MixtureConfig(n_groups=4, lifecycle=LIFECYCLE_ON)
    texts = merge_stream()
    store = create_model(redis_client, model_name, config, fast_options(checkpoint_documents=500))
    learn_all(redis_client, store, texts)
    settings = Settings(redis_url=redis_url, reload_poll_interval=0.05)
    with uvicorn_thread(create_app(settings)) as url:
        api = ["--api", url]
        assert main(["events", "--model", model_name, *api]) == 0
        out = capsys.readouterr().out.splitlines()
        event = store.events()[0]
        assert out[0].startswith("version\tkind\tgroups")
        assert out[1].startswith(f"{event.version}\tmerge\t{event.groups[0]},{event.groups[1]}\t")
        other = model_name + "-k"
        assert main(["models", "create", other, "--max-groups", "9", *api]) == 0
        assert "with 2 groups" in capsys.readouterr().out
        assert ModelStore(redis_client, other).info.config.lifecycle.max_groups == 9
        assert main(["models", "delete", other, *api]) == 0
