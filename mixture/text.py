"""Text to counts: tokenizer, vocabulary with stable ids, and batch count matrices.

Tokenizer rules (deterministic; the same text always gives the same tokens):

- The text is case-folded (``str.casefold``: "Straße" -> "strasse", "ΣΟΦΊΑ" -> "σοφία").
- URLs (``scheme://...`` or ``www....``) become ``_url_`` and e-mail addresses
  (``local@domain.tld``) become ``_email_`` before splitting, when folding is enabled.
- A token is a run of Unicode letters and digits (``str.isalnum``; no underscore). Combining
  marks and the zero-width (non-)joiner continue a run, so Devanagari or Thai vowel signs and
  decomposed accents stay inside their word. A non-ASCII token is brought to NFKC form, so
  fullwidth letters, ligatures and decomposed accents meet their usual spelling; "İ" meets "i".
- Apostrophes (' and U+2019) between letters join: a final possessive "'s" is dropped and the
  remaining apostrophes removed ("passenger's" -> "passenger", "don't" -> "dont", then a stop
  word). Hyphens split ("check-in" -> "check", "in"): writers spell compounds with a hyphen, a
  space or neither, and splitting makes the first two agree. Every other character (symbols,
  emoji, punctuation, the underscore) separates tokens.
- A run of digits, optionally with inner ``.``, ``,`` or ``:`` between ASCII digits ("12.50",
  "1,000", "10:30", "٤٢"), is a number and becomes ``_num_``. Tokens mixing letters and digits
  ("3pm", "a320", "v1.2") are ordinary words.
- Tokens shorter than ``min_length`` or longer than ``max_length`` characters are dropped (not
  cut), as are the built-in English stop words. Placeholders are exempt from both. A text
  cannot forge a placeholder: the literal string ``_url_`` in a message is the word "url".

Vocabulary ids are issued in order of first arrival and never change except through an explicit
:meth:`Vocabulary.compact`. A retired id is never issued again; if its word comes back later,
the word gets a fresh id.
"""

from __future__ import annotations

import functools
import itertools
import re
import unicodedata
from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass, fields
from typing import Any, Final

import numpy as np
import scipy.sparse as sp

from mixture.errors import ConfigError, InputError, StateFormatError

__all__ = [
    "EMAIL_TOKEN",
    "ENGLISH_STOP_WORDS",
    "NUMBER_TOKEN",
    "URL_TOKEN",
    "CountBatch",
    "Tokenizer",
    "TokenizerConfig",
    "Vocabulary",
    "count_texts",
]

URL_TOKEN: Final = "_url_"
EMAIL_TOKEN: Final = "_email_"
NUMBER_TOKEN: Final = "_num_"

# Our own list of English function words: articles, pronouns, auxiliaries, prepositions,
# conjunctions, frequent adverbs and the apostrophe-free forms of common contractions (the
# tokenizer removes apostrophes, so "don't" arrives as "dont"). Words that carry meaning in a
# service inbox ("id", "ill", "help", "please", "no", "not") are deliberately absent.
_ENGLISH_STOP_TEXT: Final = """
    a about above after again against all almost also am an and any are arent around as at
    be because been before being below between both but by
    can cant could couldnt
    did didnt do does doesnt doing done dont down during
    each either else even ever every
    few for from further
    had hadnt has hasnt have havent having he her here hers herself him himself his how however
    i if im in into is isnt it its itself ive
    just
    let lets
    may me might more most much must my myself
    neither nor now
    of off often on once only onto or other others our ours ourselves out over own
    per
    quite
    rather really
    same shall she should shouldnt since so some such
    than that the their theirs them themselves then there these they theyre theyve this those
    though through thus to too toward towards
    under until up upon us
    very via
    was wasnt we were werent weve what when where whether which while who whom whose why will
    with within without wont would wouldnt
    yet you youd youll your youre yours yourself yourselves youve
"""
ENGLISH_STOP_WORDS: Final[frozenset[str]] = frozenset(_ENGLISH_STOP_TEXT.split())

# A token id in the lookup caches: skipped by the tokenizer (stop word, length) or unknown to
# the vocabulary (only in caches used with grow=False).
_SKIP: Final = -1
_UNKNOWN: Final = -2
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

_STOP_LISTS: Final[dict[str, frozenset[str]]] = {
    "english": ENGLISH_STOP_WORDS,
    "none": frozenset(),
}


