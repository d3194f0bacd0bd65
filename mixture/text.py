"""Compatibility re-export of the text modules (import from them directly).

The tokenizer lives in :mod:`mixture.tokenizer`, the vocabulary in :mod:`mixture.vocabulary`
and batch counting in :mod:`mixture.counting`. This module only keeps ``mixture.text``
importable for code written against the single module it replaced.
"""

from mixture.counting import CountBatch, count_texts
from mixture.tokenizer import (
    EMAIL_TOKEN,
    ENGLISH_STOP_WORDS,
    NUMBER_TOKEN,
    URL_TOKEN,
    Tokenizer,
    TokenizerConfig,
)
from mixture.vocabulary import Vocabulary

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
