"""Terms that describe topics: suffixed numbers fold, a model's own stop words, courtesy words.

- Ordinals: the English ordinal suffixes are -st, -nd, -rd and -th (any English grammar; value
  from memory). "23th" is the misspelling the issue saw in real top terms; it folds too.
- The courtesy list (greetings and closings) is our own: common practice, no source. What is
  checked against something outside the project is the demo's own generator, which writes
  "Thanks in advance.", "Kind regards, {name}." and "Hello, this is {name}." into every theme,
  and scikit-learn's NMI for the claim that routing does not depend on the describe option.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import redis
from fastapi.testclient import TestClient
from sklearn.metrics import normalized_mutual_info_score

from mixture.config import MixtureConfig
from mixture.describe import COURTESY_TERMS, describe_groups
from mixture.em import fit_texts
from mixture.errors import ConfigError
from mixture.routing import route_texts
from mixture.serialize import state_from_bytes, state_to_bytes
from mixture.tokenizer import NUMBER_TOKEN, Tokenizer, TokenizerConfig
from service.app import create_app
from service.cli import main
from service.demo_data import THEMES, generate_days
from service.settings import Settings
from service.testing import first_checkpoint, wait_until

# ---- suffixed numbers -----------------------------------------------------------------------


@pytest.mark.parametrize(
    "word",
    ["1st", "2nd", "3rd", "4th", "9th", "11th", "12th", "21st", "22nd", "23th", "101st"],
)
def test_numbers_with_an_ordinal_suffix_fold_into_the_placeholder(
    word: str,
) -> None:
    assert Tokenizer().tokenize(f"on the {word} of june") == [NUMBER_TOKEN, "june"]
    assert Tokenizer().tokenize(word.upper()) == [NUMBER_TOKEN]  # "9TH": case-folded


@pytest.mark.parametrize(
    "word", ["5kg", "20gb", "2fa", "a320", "4x4", "3d", "12v", "mv2", "3pm", "10am", "1990s"]
)
def test_numbers_with_a_unit_code_time_or_decade_stay_words(word: str) -> None:
    assert Tokenizer().tokenize(word) == [word]


def test_without_number_or_ordinal_folding_ordinals_stay_words() -> None:
    tokenizer = Tokenizer(TokenizerConfig(fold_numbers=False))
    assert tokenizer.tokenize("the 9th and 23th, 23 days") == ["9th", "23th", "23", "days"]
    tokenizer = Tokenizer(TokenizerConfig(fold_ordinals=False))
    assert tokenizer.tokenize("the 9th and 23th, 23 days") == ["9th", "23th", NUMBER_TOKEN, "days"]
    assert TokenizerConfig.from_dict({}).fold_ordinals  # on unless said otherwise


def test_an_ordinal_date_and_a_plain_date_give_the_same_tokens() -> None:
    tokenizer = Tokenizer()
    assert tokenizer.tokenize("sailing on 9th June") == tokenizer.tokenize("sailing on 9 June")


# ---- a model's own stop words ---------------------------------------------------------------


def test_extra_stop_words_are_dropped_and_stored_as_the_tokenizer_spells_them() -> None:
    config = TokenizerConfig(extra_stop_words=("Marrowline", "skerry's", "MARROWLINE"))
    assert config.extra_stop_words == ("marrowline", "skerry")  # folded, sorted, no repeats
    tokens = Tokenizer(config).tokenize("Marrowline ferries to Skerry: the skerry's pier")
    assert tokens == ["ferries", "pier"]
    # the default list still applies beside them, and placeholders are never stop words
    assert Tokenizer(config).tokenize("the 9th") == [NUMBER_TOKEN]
    assert Tokenizer().tokenize("Marrowline ferries") == ["marrowline", "ferries"]


@pytest.mark.parametrize(
    "value",
    [
        "marrowline",  # a string, not a list of words
        ["check-in"],  # two tokens
        ["two words"],
        [""],
        ["..."],
        [7],
        ["x" * 101],
        ["w"] * 1001,
    ],
)
def test_extra_stop_words_that_are_not_single_words_are_refused(value: object) -> None:
    with pytest.raises(ConfigError, match="extra_stop_words"):
        TokenizerConfig(extra_stop_words=value)  # type: ignore[arg-type]


def test_extra_stop_words_round_trip_through_the_dict_and_the_state_bytes() -> None:
    tokenizer = TokenizerConfig(extra_stop_words=("marrowline", "skerry"))
    config = MixtureConfig(n_groups=2, tokenizer=tokenizer)
    assert MixtureConfig.from_dict(config.to_dict()) == config
    texts = ["marrowline ferry delayed by fog", "skerry refund for my ticket please"] * 20
    state, _ = fit_texts(texts, config, seed=0)
    assert "marrowline" not in state.vocabulary and "skerry" not in state.vocabulary
    again = state_from_bytes(state_to_bytes(state))
    assert again.config.tokenizer.extra_stop_words == ("marrowline", "skerry")
    assert again.config == config


@pytest.fixture
def api(redis_url: str) -> Iterator[TestClient]:
    with TestClient(create_app(Settings(redis_url=redis_url))) as client:
        yield client


def test_extra_stop_words_are_set_through_post_models(api: TestClient, model_name: str) -> None:
    body = {
        "name": model_name,
        "config": {"n_groups": 2, "tokenizer": {"extra_stop_words": ["Marrowline", "skerry"]}},
    }
    made = api.post("/models", json=body)
    assert made.status_code == 201, made.text
    stored = api.get(f"/models/{model_name}").json()
    assert stored["config"]["tokenizer"]["extra_stop_words"] == ["marrowline", "skerry"]
    schema = api.get("/openapi.json").json()["components"]["schemas"]["TokenizerIn"]
    assert schema["properties"]["extra_stop_words"]["type"] == "array"
    refused = api.post(
        "/models",
        json={"name": model_name + "-b", "config": {"tokenizer": {"extra_stop_words": ["a-b"]}}},
    )
    assert refused.status_code == 422, refused.text
    assert "extra_stop_words" in refused.json()["detail"]
    not_a_list = api.post(
        "/models",
        json={"name": model_name + "-c", "config": {"tokenizer": {"extra_stop_words": "ab"}}},
    )
    assert not_a_list.status_code == 422
    assert not_a_list.json()["field"] == "config.tokenizer.extra_stop_words"


# ---- greetings and closings out of the term lists -------------------------------------------


@pytest.fixture(scope="module")
def demo_fit() -> tuple[object, list[str], list[str]]:
    messages = [m for day in generate_days(seed=0) for m in day if m.theme != "junk"][:1500]
    texts = [m.text for m in messages]
    state, _ = fit_texts(texts, MixtureConfig(n_groups=len(THEMES)), seed=0)
    return state, texts, [m.theme for m in messages]


def test_courtesy_words_are_left_out_of_the_demos_top_and_distinctive_terms(
    demo_fit: tuple[object, list[str], list[str]],
) -> None:
    state = demo_fit[0]
    kept = describe_groups(state, top_n=10, keep_courtesy_terms=True)  # type: ignore[arg-type]
    shown_when_kept = {t for s in kept for t, _ in s.top_terms + s.distinctive_terms}
    # the demo's generator writes greetings into every theme: with the switch on they show
    assert shown_when_kept & COURTESY_TERMS >= {"thanks", "please"}
    summaries = describe_groups(state, top_n=10)  # type: ignore[arg-type]
    for summary in summaries:
        terms = [t for t, _ in summary.top_terms + summary.distinctive_terms]
        assert len(summary.top_terms) == 10
        assert not set(terms) & COURTESY_TERMS, terms
    # the other words keep their scores (p(w | k) is not renormalised without them)
    for with_them, without in zip(kept, summaries, strict=True):
        scores = dict(with_them.top_terms)
        for term, score in without.top_terms:
            if term in scores:
                assert score == scores[term]


def test_the_courtesy_words_stay_in_the_model_and_routing(
    demo_fit: tuple[object, list[str], list[str]],
) -> None:
    state, texts, themes = demo_fit
    assert {"thanks", "regards", "hello"} <= set(state.vocabulary.words())  # type: ignore[attr-defined]
    before = route_texts(state, texts).group  # type: ignore[arg-type]
    describe_groups(state)  # type: ignore[arg-type]
    after = route_texts(state, texts).group  # type: ignore[arg-type]
    assert np.array_equal(before, after)
    # and the fit still finds the themes (scikit-learn's NMI; chance is about 0)
    assert normalized_mutual_info_score(themes, after) > 0.5


def test_describe_leaves_courtesy_words_out_unless_asked_offline_and_through_the_api(
    demo_fit: tuple[object, list[str], list[str]],
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    model_file = tmp_path / "demo.model"
    model_file.write_bytes(state_to_bytes(demo_fit[0]))  # type: ignore[arg-type]

    def listed(*extra: str) -> set[str]:
        assert main(["describe", "--model-file", str(model_file), "--json", *extra]) == 0
        groups = json.loads(capsys.readouterr().out)
        return {t for g in groups for t, _ in g["top_terms"] + g["distinctive_terms"]}

    assert not listed() & COURTESY_TERMS
    assert listed("--keep-courtesy-terms") & COURTESY_TERMS >= {"thanks", "please"}


def test_the_groups_endpoint_takes_the_switch(
    redis_url: str, redis_client: redis.Redis, model_name: str
) -> None:
    with TestClient(create_app(Settings(redis_url=redis_url))) as api:
        store, worker, _ = first_checkpoint(api, redis_client, redis_url, model_name, 4, seed=3)
        worker.stop()
        path = f"/models/{model_name}/groups"
        version = store.version()
        # the API reloads on the checkpoint's notice, in the background: wait for it
        wait_until(lambda: api.get(path).json()["version"] == version, what="the reload")

        def listed(**params: object) -> set[str]:
            answer = api.get(path, params={"top": 20, **params})
            assert answer.status_code == 200, answer.text
            groups = answer.json()["groups"]
            return {t["term"] for g in groups for t in g["top_terms"] + g["distinctive_terms"]}

        assert listed(keep_courtesy_terms="true") & COURTESY_TERMS
        assert not listed() & COURTESY_TERMS
        one = api.get(f"{path}/0", params={"top": 20, "keep_courtesy_terms": "true"}).json()
        assert {t["term"] for t in one["top_terms"]} & COURTESY_TERMS