@functools.cache
def _word_characters() -> tuple[str, frozenset[str]]:
    """The characters a token is made of, as a regex class body, and the combining marks.

    A token character is a letter or digit (``str.isalnum``), a combining mark (categories Mn,
    Mc, Me: without them Python's ``\\w`` cuts Devanagari or Thai words at every vowel sign)
    or the zero-width joiner / non-joiner. ASCII capitals are included because the placeholder
    sentinels are written in them (case-folded text never contains any).

    Python's ``re`` tests a class of BMP characters with a bitmap but walks supplementary
    ranges one by one, so beyond the BMP the class holds three broad ranges (historic scripts
    and symbols, the ideograph planes, variation selectors) and leaves out the emoji block;
    stray non-letters caught that way are filtered when a token is first normalised.

    Returns
    -------
    tuple of (str, frozenset of str)
        The class body and the set of combining marks and joiners.
    """
    marks = ["\u200c", "\u200d"]
    code_points = [0x200C, 0x200D]
    for c in range(0x80, 0x10000):
        character = chr(c)
        if unicodedata.category(character)[0] == "M":
            marks.append(character)
            code_points.append(c)
        elif character.isalnum():
            code_points.append(c)
    code_points.sort()
    ranges = ["a-zA-Z0-9"]
    start = previous = code_points[0]
    for c in [*code_points[1:], -1]:
        if c == previous + 1:
            previous = c
            continue
        first, last = re.escape(chr(start)), re.escape(chr(previous))
        ranges.append(first if start == previous else f"{first}-{last}")
        start = previous = c
    ranges.append("\U00010000-\U0001efff\U00020000-\U0003ffff\U000e0100-\U000e01ef")
    return "".join(ranges), frozenset(marks)


_URL_RE: Final = re.compile(r"""(?<![\w.+-])(?:[a-z][a-z0-9+.-]*+://|www\.)[^\s<>"]+""")
_EMAIL_RE: Final = re.compile(r"(?<![\w.+-])[\w.+-]++@[^\W_][\w-]*+(?:\.[\w-]++)+")
_NON_SPACE_RUN: Final = re.compile(r"\S*")
_NUMBER_SEPARATORS: Final = str.maketrans("", "", ".,:")
# Sentinels written into case-folded text in place of URLs and e-mail addresses: they are
# tokens of ASCII capitals, which case folding never leaves behind, so no text can forge them.
_SENTINELS: Final = {"URL": URL_TOKEN, "EMAIL": EMAIL_TOKEN}
_APOSTROPHES: Final = ("'", "\u2019")


@dataclass(frozen=True)
class TokenizerConfig:
    """How text becomes tokens.

    Parameters
    ----------
    min_length : int
        Shortest token kept, in characters (placeholders are exempt).
    max_length : int
        Longest token kept; longer runs (hashes, base64) are dropped, not cut.
    stop_words : str
        ``"english"`` for our built-in list, ``"none"`` to keep every word.
    fold_urls, fold_emails, fold_numbers : bool
        Replace URLs, e-mail addresses and numbers by ``_url_``, ``_email_`` and ``_num_``.
    """

    min_length: int = 2
    max_length: int = 40
    stop_words: str = "english"
    fold_urls: bool = True
    fold_emails: bool = True
    fold_numbers: bool = True

    def __post_init__(self) -> None:
        for name in ("min_length", "max_length"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | np.integer):
                raise ConfigError(f"tokenizer {name} must be an integer, got {value!r}")
            object.__setattr__(self, name, int(value))
        if self.min_length < 1:
            raise ConfigError(f"tokenizer min_length must be at least 1, got {self.min_length}")
        if self.max_length < self.min_length:
            raise ConfigError(
                f"tokenizer max_length ({self.max_length}) must be at least "
                f"min_length ({self.min_length})"
            )
        if self.stop_words not in _STOP_LISTS:
            raise ConfigError(
                f"tokenizer stop_words must be one of {sorted(_STOP_LISTS)}, "
                f"got {self.stop_words!r}"
            )
        for name in ("fold_urls", "fold_emails", "fold_numbers"):
            value = getattr(self, name)
            if not isinstance(value, bool | np.bool_):
                raise ConfigError(f"tokenizer {name} must be true or false, got {value!r}")
            object.__setattr__(self, name, bool(value))

    def to_dict(self) -> dict[str, Any]:
        """Return the settings as a JSON-able dict (the inverse of :meth:`from_dict`)."""
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> TokenizerConfig:
        """Build a config from a dict; missing keys take their defaults.

        Raises
        ------
        ConfigError
            On a key that is not a setting or a value of the wrong type or range.
        """
        if not isinstance(d, dict):
            raise ConfigError(f"tokenizer settings must be a mapping, got {type(d).__name__}")
        known = {f.name for f in fields(cls)}
        unknown = sorted(str(k) for k in d if k not in known)
        if unknown:
            raise ConfigError(
                f"unknown tokenizer setting(s) {', '.join(unknown)}; "
                f"known: {', '.join(sorted(known))}"
            )
        return cls(**d)


