"""Tests of the text modules: tokenizer, vocabulary, and batch counts."""

from __future__ import annotations

import io
import unicodedata
from collections import Counter

import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.feature_extraction.text import CountVectorizer

from mixture.counting import CountBatch, count_texts, token_id_cache, token_ids_text_by_text
from mixture.errors import ConfigError, InputError, StateFormatError
from mixture.tokenizer import (
    EMAIL_TOKEN,
    ENGLISH_STOP_WORDS,
    NUMBER_TOKEN,
    URL_TOKEN,
    Tokenizer,
    TokenizerConfig,
    _ascii_word_runs,
)
from mixture.vocabulary import Vocabulary

# Invented ferry-inbox snippets (made up for these tests).
INBOX = [
    "My booking ref KX-2291 for the 07:45 crossing to Skerry Isle was cancelled, refund please!",
    "Lost a blue bag on deck; call 0771 234 567 or mail lena.moss@ferry-coop.example",
    "Timetable at https://ferry-coop.example/timetable?season=winter doesn't show the Sunday boat",
    "Can I bring my dog and a bicycle? The dog's crate is 80 cm.",
    "Storm warning: the 18.30 sailing is delayed. Passengers' cars wait at the harbour.",
    "Wheelchair access to the upper deck, please; my carer's ticket costs €12.50?",
    "Café on board was closed again. Straße? No, I mean the harbour street, near www.isle.example",
    "",
]


def sklearn_counts(vectorizer: CountVectorizer, matrix: sp.csr_matrix, vocabulary: Vocabulary):
    """Reorder scikit-learn's columns into our vocabulary ids (shape of ours)."""
    out = sp.lil_matrix((matrix.shape[0], vocabulary.capacity))
    for term, column in vectorizer.vocabulary_.items():
        word_id = vocabulary.lookup(term)
        assert word_id >= 0, term
        out[:, word_id] = matrix[:, column]
    return out.tocsr()


# --------------------------------------------------------------------------------------------
# TokenizerConfig
# --------------------------------------------------------------------------------------------


def test_config_round_trip_and_defaults() -> None:
    config = TokenizerConfig(min_length=3, stop_words="none", fold_numbers=False)
    assert TokenizerConfig.from_dict(config.to_dict()) == config
    assert TokenizerConfig.from_dict({}) == TokenizerConfig()
    assert config.to_dict()["min_length"] == 3
    assert hash(config) == hash(TokenizerConfig.from_dict(config.to_dict()))


@pytest.mark.parametrize(
    ("settings_dict", "named"),
    [
        ({"min_lenght": 2}, "min_lenght"),
        ({"min_length": 0}, "min_length"),
        ({"min_length": True}, "min_length"),
        ({"min_length": 2.5}, "min_length"),
        ({"max_length": 1, "min_length": 2}, "max_length"),
        ({"stop_words": "french"}, "stop_words"),
        ({"fold_urls": "yes"}, "fold_urls"),
    ],
)
def test_config_rejects_bad_settings_naming_them(settings_dict: dict, named: str) -> None:
    with pytest.raises(ConfigError, match=named):
        TokenizerConfig.from_dict(settings_dict)


def test_config_errors_are_value_errors() -> None:
    with pytest.raises(ValueError):
        TokenizerConfig(min_length=-1)
    with pytest.raises(ConfigError, match="mapping"):
        TokenizerConfig.from_dict(["min_length"])  # type: ignore[arg-type]


# --------------------------------------------------------------------------------------------
# Tokenizer
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def tokenizer() -> Tokenizer:
    return Tokenizer()


def test_casefold_latin(tokenizer: Tokenizer) -> None:
    # Python's str.casefold documentation: "ß" folds to "ss" (full case folding of Unicode
    # CaseFolding.txt), so "Straße" and "STRASSE" meet.
    assert tokenizer.tokenize("Straße STRASSE strasse") == ["strasse"] * 3
    assert tokenizer.tokenize("Café CAFÉ café") == ["café"] * 3


def test_casefold_greek_and_cyrillic(tokenizer: Tokenizer) -> None:
    # Unicode CaseFolding.txt maps final sigma U+03C2 and capital sigma U+03A3 both to U+03C3.
    assert tokenizer.tokenize("Οδυσσεύς ΟΔΥΣΣΕΎΣ") == ["οδυσσεύσ"] * 2
    assert tokenizer.tokenize("Привет, ПРИВЕТ мир!") == ["привет", "привет", "мир"]


