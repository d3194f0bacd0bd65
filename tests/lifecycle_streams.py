"""Synthetic message streams from known unigram topics (invented data, generated here).

Each topic is a word distribution drawn from a sparse Dirichlet over its own block of an
invented vocabulary plus a shared block of common words; a message draws a topic, a length,
and its words. Words are letter strings (no digits, no stop words) so the tokenizer keeps them
as they are.
"""

from __future__ import annotations

import numpy as np

_LETTERS = "abcdefghijklmnopqrstuvwxyz"


def invented_word(index: int) -> str:
    """A letter-only word that is no English stop word ("zq" and base-26 digits)."""
    digits = []
    for _ in range(3):
        index, rest = divmod(index, 26)
        digits.append(_LETTERS[rest])
    return "zq" + "".join(reversed(digits))


class TopicStream:
    """Invented topics: ``n_topics`` word distributions over their own and shared words.

    Parameters
    ----------
    n_topics : int
    words_per_topic : int
        Size of each topic's own block of words.
    shared_words : int
        Words every topic uses a little (a fifth of each topic's mass).
    seed : int
    """

    def __init__(
        self, n_topics: int, words_per_topic: int = 150, shared_words: int = 100, seed: int = 0
    ) -> None:
        rng = np.random.default_rng(seed)
        self.vocabulary = [
            invented_word(i) for i in range(n_topics * words_per_topic + shared_words)
        ]
        shared = rng.dirichlet(np.full(shared_words, 0.5))
        self.topics = np.zeros((n_topics, len(self.vocabulary)))
        for t in range(n_topics):
            own = rng.dirichlet(np.full(words_per_topic, 0.3))
            block = slice(t * words_per_topic, (t + 1) * words_per_topic)
            self.topics[t, block] = 0.8 * own
            self.topics[t, n_topics * words_per_topic :] = 0.2 * shared
        self.rng = np.random.default_rng(seed + 1)

    def messages(self, labels: np.ndarray, mean_length: float = 12.0) -> list[str]:
        """One invented message per label (the topic index)."""
        out = []
        for label in labels:
            length = 3 + self.rng.poisson(mean_length - 3)
            words = self.rng.choice(len(self.vocabulary), size=length, p=self.topics[label])
            out.append(" ".join(self.vocabulary[w] for w in words))
        return out

    def labels(self, n: int, topics: list[int]) -> np.ndarray:
        """n topic labels drawn uniformly from ``topics``."""
        return self.rng.choice(np.asarray(topics), size=n)