class _TermCache(dict[str, str | None]):
    """Raw token (case-folded regex match) -> normalised term, or None when dropped."""

    __slots__ = ("resolve",)

    def __init__(self, resolve: Any) -> None:
        super().__init__()
        self.resolve = resolve

    def __missing__(self, raw: str) -> str | None:
        term = self.resolve(raw)
        self[raw] = term
        return term


class Tokenizer:
    """Split text into normalised tokens (see the module docstring for the rules).

    Parameters
    ----------
    config : TokenizerConfig, optional
        Settings; the defaults when omitted.
    """

    def __init__(self, config: TokenizerConfig | None = None) -> None:
        if config is None:
            config = TokenizerConfig()
        if not isinstance(config, TokenizerConfig):
            raise ConfigError(
                f"tokenizer config must be a TokenizerConfig, got {type(config).__name__}"
            )
        self.config: Final = config
        self._stop_words = _STOP_LISTS[config.stop_words]
        self._sentinels = {
            sentinel: token
            for sentinel, token in _SENTINELS.items()
            if (token == URL_TOKEN and config.fold_urls)
            or (token == EMAIL_TOKEN and config.fold_emails)
        }
        markers = [
            m
            for m, on in (
                ("://", config.fold_urls),
                ("www.", config.fold_urls),
                ("@", config.fold_emails),
            )
            if on
        ]
        self._markers: tuple[str, ...] = tuple(markers)
        characters, self._marks = _word_characters()
        word = f"[{characters}]++"
        # Apostrophes join letters ("don't"); . , : join digits ("12.50", "10:30"). The
        # possessive quantifiers never backtrack, so matching stays linear in the text.
        self._token_re = re.compile(rf"{word}(?:['\u2019]{word}|(?<=[0-9])[.,:][0-9]++)*+")
        self._terms = _TermCache(self._resolve)

    def __repr__(self) -> str:
        return f"Tokenizer({self.config!r})"

    def _fold_special(self, text: str) -> str:
        """Replace URLs and e-mail addresses of case-folded ``text`` by sentinels.

        Only the whitespace-delimited stretches around a marker ("://", "www.", "@") are given
        to the URL and e-mail patterns: running those patterns over a whole long text costs
        more than tokenizing it.
        """
        hits: list[tuple[int, int]] = []
        for marker in self._markers:
            # str.find is a fast substring search; a regex alternation walks every character.
            position = text.find(marker)
            while position >= 0:
                hits.append((position, position + len(marker)))
                position = text.find(marker, position + 1)
        if not hits:
            return text
        hits.sort()
        pieces: list[str] = []
        done = 0
        for position, marker_end in hits:
            if position < done:
                continue  # inside a stretch already handled
            # Start after the last plain space: a stretch that begins further left (after a
            # tab or a no-break space) is harmless, as URLs and addresses hold no whitespace.
            start = max(text.rfind(" ", done, position) + 1, done)
            end = _NON_SPACE_RUN.match(text, marker_end).end()
            stretch = text[start:end]
            if self.config.fold_urls:
                stretch = _URL_RE.sub(" URL ", stretch)
            if self.config.fold_emails and "@" in stretch:
                stretch = _EMAIL_RE.sub(" EMAIL ", stretch)
            pieces.append(text[done:start])
            pieces.append(stretch)
            done = end
        pieces.append(text[done:])
        return "".join(pieces)

    def _raw_tokens(self, text: str) -> list[str]:
        """Case-fold, fold URLs and e-mails, and return the regex matches (not yet filtered)."""
        return self._token_re.findall(self._fold_special(text.casefold()))

    def _resolve(self, raw: str) -> str | None:
        """Normalise one raw token; None when it is dropped (stop word, length, no letter)."""
        placeholder = self._sentinels.get(raw)
        if placeholder is not None:
            return placeholder
        term = raw
        if "'" in term or "\u2019" in term:
            if term.endswith(("'s", "\u2019s")):
                term = term[:-2]
            term = term.replace("'", "").replace("\u2019", "")
            if not term:
                return None
        ascii_only = term.isascii()
        if not ascii_only and self._is_plain(term):
            # Already NFKC, inside the BMP class (letters, digits, marks) and, being cut from
            # case-folded text, already folded (folding is idempotent): the slow path below
            # would return it unchanged.
            if not term.isalnum() and not any(c.isalnum() for c in term):
                return None
            normal = term
        elif not ascii_only:
            # NFKC, fold, NFKC again: folding can undo a composition and NFKC can bring back
            # capitals (Roman numerals). "İ" folds to "i" plus a combining dot; dropping the
            # dot lets "İstanbul" meet "istanbul".
            normal = unicodedata.normalize("NFKC", term).casefold().replace("i\u0307", "i")
            normal = unicodedata.normalize("NFKC", normal)
            # NFKC can also produce punctuation (the fraction slash of "½", the full stops
            # of "㏂"), and the class lets a few non-letters in beyond the BMP.
            term = "".join(c for c in normal if c.isalnum() or c in self._marks or c in ".,:")
            if not any(c.isalnum() for c in term):
                return None
        config = self.config
        if term[0].isdigit() and term.translate(_NUMBER_SEPARATORS).isdigit():
            if config.fold_numbers:
                return NUMBER_TOKEN
            term = term.strip(".,:")
            return term if config.min_length <= len(term) <= config.max_length else None
        if not ascii_only:
            stripped = term.translate(_NUMBER_SEPARATORS)
            if stripped != normal:
                # Removing characters may leave a base letter next to a mark: recompose.
                stripped = unicodedata.normalize("NFKC", stripped)
            term = stripped
        if not config.min_length <= len(term) <= config.max_length:
            return None
        if term in self._stop_words:
            return None
        return term

    @staticmethod
    def _is_plain(term: str) -> bool:
        return (
            "\u0307" not in term
            and max(term) < "\U00010000"
            and unicodedata.is_normalized("NFKC", term)
        )

    def tokenize(self, text: str) -> list[str]:
        """Return the tokens of one text, in order.

        Parameters
        ----------
        text : str
            The document.

        Returns
        -------
        list of str
            Normalised tokens; stop words and out-of-length runs removed.

        Raises
        ------
        InputError
            When ``text`` is not a str.
        """
        if not isinstance(text, str):
            raise InputError(f"text must be a str, got {type(text).__name__}")
        terms = self._terms
        if len(terms) > 4 * _CACHE_LIMIT:
            terms.clear()
        return [t for t in map(terms.__getitem__, self._raw_tokens(text)) if t is not None]


