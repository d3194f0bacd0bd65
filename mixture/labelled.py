"""Labelled documents: operators' corrections and example messages, kept inside the state.

Semi-supervised EM after Nigam, McCallum, Thrun and Mitchell (2000), "Text classification from
labeled and unlabeled documents using EM" (Machine Learning 39):

- a labelled document keeps its class: its responsibility is one-hot on its group and is never
  re-estimated, in batch EM (every iteration, every temperature of the annealing, around every
  revival) and in stepwise EM (labelled documents never enter a stepwise step: their counts
  are added to the group's statistics whole, at every derivation of the parameters);
- EM-lambda: each unlabelled document weighs ``lambda`` (``MixtureConfig.unlabelled_weight``)
  in the M-step, each labelled one 1. The parameters are smoothed from::

      lambda * (unlabelled statistics in count units) + (labelled counts)

  where the unlabelled statistics are the running average of stepwise EM turned into counts
  with Kish's effective number of documents (mixture.stats). Labelled counts are real counts:
  they never decay.

The labelled statistics are never folded into the running average: the set keeps running
per-group sums beside its documents (:class:`LabelledSums`), changed by each add, withdrawal,
relabel or merge by that document's words alone. They are integer counts, so withdrawing a
document is exact: the sums, and the parameters, afterwards are those of never having had it.

Groups are named by stable ids (``state.group_ids``); a labelled document names its group's
id, mapped to an array position only when the statistics are read. A birth never gets
labelled documents; a merge moves them to the survivor (mixture.lifecycle).

How much of an unlabelled document remains
------------------------------------------
A correction of a message that was already learned as an unlabelled document does not take
that document out of the running average (its responsibilities were never stored); the
stepwise statistics forget it at the model's pace, and :func:`remaining_weight` says exactly
how much of it is left. A document learned in a unit of ``m`` documents at step size ``eta``
had weight ``eta / m`` in the running average right after that unit; every later update
multiplies every old weight by ``1 - eta_j``, so its weight now is::

    (eta / m) * exp(log_forgetting_now - log_forgetting_after_its_unit)

with ``MixtureState.log_forgetting`` the running sum of ``log(1 - eta_j)`` over every stepwise
update (``BatchReport.unit_log_forgetting`` gives its value after each unit). A warm-up
document had weight ``1 / n`` (the n documents of the warm-up fit, ``log_forgetting`` then 0).
In count units (documents' worth in the parameters, before the factor lambda) a weight w is
``w / state.weight_square_sum`` (:func:`remaining_documents`): 1.0 is one whole document.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import scipy.sparse as sp

from mixture.errors import InputError, StateFormatError

if TYPE_CHECKING:
    from mixture.stats import MixtureState

__all__ = [
    "EXCERPT_CHARACTERS",
    "LABELLED_SOURCES",
    "LabelledCounts",
    "LabelledItem",
    "LabelledSet",
    "LabelledSums",
    "remaining_documents",
    "remaining_weight",
]

# Where a labelled document came from: an operator's correction, or an example message given
# to start or grow a group.
LABELLED_SOURCES = ("correction", "example")
# Characters of the text kept for listing (the text itself is not kept: its counts are).
EXCERPT_CHARACTERS = 200
# Longest document id accepted (client ids in the stream are of this order).
_MAX_ID_LENGTH = 512
# Up to this many documents a removal deletes in place; more rebuild the lists once (a removal
# in place moves the tail of each list once per document).
_REMOVE_IN_PLACE = 16


@dataclass(frozen=True)
class LabelledItem:
    """One labelled document to learn.

    Attributes
    ----------
    doc_id : str
        The document's id (a client id, or one the caller made); one entry per id.
    text : str
        Its text.
    group_id : int
        Stable id of its group (``state.group_ids``).
    source : str
        ``"correction"`` or ``"example"``.
    """

    doc_id: str
    text: str
    group_id: int
    source: str = "correction"

    def check(self) -> None:
        """Raise InputError naming the field when a value cannot be used."""
        if not isinstance(self.doc_id, str) or not self.doc_id:
            raise InputError("doc_id must be a non-empty str")
        if len(self.doc_id) > _MAX_ID_LENGTH:
            raise InputError(f"doc_id is longer than {_MAX_ID_LENGTH} characters")
        if not isinstance(self.text, str):
            raise InputError(f"text of {self.doc_id!r} must be a str")
        if isinstance(self.group_id, bool) or not isinstance(self.group_id, int | np.integer):
            raise InputError(f"group_id of {self.doc_id!r} must be an int")
        if self.source not in LABELLED_SOURCES:
            raise InputError(
                f"source of {self.doc_id!r} must be one of {', '.join(LABELLED_SOURCES)}; "
                f"got {self.source!r}"
            )


@dataclass(frozen=True)
class LabelledCounts:
    """Labelled documents as batch EM takes them: counts and a fixed group per row.

    Attributes
    ----------
    counts : csr_matrix of shape (L, V)
        Word counts over the same columns as the unlabelled counts.
    groups : ndarray of shape (L,) of int
        Array position (0..K-1) of each row's group in the fit.
    """

    counts: sp.csr_matrix
    groups: np.ndarray

    def __len__(self) -> int:
        return int(self.groups.shape[0])


class LabelledSums:
    """Running per-group sums of the labelled documents, keyed by stable group id.

    One row per word that labelled documents used (``word_ids``; ``row_of_word`` maps back),
    one column per group id they name; a dense int64 block rows x columns of word counts, and
    per column the documents naming the group (``members``), those with at least one token
    (``documents``: only they count, as in stepwise and batch EM) and their tokens. Adding or
    taking out a document touches its words' rows only: O(words of the document).

    Integer counts: labelled documents carry whole word counts (counted from text), and int64
    addition is exact, so any sequence of adds and withdrawals leaves exactly the sums of the
    documents held, never a drift. Read as float64 they equal a float sum of the same counts
    (whole numbers below 2**53 add exactly in any order), so parameters derived from them are
    bit-identical to those of summing the documents again.

    Memory: words the labelled documents use x groups they name (8 bytes each, allocated by
    doubling), so of the order of the state's own (capacity, K) statistics at most. Rows of
    words no document uses any more stay (zero) until the next vocabulary compaction rebuilds
    the sums; the column of a group no document names any more is reused.
    """

    def __init__(self) -> None:
        self._row_of_word = np.full(0, -1, dtype=np.int64)
        self._word_ids = np.zeros(0, dtype=np.int64)
        self._n_rows = 0
        self._counts = np.zeros((0, 0), dtype=np.int64)
        self._column: dict[int, int] = {}
        self._free: list[int] = []
        self._members = np.zeros(0, dtype=np.int64)
        self._documents = np.zeros(0, dtype=np.int64)
        self._tokens = np.zeros(0, dtype=np.int64)

    @classmethod
    def recount(
        cls, groups: Sequence[int], indices: Sequence[np.ndarray], data: Sequence[np.ndarray]
    ) -> LabelledSums:
        """The sums of the given documents counted from scratch (a state read from bytes, a
        vocabulary compaction). ``indices[i]`` are distinct word ids, ``data[i]`` their whole
        counts."""
        out = cls()
        n = len(groups)
        if not n:
            return out
        group_ids = np.asarray(groups, dtype=np.int64)
        columns, doc_column = np.unique(group_ids, return_inverse=True)
        lengths = np.fromiter((i.size for i in indices), dtype=np.int64, count=n)
        words = np.concatenate(indices).astype(np.int64)
        counts = np.concatenate(data).astype(np.int64)
        word_ids, entry_row = np.unique(words, return_inverse=True)
        out._grow_rows(word_ids.size)
        out._grow_columns(columns.size)
        out._word_ids[: word_ids.size] = word_ids
        out._n_rows = int(word_ids.size)
        if word_ids.size:
            out._grow_word_map(int(word_ids[-1]) + 1)
            out._row_of_word[word_ids] = np.arange(word_ids.size)
        np.add.at(out._counts, (entry_row, np.repeat(doc_column, lengths)), counts)
        doc_tokens = np.zeros(n, dtype=np.int64)
        np.add.at(doc_tokens, np.repeat(np.arange(n), lengths), counts)
        out._members[: columns.size] = np.bincount(doc_column, minlength=columns.size)
        out._documents[: columns.size] = np.bincount(
            doc_column[doc_tokens > 0], minlength=columns.size
        )
        np.add.at(out._tokens, doc_column, doc_tokens)
        out._column = {int(g): c for c, g in enumerate(columns)}
        return out

    # ---- reading ---------------------------------------------------------------------------
    @property
    def word_ids(self) -> np.ndarray:
        """Word id of each row, shape (R,) (a view: valid until the next change)."""
        return self._word_ids[: self._n_rows]

    @property
    def counts(self) -> np.ndarray:
        """Word counts, shape (R, allocated columns) int64 (a view: valid until a change)."""
        return self._counts[: self._n_rows]

    def rows_of(self, word_ids: np.ndarray) -> np.ndarray:
        """Row of each word id, -1 for a word no labelled document used."""
        ids = np.asarray(word_ids, dtype=np.int64)
        rows = np.full(ids.shape, -1, dtype=np.int64)
        inside = ids < self._row_of_word.size
        rows[inside] = self._row_of_word[ids[inside]]
        return rows

    def column_of(self, group_id: int) -> int:
        """Column of a group id, -1 when no labelled document names it."""
        return self._column.get(int(group_id), -1)

    def columns_of(self, group_ids: np.ndarray) -> np.ndarray:
        """Column of each group id (-1 for a group no labelled document names)."""
        return np.array([self._column.get(int(g), -1) for g in group_ids], dtype=np.int64)

    def group_ids(self) -> list[int]:
        """Group ids that labelled documents name."""
        return list(self._column)

    def members(self, column: int) -> int:
        """Documents naming the column's group."""
        return int(self._members[column])

    def documents(self, columns: np.ndarray) -> np.ndarray:
        """Documents with at least one token, per column, int64."""
        return self._documents[columns]

    def tokens(self, columns: np.ndarray) -> np.ndarray:
        """Tokens per column, int64."""
        return self._tokens[columns]

    def holds_words(self, word_ids: np.ndarray) -> np.ndarray:
        """Whether any labelled document (of any group) uses each word id, shape (n,) bool."""
        rows = self.rows_of(word_ids)
        held = rows >= 0
        if held.any():
            held[held] = np.any(self._counts[rows[held]] != 0, axis=1)
        return held

    def by_group(self) -> dict[int, tuple[int, int, int, dict[int, int]]]:
        """Every sum keyed by group id: ``(members, documents, tokens, {word id: count})``
        with zero counts left out; equal for any two sums of the same documents."""
        out = {}
        for group, column in self._column.items():
            values = self.counts[:, column]
            nonzero = np.flatnonzero(values)
            words = {
                int(w): int(c) for w, c in zip(self.word_ids[nonzero], values[nonzero], strict=True)
            }
            out[group] = (
                int(self._members[column]),
                int(self._documents[column]),
                int(self._tokens[column]),
                words,
            )
        return out

    # ---- changing --------------------------------------------------------------------------
    def add(self, group_id: int, indices: np.ndarray, counts: np.ndarray) -> None:
        """Count one document (distinct word ids, whole counts) into its group."""
        column = self._column.get(int(group_id), -1)
        if column < 0:
            column = self._new_column(int(group_id))
        tokens = int(counts.sum())
        if indices.size:
            rows = self._rows_for(indices)  # before reading self._counts: it may grow
            self._counts[rows, column] += counts
        self._members[column] += 1
        self._documents[column] += tokens > 0
        self._tokens[column] += tokens

    def subtract(self, group_id: int, indices: np.ndarray, counts: np.ndarray) -> None:
        """Take out one document counted by :meth:`add` with the same arguments."""
        column = self._column[int(group_id)]
        tokens = int(counts.sum())
        if indices.size:
            self._counts[self._row_of_word[indices], column] -= counts
        self._members[column] -= 1
        self._documents[column] -= tokens > 0
        self._tokens[column] -= tokens
        if self._members[column] == 0:
            self._release(int(group_id), column)

    def subtract_words(
        self, group_id: int, indices: np.ndarray, counts: np.ndarray, emptied: bool
    ) -> None:
        """Take some words out of a document that stays (retired words); ``emptied`` when it
        has no token left."""
        column = self._column[int(group_id)]
        self._counts[self._row_of_word[indices], column] -= counts
        self._tokens[column] -= int(counts.sum())
        self._documents[column] -= bool(emptied)

    def move_group(self, old_id: int, new_id: int) -> None:
        """Add every sum of group ``old_id`` to ``new_id`` (a merge): O(rows)."""
        old = self._column.get(int(old_id), -1)
        if old < 0 or int(old_id) == int(new_id):
            return
        new = self._column.get(int(new_id), -1)
        if new < 0:
            new = self._new_column(int(new_id))
        self._counts[: self._n_rows, new] += self._counts[: self._n_rows, old]
        for array in (self._members, self._documents, self._tokens):
            array[new] += array[old]
        self._counts[: self._n_rows, old] = 0
        self._members[old] = 0
        self._documents[old] = 0
        self._tokens[old] = 0
        self._release(int(old_id), old)

    # ---- storage ---------------------------------------------------------------------------
    def _rows_for(self, indices: np.ndarray) -> np.ndarray:
        top = int(indices[-1]) + 1 if indices.size else 0  # indices are sorted
        if top > self._row_of_word.size:
            self._grow_word_map(top)
        rows = self._row_of_word[indices]
        missing = rows < 0
        if missing.any():
            n_new = int(np.count_nonzero(missing))
            self._grow_rows(self._n_rows + n_new)
            new = np.arange(self._n_rows, self._n_rows + n_new, dtype=np.int64)
            self._word_ids[new] = indices[missing]
            self._row_of_word[indices[missing]] = new
            rows[missing] = new
            self._n_rows += n_new
        return rows

    def _new_column(self, group_id: int) -> int:
        if self._free:
            column = self._free.pop()
        else:
            column = len(self._column)
            self._grow_columns(column + 1)
        self._column[group_id] = column
        return column

    def _release(self, group_id: int, column: int) -> None:
        del self._column[group_id]
        self._free.append(column)

    def _grow_word_map(self, size: int) -> None:
        grown = np.full(max(size, 2 * self._row_of_word.size), -1, dtype=np.int64)
        grown[: self._row_of_word.size] = self._row_of_word
        self._row_of_word = grown

    def _grow_rows(self, size: int) -> None:
        have = self._counts.shape[0]
        if size <= have:
            return
        rows = max(size, 2 * have, 64)
        counts = np.zeros((rows, self._counts.shape[1]), dtype=np.int64)
        counts[:have] = self._counts
        self._counts = counts
        word_ids = np.zeros(rows, dtype=np.int64)
        word_ids[:have] = self._word_ids[:have]
        self._word_ids = word_ids

    def _grow_columns(self, size: int) -> None:
        have = self._counts.shape[1]
        if size <= have:
            return
        columns = max(size, 2 * have, 4)
        counts = np.zeros((self._counts.shape[0], columns), dtype=np.int64)
        counts[:, :have] = self._counts
        self._counts = counts
        for name in ("_members", "_documents", "_tokens"):
            grown = np.zeros(columns, dtype=np.int64)
            grown[:have] = getattr(self, name)
            setattr(self, name, grown)