def test_combining_marks_stay_inside_words(tokenizer: Tokenizer) -> None:
    # U+093F DEVANAGARI VOWEL SIGN I is category Mc and U+094D VIRAMA is Mn (unicodedata);
    # Python's \w matches neither, yet both belong to the word.
    assert unicodedata.category("\u093f") == "Mc"
    assert tokenizer.tokenize("हिन्दी भाषा") == ["हिन्दी", "भाषा"]
    # A decomposed accent (e + U+0301) meets the precomposed letter after NFKC.
    assert tokenizer.tokenize("Cafe\u0301") == ["café"]
    assert tokenizer.tokenize("ภาษาไทย") == ["ภาษาไทย"]
    assert tokenizer.tokenize("İstanbul Istanbul") == ["istanbul", "istanbul"]


def test_compatibility_forms_are_normalised(tokenizer: Tokenizer) -> None:
    assert tokenizer.tokenize("ＦＵＬＬ ﬁsh") == ["full", "fish"]


def test_numbers_fold_to_placeholder(tokenizer: Tokenizer) -> None:
    tokens = tokenizer.tokenize("42 12.50 1,000 10:30 ٤٢ 7 3pm a320 v1.2")
    assert tokens == [NUMBER_TOKEN] * 6 + ["3pm", "a320", "v1.2"]
    kept = Tokenizer(TokenizerConfig(fold_numbers=False))
    assert kept.tokenize("2024 12.50 7 3pm") == ["2024", "12.50", "3pm"]


def test_urls_and_emails_fold_to_placeholders(tokenizer: Tokenizer) -> None:
    text = "See https://ferry.example/a?b=1, www.isle.example or Mail Anna.B+x@ferry-coop.example!"
    assert tokenizer.tokenize(text) == ["see", URL_TOKEN, URL_TOKEN, "mail", EMAIL_TOKEN]
    plain = Tokenizer(TokenizerConfig(fold_urls=False, fold_emails=False))
    assert plain.tokenize("https://ferry.example anna@isle.example") == [
        "https",
        "ferry",
        "example",
        "anna",
        "isle",
        "example",
    ]
    # An address without a dotted domain is not an e-mail address; the literal placeholder
    # text in a message is ordinary text, not a placeholder.
    assert tokenizer.tokenize("ab@cd _url_ _num_") == ["ab", "cd", "url", "num"]
    # Nor can the internal sentinels (ASCII capitals, which case folding removes).
    assert tokenizer.tokenize("URL EMAIL Url") == ["url", "email", "url"]


def test_url_inside_punctuation_and_multiple_lines(tokenizer: Tokenizer) -> None:
    text = "timetable (http://ferry.example/t)\nand\tcontact:ops@ferry.example."
    assert tokenizer.tokenize(text) == ["timetable", URL_TOKEN, "contact", EMAIL_TOKEN]


def test_apostrophes_and_hyphens(tokenizer: Tokenizer) -> None:
    text = "passenger's O’Brien rock'n'roll check-in e-mail don't passengers'"
    assert tokenizer.tokenize(text) == [
        "passenger",
        "obrien",
        "rocknroll",
        "check",
        "mail",
        "passengers",
    ]


def test_length_limits_and_placeholder_exemption() -> None:
    strict = Tokenizer(TokenizerConfig(min_length=4, max_length=6, stop_words="none"))
    assert strict.tokenize("abc abcd abcdef abcdefg 12 x@ferry.example") == [
        "abcd",
        "abcdef",
        NUMBER_TOKEN,
        EMAIL_TOKEN,
    ]
    default = Tokenizer()
    assert default.tokenize("x " + "h" * 41 + " " + "k" * 40) == ["k" * 40]


def test_stop_words() -> None:
    text = "The ferry and the dog are not late"
    assert Tokenizer().tokenize(text) == ["ferry", "dog", "not", "late"]
    keep_all = Tokenizer(TokenizerConfig(stop_words="none"))
    assert keep_all.tokenize(text) == ["the", "ferry", "and", "the", "dog", "are", "not", "late"]
    # Our own list: about 150 to 200 function words, lower case, apostrophe-free.
    assert 140 <= len(ENGLISH_STOP_WORDS) <= 200
    assert all(w.isascii() and w.isalpha() and w.islower() for w in ENGLISH_STOP_WORDS)
    assert {"the", "and", "dont", "youre"} <= ENGLISH_STOP_WORDS
    assert not {"no", "not", "please", "help", "id"} & ENGLISH_STOP_WORDS


def test_tokenize_is_deterministic_across_instances() -> None:
    first = [Tokenizer().tokenize(t) for t in INBOX]
    second = [Tokenizer(TokenizerConfig()).tokenize(t) for t in reversed(INBOX)][::-1]
    assert first == second