class _IdCache(dict[str, int]):
    """Raw token -> vocabulary id (or ``_SKIP`` / ``_UNKNOWN``) for one tokenizer setting.

    Filled lazily by ``__missing__``, so the hot loop of :func:`count_texts` is one C-level
    ``map`` over the regex matches. ``aliases`` remembers, per term, the raw tokens that differ
    from it ("passenger's", "12.50"), so that invalidating one term touches only its entries.
    """

    __slots__ = ("aliases", "grow", "term_of", "vocabulary")

    def __init__(self, vocabulary: Vocabulary, term_of: Any, grow: bool) -> None:
        super().__init__()
        self.vocabulary = vocabulary
        self.term_of = term_of
        self.grow = grow
        self.aliases: dict[str, list[str]] = {}

    def __missing__(self, raw: str) -> int:
        if raw == _SEPARATOR:  # the boundary between two texts of a joined batch
            self[raw] = _BOUNDARY
            return _BOUNDARY
        term = self.term_of(raw)
        if term is None:
            word_id = _SKIP
        else:
            word_id = self.vocabulary._ids.get(term, _UNKNOWN)
            if word_id == _UNKNOWN and self.grow:
                word_id = self.vocabulary._issue(term)
            if raw != term:
                self.aliases.setdefault(term, []).append(raw)
        self[raw] = word_id
        return word_id

    def forget(self, term: str) -> None:
        """Drop every entry that resolves to ``term``."""
        self.pop(term, None)
        for raw in self.aliases.pop(term, ()):
            self.pop(raw, None)

    def reset(self) -> None:
        self.clear()
        self.aliases.clear()


