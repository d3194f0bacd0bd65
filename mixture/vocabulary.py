"""The vocabulary: words and their stable ids.

Vocabulary ids are issued in order of first arrival and never change except through an explicit
:meth:`Vocabulary.compact`. A retired id is never issued again; if its word comes back later,
the word gets a fresh id.

Lookup caches built on a vocabulary (the counting module's raw-token caches) register with it
through :meth:`Vocabulary.attach_cache` and are told when a word is issued or removed and when
ids are renumbered, so they never answer with a stale id.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Hashable, Iterable
from typing import Any, Protocol, TypeVar

import numpy as np

from mixture.errors import InputError, StateFormatError

__all__ = ["Vocabulary", "VocabularyCache"]


class VocabularyCache(Protocol):
    """What a cache attached to a vocabulary is told (see :meth:`Vocabulary.attach_cache`)."""

    def word_issued(self, word: str) -> None:
        """``word`` was given a new id."""

    def word_removed(self, word: str) -> None:
        """``word`` was retired: it no longer has an id."""

    def ids_renumbered(self) -> None:
        """Every id may have changed (:meth:`Vocabulary.compact`)."""


CacheT = TypeVar("CacheT", bound=VocabularyCache)


class Vocabulary:
    """Words and their ids; ids are stable, and a retired id is never issued again.

    ``capacity`` counts every id issued so far (the rows of the statistics); ``n_active`` the
    ids still in use. Ids change only through :meth:`compact`, which bumps ``generation``.

    Parameters
    ----------
    words : iterable of str, optional
        Initial words, given ids 0, 1, ... in order (duplicates keep their first id).
    """

    def __init__(self, words: Iterable[str] = ()) -> None:
        self._words: list[str] = []
        self._ids: dict[str, int] = {}
        self._active = np.zeros(0, dtype=bool)
        self._n_active = 0
        self._generation = 0
        self._caches: dict[Hashable, VocabularyCache] = {}
        self._mask: np.ndarray | None = None  # read-only snapshot handed out by active_mask()
        # UTF-8 of the first ``_n_encoded`` words and where each ends, for to_arrays: words are
        # only appended between renumberings, so a checkpoint encodes only the words new since
        # the last one (encoding all of them was O(V) Python work, 27 ms at V = 100,000).
        self._encoded = bytearray()
        self._encoded_ends = np.zeros(0, dtype=np.int64)
        self._n_encoded = 0
        for word in words:
            self.add(word)

    # -- size and identity -------------------------------------------------------------------
    @property
    def capacity(self) -> int:
        """Number of ids issued so far (active and retired)."""
        return len(self._words)

    @property
    def n_active(self) -> int:
        """Number of ids in use."""
        return self._n_active

    @property
    def n_retired(self) -> int:
        """Number of retired ids still holding a row (``capacity - n_active``)."""
        return len(self._words) - self._n_active

    @property
    def generation(self) -> int:
        """How many times ids were renumbered by :meth:`compact`."""
        return self._generation

    def __len__(self) -> int:
        return self._n_active

    def __contains__(self, word: object) -> bool:
        return word in self._ids

    def __repr__(self) -> str:
        return (
            f"Vocabulary(n_active={self._n_active}, capacity={self.capacity}, "
            f"generation={self._generation})"
        )

    # -- words and ids -----------------------------------------------------------------------
    def lookup(self, word: str) -> int:
        """Return the id of ``word``, or -1 when it is unknown or retired."""
        return self._ids.get(word, -1)

    def lookup_many(self, words: Iterable[str]) -> np.ndarray:
        """Return the ids of ``words`` as an int64 array (-1 for unknown or retired)."""
        get = self._ids.get
        return np.fromiter((get(w, -1) for w in words), dtype=np.int64)

    def add(self, word: str) -> int:
        """Return the id of ``word``, issuing a new id when it is unknown or was retired.

        Raises
        ------
        InputError
            When ``word`` is not a non-empty str.
        """
        if not isinstance(word, str) or not word:
            raise InputError(f"a vocabulary word must be a non-empty str, got {word!r}")
        word_id = self._ids.get(word)
        return self._issue(word) if word_id is None else word_id

    def _issue(self, word: str) -> int:
        word_id = len(self._words)
        self._words.append(word)
        self._ids[word] = word_id
        if word_id >= len(self._active):
            # Grow geometrically so that issuing ids one by one costs amortised O(1).
            grown = np.zeros(max(16, 2 * len(self._active)), dtype=bool)
            grown[: len(self._active)] = self._active
            self._active = grown
        self._active[word_id] = True
        self._n_active += 1
        self._mask = None
        # Caches that answered "unknown" for this word must ask again.
        for cache in self._caches.values():
            cache.word_issued(word)
        return word_id

    def word(self, word_id: int) -> str:
        """Return the word of an id (retired ids keep their word until :meth:`compact`).

        Raises
        ------
        InputError
            When ``word_id`` was never issued.
        """
        if isinstance(word_id, bool) or not isinstance(word_id, int | np.integer):
            raise InputError(f"a word id must be an integer, got {word_id!r}")
        if not 0 <= word_id < len(self._words):
            raise InputError(f"word id {word_id} out of range [0, {len(self._words)})")
        return self._words[int(word_id)]

    def words(self) -> list[str]:
        """Return the word of every id, in id order (a copy; retired ids included)."""
        return list(self._words)

    def active_mask(self) -> np.ndarray:
        """Return a ``(capacity,)`` bool array, True where the id is in use.

        The array is read-only and shared between calls until the vocabulary next changes
        (then a new one is made), so calling this per batch costs O(1), and an array kept by
        a caller never changes under it.
        """
        if self._mask is None:
            mask = self._active[: len(self._words)].copy()
            mask.flags.writeable = False
            self._mask = mask
        return self._mask

    def active_ids(self) -> np.ndarray:
        """Return the ids in use, ascending, as int64."""
        return np.flatnonzero(self._active[: len(self._words)]).astype(np.int64)

    # -- retirement and compaction -----------------------------------------------------------
    def retire(self, word_ids: np.ndarray) -> None:
        """Remove words from lookup; their ids stay issued and are never given to another word.

        Retiring an id twice is harmless. Costs O(len(word_ids)), independent of capacity.

        Parameters
        ----------
        word_ids : array-like of int
            Ids to retire.

        Raises
        ------
        InputError
            When an id is not an integer or was never issued; nothing is retired then.
        """
        ids = np.asarray(word_ids)
        if ids.size == 0:
            return
        if ids.dtype.kind not in "iu":
            raise InputError(f"word ids to retire must be integers, got dtype {ids.dtype}")
        ids = ids.reshape(-1).astype(np.int64, copy=False)
        bad = ids[(ids < 0) | (ids >= len(self._words))]
        if bad.size:
            raise InputError(
                f"cannot retire word id {int(bad[0])}: out of range [0, {len(self._words)})"
            )
        ids = np.unique(ids)
        ids = ids[self._active[ids]]
        if ids.size == 0:
            return
        self._active[ids] = False
        self._n_active -= int(ids.size)
        self._mask = None
        words = self._words
        for word_id in ids.tolist():
            word = words[word_id]
            del self._ids[word]
            for cache in self._caches.values():
                cache.word_removed(word)

    def compact(self) -> np.ndarray:
        """Renumber the active words densely (keeping their order) and drop retired ids.

        This is the only operation that changes ids; it bumps :attr:`generation`.

        Returns
        -------
        numpy.ndarray
            ``(old capacity,)`` int64: the new id of each old id, -1 for retired ids. Apply it
            to statistics with ``new_rows = old_rows[old_to_new >= 0]``.
        """
        active = self._active[: len(self._words)]
        old_to_new = np.full(len(self._words), -1, dtype=np.int64)
        kept = np.flatnonzero(active)
        old_to_new[kept] = np.arange(kept.size, dtype=np.int64)
        self._words = [self._words[i] for i in kept.tolist()]
        self._ids = {w: i for i, w in enumerate(self._words)}
        self._active = np.ones(len(self._words), dtype=bool)
        self._n_active = len(self._words)
        self._generation += 1
        self._mask = None
        self._forget_encoding()
        for cache in self._caches.values():
            cache.ids_renumbered()
        return old_to_new

    # -- arrays and copies -------------------------------------------------------------------
    def to_arrays(self) -> dict[str, np.ndarray]:
        """Return the vocabulary as plain numpy arrays (no object arrays; fit for an npz).

        Returns
        -------
        dict of str to numpy.ndarray
            ``word_bytes`` (uint8, the UTF-8 of all words concatenated), ``word_offsets``
            (int64, ``capacity + 1``; word i is ``word_bytes[offsets[i]:offsets[i + 1]]``),
            ``active`` (bool, ``capacity``) and ``generation`` (int64, shape ``()``).
        """
        self._encode_new_words()
        offsets = np.zeros(self._n_encoded + 1, dtype=np.int64)
        offsets[1:] = self._encoded_ends[: self._n_encoded]
        return {
            "word_bytes": np.frombuffer(self._encoded, dtype=np.uint8).copy(),  # one copy
            "word_offsets": offsets,
            "active": self.active_mask().copy(),
            "generation": np.array(self._generation, dtype=np.int64),
        }

    def _encode_new_words(self) -> None:
        """Append the UTF-8 of the words issued since the last call to the encoded prefix."""
        new = self._words[self._n_encoded :]
        if not new:
            return
        encoded = [w.encode("utf-8") for w in new]
        total = self._n_encoded + len(encoded)
        if total > self._encoded_ends.size:  # geometric growth: amortised O(new words)
            grown = np.zeros(max(16, 2 * self._encoded_ends.size, total), dtype=np.int64)
            grown[: self._n_encoded] = self._encoded_ends[: self._n_encoded]
            self._encoded_ends = grown
        start = len(self._encoded)
        ends = self._encoded_ends[self._n_encoded : total]
        np.cumsum([len(b) for b in encoded], out=ends)
        ends += start
        self._encoded += b"".join(encoded)
        self._n_encoded = total

    def _forget_encoding(self) -> None:
        self._encoded = bytearray()
        self._encoded_ends = np.zeros(0, dtype=np.int64)
        self._n_encoded = 0

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> Vocabulary:
        """Rebuild a vocabulary from :meth:`to_arrays` output.

        Raises
        ------
        StateFormatError
            When an array is missing or has the wrong dtype or shape, the offsets are not a
            valid partition of the bytes, a word is not UTF-8 or empty, or an active word
            appears twice.
        """
        try:
            data = np.asarray(arrays["word_bytes"])
            offsets = np.asarray(arrays["word_offsets"])
            active = np.asarray(arrays["active"])
            generation = np.asarray(arrays["generation"])
        except (KeyError, TypeError) as exc:
            raise StateFormatError(f"vocabulary arrays incomplete: missing {exc}") from None
        if data.dtype != np.uint8 or data.ndim != 1:
            raise StateFormatError(f"vocabulary word_bytes must be 1-d uint8, got {data.dtype}")
        if offsets.dtype != np.int64 or offsets.ndim != 1 or offsets.size < 1:
            raise StateFormatError("vocabulary word_offsets must be a non-empty 1-d int64 array")
        capacity = offsets.size - 1
        if active.dtype != np.bool_ or active.shape != (capacity,):
            raise StateFormatError(
                f"vocabulary active must be bool of shape ({capacity},), "
                f"got {active.dtype} {active.shape}"
            )
        if generation.dtype.kind not in "iu" or generation.shape != () or int(generation) < 0:
            raise StateFormatError("vocabulary generation must be a non-negative integer scalar")
        if offsets[0] != 0 or offsets[-1] != data.size or np.any(np.diff(offsets) <= 0):
            raise StateFormatError(
                "vocabulary word_offsets must start at 0, increase strictly and end at the "
                "length of word_bytes"
            )
        raw = data.tobytes()
        bounds = offsets.tolist()
        try:
            words = [raw[a:b].decode("utf-8") for a, b in itertools.pairwise(bounds)]
        except UnicodeDecodeError as exc:
            raise StateFormatError(f"vocabulary word is not UTF-8: {exc}") from None
        vocabulary = cls()
        vocabulary._words = words
        active_list = active.tolist()
        vocabulary._ids = {
            w: i for i, (w, a) in enumerate(zip(words, active_list, strict=True)) if a
        }
        n_active = int(active.sum())
        if len(vocabulary._ids) != n_active:
            raise StateFormatError("vocabulary has an active word under two ids")
        vocabulary._active = active.copy()
        vocabulary._n_active = n_active
        vocabulary._generation = int(generation)
        vocabulary._encoded = bytearray(raw)  # the encoding read is the encoding to write
        vocabulary._encoded_ends = offsets[1:].astype(np.int64, copy=True)
        vocabulary._n_encoded = capacity
        return vocabulary

    def copy(self) -> Vocabulary:
        """Return an independent copy (lookup caches are not copied; they refill lazily)."""
        other = Vocabulary()
        other._words = list(self._words)
        other._ids = dict(self._ids)
        other._active = self._active.copy()
        other._n_active = self._n_active
        other._generation = self._generation
        other._encoded = bytearray(self._encoded)
        other._encoded_ends = self._encoded_ends.copy()
        other._n_encoded = self._n_encoded
        return other

    __copy__ = copy

    def __deepcopy__(self, memo: dict[int, Any]) -> Vocabulary:
        return self.copy()

    # -- caches --------------------------------------------------------------------------------
    def attach_cache(self, key: Hashable, make: Callable[[], CacheT]) -> CacheT:
        """Return the cache attached under ``key``, attaching ``make()`` the first time.

        The vocabulary tells every attached cache when a word is issued or retired and when
        ids are renumbered (:class:`VocabularyCache`). Caches are not copied with the
        vocabulary (a copy starts without any; they refill lazily).

        Parameters
        ----------
        key : hashable
            Names the cache (e.g. a tokenizer setting and a mode).
        make : callable
            Builds the cache when none is attached under ``key``.

        Returns
        -------
        VocabularyCache
        """
        cache = self._caches.get(key)
        if cache is None:
            cache = self._caches[key] = make()
        return cache  # type: ignore[return-value]