def test_tokenize_rejects_non_str(tokenizer: Tokenizer) -> None:
    with pytest.raises(InputError, match="bytes"):
        tokenizer.tokenize(b"ferry")  # type: ignore[arg-type]


def test_tokenizer_rejects_wrong_config_type() -> None:
    with pytest.raises(ConfigError):
        Tokenizer({"min_length": 2})  # type: ignore[arg-type]


TEXT_ALPHABET = st.sampled_from(
    [
        *"abcXYZ019 .,:;'’-_@/",
        *("://", "www.", "'s", "é", "ß", "Σ", "ς", "ж", "ह", "\u093f", "日", "\u0301"),
        *("ﬁ", "Ｆ", "٣", "😀", "\n", "\t", "İ", "½", "Ⅻ", "㏂", "ǅ", "\u200d", "𝐀"),
    ]
)
texts_strategy = st.lists(TEXT_ALPHABET, max_size=60).map("".join)


@settings(max_examples=300, deadline=None)
@given(texts_strategy)
def test_tokens_are_fixed_points(text: str) -> None:
    # Property: re-tokenizing the joined tokens gives the same tokens (no placeholders here,
    # since their spelling is deliberately not something a text can forge).
    plain = Tokenizer(TokenizerConfig(fold_urls=False, fold_emails=False, fold_numbers=False))
    tokens = plain.tokenize(text)
    assert plain.tokenize(" ".join(tokens)) == tokens
    assert all(1 <= len(t) <= 40 for t in tokens)


# --------------------------------------------------------------------------------------------
# Vocabulary
# --------------------------------------------------------------------------------------------


def test_vocabulary_ids_are_stable_and_in_arrival_order() -> None:
    vocabulary = Vocabulary(["ferry", "dog", "ferry"])
    assert vocabulary.lookup("ferry") == 0
    assert vocabulary.add("harbour") == 2
    assert vocabulary.add("dog") == 1
    assert vocabulary.lookup("storm") == -1
    assert (vocabulary.capacity, vocabulary.n_active, vocabulary.generation) == (3, 3, 0)
    assert vocabulary.words() == ["ferry", "dog", "harbour"]
    assert vocabulary.word(2) == "harbour"
    assert "dog" in vocabulary and len(vocabulary) == 3
    assert vocabulary.lookup_many(["dog", "storm"]).tolist() == [1, -1]


def test_retire_never_reuses_ids() -> None:
    vocabulary = Vocabulary(["ferry", "dog", "harbour"])
    vocabulary.retire(np.array([1]))
    assert vocabulary.lookup("dog") == -1
    assert vocabulary.capacity == 3 and vocabulary.n_active == 2 and vocabulary.n_retired == 1
    assert vocabulary.active_mask().tolist() == [True, False, True]
    assert vocabulary.active_ids().tolist() == [0, 2]
    assert vocabulary.word(1) == "dog"  # kept for reports until a compaction
    # A new word and the retired word coming back both get fresh ids.
    assert vocabulary.add("storm") == 3
    assert vocabulary.add("dog") == 4
    vocabulary.retire([1, 1])  # retiring again is harmless
    assert vocabulary.n_active == 4


def test_retire_rejects_bad_ids_and_changes_nothing() -> None:
    vocabulary = Vocabulary(["ferry", "dog"])
    with pytest.raises(InputError, match="id 5"):
        vocabulary.retire(np.array([0, 5]))
    with pytest.raises(InputError, match="integers"):
        vocabulary.retire(np.array([0.5]))
    assert vocabulary.n_active == 2 and vocabulary.lookup("ferry") == 0
    with pytest.raises(InputError):
        vocabulary.word(7)
    with pytest.raises(InputError):
        vocabulary.add("")


def test_compact_renumbers_densely_and_bumps_generation() -> None:
    vocabulary = Vocabulary(["a1", "b2", "c3", "d4", "e5"])
    vocabulary.retire(np.array([0, 3]))
    old_to_new = vocabulary.compact()
    assert old_to_new.dtype == np.int64
    assert old_to_new.tolist() == [-1, 0, 1, -1, 2]
    assert vocabulary.words() == ["b2", "c3", "e5"]
    assert [vocabulary.lookup(w) for w in ("a1", "b2", "c3", "d4", "e5")] == [-1, 0, 1, -1, 2]
    assert (vocabulary.capacity, vocabulary.n_active, vocabulary.generation) == (3, 3, 1)
    assert vocabulary.add("f6") == 3


