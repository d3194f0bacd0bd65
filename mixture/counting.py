"""Batch counting: texts to a documents x vocabulary-ids count matrix.

``count_texts`` is the hot path of learning and routing. It case-folds each text, joins the
batch with a separator word, runs the tokenizer's pattern once over the join and maps every
raw token to a vocabulary id through a cache (raw token -> id) attached to the vocabulary, so
that the loop over tokens is one C-level ``map``.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Final

import numpy as np
import scipy.sparse as sp

from mixture.errors import InputError
from mixture.tokenizer import PLACEHOLDERS, Tokenizer
from mixture.vocabulary import Vocabulary

__all__ = [
    "SKIPPED",
    "UNKNOWN",
    "CountBatch",
    "TokenIdCache",
    "count_texts",
    "token_id_cache",
    "token_ids_text_by_text",
]

# A token id in the lookup caches: skipped by the tokenizer (stop word, length) or unknown to
# the vocabulary (only in caches used with grow=False).
SKIPPED: Final = -1
UNKNOWN: Final = -2
# count_texts tokenizes a whole batch in one regex pass over its case-folded texts joined by
# this separator: a word the token pattern itself finds (an alternation would slow the regex's
# scan), made of ASCII so that joining ASCII texts keeps them narrow, between plain spaces,
# which end every token, URL and e-mail stretch. A batch in which a text holds the word takes
# the per-text path (the count of separators then differs from the number of joins).
_SEPARATOR: Final = "qzxjbound0"
_JOINER: Final = " qzxjbound0 "
_BOUNDARY: Final = -3
# A lookup cache larger than this (or than twice the vocabulary) is dropped and refilled, so a
# stream of one-off tokens (hashes, ticket numbers, typos) cannot grow memory without bound.
_CACHE_LIMIT: Final = 1 << 18


class TokenIdCache(dict[str, int]):
    """Raw token -> vocabulary id (or ``SKIPPED`` / ``UNKNOWN``) for one tokenizer setting.

    Filled lazily by ``__missing__``, so the hot loop of :func:`count_texts` is one C-level
    ``map`` over the regex matches. ``aliases`` remembers, per term, the raw tokens that differ
    from it ("passenger's", "12.50"), so that invalidating one term touches only its entries.
    Attached to its vocabulary (:meth:`Vocabulary.attach_cache`), which tells it of changes.
    """

    __slots__ = ("aliases", "grow", "normalise", "vocabulary")

    def __init__(
        self, vocabulary: Vocabulary, normalise: Callable[[str], str | None], grow: bool
    ) -> None:
        super().__init__()
        self.vocabulary = vocabulary
        self.normalise = normalise
        self.grow = grow
        self.aliases: dict[str, list[str]] = {}

    def __missing__(self, raw: str) -> int:
        if raw == _SEPARATOR:  # the boundary between two texts of a joined batch
            self[raw] = _BOUNDARY
            return _BOUNDARY
        term = self.normalise(raw)
        if term is None:
            word_id = SKIPPED
        else:
            word_id = self.vocabulary.lookup(term)
            if word_id < 0:
                word_id = self.vocabulary.add(term) if self.grow else UNKNOWN
            if raw != term:
                self.aliases.setdefault(term, []).append(raw)
        self[raw] = word_id
        return word_id

    def forget(self, term: str) -> None:
        """Drop every entry that resolves to ``term``."""
        if term in PLACEHOLDERS:
            self.reset()  # many raw tokens stand behind a placeholder
            return
        self.pop(term, None)
        for raw in self.aliases.pop(term, ()):
            self.pop(raw, None)

    def reset(self) -> None:
        """Drop every entry."""
        self.clear()
        self.aliases.clear()

    # What the vocabulary tells its caches (mixture.vocabulary.VocabularyCache).
    def word_issued(self, word: str) -> None:
        """A new id: entries that answered "unknown" for the word must ask again."""
        if not self.grow:
            self.forget(word)

    def word_removed(self, word: str) -> None:
        """A retired word: its entries must not answer with the old id."""
        self.forget(word)

    def ids_renumbered(self) -> None:
        """Every id may have changed."""
        self.reset()


def token_id_cache(vocabulary: Vocabulary, tokenizer: Tokenizer, grow: bool) -> TokenIdCache:
    """The raw-token -> id cache of one tokenizer setting and mode, attached to the vocabulary.

    Parameters
    ----------
    vocabulary : Vocabulary
    tokenizer : Tokenizer
    grow : bool
        True: unknown words get new ids on lookup. False: they map to ``UNKNOWN``.

    Returns
    -------
    TokenIdCache
        Emptied first when it has grown past its bound.
    """
    cache = vocabulary.attach_cache(
        ("token ids", tokenizer.config, grow),
        lambda: TokenIdCache(vocabulary, tokenizer.normalise, grow),
    )
    if len(cache) > max(_CACHE_LIMIT, 2 * vocabulary.capacity):
        cache.reset()
    return cache


@dataclass
class CountBatch:
    """Word counts of a batch of documents.

    Attributes
    ----------
    counts : scipy.sparse.csr_matrix
        ``(n_docs, vocabulary.capacity)`` float64, sorted indices, duplicates summed.
    known_tokens : numpy.ndarray
        ``(n_docs,)`` int64: tokens counted (equal to the row sums of ``counts``).
    unknown_tokens : numpy.ndarray
        ``(n_docs,)`` int64: tokens whose word is not in the vocabulary (0 when growing).
    new_words : int
        Words added to the vocabulary by this call.
    """

    counts: sp.csr_matrix
    known_tokens: np.ndarray
    unknown_tokens: np.ndarray
    new_words: int


def _token_ids_joined(
    folded: str, n_docs: int, tokenizer: Tokenizer, lookup: Callable[[str], int]
) -> tuple[np.ndarray, np.ndarray]:
    """Token ids of case-folded texts joined by ``_JOINER`` (one regex pass, one map)."""
    if tokenizer.needs_folding(folded):
        folded = tokenizer.fold_special(folded)
    ids = np.fromiter(map(lookup, tokenizer.find_raw_tokens(folded)), dtype=np.int64)
    boundaries = np.flatnonzero(ids == _BOUNDARY)
    ends = np.empty(n_docs, dtype=np.int64)
    ends[:-1] = boundaries - np.arange(n_docs - 1)  # tokens before each boundary
    ends[-1] = ids.size - (n_docs - 1)
    return ids[ids != _BOUNDARY], ends


def token_ids_text_by_text(
    texts: Sequence[str], tokenizer: Tokenizer, lookup: Callable[[str], int]
) -> tuple[np.ndarray, np.ndarray]:
    """Token ids text by text (the path without the joined pass).

    Parameters
    ----------
    texts : sequence of str
    tokenizer : Tokenizer
    lookup : callable
        Raw token -> id, e.g. ``token_id_cache(...).__getitem__``.

    Returns
    -------
    ids : ndarray of int64
        Every raw token's id in order (``SKIPPED`` and ``UNKNOWN`` included).
    ends : ndarray of shape (len(texts),) of int64
        The running token count at the end of each text.
    """
    find_raw_tokens = tokenizer.find_raw_tokens
    token_ids: list[int] = []
    extend = token_ids.extend
    ends = np.empty(len(texts), dtype=np.int64)
    for index, text in enumerate(texts):
        folded = text.casefold()
        if tokenizer.needs_folding(folded):
            folded = tokenizer.fold_special(folded)
        extend(map(lookup, find_raw_tokens(folded)))
        ends[index] = len(token_ids)
    return np.array(token_ids, dtype=np.int64), ends


def count_texts(
    texts: Sequence[str], tokenizer: Tokenizer, vocabulary: Vocabulary, grow: bool
) -> CountBatch:
    """Tokenize a batch and count words per document.

    Parameters
    ----------
    texts : sequence of str
        The documents.
    tokenizer : Tokenizer
        Splits each text.
    vocabulary : Vocabulary
        Maps words to ids; grows when ``grow`` is true.
    grow : bool
        True: unknown words get new ids (learning). False: unknown words are left out and
        counted in ``unknown_tokens`` (routing).

    Returns
    -------
    CountBatch
        The CSR counts and per-document token tallies.

    Raises
    ------
    InputError
        When ``texts`` is a single str or not a sequence, or an item is not a str (the message
        names its index). Nothing is added to the vocabulary then.
    """
    if isinstance(texts, str | bytes) or not isinstance(texts, Sequence):
        raise InputError(f"texts must be a sequence of str, got {type(texts).__name__}")
    if not isinstance(tokenizer, Tokenizer):
        raise InputError(f"tokenizer must be a Tokenizer, got {type(tokenizer).__name__}")
    if not isinstance(vocabulary, Vocabulary):
        raise InputError(f"vocabulary must be a Vocabulary, got {type(vocabulary).__name__}")
    # Check every item before touching the vocabulary, so a bad batch adds no words. Each text
    # is case-folded on its own (ASCII texts take casefold's fast path; one non-ASCII text
    # would slow a fold of the whole join), then the folded texts are joined.
    try:
        folded = _JOINER.join([text.casefold() for text in texts])
    except (TypeError, AttributeError):
        for index, text in enumerate(texts):
            if not isinstance(text, str):
                raise InputError(
                    f"text at index {index} must be a str, got {type(text).__name__}"
                ) from None
        raise
    grow = bool(grow)
    n_docs = len(texts)
    capacity_before = vocabulary.capacity
    lookup = token_id_cache(vocabulary, tokenizer, grow).__getitem__
    if n_docs > 1 and folded.count(_SEPARATOR) == n_docs - 1:  # no text holds the separator
        ids, ends = _token_ids_joined(folded, n_docs, tokenizer, lookup)
    else:  # one text, or a text holding the separator itself
        ids, ends = token_ids_text_by_text(texts, tokenizer, lookup)
    doc_of_token = np.repeat(np.arange(n_docs, dtype=np.int64), np.diff(ends, prepend=0))
    known = ids >= 0
    known_tokens = np.bincount(doc_of_token[known], minlength=n_docs).astype(np.int64)
    if grow:
        unknown_tokens = np.zeros(n_docs, dtype=np.int64)
    else:
        unknown_tokens = np.bincount(doc_of_token[ids == UNKNOWN], minlength=n_docs).astype(
            np.int64
        )
    indptr = np.zeros(n_docs + 1, dtype=np.int64)
    np.cumsum(known_tokens, out=indptr[1:])
    indices = ids[known]
    counts = sp.csr_matrix(
        (np.ones(indices.size, dtype=np.float64), indices, indptr),
        shape=(n_docs, vocabulary.capacity),
    )
    counts.sum_duplicates()  # sorts each row's indices, then merges repeats (scipy, in C++)
    return CountBatch(
        counts=counts,
        known_tokens=known_tokens,
        unknown_tokens=unknown_tokens,
        new_words=vocabulary.capacity - capacity_before,
    )
