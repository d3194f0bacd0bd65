"""Key names, model names, options and stream-id helpers (fast units, fakeredis)."""

from __future__ import annotations

import fakeredis
import pytest
from redis.crc import key_slot

from mixture.config import MixtureConfig
from state.errors import ModelExistsError, ModelNotFoundError, OptionsError
from state.keys import REGISTRY_KEY, ModelKeys, validate_model_name
from state.options import ModelOptions
from state.registry import Registry
from state.stream import SkipRanges, decode_entry, parse_stream_id


def _all_key_names(keys: ModelKeys) -> list[str]:
    names = [getattr(keys, slot) for slot in ModelKeys.__slots__ if slot not in ("model", "base")]
    return [*names, keys.snapshot("snap-000001"), keys.client_id("abc")]


def test_every_key_of_a_model_is_in_one_cluster_slot() -> None:
    # Redis Cluster specification, "Hash tags": only the text between the first { and the next }
    # is hashed (CRC16 mod 16384); redis-py's key_slot implements that rule.
    keys = ModelKeys("ferry-inbox")
    slots = {key_slot(name.encode()) for name in _all_key_names(keys)}
    assert slots == {key_slot(b"ferry-inbox")}
    assert all(name.startswith("mixroute:{ferry-inbox}:") for name in _all_key_names(keys))


def test_pattern_does_not_reach_a_model_whose_name_extends_another() -> None:
    import fnmatch  # Redis SCAN MATCH uses glob patterns; fnmatch follows the same rules here

    pattern = ModelKeys("inbox").pattern()
    assert fnmatch.fnmatchcase(ModelKeys("inbox").docs, pattern)
    for other in ("inbox2", "inbox-2", "inbox.x", "Inbox"):
        assert not any(fnmatch.fnmatchcase(k, pattern) for k in _all_key_names(ModelKeys(other)))


@pytest.mark.parametrize("bad", ["", "a b", "x{y}", "a:b", "-lead", "x" * 65, "é"])
def test_bad_model_names_are_refused(bad: str) -> None:
    with pytest.raises(OptionsError, match="model name"):
        validate_model_name(bad)


def test_options_round_trip_and_errors_name_the_field() -> None:
    options = ModelOptions(checkpoint_documents=10, stream_max_length=None)
    assert ModelOptions.from_dict(options.to_dict()) == options
    with pytest.raises(OptionsError, match="checkpoint_documents"):
        ModelOptions(checkpoint_documents=0)
    with pytest.raises(OptionsError, match="drift_threshold"):
        ModelOptions(drift_threshold=1.5)
    with pytest.raises(OptionsError, match="unknown model option"):
        ModelOptions.from_dict({"checkpoint_every": 3})
    with pytest.raises(OptionsError, match="lease_seconds"):
        ModelOptions(lease_seconds=float("nan"))


def test_registry_create_list_get_delete_on_fakeredis() -> None:
    client = fakeredis.FakeRedis()
    registry = Registry(client)
    config = MixtureConfig(n_groups=4)
    info = registry.create("alpha", config, ModelOptions(seed=3))
    registry.create("beta", MixtureConfig(n_groups=2))
    assert registry.list() == ["alpha", "beta"]
    got = registry.get("alpha")
    assert got.config == config and got.options.seed == 3 and got.created == info.created
    with pytest.raises(ModelExistsError):
        registry.create("alpha", config)
    client.set(ModelKeys("alpha").state, b"x")
    removed = registry.delete("alpha")
    assert removed == 2  # config and state (no document was queued, so no stream)
    assert registry.list() == ["beta"]
    assert client.sismember(REGISTRY_KEY, "beta")
    with pytest.raises(ModelNotFoundError, match="alpha"):
        registry.get("alpha")
    with pytest.raises(ModelNotFoundError):
        registry.delete("alpha")


def test_stream_ids_and_skip_ranges() -> None:
    assert parse_stream_id("1700000000000-5") == (1700000000000, 5)
    assert parse_stream_id(b"12") == (12, 0)
    with pytest.raises(OptionsError):
        parse_stream_id("12-x")
    skip = SkipRanges.build(ids=[["10-0", "20-3"]], received=[[100.0, 200.0]], until="30-0")
    assert skip.skips("15-0", None) and skip.skips("20-3", None) and not skip.skips("20-4", None)
    assert skip.skips("25-0", 150.0) and not skip.skips("25-0", 250.0)
    assert not skip.skips("31-0", 150.0)  # after the rollback: never skipped
    assert SkipRanges.from_dict(skip.to_dict()) == skip
    with pytest.raises(OptionsError, match="first is after last"):
        SkipRanges.build(ids=[["20-0", "10-0"]])


def test_decode_entry_reasons() -> None:
    good = decode_entry(
        "1-0", {b"id": b"a", b"text": b"hello", b"metadata": b'{"k": 1}', b"received": b"5.5"}
    )
    assert good.text == "hello" and good.metadata == {"k": 1} and good.received == 5.5
    assert "no 'text'" in decode_entry("1-1", {b"id": b"a"}).reason
    assert "UTF-8" in decode_entry("1-2", {b"text": b"\xff\xfe"}).reason
    assert "JSON" in decode_entry("1-3", {b"text": b"x", b"metadata": b"{oops"}).reason
    assert "object" in decode_entry("1-4", {b"text": b"x", b"metadata": b"[1]"}).reason
    assert "number" in decode_entry("1-5", {b"text": b"x", b"received": b"soon"}).reason
