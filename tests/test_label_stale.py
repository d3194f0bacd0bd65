"""Labels that stay true: the stale-label rule fires on an invented junk burst that takes over
a labelled group and not on the ordinary drift of the demo's storm day (service/demo_data.py
builds the invented week); through the API and the worker, routing answers carry
``label_stale`` and the review reason, the worker records one ``label-stale`` alert per
recorded word distribution, and a refresh clears it."""

from __future__ import annotations

import uuid
from collections.abc import Iterator
from typing import Any

import numpy as np
import pytest

from mixture.config import MixtureConfig
from mixture.online import OnlineLearner
from mixture.routing import LABEL_STALE, route_texts
from service.demo_data import THEMES, DemoMessage, default_days, generate_day
from service.testing import learned, wait_until
from state.group_drift import group_ids_of
from state.label_words import label_divergences, sketch_group
from state.options import ModelOptions
from tests.ops_support import ADMIN, SCALE, TestClient, make_app, train

THRESHOLD = ModelOptions().label_stale_threshold


def learn_days(learner: OnlineLearner, days: list[list[DemoMessage]], batch: int) -> None:
    for day in days:
        texts = [m.text for m in day]
        for start in range(0, len(texts), batch):
            learner.learn(texts[start : start + batch])


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_the_rule_fires_on_a_junk_take_over_and_not_on_the_storm_day(seed: int) -> None:
    """Every group labelled after day 3 of the invented week: the storm day (delays swell to
    half of the mail) moves no group past the threshold; the junk burst of day 5 makes stale
    exactly the labels of the groups the junk is routed to (and only where it is a large
    share), and leaves the others true."""
    plans = default_days(SCALE)
    batch = 80
    config = MixtureConfig(
        n_groups=len(THEMES), warmup_documents=plans[0].messages, batch_size=batch
    )
    learner = OnlineLearner(config, seed=seed)
    days = [generate_day(plan, seed=seed + 20) for plan in plans]
    learn_days(learner, days[:3], batch)
    state = learner.state
    sketches = {g: sketch_group(state, g, 3, 0.0) for g in group_ids_of(state)}
    assert all(s is not None for s in sketches.values())
    recorded = {g: s for g, s in sketches.items() if s is not None}

    learn_days(learner, [days[3]], batch)  # the storm
    storm = label_divergences(recorded, learner.state)
    assert set(storm) == set(recorded)
    assert max(storm.values()) < THRESHOLD, storm

    junk_day = days[4]
    learn_days(learner, [junk_day], batch)
    after = label_divergences(recorded, learner.state)
    junk = [m.text for m in junk_day if m.theme == "junk"]
    routed = route_texts(learner.state, junk).group
    share = np.bincount(routed, minlength=learner.state.n_groups) / len(junk)
    ids = group_ids_of(learner.state)
    taken = {ids[p] for p in np.flatnonzero(share >= 0.25)}  # a quarter of the burst or more
    untouched = {ids[p] for p in np.flatnonzero(share == 0)}
    assert taken, share
    assert all(after[g] > THRESHOLD for g in taken), (after, share)
    assert all(after[g] < THRESHOLD for g in untouched), (after, share)


@pytest.fixture()
def api(redis_url: str) -> Iterator[tuple[Any, str]]:
    model = f"t-stale-{uuid.uuid4().hex[:8]}"
    app = make_app(redis_url, model)
    with TestClient(app, headers=ADMIN) as client:
        yield client, model
        client.delete(f"/models/{model}")


def feed(client: Any, model: str, messages: list[DemoMessage], total: int) -> int:
    answer = client.post(
        f"/models/{model}/documents",
        json={"documents": [{"id": m.id, "text": m.text} for m in messages]},
    )
    assert answer.status_code == 202, answer.text
    total += len(messages)
    wait_until(lambda: learned(client, model, total), 90, what="documents learned")
    return total


def groups_of(client: Any, model: str, version: int) -> dict[int, dict[str, Any]]:
    """The groups once the API serves at least ``version``."""

    def served() -> dict[str, Any] | None:
        body = client.get(f"/models/{model}/groups").json()
        return body if body["version"] >= version else None

    body = wait_until(served, 30, what=f"version {version} served")
    return {g["group"]: g for g in body["groups"]}