class LabelledSet:
    """The labelled documents of one state, in the order they were first given.

    Each document has its id, its group's stable id, its source, an excerpt of its text (for
    listing) and its word counts over the state's vocabulary ids (one CSR row, whole counts).
    Replacing a document keeps its place; removing one closes the gap. ``revision`` moves with
    every change, so what is derived from the set can be cached by it. :attr:`sums` are the
    per-group sums, kept up to date by every change (:class:`LabelledSums`).
    """

    def __init__(self) -> None:
        self._ids: list[str] = []
        self._index: dict[str, int] = {}
        self._groups: list[int] = []
        self._sources: list[str] = []
        self._excerpts: list[str] = []
        self._indices: list[np.ndarray] = []  # int64 word ids, sorted, distinct
        self._data: list[np.ndarray] = []  # float64 counts, whole numbers
        self._sums = LabelledSums()
        self.revision = 0

    # ---- reading ---------------------------------------------------------------------------
    @property
    def sums(self) -> LabelledSums:
        """Per-group sums of the documents held (updated in place by every change)."""
        return self._sums

    def __len__(self) -> int:
        return len(self._ids)

    def len(self) -> int:
        """Number of labelled documents."""
        return len(self._ids)

    def __contains__(self, doc_id: object) -> bool:
        return doc_id in self._index

    def ids(self) -> list[str]:
        """Document ids in order."""
        return list(self._ids)

    def group_of(self, doc_id: str) -> int | None:
        """Group id of a labelled document, None when the id is not labelled."""
        index = self._index.get(doc_id)
        return None if index is None else self._groups[index]

    def groups(self) -> np.ndarray:
        """Group id of every document, in order, shape (L,) int64."""
        return np.asarray(self._groups, dtype=np.int64)

    def tokens(self) -> np.ndarray:
        """Tokens of every document (over active words), shape (L,) float64."""
        return np.array([float(d.sum()) for d in self._data], dtype=np.float64)

    def documents(self) -> list[dict[str, Any]]:
        """Every labelled document for listing.

        Returns
        -------
        list of dict
            ``{"id", "group", "source", "excerpt", "tokens"}`` in order; ``tokens`` counts the
            document's words still in the vocabulary.
        """
        return [
            {
                "id": doc_id,
                "group": int(group),
                "source": source,
                "excerpt": excerpt,
                "tokens": round(float(data.sum())),
            }
            for doc_id, group, source, excerpt, data in zip(
                self._ids, self._groups, self._sources, self._excerpts, self._data, strict=True
            )
        ]

    def group_counts(self) -> dict[int, int]:
        """Labelled documents per group id (groups without any are left out)."""
        sums = self._sums
        return {group: sums.members(sums.column_of(group)) for group in sums.group_ids()}

    def source_counts(self) -> dict[str, int]:
        """Labelled documents per source."""
        out: dict[str, int] = {}
        for source in self._sources:
            out[source] = out.get(source, 0) + 1
        return out

    def word_ids_of(self, doc_ids: Iterable[str]) -> np.ndarray:
        """Distinct word ids the given documents use (unknown ids are ignored)."""
        parts = [self._indices[self._index[d]] for d in doc_ids if d in self._index]
        if not parts:
            return np.zeros(0, dtype=np.int64)
        return np.unique(np.concatenate(parts))

    def holds_group(self, group_id: int) -> bool:
        """Whether any labelled document names this group id."""
        return self._sums.column_of(group_id) >= 0

    def holds_words(self, word_ids: np.ndarray) -> np.ndarray:
        """Whether any labelled document uses each word id, shape (n,) bool."""
        return self._sums.holds_words(word_ids)

    def counts_matrix(self, capacity: int) -> sp.csr_matrix:
        """Word counts of every document, shape (L, capacity) CSR."""
        n = len(self._ids)
        lengths = np.fromiter((i.size for i in self._indices), dtype=np.int64, count=n)
        indptr = np.zeros(n + 1, dtype=np.int64)
        np.cumsum(lengths, out=indptr[1:])
        indices = np.concatenate(self._indices) if n else np.zeros(0, dtype=np.int64)
        data = np.concatenate(self._data) if n else np.zeros(0, dtype=np.float64)
        if indices.size and int(indices.max()) >= capacity:
            raise InputError("labelled counts name word ids beyond the vocabulary's capacity")
        return sp.csr_matrix((data, indices, indptr), shape=(n, capacity))

    # ---- changing --------------------------------------------------------------------------
    def put(
        self,
        doc_id: str,
        group_id: int,
        source: str,
        excerpt: str,
        row: sp.csr_matrix,
    ) -> bool:
        """Add a document or replace the one with this id (keeping its place).

        Returns False (and changes nothing) when the id is held with the same group, source
        and counts: learning the same correction twice is a no-op. InputError when a count is
        not a whole number (labelled documents are counted from text).
        """
        row = sp.csr_matrix(row, dtype=np.float64)
        row.sum_duplicates()  # sorted, distinct word ids
        return self.put_counts(doc_id, group_id, source, excerpt, row.indices, row.data)

    def put_counts(
        self,
        doc_id: str,
        group_id: int,
        source: str,
        excerpt: str,
        indices: np.ndarray,
        data: np.ndarray,
    ) -> bool:
        """:meth:`put` with the row given as sorted, distinct word ids and their counts (a
        canonical CSR row's ``indices`` and ``data``, e.g. a slice of ``count_texts``' counts:
        no sparse matrix is built per document)."""
        indices = np.asarray(indices, dtype=np.int64)
        data = np.asarray(data, dtype=np.float64)
        if indices.shape != data.shape or np.any(np.diff(indices) <= 0):
            raise InputError(f"word ids of labelled document {doc_id!r} must be sorted, distinct")
        keep = data > 0
        if not keep.all():
            indices, data = indices[keep], data[keep]
        else:  # own copies: the caller's arrays may be views of a batch
            indices, data = indices.copy(), data.copy()
        if not np.all(np.floor(data) == data):
            raise InputError(f"counts of labelled document {doc_id!r} must be whole numbers")
        index = self._index.get(doc_id)
        if index is not None:
            if (
                self._groups[index] == int(group_id)
                and self._sources[index] == source
                and np.array_equal(self._indices[index], indices)
                and np.array_equal(self._data[index], data)
            ):
                return False
            self._sums.subtract(
                self._groups[index], self._indices[index], self._data[index].astype(np.int64)
            )
            self._groups[index] = int(group_id)
            self._sources[index] = source
            self._excerpts[index] = excerpt
            self._indices[index] = indices
            self._data[index] = data
        else:
            self._index[doc_id] = len(self._ids)
            self._ids.append(doc_id)
            self._groups.append(int(group_id))
            self._sources.append(source)
            self._excerpts.append(excerpt)
            self._indices.append(indices)
            self._data.append(data)
        self._sums.add(int(group_id), indices, data.astype(np.int64))
        self.revision += 1
        return True

    def remove(self, doc_ids: Iterable[str]) -> int:
        """Remove documents by id (unknown ids are ignored); returns how many were removed."""
        drop = {self._index[d] for d in doc_ids if d in self._index}
        if not drop:
            return 0
        for i in drop:
            self._sums.subtract(self._groups[i], self._indices[i], self._data[i].astype(np.int64))
        columns = (
            self._ids,
            self._groups,
            self._sources,
            self._excerpts,
            self._indices,
            self._data,
        )
        if len(drop) <= _REMOVE_IN_PLACE:
            # A few: delete in place (a memmove per list) and renumber only the ids after the
            # first gap, instead of rebuilding every list in Python.
            for d in [self._ids[i] for i in drop]:
                del self._index[d]
            for i in sorted(drop, reverse=True):
                for column in columns:
                    del column[i]
            first = min(drop)
            for i in range(first, len(self._ids)):
                self._index[self._ids[i]] = i
        else:
            keep = [i for i in range(len(self._ids)) if i not in drop]
            for column in columns:
                column[:] = [column[i] for i in keep]
            self._index = {d: i for i, d in enumerate(self._ids)}
        self.revision += 1
        return len(drop)

    def move_group(self, old_id: int, new_id: int) -> int:
        """Give every document of group ``old_id`` to ``new_id`` (a merge); returns how many."""
        moved = 0
        for i, group in enumerate(self._groups):
            if group == old_id:
                self._groups[i] = int(new_id)
                moved += 1
        if moved:
            self._sums.move_group(old_id, new_id)
            self.revision += 1
        return moved

    def drop_words(self, word_ids: np.ndarray) -> None:
        """Take retired word ids out of every document's counts."""
        retired = np.asarray(word_ids, dtype=np.int64)
        if retired.size == 0 or not self._ids:
            return
        # Only words some document uses need the pass over the documents.
        retired = np.unique(retired[self._sums.holds_words(retired)])
        if retired.size == 0:
            return
        for i, indices in enumerate(self._indices):
            keep = ~np.isin(indices, retired, assume_unique=True)
            if not keep.all():
                data = self._data[i]
                self._indices[i] = indices[keep]
                self._data[i] = data[keep]
                self._sums.subtract_words(
                    self._groups[i],
                    indices[~keep],
                    data[~keep].astype(np.int64),
                    emptied=data.sum() > 0 and not np.any(data[keep] > 0),
                )
        self.revision += 1

    def renumber_words(self, mapping: np.ndarray) -> None:
        """Apply a vocabulary compaction (old id -> new id, -1 for retired) to the counts."""
        if not self._ids:
            return
        for i, indices in enumerate(self._indices):
            new = mapping[indices]
            keep = new >= 0
            order = np.argsort(new[keep], kind="stable")
            self._indices[i] = new[keep][order].astype(np.int64)
            self._data[i] = self._data[i][keep][order]
        # Word ids changed everywhere (a rare O(V) step): count the sums again, compactly.
        self._sums = LabelledSums.recount(self._groups, self._indices, self._data)
        self.revision += 1

    def copy(self) -> LabelledSet:
        """An independent copy."""
        return LabelledSet.from_arrays(self.to_arrays())

    # ---- bytes -----------------------------------------------------------------------------
    def to_arrays(self) -> dict[str, np.ndarray]:
        """Plain arrays (no object arrays): fit for the state's npz archive."""
        meta = {"ids": self._ids, "sources": self._sources, "excerpts": self._excerpts}
        matrix_indptr = np.zeros(len(self._ids) + 1, dtype=np.int64)
        np.cumsum([i.size for i in self._indices], out=matrix_indptr[1:])
        return {
            "meta": np.frombuffer(json.dumps(meta).encode("utf-8"), dtype=np.uint8),
            "groups": np.asarray(self._groups, dtype=np.int64),
            "indptr": matrix_indptr,
            "indices": (
                np.concatenate(self._indices) if self._ids else np.zeros(0, dtype=np.int64)
            ).astype(np.int64),
            "data": (
                np.concatenate(self._data) if self._ids else np.zeros(0, dtype=np.float64)
            ).astype(np.float64),
        }

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> LabelledSet:
        """Read what :meth:`to_arrays` wrote; StateFormatError when it is inconsistent."""
        try:
            meta = json.loads(np.asarray(arrays["meta"]).tobytes().decode("utf-8"))
            ids, sources, excerpts = meta["ids"], meta["sources"], meta["excerpts"]
            groups = np.asarray(arrays["groups"], dtype=np.int64)
            indptr = np.asarray(arrays["indptr"], dtype=np.int64)
            indices = np.asarray(arrays["indices"], dtype=np.int64)
            data = np.asarray(arrays["data"], dtype=np.float64)
        except (KeyError, ValueError, UnicodeDecodeError, TypeError) as exc:
            raise StateFormatError(f"labelled documents are malformed: {exc}") from exc
        n = len(ids)
        if not (
            len(sources) == n == len(excerpts) == groups.shape[0]
            and indptr.shape == (n + 1,)
            and indptr[0] == 0
            and indptr[-1] == indices.size == data.size
            and np.all(np.diff(indptr) >= 0)
            and len(set(ids)) == n
        ):
            raise StateFormatError("labelled documents are inconsistent (lengths or ids)")
        if data.size and (not np.all(np.isfinite(data)) or data.min() < 0):
            raise StateFormatError("labelled counts must be finite and non-negative")
        if not np.all(np.floor(data) == data):
            raise StateFormatError("labelled counts must be whole numbers")
        if indices.size and indices.min() < 0:
            raise StateFormatError("labelled counts name negative word ids")
        # Within each document the word ids increase (steps across two documents aside).
        steps = np.diff(indices) > 0
        steps[indptr[1:-1][(indptr[1:-1] > 0) & (indptr[1:-1] < indices.size)] - 1] = True
        if not steps.all():
            raise StateFormatError("a labelled document's word ids must be sorted, distinct")
        out = cls()
        for i in range(n):
            if not isinstance(ids[i], str) or sources[i] not in LABELLED_SOURCES:
                raise StateFormatError("labelled documents hold a bad id or source")
            out._index[ids[i]] = i
            out._ids.append(ids[i])
            out._groups.append(int(groups[i]))
            out._sources.append(str(sources[i]))
            out._excerpts.append(str(excerpts[i]))
            out._indices.append(indices[indptr[i] : indptr[i + 1]].copy())
            out._data.append(data[indptr[i] : indptr[i + 1]].copy())
        # The sums are not stored: counted again from the documents (equal to the running ones).
        out._sums = LabelledSums.recount(out._groups, out._indices, out._data)
        return out


