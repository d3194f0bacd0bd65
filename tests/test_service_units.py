"""Fast unit checks of service pieces: the typicality statistics, the review rule, settings
from the environment, and the JSON-lines parser."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from pydantic import ValidationError

from mixture.config import MixtureConfig
from mixture.em import fit_texts
from mixture.routing import route_texts
from service.demo_data import THEME_NAMES, default_days, fresh_examples, generate_day
from service.jsonl import parse_line
from service.routers.routing import build_results
from service.runtime import Typicality
from service.schemas import DocumentIn
from service.settings import Settings


def test_typicality_matches_numpy_weighted_moments() -> None:
    """The running mean and variance equal numpy.average with exponentially decaying weights
    (source: numpy.average; weight of the i-th of n values = decay ** (n - 1 - i))."""
    rng = np.random.default_rng(0)
    values = rng.normal(-4.5, 0.3, size=400)
    stats = Typicality(n_groups=2, half_life=50.0, min_documents=10.0)
    groups = np.zeros(values.size, dtype=np.int64)
    stats.check_and_update(groups, values, np.ones(values.size, dtype=bool), z=3.0)
    weights = stats.decay ** np.arange(values.size - 1, -1, -1)
    mean = np.average(values, weights=weights)
    variance = np.average((values - mean) ** 2, weights=weights)
    assert stats.mean[0] == pytest.approx(mean, rel=1e-12)
    assert stats.std()[0] ** 2 == pytest.approx(variance, rel=1e-9)
    assert stats.weight[0] == pytest.approx(weights.sum(), rel=1e-12)
    assert stats.weight[1] == 0.0  # the other group saw nothing


def test_typicality_flags_only_far_outliers_and_skips_no_evidence() -> None:
    rng = np.random.default_rng(1)
    stats = Typicality(n_groups=1, half_life=200.0, min_documents=30.0)
    ones = np.ones(1, dtype=bool)
    zero = np.zeros(1, dtype=np.int64)
    # below min_documents nothing is flagged, however odd
    assert not stats.check_and_update(zero, np.array([-50.0]), ones, 3.0)[0]
    stats = Typicality(n_groups=1, half_life=200.0, min_documents=30.0)
    values = rng.normal(-5.0, 0.2, size=200)
    flags = stats.check_and_update(np.zeros(200, dtype=np.int64), values, np.ones(200, bool), 3.0)
    assert flags.sum() <= 2  # a 3-sigma screen flags about 0.1% of normal values
    assert stats.check_and_update(zero, np.array([-7.0]), ones, 3.0)[0]  # 10 sigma below
    assert not stats.check_and_update(zero, np.array([-5.1]), ones, 3.0)[0]
    assert not stats.check_and_update(zero, np.array([-3.0]), ones, 3.0)[0]  # above: typical
    before = stats.weight.copy()
    stats.check_and_update(zero, np.array([np.nan]), np.zeros(1, dtype=bool), 3.0)
    np.testing.assert_array_equal(stats.weight, before)  # no evidence: not learned from


def test_review_reasons_follow_the_rule() -> None:
    texts = [m.text for plan in default_days(0.2)[:2] for m in generate_day(plan, 2)]
    config = MixtureConfig(n_groups=len(THEME_NAMES), n_restarts=1, warmup_documents=10)
    state, _ = fit_texts(texts, config, seed=0)
    examples = fresh_examples(3)
    documents = [DocumentIn(id=m.id, text=m.text) for m in examples]
    documents.append(DocumentIn(id="mostly-unknown", text="ferry qqqq zzzz wwww"))
    documents.append(DocumentIn(id="nothing-known", text="qqqq zzzz"))
    routing = route_texts(state, [d.text for d in documents])
    atypical = np.zeros(len(documents), dtype=bool)
    atypical[1] = True
    loaded = SimpleNamespace(
        review_threshold=0.999999,
        review_unknown_share=0.5,
        labels={0: {"label": "L0", "destination": "d"}},
        provisional=False,
        group_ids=list(range(state.n_groups)),
        starting_groups=state.n_groups,
        # group 0's label is stale (its words moved past the threshold), group 1's is not
        label_divergence={0: 0.4, 1: 0.01},
        label_stale=lambda group: group == 0,
    )
    results = build_results(loaded, documents, routing, atypical, None, None)  # type: ignore[arg-type]
    for result, posterior in zip(results, routing.posterior, strict=True):
        low = posterior.max() < 0.999999
        assert ("low_posterior" in result["review_reasons"]) == low
        assert result["review"] == bool(result["review_reasons"])
        assert result["label"] == ("L0" if result["group"] == 0 else None)
        assert result["label_stale"] is (result["group"] == 0)
        assert ("label_stale" in result["review_reasons"]) is (result["group"] == 0)
    assert any(r["label_stale"] for r in results) and not all(r["label_stale"] for r in results)
    assert "atypical" in results[1]["review_reasons"]
    assert "mostly_unknown_words" in results[-2]["review_reasons"]
    assert results[-2]["known_tokens"] == 1 and results[-2]["unknown_tokens"] == 3
    nothing = results[-1]
    assert "mostly_unknown_words" not in nothing["review_reasons"]
    assert "no_known_words" in nothing["review_reasons"] and nothing["known_tokens"] == 0
    assert nothing["log_likelihood_per_token"] is None
    # with no known word the posterior is the prior (the mixture weights)
    prior = {p["group"]: p["probability"] for p in nothing["posterior"]}
    np.testing.assert_allclose(
        [prior[k] for k in range(state.n_groups)], state.weights(), atol=1e-12
    )


def test_settings_come_from_the_environment(monkeypatch) -> None:
    monkeypatch.setenv("MIXROUTE_PORT", "9123")
    monkeypatch.setenv("MIXROUTE_MAX_TEXT_BYTES", "5000")
    monkeypatch.setenv("REDIS_URL", "redis://127.0.0.1:6390/2")
    monkeypatch.delenv("MIXROUTE_REDIS_URL", raising=False)
    settings = Settings()
    assert settings.port == 9123 and settings.max_text_bytes == 5000
    assert settings.redis_url == "redis://127.0.0.1:6390/2"
    monkeypatch.setenv("MIXROUTE_REDIS_URL", "unix:///tmp/x.sock")
    assert Settings().redis_url == "unix:///tmp/x.sock"  # the prefixed name wins
    monkeypatch.setenv("MIXROUTE_REVIEW_UNKNOWN_SHARE", "1.5")
    with pytest.raises(ValidationError, match="review_unknown_share"):
        Settings()


@pytest.mark.parametrize(
    ("raw", "message"),
    [
        (b"{", "not valid JSON"),
        (b'"text"', "expected a JSON object"),
        (b'{"text": null}', 'field "text" must be a string'),
        (b'{"text": ""}', "is empty"),
        (b'{"text": "ok", "id": true}', 'field "id" must be a string or an integer'),
        (b'{"text": "\xc3("}', "not valid UTF-8"),
        (b'{"text": "' + b"a" * 50 + b'"}', "longer than 40 bytes"),
    ],
)
def test_jsonl_line_errors(raw: bytes, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        parse_line(raw, 7, max_text_bytes=40)


def test_jsonl_line_ok() -> None:
    doc = parse_line('{"id": 12, "text": "Fähre verspätet", "day": 3}'.encode(), 4)
    assert (doc.id, doc.text, doc.position, doc.metadata) == (
        "12",
        "Fähre verspätet",
        "line 4",
        {"day": 3},
    )
    assert parse_line(b'{"text": "x"}', 9).id == "line-9"


def test_demo_data_is_deterministic_and_shaped_as_promised() -> None:
    plans = default_days()
    assert [p.day for p in plans] == list(range(1, len(plans) + 1)) and len(plans) >= 5
    days = [generate_day(plan, seed=11) for plan in plans]
    assert days == [generate_day(plan, seed=11) for plan in plans]
    assert days[0] != generate_day(plans[0], seed=12)
    assert len(THEME_NAMES) >= 6
    share = [sum(m.theme == "delays" for m in day) / len(day) for day in days]
    storm = next(i for i, p in enumerate(plans) if "STORM" in p.title)
    assert share[storm] > 2 * max(s for i, s in enumerate(share) if i != storm)
    junk_day = next(day for day in days if any(m.theme == "junk" for m in day))
    positions = [i for i, m in enumerate(junk_day) if m.theme == "junk"]
    assert positions == list(range(positions[0], positions[-1] + 1))  # one contiguous burst
    assert len({m.id for day in days for m in day}) == sum(len(day) for day in days)


def test_model_threads_setting_reaches_the_model_core() -> None:
    import fakeredis
    from fastapi.testclient import TestClient

    from mixture import threads
    from service.app import create_app
    from service.settings import Settings

    with pytest.raises(ValueError, match="model_threads"):
        Settings(model_threads=0)
    previous = threads.worker_threads()
    try:
        app = create_app(Settings(model_threads=1), redis_client=fakeredis.FakeRedis())
        with TestClient(app):
            assert threads.worker_threads() == 1
    finally:
        threads.set_worker_threads(previous)