@pytest.mark.redis
def test_stale_labels_through_the_api_and_the_worker(api: tuple[Any, str]) -> None:
    client, model = api
    trained = train(client, model, days=3, snapshot_after=0)
    total = trained["documents_learned"]
    version = trained["version"]
    for g in groups_of(client, model, version):
        answer = client.put(f"/models/{model}/groups/{g}/label", json={"label": f"theme {g}"})
        assert answer.status_code == 200, answer.text
        body = answer.json()
        assert body["label_stale"] is False
        assert body["label_divergence"] == pytest.approx(0.0, abs=1e-6)
        assert body["label_words_version"] == version
        assert body["label_stale_threshold"] == THRESHOLD

    plans = default_days(SCALE)
    total = feed(client, model, generate_day(plans[3], seed=11), total)  # the storm
    storm = groups_of(client, model, client.get(f"/models/{model}").json()["version"])
    assert not any(g["label_stale"] for g in storm.values()), storm
    alerts = client.get(f"/models/{model}/drift/alerts").json()["alerts"]
    assert not [a for a in alerts if a["kind"] == "label-stale"]

    junk_day = generate_day(plans[4], seed=11)
    total = feed(client, model, junk_day, total)
    now = groups_of(client, model, client.get(f"/models/{model}").json()["version"])
    stale = {g for g, body in now.items() if body["label_stale"]}
    junk = [{"id": m.id, "text": m.text} for m in junk_day if m.theme == "junk"][:40]
    answer = client.post(f"/models/{model}/route", json={"documents": junk}).json()
    homes = {r["group"] for r in answer["results"]}
    assert stale and stale <= homes, (stale, homes)
    for result in answer["results"]:
        assert result["label_stale"] is (result["group"] in stale)
        assert (LABEL_STALE in result["review_reasons"]) is (result["group"] in stale)
        if result["group"] in stale:
            assert result["review"] is True
    calm = [
        {"id": m.id, "text": m.text} for m in generate_day(plans[0], seed=99) if m.theme != "junk"
    ][:40]
    calm_results = client.post(f"/models/{model}/route", json={"documents": calm}).json()
    assert any(r["label_stale"] is False for r in calm_results["results"])

    # the metrics carry the same figures (served from the same memory)
    metrics = client.get("/metrics").text
    for g, body in now.items():
        line = f'mixroute_label_divergence{{group="{g}",model="{model}"}} '
        value = float(metrics.split(line, 1)[1].split("\n", 1)[0])
        assert value == pytest.approx(body["label_divergence"], rel=1e-9)
    assert f'mixroute_label_stale_threshold{{model="{model}"}} {THRESHOLD}' in metrics

    # one alert per stale group, from the worker's checkpoint; more learning adds none
    def label_alerts() -> list[dict[str, Any]]:
        listed = client.get(f"/models/{model}/drift/alerts").json()["alerts"]
        return [a for a in listed if a["kind"] == "label-stale"]

    wait_until(lambda: len(label_alerts()) >= len(stale), 30, what="label-stale alerts")
    total = feed(client, model, generate_day(plans[5], seed=11), total)
    alerted = label_alerts()
    named = sorted(int(a["reason"].split(":")[0].removeprefix("group ")) for a in alerted)
    assert len(named) == len(set(named)), named  # once each
    assert stale <= set(named)
    assert all(a["value"] > a["threshold"] == THRESHOLD for a in alerted)

    # the operator checks and keeps the label: its words are recorded anew, no longer stale
    group = min(stale)
    kept = client.patch(f"/models/{model}/groups/{group}/label", json={"refresh": True})
    assert kept.status_code == 200, kept.text
    assert kept.json()["label_stale"] is False
    assert kept.json()["label"] == f"theme {group}"
    history = client.get(f"/models/{model}/groups/{group}/label/history").json()["history"]
    assert [h["action"] for h in history] == ["set", "patch"]
    assert history[1]["fields"] == {} and history[1]["words_recorded"] is True
    assert history[0]["version"] == version < history[1]["version"]