def test_arrays_round_trip_through_npz_without_pickle() -> None:
    vocabulary = Vocabulary(["ferry", "straße", "हिन्दी", "日本", "dog"])
    vocabulary.retire([1])
    vocabulary.compact()
    vocabulary.add("storm")
    vocabulary.retire([0])
    arrays = vocabulary.to_arrays()
    assert all(a.dtype != object for a in arrays.values())
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    buffer.seek(0)
    with np.load(buffer, allow_pickle=False) as loaded:
        restored = Vocabulary.from_arrays({k: loaded[k] for k in loaded.files})
    assert restored.words() == vocabulary.words()
    assert restored.active_mask().tolist() == vocabulary.active_mask().tolist()
    assert restored.generation == vocabulary.generation == 1
    assert restored.lookup("ferry") == -1 and restored.lookup("storm") == 4
    assert restored.add("new") == vocabulary.capacity


_VOCABULARY_STEPS = st.lists(
    st.one_of(
        st.tuples(st.just("add"), st.text(min_size=1, max_size=6)),
        st.tuples(st.just("retire"), st.integers(0, 40)),
        st.tuples(st.just("compact"), st.none()),
        st.tuples(st.just("copy"), st.none()),
        st.tuples(st.just("reload"), st.none()),
        st.tuples(st.just("arrays"), st.none()),
    ),
    max_size=60,
)


@settings(max_examples=150, deadline=None)
@given(_VOCABULARY_STEPS)
def test_arrays_encode_every_word_after_any_history(steps: list[tuple[str, object]]) -> None:
    """to_arrays encodes only the words new since its last call; whatever happened between
    (adds, retirements, renumbering, copies, a reload), its bytes and offsets are those of
    encoding every word afresh with Python's UTF-8 codec, and an array it returned earlier is
    never changed by what comes after."""

    def expected(vocabulary: Vocabulary) -> tuple[bytes, list[int]]:
        encoded = [w.encode("utf-8") for w in vocabulary.words()]
        return b"".join(encoded), np.cumsum([0] + [len(b) for b in encoded]).tolist()

    vocabulary = Vocabulary(["ferry", "straße"])
    handed_out: list[tuple[dict[str, np.ndarray], bytes, list[int]]] = []
    for kind, value in steps:
        if kind == "add":
            assert isinstance(value, str)
            vocabulary.add(value)
        elif kind == "retire" and vocabulary.capacity:
            vocabulary.retire([int(value) % vocabulary.capacity])  # type: ignore[call-overload]
        elif kind == "compact":
            vocabulary.compact()
        elif kind == "copy":
            vocabulary = vocabulary.copy()
        elif kind == "reload":
            vocabulary = Vocabulary.from_arrays(vocabulary.to_arrays())
        arrays = vocabulary.to_arrays()
        data, offsets = expected(vocabulary)
        assert arrays["word_bytes"].tobytes() == data
        assert arrays["word_offsets"].tolist() == offsets
        handed_out.append((arrays, data, offsets))
    for arrays, data, offsets in handed_out:  # none changed by the later steps
        assert arrays["word_bytes"].tobytes() == data
        assert arrays["word_offsets"].tolist() == offsets


def _arrays(words: list[str]) -> dict[str, np.ndarray]:
    return Vocabulary(words).to_arrays()


@pytest.mark.parametrize(
    ("mutate", "message"),
    [
        (lambda a: a.pop("active"), "missing"),
        (lambda a: a.update(word_bytes=a["word_bytes"].astype(np.int64)), "uint8"),
        (lambda a: a.update(word_offsets=a["word_offsets"][::-1].copy()), "offsets"),
        (lambda a: a.update(active=a["active"][:1]), "active"),
        (lambda a: a.update(generation=np.array([1, 2])), "generation"),
        (lambda a: a.update(word_bytes=np.full_like(a["word_bytes"], 0xFF)), "UTF-8"),
    ],
)
def test_from_arrays_rejects_corrupt_arrays(mutate, message: str) -> None:
    arrays = _arrays(["ferry", "dog"])
    mutate(arrays)
    with pytest.raises(StateFormatError, match=message):
        Vocabulary.from_arrays(arrays)


def test_from_arrays_rejects_an_active_word_twice() -> None:
    arrays = _arrays(["dog", "cat"])
    arrays["word_bytes"] = np.frombuffer(b"dogdog", dtype=np.uint8).copy()
    arrays["word_offsets"] = np.array([0, 3, 6], dtype=np.int64)
    with pytest.raises(StateFormatError, match="two ids"):
        Vocabulary.from_arrays(arrays)