def remaining_weight(
    unit_eta: float,
    unit_documents: int,
    log_forgetting_after_unit: float,
    log_forgetting_now: float,
) -> float:
    """Weight an unlabelled document still has in the stepwise running average.

    A document learned in a unit of ``unit_documents`` documents at step size ``unit_eta``
    weighed ``unit_eta / unit_documents`` right after that unit; every update since multiplied
    it by ``1 - eta_j``, which ``MixtureState.log_forgetting`` sums in log space. For a
    document of the warm-up fit pass ``unit_eta = 1``, ``unit_documents`` = the documents of
    the fit and the ``log_forgetting`` at the fit (0 for a state that began with it).

    Parameters
    ----------
    unit_eta : float
        The step size its unit took (``BatchReport.unit_etas``).
    unit_documents : int
        Documents with tokens in that unit (``BatchReport.unit_documents``).
    log_forgetting_after_unit : float
        ``state.log_forgetting`` right after that unit (``BatchReport.unit_log_forgetting``).
    log_forgetting_now : float
        ``state.log_forgetting`` now.

    Returns
    -------
    float
        The document's weight in the running average, in [0, 1] (the weights of all documents
        learned sum to 1 without retirements).
    """
    if unit_documents <= 0:
        raise InputError("unit_documents must be positive")
    if log_forgetting_now > log_forgetting_after_unit + 1e-12:
        raise InputError("log_forgetting_now must not exceed the value after the unit")
    return float(unit_eta / unit_documents * np.exp(log_forgetting_now - log_forgetting_after_unit))


