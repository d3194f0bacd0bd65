"""Text to counts: ``count_texts`` against scikit-learn's ``CountVectorizer.transform``.

Both sides get the same documents and a vocabulary fitted on them beforehand, so the timed call
is pure routing-time counting (tokenize, look up, build CSR). The documents are synthetic (made
up here, no external data): message-like texts of about 30 tokens and article-like texts of
about 400 tokens, with mixed case, punctuation, numbers, the odd URL, e-mail address and
non-ASCII word, and English function words at a realistic rate.

Run ``python -m bench.bench_text [--docs N] [--long-docs N] [--repeats R]``. The figure to
watch is the ratio ours / scikit-learn (target <= 1.0). The reference is CountVectorizer with its
default settings (no stop list): the cheaper of its two configurations, so the stricter
comparison. Times are CPU times of this process, best of R runs taken in turn.
"""

from __future__ import annotations

import argparse
import gc
import time
from collections.abc import Callable, Sequence

import numpy as np
from sklearn.feature_extraction.text import CountVectorizer

from mixture.counting import count_texts
from mixture.tokenizer import Tokenizer
from mixture.vocabulary import Vocabulary

# Syllables for invented content words; the function words are real English.
_SYLLABLES = [
    "ka",
    "ri",
    "to",
    "mo",
    "na",
    "se",
    "lu",
    "ve",
    "pa",
    "di",
    "ro",
    "fe",
    "ga",
    "ni",
    "so",
    "ta",
    "be",
    "la",
    "mi",
    "ko",
    "ru",
    "de",
    "sa",
    "po",
    "ne",
    "fi",
    "ha",
    "jo",
    "ter",
    "an",
    "ol",
    "en",
    "is",
    "ar",
    "un",
    "or",
    "el",
    "im",
    "ber",
    "dal",
    "fen",
    "gor",
    "har",
    "kel",
    "mor",
    "nis",
    "port",
    "sven",
    "tal",
    "wik",
]
_FUNCTION_WORDS = [
    "the",
    "a",
    "of",
    "to",
    "and",
    "in",
    "is",
    "for",
    "on",
    "it",
    "with",
    "as",
    "at",
    "by",
    "this",
    "that",
    "be",
    "are",
    "was",
    "from",
    "or",
    "an",
    "have",
    "not",
    "we",
    "you",
    "i",
    "our",
    "my",
    "your",
    "has",
    "can",
    "will",
    "would",
    "there",
    "their",
    "they",
    "but",
    "if",
    "please",
]
_NON_ASCII = ("café", "Straße", "Ålesund", "naïve", "über", "Øya", "fjörður", "été", "Zürich")
_PUNCTUATION = (",", ".", "!", "?", ":", ";", ")", "'s", "-")


_LATIN = "abdefghijklmnoprstuvw"
_SCRIPTS = {
    "cyrillic": str.maketrans(
        _LATIN + _LATIN.upper(), "абдефгхийклмнопрстувш" + "абдефгхийклмнопрстувш".upper()
    ),
    "greek": str.maketrans(
        _LATIN + _LATIN.upper(), "αβδεφγηιξκλμνοπρστυωψ" + "αβδεφγηιξκλμνοπρστυωψ".upper()
    ),
}