@settings(max_examples=200, deadline=None)
@given(
    st.lists(
        st.one_of(
            st.tuples(st.just("add"), st.sampled_from(["ab", "cd", "éf", "ß", "日本", "x y"])),
            st.tuples(st.just("retire"), st.integers(0, 30)),
            st.tuples(st.just("compact"), st.none()),
        ),
        max_size=40,
    )
)
def test_ids_never_change_meaning_within_a_generation(operations) -> None:
    # Property: within one generation an id, once issued, always names the same word; active
    # words have exactly one id; arrays round-trip exactly.
    vocabulary = Vocabulary()
    issued: dict[int, str] = {}
    for operation, value in operations:
        if operation == "add":
            word_id = vocabulary.add(value)
            assert issued.setdefault(word_id, value) == value
        elif operation == "retire" and value < vocabulary.capacity:
            vocabulary.retire([value])
            assert vocabulary.lookup(issued[value]) != value
        elif operation == "compact":
            old_to_new = vocabulary.compact()
            issued = {int(old_to_new[i]): w for i, w in issued.items() if old_to_new[i] >= 0}
        for word_id, word in issued.items():
            assert vocabulary.word(word_id) == word
    active = vocabulary.active_ids().tolist()
    assert sorted(vocabulary.lookup(vocabulary.word(i)) for i in active) == active
    restored = Vocabulary.from_arrays(vocabulary.to_arrays())
    assert restored.words() == vocabulary.words()
    assert restored.active_mask().tolist() == vocabulary.active_mask().tolist()
    assert restored.generation == vocabulary.generation


# --------------------------------------------------------------------------------------------
# count_texts
# --------------------------------------------------------------------------------------------


def test_counts_equal_scikit_learn_count_vectorizer(tokenizer: Tokenizer) -> None:
    # Reference: scikit-learn's CountVectorizer given our tokenizer as its callable; the
    # matrices must agree entry by entry once its columns are mapped to our ids.
    vocabulary = Vocabulary()
    batch = count_texts(INBOX, tokenizer, vocabulary, grow=True)
    vectorizer = CountVectorizer(tokenizer=tokenizer.tokenize, lowercase=False, token_pattern=None)
    reference = vectorizer.fit_transform(INBOX)
    assert set(vectorizer.vocabulary_) == set(vocabulary.words())
    assert batch.new_words == vocabulary.capacity == len(vectorizer.vocabulary_)
    expected = sklearn_counts(vectorizer, reference, vocabulary)
    assert batch.counts.shape == (len(INBOX), vocabulary.capacity)
    assert (batch.counts != expected).nnz == 0
    assert batch.known_tokens.tolist() == [len(tokenizer.tokenize(t)) for t in INBOX]
    assert batch.unknown_tokens.tolist() == [0] * len(INBOX)


def test_routing_counts_ignore_unknown_words_like_scikit_learn(tokenizer: Tokenizer) -> None:
    # Reference: CountVectorizer.transform drops terms outside its fitted vocabulary.
    vocabulary = Vocabulary()
    count_texts(INBOX[:4], tokenizer, vocabulary, grow=True)
    vectorizer = CountVectorizer(tokenizer=tokenizer.tokenize, lowercase=False, token_pattern=None)
    vectorizer.fit(INBOX[:4])
    capacity = vocabulary.capacity
    batch = count_texts(INBOX, tokenizer, vocabulary, grow=False)
    assert vocabulary.capacity == capacity and batch.new_words == 0
    expected = sklearn_counts(vectorizer, vectorizer.transform(INBOX), vocabulary)
    assert (batch.counts != expected).nnz == 0
    totals = np.array([len(tokenizer.tokenize(t)) for t in INBOX])
    assert (batch.known_tokens + batch.unknown_tokens).tolist() == totals.tolist()
    assert batch.unknown_tokens[4:].sum() > 0


def test_csr_is_canonical_float64(tokenizer: Tokenizer) -> None:
    batch = count_texts(["dog dog ferry dog", "ferry harbour ferry"], tokenizer, Vocabulary(), True)
    counts = batch.counts
    assert isinstance(counts, sp.csr_matrix)
    assert counts.dtype == np.float64
    assert counts.has_sorted_indices and counts.has_canonical_format
    assert counts.toarray().tolist() == [[3.0, 1.0, 0.0], [0.0, 2.0, 1.0]]


def test_empty_batches_and_empty_texts(tokenizer: Tokenizer) -> None:
    vocabulary = Vocabulary(["ferry"])
    batch = count_texts([], tokenizer, vocabulary, grow=True)
    assert isinstance(batch, CountBatch)
    assert batch.counts.shape == (0, 1) and batch.known_tokens.shape == (0,)
    batch = count_texts(["", "the and of", "   "], tokenizer, vocabulary, grow=False)
    assert batch.counts.shape == (3, 1) and batch.counts.nnz == 0
    assert batch.known_tokens.tolist() == [0, 0, 0] == batch.unknown_tokens.tolist()


