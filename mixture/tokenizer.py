r"""The tokenizer: how text becomes tokens.

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
  "1,000", "10:30", "٤٢"), is a number and becomes ``_num_``. So is a run of ASCII digits
  followed by an English ordinal suffix, right or wrong ("1st", "2nd", "9th", "23th";
  ``NUMBER_SUFFIXES``): the suffix only spells the same number in the same place ("9th June"
  is "9 June"), and left as words they filled the top terms with one-off dates. Digits
  followed by other letters stay words, as they say more than the number: a unit or a code
  ("5kg", "20gb", "a320", "v1.2"), a time of day ("3pm"), a decade ("1990s"). With
  ``fold_ordinals`` off, or ``fold_numbers`` off, ordinals stay words.
- Tokens shorter than ``min_length`` or longer than ``max_length`` characters are dropped (not
  cut), as are the built-in English stop words and a model's ``extra_stop_words``.
  Placeholders are exempt from both. A text cannot forge a placeholder: the literal string
  ``_url_`` in a message is the word "url".

The token pattern is Python's ``re`` with a character class built once per process (about
10 ms) from ``str.isalnum`` and the combining marks of the BMP. The ``regex`` package's
``\p{L}\p{N}\p{M}`` class gives the same tokens but its ``findall`` took about twice as long
on the benchmark's texts (bench/bench_text.py corpora, measured when this module was split
out), so it is not used.
ASCII text in which no apostrophe or digit separator joins (most short messages) skips the
regex: its tokens are the runs of ASCII letters and digits, split by C-level byte operations
(``Tokenizer.find_raw_tokens``; the same matches, tested against the pattern).
"""

from __future__ import annotations

import functools
import re
import unicodedata
from collections.abc import Callable
from dataclasses import asdict, dataclass, fields
from typing import Any, Final

import numpy as np

from mixture.errors import ConfigError, InputError