def make_texts(
    n_docs: int, mean_tokens: int, seed: int, n_words: int = 30_000, script: str | None = None
) -> list[str]:
    """Return ``n_docs`` synthetic documents of about ``mean_tokens`` tokens each.

    Content words follow a Zipf-like law over ``n_words`` invented words (common practice, no
    source); about 40 % of tokens are function words, a few are numbers, URLs, e-mail
    addresses or non-ASCII words, and sentences start with a capital. ``script``
    ("cyrillic" or "greek") transliterates every letter, URLs and addresses included, so that
    all tokens take the non-ASCII path and no stop word matches.
    """
    rng = np.random.default_rng(seed)
    lengths = rng.integers(1 + 2 * mean_tokens // 3, 1 + 4 * mean_tokens // 3, size=n_docs)
    total = int(lengths.sum())
    parts = rng.integers(0, len(_SYLLABLES), size=(n_words, 4))
    n_parts = rng.integers(2, 5, size=n_words)
    lexicon = np.array(
        ["".join(_SYLLABLES[j] for j in row[:k]) for row, k in zip(parts, n_parts, strict=True)]
    )
    zipf = 1.0 / np.arange(1, n_words + 1) ** 1.05
    content = lexicon[rng.choice(n_words, size=total, p=zipf / zipf.sum())]
    function = np.array(_FUNCTION_WORDS)[rng.integers(0, len(_FUNCTION_WORDS), size=total)]
    kind = rng.random(total)
    tokens = np.where(kind < 0.4, function, content).astype(object)
    special = np.flatnonzero(kind > 0.985)
    for position in special.tolist():
        pick = position % 5
        if pick == 0:
            tokens[position] = str(position % 977)
        elif pick == 1:
            tokens[position] = f"{position % 97}.{position % 89:02d}"
        elif pick == 2:
            tokens[position] = f"https://ferry.example/trip/{position % 1000}?seat={position % 40}"
        elif pick == 3:
            tokens[position] = f"passenger{position % 500}@isles.example"
        else:
            tokens[position] = _NON_ASCII[position % len(_NON_ASCII)]
    punct = rng.random(total) < 0.12
    marks = np.array(_PUNCTUATION)[rng.integers(0, len(_PUNCTUATION), size=total)]
    tokens[punct] = tokens[punct] + marks[punct]
    capital = np.roll(punct, 1)
    tokens[capital] = [t.capitalize() for t in tokens[capital]]
    ends = np.cumsum(lengths).tolist()
    starts = [0, *ends[:-1]]
    texts = [" ".join(tokens[a:b]) for a, b in zip(starts, ends, strict=True)]
    if script is not None:
        table = _SCRIPTS[script]
        texts = [t.translate(table) for t in texts]
    return texts


def best_times(runs: Sequence[Callable[[], object]], repeats: int) -> list[float]:
    """Best CPU time of each callable over ``repeats`` rounds, in seconds.

    CPU time of this process (both sides are single-threaded), not wall time, so that other
    work on a shared machine does not count; the callables also take turns within each round.
    The garbage collector is off while a call is timed.
    """
    best = [float("inf")] * len(runs)
    for _ in range(repeats):
        for i, run in enumerate(runs):
            gc.collect()
            gc.disable()
            try:
                start = time.process_time()
                run()
                best[i] = min(best[i], time.process_time() - start)
            finally:
                gc.enable()
    return best


def compare(name: str, texts: Sequence[str], repeats: int) -> float:
    """Time ours and scikit-learn on ``texts``; print one row and return the ratio."""
    tokenizer = Tokenizer()
    vocabulary = Vocabulary()
    vectorizer = CountVectorizer()
    ours_grow, theirs_fit = best_times(
        [
            lambda: count_texts(texts, tokenizer, Vocabulary(), grow=True),
            lambda: CountVectorizer().fit(texts),
        ],
        1,
    )
    count_texts(texts, tokenizer, vocabulary, grow=True)
    vectorizer.fit(texts)
    vectorizer_stop = CountVectorizer(stop_words="english").fit(texts)
    ours, theirs, theirs_stop = best_times(
        [
            lambda: count_texts(texts, tokenizer, vocabulary, grow=False),
            lambda: vectorizer.transform(texts),
            lambda: vectorizer_stop.transform(texts),
        ],
        repeats,
    )
    batch = count_texts(texts, tokenizer, vocabulary, grow=False)
    tokens = int(batch.known_tokens.sum())
    ratio = ours / theirs
    print(
        f"{name:<6} docs={len(texts):>6} counted tokens={tokens:>10,}  "
        f"ours {ours:6.3f}s  sklearn {theirs:6.3f}s (with stop list {theirs_stop:6.3f}s)  "
        f"ratio {ratio:5.3f}   cold start: ours grow=True {ours_grow:6.3f}s, "
        f"sklearn fit {theirs_fit:6.3f}s, ratio {ours_grow / theirs_fit:5.3f}",
        flush=True,
    )
    return ratio


def main(argv: Sequence[str] | None = None) -> None:
    """Print ours, scikit-learn and their ratio for four synthetic corpora."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--docs", type=int, default=50_000, help="documents per corpus")
    parser.add_argument(
        "--long-docs", type=int, default=10_000, help="documents in the long-only corpus"
    )
    parser.add_argument("--repeats", type=int, default=3, help="timed runs; the best counts")
    args = parser.parse_args([] if argv is None else list(argv))
    n = args.docs
    n_long = n // 5  # mixed corpora: one long text in five
    short = make_texts(n, 30, seed=1)
    long = make_texts(args.long_docs, 400, seed=2)
    mixed = make_texts(n - n_long, 30, seed=3) + make_texts(n_long, 400, seed=4)
    np.random.default_rng(5).shuffle(mixed)
    n_half = (n - n_long) // 2
    non_latin = (
        make_texts(n_half, 30, seed=6, script="cyrillic")
        + make_texts(n - n_long - n_half, 30, seed=7, script="greek")
        + make_texts(n_long // 2, 400, seed=8, script="cyrillic")
        + make_texts(n_long - n_long // 2, 400, seed=9, script="greek")
    )
    np.random.default_rng(10).shuffle(non_latin)
    print(
        "text to counts: CPU time of count_texts(grow=False) / CountVectorizer.transform, "
        f"best of {args.repeats} (target <= 1.0)"
    )
    print("corpora: short ~30 tokens, long ~400, mixed and nonlat (Cyrillic/Greek) 4:1 short:long")
    ratios = [
        compare(name, texts, args.repeats)
        for name, texts in (
            ("short", short),
            ("long", long),
            ("mixed", mixed),
            ("nonlat", non_latin),
        )
    ]
    print(f"worst ratio {max(ratios):.3f}")


if __name__ == "__main__":
    import sys

    main(sys.argv[1:])