def test_counts_follow_retire_and_compact(tokenizer: Tokenizer) -> None:
    vocabulary = Vocabulary()
    count_texts(["ferry dog harbour"], tokenizer, vocabulary, grow=True)
    dog = vocabulary.lookup("dog")
    vocabulary.retire([dog])
    routed = count_texts(["dog ferry"], tokenizer, vocabulary, grow=False)
    assert routed.unknown_tokens.tolist() == [1] and routed.counts[0, dog] == 0
    learned = count_texts(["dog ferry"], tokenizer, vocabulary, grow=True)
    new_dog = vocabulary.lookup("dog")
    assert new_dog == 3 and learned.new_words == 1 and learned.counts[0, new_dog] == 1
    assert learned.counts.shape == (1, 4) and learned.counts[0, dog] == 0
    old_to_new = vocabulary.compact()
    after = count_texts(["dog ferry"], tokenizer, vocabulary, grow=False)
    assert after.counts.shape == (1, 3)
    assert after.counts[0, old_to_new[new_dog]] == 1 and after.known_tokens.tolist() == [2]


def test_cached_lookups_see_later_vocabulary_changes(tokenizer: Tokenizer) -> None:
    # The per-vocabulary lookup cache must never answer from a stale entry: an alias
    # ("passenger's" -> "passenger"), a number behind the placeholder, a plain word.
    vocabulary = Vocabulary(["ferry"])
    texts = ["passenger's ferry 42 storm"]
    first = count_texts(texts, tokenizer, vocabulary, grow=False)
    assert first.unknown_tokens.tolist() == [3]
    for word in ("passenger", NUMBER_TOKEN, "storm"):
        vocabulary.add(word)
    second = count_texts(texts, tokenizer, vocabulary, grow=False)
    assert second.known_tokens.tolist() == [4] and second.unknown_tokens.tolist() == [0]
    vocabulary.retire([vocabulary.lookup("passenger"), vocabulary.lookup(NUMBER_TOKEN)])
    third = count_texts(texts, tokenizer, vocabulary, grow=False)
    assert third.unknown_tokens.tolist() == [2]
    grown = count_texts(texts, tokenizer, vocabulary, grow=True)
    assert grown.new_words == 2 and grown.known_tokens.tolist() == [4]
    assert vocabulary.lookup("passenger") == 4 and vocabulary.lookup(NUMBER_TOKEN) == 5


def test_vocabulary_copies_are_independent(tokenizer: Tokenizer) -> None:
    import copy

    vocabulary = Vocabulary()
    count_texts(["ferry dog"], tokenizer, vocabulary, grow=True)
    clone = copy.deepcopy(vocabulary)
    count_texts(["storm"], tokenizer, clone, grow=True)
    assert vocabulary.capacity == 2 and clone.capacity == 3
    assert count_texts(["storm"], tokenizer, vocabulary, grow=False).unknown_tokens.tolist() == [1]


@pytest.mark.parametrize(
    ("texts", "message"),
    [
        (["ferry", "dog", None], "index 2"),
        (["ferry", b"dog"], "index 1"),
        ("ferry dog", "sequence"),
        (42, "sequence"),
    ],
)
def test_bad_input_names_the_problem_and_adds_nothing(texts, message: str) -> None:
    vocabulary = Vocabulary()
    with pytest.raises(InputError, match=message):
        count_texts(texts, Tokenizer(), vocabulary, grow=True)
    assert vocabulary.capacity == 0


def test_bad_tokenizer_or_vocabulary_argument() -> None:
    with pytest.raises(InputError, match="Tokenizer"):
        count_texts(["x"], "tokenizer", Vocabulary(), grow=True)  # type: ignore[arg-type]
    with pytest.raises(InputError, match="Vocabulary"):
        count_texts(["x"], Tokenizer(), {}, grow=True)  # type: ignore[arg-type]