def remaining_documents(weight: float, weight_square_sum: float) -> float:
    """A running-average weight in count units: the documents' worth it adds to the counts
    the parameters are smoothed from (before the factor lambda); 1.0 is one whole document.

    ``weight_square_sum`` is ``state.weight_square_sum`` (Kish: counts = average / sum w^2).
    """
    return float(weight / weight_square_sum)


def check_items(items: Sequence[LabelledItem]) -> list[LabelledItem]:
    """Validate a batch of items (InputError naming the first bad one); returns them as a list."""
    if isinstance(items, LabelledItem) or not isinstance(items, Sequence):
        raise InputError("items must be a sequence of LabelledItem")
    for index, item in enumerate(items):
        if not isinstance(item, LabelledItem):
            raise InputError(f"item at index {index} must be a LabelledItem")
        item.check()
    return list(items)


@dataclass(frozen=True)
class AddedItems:
    """What :func:`add_items` did: documents added, moved or replaced; tokens; new words."""

    changed: int
    tokens: int
    new_words: int


def add_items(state: MixtureState, items: Sequence[LabelledItem]) -> AddedItems:
    """Count labelled items over the state's vocabulary (growing it) and put them in
    ``state.labelled``, in order. All checks come first: on InputError nothing changed.

    Raises
    ------
    InputError
        For a bad item, a group id that is not a current group, or more labelled documents
        than ``config.labelled_limit``.
    """
    from mixture.counting import count_texts

    items = check_items(items)
    if not items:
        return AddedItems(0, 0, 0)
    assert state.group_ids is not None
    current = {int(g) for g in state.group_ids}
    for item in items:
        if int(item.group_id) not in current:
            raise InputError(
                f"group {int(item.group_id)} (of labelled document {item.doc_id!r}) is not a "
                f"current group: it was retired, merged or never made"
            )
    new_ids = {item.doc_id for item in items if item.doc_id not in state.labelled}
    limit = state.config.labelled_limit
    if len(state.labelled) + len(new_ids) > limit:
        raise InputError(
            f"labelled documents would number {len(state.labelled) + len(new_ids)}, over "
            f"labelled_limit ({limit}); withdraw some first or raise the limit"
        )
    replaced = state.labelled.word_ids_of([item.doc_id for item in items])
    batch = count_texts([item.text for item in items], state.tokenizer, state.vocabulary, True)
    state.ensure_capacity()
    counts = batch.counts  # canonical CSR (count_texts sums duplicates): rows by slice
    changed = 0
    for index, item in enumerate(items):
        start, stop = counts.indptr[index], counts.indptr[index + 1]
        changed += state.labelled.put_counts(
            item.doc_id,
            int(item.group_id),
            item.source,
            item.text[:EXCERPT_CHARACTERS],
            counts.indices[start:stop],
            counts.data[start:stop],
        )
    if changed:
        state.touch()
        # A replaced text's words that nothing else holds leave with it.
        state.retire_unused_words(replaced)
    return AddedItems(changed, int(counts.data.sum()), batch.new_words)
