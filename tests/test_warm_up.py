"""The warm-up stated in tokens, and the provisional fits that route before it ends.

Invented data (the island ferry cooperative's messages, tests/worker_support.ferry_texts). The
token counts are checked against Python's ``str.split`` (the invented messages are plain
lower-case words separated by spaces, so the two counts agree by construction); the
provisional fit against batch EM on exactly the documents it saw.
"""

from __future__ import annotations

import numpy as np
import pytest

from mixture.config import MixtureConfig
from mixture.em import fit_texts
from mixture.errors import ConfigError
from mixture.online import OnlineLearner, warm_up_progress
from mixture.routing import route_texts
from mixture.serialize import state_from_bytes, state_to_bytes
from tests.worker_support import assert_same_state, ferry_texts


def _config(**changes: object) -> MixtureConfig:
    base: dict[str, object] = {
        "n_groups": 3,
        "batch_size": 50,
        "n_restarts": 1,
        "max_iter": 30,
        "warmup_tokens": 0,
        "warmup_documents": 1000,
        "provisional_documents": 100,
    }
    base.update(changes)
    return MixtureConfig(**base)  # type: ignore[arg-type]


def _learn_in_chunks(config: MixtureConfig, texts: list[str], chunk: int) -> OnlineLearner:
    learner = OnlineLearner(config, seed=4)
    for start in range(0, len(texts), chunk):
        learner.learn(texts[start : start + chunk])
    return learner


def test_the_warm_up_ends_at_the_first_document_that_reaches_the_token_target() -> None:
    texts = ferry_texts(600, seed=1)
    words = np.cumsum([len(text.split()) for text in texts])  # tokens, counted by str.split
    target = 1500
    end = int(np.searchsorted(words, target)) + 1  # documents up to the one that reaches it
    assert 100 < end < 600
    config = _config(warmup_tokens=target, provisional_documents=0)
    learner = OnlineLearner(config, seed=4)
    report = learner.learn(texts[: end - 1])
    assert not report.warmed_up and not learner.state.warmed_up
    progress = warm_up_progress(learner.state)
    assert (progress.documents, progress.tokens) == (end - 1, int(words[end - 2]))
    assert progress.describe().startswith(f"warming up: {words[end - 2]} of {target} tokens")
    report = learner.learn(texts[end - 1 : end + 10])  # the 11 texts after it learn stepwise
    assert report.warmed_up and learner.state.warmed_up
    assert report.tokens == int(words[end + 9] - words[end - 2])
    assert learner.state.documents_learned == end + 10
    # the warm-up fit is batch EM on exactly those documents (same seed, same vocabulary)
    alone, _ = fit_texts(texts[:end], config, seed=4)
    fitted = OnlineLearner(config, seed=4)
    fitted.learn(texts[:end])
    assert_same_state(fitted.state, alone)


def test_warmup_documents_caps_the_warm_up_of_short_messages() -> None:
    texts = ferry_texts(400, seed=2)
    learner = OnlineLearner(_config(warmup_tokens=40_000, warmup_documents=300), seed=4)
    learner.learn(texts[:299])
    assert not learner.state.warmed_up  # 299 messages hold about 1,950 tokens, far below 40k
    assert learner.learn(texts[299:300]).warmed_up


def test_provisional_fits_come_at_100_and_every_doubling_whatever_the_cut() -> None:
    texts = ferry_texts(900, seed=3)
    config = _config()
    fits = []
    learner = OnlineLearner(config, seed=4)
    for start in range(0, len(texts), 50):  # the worker's units
        fits.append(learner.learn(texts[start : start + 50]).provisional_fits)
        provisional = learner.state.provisional
        if start + 50 < 100:
            assert provisional is None
        else:
            assert provisional is not None and provisional.warmed_up
    assert sum(fits) == 4  # at 100, 200, 400 and 800 documents
    state = learner.state
    assert not state.warmed_up and state.provisional is not None
    assert state.provisional.documents_learned == 800
    # The provisional fit is batch EM on exactly the first 800 documents.
    alone, _ = fit_texts(texts[:800], config, seed=4)
    assert_same_state(state.provisional, alone)
    # The same stream cut otherwise gives the same state and the same provisional fit.
    for chunk in (37, 256, 900):
        other = _learn_in_chunks(config, texts, chunk).state
        assert_same_state(other, state)
        assert other.provisional is not None
        assert_same_state(other.provisional, state.provisional)
        assert (other.pending != state.pending).nnz == 0
    # The first provisional fit routes like batch EM on the first 100 documents.
    first = OnlineLearner(config, seed=4)
    first.learn(texts[:100])
    assert first.state.provisional is not None
    hundred, _ = fit_texts(texts[:100], config, seed=4)
    np.testing.assert_array_equal(
        route_texts(first.state.provisional, texts).group, route_texts(hundred, texts).group
    )
    # The warm-up fit drops the provisional one.
    learner.learn(texts[:200])
    assert learner.state.warmed_up and learner.state.provisional is None


def test_a_checkpointed_provisional_fit_reads_back_the_same() -> None:
    learner = _learn_in_chunks(_config(), ferry_texts(250, seed=5), 50)
    state = learner.state
    assert state.provisional is not None
    back = state_from_bytes(state_to_bytes(state))
    assert back.provisional is not None and back.provisional.provisional is None
    assert_same_state(back.provisional, state.provisional)
    assert_same_state(back, state)


def test_configurations_stored_before_the_token_rule_still_load() -> None:
    stored = MixtureConfig().to_dict()
    for name in ("warmup_tokens", "provisional_documents"):
        del stored[name]
    stored["warmup_documents"] = 1000  # the old default, now a cap
    config = MixtureConfig.from_dict(stored)
    assert (config.warmup_documents, config.warmup_tokens) == (1000, 40_000)
    assert config.provisional_documents == 100
    with pytest.raises(ConfigError, match="warmup_tokens"):
        MixtureConfig(warmup_tokens=-1)
    with pytest.raises(ConfigError, match="provisional_documents"):
        MixtureConfig(provisional_documents=True)  # type: ignore[arg-type]


def test_no_provisional_fit_when_it_is_switched_off() -> None:
    learner = _learn_in_chunks(_config(provisional_documents=0), ferry_texts(500, seed=6), 50)
    assert not learner.state.warmed_up and learner.state.provisional is None
    assert "provisional" not in warm_up_progress(learner.state).describe()