@settings(max_examples=150, deadline=None)
@given(st.lists(texts_strategy, max_size=8), st.sampled_from([2, 1, 3]))
def test_counts_match_token_tallies(texts: list[str], min_length: int) -> None:
    # Property: each row holds exactly the Counter of the document's tokens; row sums equal
    # known_tokens; a fresh vocabulary in routing mode knows nothing and counts all as unknown.
    tokenizer = Tokenizer(TokenizerConfig(min_length=min_length))
    vocabulary = Vocabulary()
    batch = count_texts(texts, tokenizer, vocabulary, grow=True)
    rows = batch.counts.toarray()
    for row, text in zip(rows, texts, strict=True):
        expected = Counter(tokenizer.tokenize(text))
        observed = {vocabulary.word(i): row[i] for i in np.flatnonzero(row)}
        assert observed == expected
    assert rows.sum(axis=1).tolist() == batch.known_tokens.tolist()
    again = count_texts(texts, tokenizer, vocabulary, grow=False)
    assert (again.counts != batch.counts).nnz == 0 and again.unknown_tokens.sum() == 0
    fresh = count_texts(texts, tokenizer, Vocabulary(), grow=False)
    assert fresh.known_tokens.sum() == 0
    assert fresh.unknown_tokens.tolist() == batch.known_tokens.tolist()


def test_active_mask_is_a_stable_read_only_snapshot() -> None:
    vocabulary = Vocabulary(["ferry", "dog", "harbour"])
    mask = vocabulary.active_mask()
    assert vocabulary.active_mask() is mask  # shared until the vocabulary changes
    with pytest.raises(ValueError):
        mask[0] = False
    vocabulary.retire([0])
    assert mask.tolist() == [True, True, True]  # a kept snapshot does not change under you
    assert vocabulary.active_mask().tolist() == [False, True, True]
    vocabulary.add("storm")
    assert vocabulary.active_mask().shape == (4,)
    assert vocabulary.to_arrays()["active"].flags.writeable


# ---- one regex pass over the joined batch equals tokenizing text by text ---------------------
_PIECES = st.sampled_from(
    [
        "ferry",
        "Ferry's",
        "12.50",
        "10:30",
        "ΣΑΣ",
        "Straße",
        "don\u2019t",
        "the",
        "a",
        "https://isle.example/x?y=1",
        "www.isle.example",
        "lena@ferry.example",
        "@",
        "://",
        "www.",
        "\x1e",
        " ",
        "\t",
        "\n",
        "\u00a0",
        ".",
        ",",
        "-",
        "é",
        "\u0301",
        "x@y",
        "",
    ]
)
_TEXTS = st.lists(st.lists(_PIECES, max_size=12).map("".join), max_size=8)


def _assert_same_as_text_by_text(texts: list[str]) -> None:
    tokenizer = Tokenizer()
    joined_vocab, single_vocab = Vocabulary(), Vocabulary()
    batch = count_texts(texts, tokenizer, joined_vocab, grow=True)
    lookup = token_id_cache(single_vocab, tokenizer, True).__getitem__
    ids, ends = token_ids_text_by_text(texts, tokenizer, lookup)
    assert joined_vocab.words() == single_vocab.words()
    starts = np.concatenate([[0], ends])[:-1]
    for row, (start, stop) in enumerate(zip(starts, ends, strict=True)):
        mine = ids[start:stop]
        expected = Counter(mine[mine >= 0].tolist())
        got = batch.counts.getrow(row)
        assert dict(zip(got.indices.tolist(), got.data.tolist(), strict=True)) == expected
    assert batch.known_tokens.sum() == (ids >= 0).sum()


@settings(max_examples=300, deadline=None)
@given(_TEXTS)
def test_joined_batch_pass_equals_text_by_text(texts: list[str]) -> None:
    # Property check (no outside source): the batch path must be a pure speed-up.
    _assert_same_as_text_by_text(texts)


@pytest.mark.parametrize(
    "texts",
    [
        ["see https://isle.example/a", "next text", "www.isle.example"],
        ["mail lena@ferry.example", "x@y.example now", "12.50", ":// www."],
        [
            "holds the separator qzxjbound0 itself",
            "ferry https://a.exampleqzxjbound0b",
            "qzxjbound0",
            "QZXJBOUND0 folds to it",
        ],
        ["\x1e record separators \x1e", "\u0301mark first", "don' ", "12."],
        ["", "", "ferry"],
    ],
)
def test_joined_batch_pass_at_text_edges(texts: list[str]) -> None:
    # URLs and addresses at the end or start of a text must not run into the next one; a
    # text holding the separator itself takes the per-text path.
    _assert_same_as_text_by_text(texts)


# ASCII text heavy in the characters where the token pattern joins or splits: letters of both
# cases, digits, apostrophes, the digit separators, underscores, hyphens, whitespace and
# control characters (\x1c-\x1f are whitespace to str.split, not to the pattern's word class).
_ASCII_EDGES = st.text(alphabet="aZ09 '.,:-_@/\t\n\x1c\x1f\x7f!", max_size=40)