def _forget(cache: _IdCache, word: str) -> None:
    if word in (URL_TOKEN, EMAIL_TOKEN, NUMBER_TOKEN):
        cache.reset()  # many raw tokens stand behind a placeholder
    else:
        cache.forget(word)


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
        self._caches: dict[tuple[TokenizerConfig, bool], _IdCache] = {}
        self._mask: np.ndarray | None = None  # read-only snapshot handed out by active_mask()
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
        for (_, grow), cache in self._caches.items():
            if not grow:
                _forget(cache, word)
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
                _forget(cache, word)

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
        for cache in self._caches.values():
            cache.reset()
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
        encoded = [w.encode("utf-8") for w in self._words]
        offsets = np.zeros(len(encoded) + 1, dtype=np.int64)
        np.cumsum([len(b) for b in encoded], out=offsets[1:])
        return {
            "word_bytes": np.frombuffer(b"".join(encoded), dtype=np.uint8).copy(),
            "word_offsets": offsets,
            "active": self.active_mask().copy(),
            "generation": np.array(self._generation, dtype=np.int64),
        }

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
        return vocabulary

    def copy(self) -> Vocabulary:
        """Return an independent copy (lookup caches are not copied; they refill lazily)."""
        other = Vocabulary()
        other._words = list(self._words)
        other._ids = dict(self._ids)
        other._active = self._active.copy()
        other._n_active = self._n_active
        other._generation = self._generation
        return other

    __copy__ = copy

    def __deepcopy__(self, memo: dict[int, Any]) -> Vocabulary:
        return self.copy()

    def _id_cache(self, tokenizer: Tokenizer, grow: bool) -> _IdCache:
        key = (tokenizer.config, grow)
        cache = self._caches.get(key)
        if cache is None:
            cache = self._caches[key] = _IdCache(self, tokenizer._resolve, grow)
        elif len(cache) > max(_CACHE_LIMIT, 2 * len(self._words)):
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


def _needs_folding(folded: str, tokenizer: Tokenizer) -> bool:
    markers = tokenizer._markers
    if not markers:
        return False
    if markers == ("://", "www.", "@"):  # the default settings, unrolled (the hot path)
        return "@" in folded or "://" in folded or "www." in folded
    return True  # any other setting goes through the general check inside _fold_special


def _token_ids_joined(
    folded: str, n_docs: int, tokenizer: Tokenizer, lookup: Any
) -> tuple[np.ndarray, np.ndarray]:
    """Token ids of case-folded texts joined by ``_JOINER`` (one regex pass, one map)."""
    if _needs_folding(folded, tokenizer):
        folded = tokenizer._fold_special(folded)
    ids = np.fromiter(map(lookup, tokenizer._token_re.findall(folded)), dtype=np.int64)
    boundaries = np.flatnonzero(ids == _BOUNDARY)
    ends = np.empty(n_docs, dtype=np.int64)
    ends[:-1] = boundaries - np.arange(n_docs - 1)  # tokens before each boundary
    ends[-1] = ids.size - (n_docs - 1)
    return ids[ids != _BOUNDARY], ends


def _token_ids_per_text(
    texts: Sequence[str], tokenizer: Tokenizer, lookup: Any
) -> tuple[np.ndarray, np.ndarray]:
    """Token ids text by text, and the running token count at the end of each text."""
    findall = tokenizer._token_re.findall
    token_ids: list[int] = []
    extend = token_ids.extend
    ends = np.empty(len(texts), dtype=np.int64)
    for index, text in enumerate(texts):
        folded = text.casefold()
        if _needs_folding(folded, tokenizer):
            folded = tokenizer._fold_special(folded)
        extend(map(lookup, findall(folded)))
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
    lookup = vocabulary._id_cache(tokenizer, grow).__getitem__
    if n_docs > 1 and folded.count(_SEPARATOR) == n_docs - 1:  # no text holds the separator
        ids, ends = _token_ids_joined(folded, n_docs, tokenizer, lookup)
    else:  # one text, or a text holding the separator itself
        ids, ends = _token_ids_per_text(texts, tokenizer, lookup)
    doc_of_token = np.repeat(np.arange(n_docs, dtype=np.int64), np.diff(ends, prepend=0))
    known = ids >= 0
    known_tokens = np.bincount(doc_of_token[known], minlength=n_docs).astype(np.int64)
    if grow:
        unknown_tokens = np.zeros(n_docs, dtype=np.int64)
    else:
        unknown_tokens = np.bincount(doc_of_token[ids == _UNKNOWN], minlength=n_docs).astype(
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