__all__ = [
    "EMAIL_TOKEN",
    "ENGLISH_STOP_WORDS",
    "NUMBER_SUFFIXES",
    "NUMBER_TOKEN",
    "PLACEHOLDERS",
    "URL_TOKEN",
    "Tokenizer",
    "TokenizerConfig",
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

PLACEHOLDERS: Final = frozenset({URL_TOKEN, EMAIL_TOKEN, NUMBER_TOKEN})

# Letters after a run of digits that leave it the same number (module docstring): the English
# ordinal endings. Units, codes, "am"/"pm" and the decades' "s" add meaning and stay words.
NUMBER_SUFFIXES: Final[frozenset[str]] = frozenset({"st", "nd", "rd", "th"})
_SUFFIXED_NUMBER: Final = re.compile(rf"[0-9]++(?:{'|'.join(sorted(NUMBER_SUFFIXES))})")

# Bounds on a model's own stop words (``TokenizerConfig.extra_stop_words``): the list is stored
# in every state header and configuration record, so it is kept to a size a person writes.
MAX_EXTRA_STOP_WORDS: Final = 1000
_MAX_STOP_WORD_LENGTH: Final = 100

# The term cache is dropped and refilled past this many entries, so a stream of one-off tokens
# (hashes, ticket numbers, typos) cannot grow memory without bound.
_TERM_CACHE_LIMIT: Final = 1 << 20

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

# The ASCII fast path of Tokenizer.find_raw_tokens. In ASCII text the token pattern's word
# characters are [A-Za-z0-9]; every other character ends a token except where a join applies:
# an apostrophe between two word characters, or . , : between two digits. _ASCII_CLASSES maps
# each byte to its class (letter a, digit 0, apostrophe, digit separator ., anything else a
# space) so that a join shows as one of a few three-byte sequences; _ASCII_SPACES turns every
# non-word byte into a space, after which the tokens are exactly the whitespace-split runs.
_ASCII_CLASSES: Final = bytes(
    ord("a")
    if chr(c).isascii() and chr(c).isalpha()
    else ord("0")
    if chr(c) in "0123456789"
    else ord("'")
    if chr(c) == "'"
    else ord(".")
    if chr(c) in ".,:"
    else ord(" ")
    for c in range(256)
)
_ASCII_SPACES: Final = bytes(
    c if chr(c).isascii() and chr(c).isalnum() else ord(" ") for c in range(256)
)
_ASCII_JOINS: Final = (b"a'a", b"a'0", b"0'a", b"0'0")


def _ascii_word_runs(text: str) -> list[str] | None:
    """The token pattern's matches of ASCII ``text`` when no join applies in it, else None.

    Without a join a match is a maximal run of ASCII letters and digits, which splitting on
    every other byte gives at once (bytes.translate and str.split run in C).
    """
    data = text.encode("ascii")
    classes = data.translate(_ASCII_CLASSES)
    if b"0.0" in classes:
        return None  # a number such as 12.50 or 10:30: the pattern joins it
    if b"'" in classes and any(join in classes for join in _ASCII_JOINS):
        return None  # an apostrophe inside a word ("don't", "passenger's")
    return data.translate(_ASCII_SPACES).decode("ascii").split()


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
    fold_ordinals : bool
        Also fold numbers with an English ordinal suffix ("9th", "23th") into ``_num_``
        (only with ``fold_numbers``; see the tokenizer rules).
    extra_stop_words : tuple of str
        The model's own stop words (an organisation's name, its signature lines), dropped like
        the built-in list. Each must be one token; it is stored as the tokenizer spells it
        (case-folded, apostrophes removed), sorted and without repeats. At most 1000.
    """

    min_length: int = 2
    max_length: int = 40
    stop_words: str = "english"
    fold_urls: bool = True
    fold_emails: bool = True
    fold_numbers: bool = True
    fold_ordinals: bool = True
    extra_stop_words: tuple[str, ...] = ()

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
        for name in ("fold_urls", "fold_emails", "fold_numbers", "fold_ordinals"):
            value = getattr(self, name)
            if not isinstance(value, bool | np.bool_):
                raise ConfigError(f"tokenizer {name} must be true or false, got {value!r}")
            object.__setattr__(self, name, bool(value))
        object.__setattr__(self, "extra_stop_words", _spelled_stop_words(self.extra_stop_words))

    def to_dict(self) -> dict[str, Any]:
        """Return the settings as a JSON-able dict (the inverse of :meth:`from_dict`)."""
        out = asdict(self)
        out["extra_stop_words"] = list(self.extra_stop_words)
        return out

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


def _spelled_stop_words(words: Any) -> tuple[str, ...]:
    """Validate a model's own stop words and spell them as the tokenizer would.

    Raises
    ------
    ConfigError
        On a value that is not a list of strings, too many words, or a word that is not
        exactly one token.
    """
    if isinstance(words, str) or not isinstance(words, tuple | list):
        raise ConfigError(
            f"tokenizer extra_stop_words must be a list of words, got {type(words).__name__}"
        )
    if len(words) > MAX_EXTRA_STOP_WORDS:
        raise ConfigError(
            f"tokenizer extra_stop_words holds {len(words)} words; at most {MAX_EXTRA_STOP_WORDS}"
        )
    if not words:
        return ()
    # The rules of normalise without folding, stop words or length limits: the word as it
    # would come out of a text, whatever the model's other settings.
    speller = Tokenizer(
        TokenizerConfig(
            min_length=1,
            max_length=_MAX_STOP_WORD_LENGTH,
            stop_words="none",
            fold_urls=False,
            fold_emails=False,
            fold_numbers=False,
        )
    )
    spelled: set[str] = set()
    for word in words:
        if not isinstance(word, str):
            raise ConfigError(
                f"tokenizer extra_stop_words must hold strings, got {type(word).__name__}"
            )
        tokens = speller.tokenize(word) if len(word) <= _MAX_STOP_WORD_LENGTH else []
        if len(tokens) != 1:
            raise ConfigError(
                f"tokenizer extra_stop_words: {word[:50]!r} is not one word of at most "
                f"{_MAX_STOP_WORD_LENGTH} letters or digits (hyphens and spaces split words)"
            )
        spelled.add(tokens[0])
    return tuple(sorted(spelled))


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
        self._stop_words = _STOP_LISTS[config.stop_words] | frozenset(config.extra_stop_words)
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
        token_re = re.compile(rf"{word}(?:['\u2019]{word}|(?<=[0-9])[.,:][0-9]++)*+")
        self._find_all: Final[Callable[[str], list[str]]] = token_re.findall
        self._terms = _TermCache(self.normalise)

    def __repr__(self) -> str:
        return f"Tokenizer({self.config!r})"

    def find_raw_tokens(self, text: str) -> list[str]:
        """The raw tokens of case-folded, URL- and e-mail-folded text: the pattern's matches.

        ASCII text without a joining apostrophe or digit separator is split by C-level byte
        operations instead (:func:`_ascii_word_runs`), the same list in about a third of
        the time of the regex scan on the benchmark's short messages.

        Parameters
        ----------
        text : str
            Text as :meth:`fold_special` returns it.

        Returns
        -------
        list of str
            The token pattern's matches, in order.
        """
        if text.isascii():  # O(1): CPython keeps the flag on the string
            runs = _ascii_word_runs(text)
            if runs is not None:
                return runs
        return self._find_all(text)

    def needs_folding(self, folded: str) -> bool:
        """Whether case-folded text may hold a URL or e-mail address to fold (a cheap check).

        Parameters
        ----------
        folded : str
            Case-folded text.

        Returns
        -------
        bool
            False when :meth:`fold_special` would return the text unchanged.
        """
        markers = self._markers
        if not markers:
            return False
        if markers == ("://", "www.", "@"):  # the default settings, unrolled (the hot path)
            return "@" in folded or "://" in folded or "www." in folded
        return True  # any other setting goes through the general check of fold_special

    def fold_special(self, text: str) -> str:
        """Replace URLs and e-mail addresses of case-folded ``text`` by sentinels.

        The sentinels are raw tokens of ASCII capitals that :meth:`normalise` turns into the
        placeholders; :meth:`find_raw_tokens` of the result gives the raw tokens.

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
        return self.find_raw_tokens(self.fold_special(text.casefold()))

    def normalise(self, raw: str) -> str | None:
        """Normalise one raw token (a match of :meth:`find_raw_tokens`).

        Parameters
        ----------
        raw : str
            A raw token of case-folded, URL- and e-mail-folded text.

        Returns
        -------
        str or None
            The term, or None when it is dropped (stop word, length, no letter).
        """
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
        if (
            config.fold_ordinals
            and config.fold_numbers
            and term[0].isdigit()
            and _SUFFIXED_NUMBER.fullmatch(term)
        ):
            return NUMBER_TOKEN
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
        if len(terms) > _TERM_CACHE_LIMIT:
            terms.clear()
        return [t for t in map(terms.__getitem__, self._raw_tokens(text)) if t is not None]