@settings(max_examples=500, deadline=None)
@given(_ASCII_EDGES)
def test_ascii_fast_path_gives_the_patterns_matches(text: str) -> None:
    # Property check (no outside source): the byte-level split must be a pure speed-up of
    # the regex scan, the same raw tokens in the same order whenever it answers.
    tokenizer = Tokenizer()
    reference = tokenizer._find_all(text)
    runs = _ascii_word_runs(text)
    assert runs is None or runs == reference
    assert tokenizer.find_raw_tokens(text) == reference


@pytest.mark.parametrize(
    ("text", "takes_fast_path"),
    [
        ("lost bag on deck 4, call me?", True),
        ("seat-12 (window) _url_ x\x1fy", True),
        ("the 18.30 sailing", False),  # a number with a separator: joined by the pattern
        ("10:45", False),
        ("the dog's crate", False),  # an apostrophe inside a word
        ("'quoted' 12. .5 a' 'b", True),  # apostrophes and separators that join nothing
        ("café", False),  # not ASCII: the pattern itself
    ],
)
def test_ascii_fast_path_is_taken_when_no_join_applies(text: str, takes_fast_path: bool) -> None:
    tokenizer = Tokenizer()
    assert (text.isascii() and _ascii_word_runs(text) is not None) is takes_fast_path
    assert tokenizer.find_raw_tokens(text) == tokenizer._find_all(text)


def test_ascii_fast_path_counts_equal_the_regex_path_on_the_bench_corpora() -> None:
    # Bit-identical counts with and without the fast path on the texts of bench_worker and
    # bench_text (their generators, a few hundred documents each), batch and text by text.
    from bench.bench_text import make_texts
    from bench.bench_worker import short_messages

    corpora = [
        short_messages(600, seed=3),
        make_texts(300, 30, seed=1),
        make_texts(40, 400, seed=2),
        make_texts(300, 30, seed=4, script="cyrillic"),
        INBOX,
    ]
    for texts in corpora:
        fast_tokenizer, regex_tokenizer = Tokenizer(), Tokenizer()
        regex_tokenizer.find_raw_tokens = regex_tokenizer._find_all  # type: ignore[method-assign]
        for unit in (texts, texts[:1], texts[:256]):
            fast_vocab, regex_vocab = Vocabulary(), Vocabulary()
            fast = count_texts(unit, fast_tokenizer, fast_vocab, grow=True)
            regex = count_texts(unit, regex_tokenizer, regex_vocab, grow=True)
            assert fast_vocab.words() == regex_vocab.words()
            assert np.array_equal(fast.counts.indptr, regex.counts.indptr)
            assert np.array_equal(fast.counts.indices, regex.counts.indices)
            assert np.array_equal(fast.counts.data, regex.counts.data)
            assert np.array_equal(fast.known_tokens, regex.known_tokens)


def test_attached_caches_hear_of_every_change_to_the_ids() -> None:
    # The vocabulary's public seam for lookup caches (no outside source: a protocol check).
    class Recorder:
        def __init__(self) -> None:
            self.events: list[tuple[str, str]] = []

        def word_issued(self, word: str) -> None:
            self.events.append(("issued", word))

        def word_removed(self, word: str) -> None:
            self.events.append(("removed", word))

        def ids_renumbered(self) -> None:
            self.events.append(("renumbered", ""))

    vocabulary = Vocabulary(["harbour"])
    recorder = vocabulary.attach_cache("recorder", Recorder)
    assert vocabulary.attach_cache("recorder", Recorder) is recorder
    vocabulary.add("ferry")
    vocabulary.retire(np.array([0]))
    vocabulary.compact()
    assert recorder.events == [("issued", "ferry"), ("removed", "harbour"), ("renumbered", "")]
    assert vocabulary.copy().attach_cache("recorder", Recorder) is not recorder


def test_routing_counts_forget_a_retired_word_and_learn_a_new_one() -> None:
    tokenizer = Tokenizer()
    vocabulary = Vocabulary()
    count_texts(["harbour ferry"], tokenizer, vocabulary, grow=True)
    assert count_texts(["ferry storm"], tokenizer, vocabulary, grow=False).unknown_tokens[0] == 1
    vocabulary.retire(np.array([vocabulary.lookup("ferry")]))
    count_texts(["storm"], tokenizer, vocabulary, grow=True)
    routed = count_texts(["ferry storm"], tokenizer, vocabulary, grow=False)
    assert routed.unknown_tokens[0] == 1 and routed.known_tokens[0] == 1
    assert routed.counts.indices.tolist() == [vocabulary.lookup("storm")]
