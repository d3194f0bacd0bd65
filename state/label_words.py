"""What a label was given to: a group's words when its label was set, and whether they moved.

A label is an operator's judgement about the words a group held at that moment. When it is set
(or refreshed), :func:`sketch_group` records the group's word distribution in a compact form,
by word (never by vocabulary id: a compaction renumbers the ids, a word stays itself):

* the most probable words, in order, until they cover :data:`SKETCH_COVERAGE` (99 %) of the
  group's probability mass, at most :data:`SKETCH_MAX_WORDS` (2,000) of them;
* every other word as one ``rest`` bucket (its mass, 1 % or a little less; more only when
  the cap cut the list short).

:func:`sketch_divergence` compares the group's distribution now with the sketch on the sketch's
own partition: the sketch's words one by one, every other word (words the group did not have
then, junk above all) in the ``rest`` bucket. The value is the Jensen-Shannon divergence in
bits of :func:`mixture.kernels.js_divergence` between the two coarse distributions.

The error of the compact form, stated: coarsening a partition never raises an f-divergence (the
data-processing inequality; Cover and Thomas, Elements of Information Theory, 2nd ed., 2.8), so
the value is a lower bound of the JS over every word. The loss is what the merged cells held:
with a and b the rest masses of the sketch and of the group now, per cell
``js(p, q) = (p + q) / 2 * (1 - H2(p / (p + q)))`` (H2 the binary entropy), so merging cells
loses ``(a + b) / 2`` times a mutual information at most ``H2(a / (a + b))``::

    0 <= JS(full) - JS(sketch) <= (a * log2((a + b) / a) + b * log2((a + b) / b)) / 2

(:func:`sketch_error_bound`, checked against the full JS in tests/test_label_words.py). For a
group that kept its shape (b about a = 0.01) that is at most 0.01 bit; when junk words take a
share b of the group the bound grows towards 0.04 bit, but the rest bucket then carries b and
the value itself is already large: a group half of whose words are new and disjoint from the
sketch's has JS 0.311 over all words and at least 0.276 on the sketch (0.283 measured).
The comparison costs O(words of the sketch x K), whatever the vocabulary's size: under 1 ms
for eight labelled groups of the invented demo (about 400 words each; 5-10 kB of JSON).

A label is *stale* when the value passes the model's ``label_stale_threshold``
(:class:`state.options.ModelOptions`, 0.25 bit; why that value: see there).
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import dataclass
from typing import Any

import numpy as np

from mixture.kernels import js_divergence
from mixture.stats import MixtureState

SKETCH_COVERAGE = 0.99  # share of a group's probability mass kept word by word
SKETCH_MAX_WORDS = 2000  # at most this many words (about 40 kB of JSON per label)


@dataclass(frozen=True)
class WordSketch:
    """A group's word distribution when its label was set, compacted.

    Attributes
    ----------
    words : tuple of str
        The most probable words, most probable first.
    prob : tuple of float
        Their probabilities (6 significant digits).
    rest : float
        The mass of every other word (``1 - sum(prob)``).
    version : int
        The model version the distribution was read from.
    recorded : float
        Unix time it was recorded (names this sketch: an alert is raised once per sketch).
    """

    words: tuple[str, ...]
    prob: tuple[float, ...]
    rest: float
    version: int
    recorded: float

    def to_dict(self) -> dict[str, Any]:
        """JSON-able form (the value of the ``label_words`` hash field)."""
        return {
            "words": list(self.words),
            "prob": list(self.prob),
            "rest": self.rest,
            "version": self.version,
            "recorded": self.recorded,
        }

    def to_json(self) -> str:
        """Compact JSON (separators without spaces, words as they are)."""
        return json.dumps(self.to_dict(), separators=(",", ":"), ensure_ascii=False)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> WordSketch:
        """Read back what :meth:`to_dict` wrote."""
        return cls(
            tuple(str(w) for w in data["words"]),
            tuple(float(p) for p in data["prob"]),
            float(data["rest"]),
            int(data["version"]),
            float(data["recorded"]),
        )


def group_word_probabilities(state: MixtureState, position: int) -> tuple[np.ndarray, np.ndarray]:
    """Active word ids and their smoothed probabilities in the group at ``position``."""
    active = state.vocabulary.active_ids()
    if active.size == 0:
        return active, np.zeros(0)
    prob = np.exp(state.log_word_prob_rows(active)[:, position])
    return active, prob


def sketch_group(
    state: MixtureState,
    group_id: int,
    version: int,
    recorded: float,
    *,
    coverage: float = SKETCH_COVERAGE,
    max_words: int = SKETCH_MAX_WORDS,
) -> WordSketch | None:
    """The compact word distribution of one group now (None when the state has no such
    group or no words).

    Parameters
    ----------
    state : MixtureState
        The state the group's words are read from (the one routing answers with).
    group_id : int
        Stable group id.
    version : int
        The model version of ``state`` (recorded in the sketch).
    recorded : float
        Unix time to record.
    coverage : float
        Keep words until they cover this share of the mass.
    max_words : int
        ... but at most this many.

    Returns
    -------
    WordSketch or None
    """
    ids = _group_ids(state)
    if group_id not in ids:
        return None
    word_ids, prob = group_word_probabilities(state, ids.index(group_id))
    total = float(prob.sum())
    if word_ids.size == 0 or not total > 0:
        return None
    prob = prob / total
    order = np.lexsort((word_ids, -prob))  # most probable first; ties by id, deterministic
    cumulative = np.cumsum(prob[order])
    keep = min(int(np.searchsorted(cumulative, coverage)) + 1, max_words, order.size)
    chosen = order[:keep]
    kept = [float(f"{p:.6g}") for p in prob[chosen]]
    vocabulary = state.vocabulary
    words = tuple(vocabulary.word(int(word_ids[i])) for i in chosen)
    rest = max(0.0, 1.0 - math.fsum(kept))
    return WordSketch(words, tuple(kept), float(f"{rest:.6g}"), int(version), float(recorded))


def sketch_divergence(sketch: WordSketch, state: MixtureState, group_id: int) -> float | None:
    """JS divergence in bits between the group's words now and the sketch, on the sketch's
    partition (its words, then one bucket for every other word); None when the state has no
    group ``group_id``. O(words of the sketch x K), no pass over the vocabulary."""
    p, q = sketch_partition(sketch, state, group_id)
    if p is None or q is None:
        return None
    return float(js_divergence(p, q))


def sketch_partition(
    sketch: WordSketch, state: MixtureState, group_id: int
) -> tuple[np.ndarray | None, np.ndarray | None]:
    """The sketch and the group now on the sketch's partition: two arrays of
    ``len(words) + 1`` probabilities (the last is the rest bucket), or (None, None)."""
    ids = _group_ids(state)
    if group_id not in ids:
        return None, None
    position = ids.index(group_id)
    word_ids = state.vocabulary.lookup_many(sketch.words)
    now = np.zeros(len(sketch.words) + 1)
    known = word_ids >= 0  # a word retired or compacted away since has probability 0 now
    if known.any() and state.vocabulary.n_active:
        now[:-1][known] = np.exp(state.log_word_prob_rows(word_ids[known])[:, position])
    now[-1] = max(0.0, 1.0 - math.fsum(now[:-1].tolist()))
    then = np.array([*sketch.prob, sketch.rest], dtype=np.float64)
    if not then.sum() > 0 or not now.sum() > 0:
        return None, None
    return then, now


def sketch_error_bound(rest_then: float, rest_now: float) -> float:
    """The most the sketch's JS can fall short of the JS over every word, in bits.

    ``(a log2((a + b) / a) + b log2((a + b) / b)) / 2`` for rest masses a (the sketch) and b
    (the group now, on the sketch's partition): see the module docstring.
    """
    a, b = max(rest_then, 0.0), max(rest_now, 0.0)
    s = a + b
    if s <= 0:
        return 0.0
    total = 0.0
    for x in (a, b):
        if x > 0:
            total += x * math.log2(s / x)
    return 0.5 * total


def label_divergences(
    sketches: dict[int, WordSketch], state: MixtureState | None
) -> dict[int, float]:
    """Divergence of every sketched group still present in ``state`` (by group id)."""
    if state is None:
        return {}
    out: dict[int, float] = {}
    for group, sketch in sketches.items():
        value = sketch_divergence(sketch, state, group)
        if value is not None:
            out[group] = value
    return out


def parse_sketches(raw: dict[bytes | str, bytes | str]) -> dict[int, WordSketch]:
    """The ``label_words`` hash as read (field = group id) to sketches by group id; a field
    that does not parse is left out (a label without a sketch is never stale)."""
    out: dict[int, WordSketch] = {}
    for field_name, value in raw.items():
        try:
            out[int(field_name)] = WordSketch.from_dict(json.loads(value))
        except (ValueError, KeyError, TypeError):
            continue
    return dict(sorted(out.items()))


def _group_ids(state: MixtureState) -> list[int]:
    ids = state.group_ids if state.group_ids is not None else np.arange(state.n_groups)
    return [int(g) for g in ids]


ALERT_KIND = "label-stale"
ALERTED_KEY = "label_stale_alerted"  # state metadata: group id -> sketch stamp alerted on


def routing_state_of(state: MixtureState) -> MixtureState | None:
    """The state routing answers with: the state once warmed up, else its provisional fit."""
    return state if state.warmed_up else state.provisional


class LabelWatch:
    """The worker's side of stale labels: one ``label-stale`` alert per recorded sketch.

    At each checkpoint :meth:`alerts` compares every labelled group's words with the sketch
    its label was given to (one GET of the label counter per checkpoint; the sketches are
    re-read only when it moved) and returns an alert for each group that passed
    ``label_stale_threshold`` and was not alerted on for that sketch yet. Which sketch was
    alerted on (its ``recorded`` stamp) rides in the state's metadata, so the memory is
    checkpointed with the alert in one MULTI (exactly once under crashes) and a label set
    anew (a new sketch) can alert again.

    Parameters
    ----------
    store : object
        A ``state.store.ModelStore`` (``labels_version()``, ``label_sketches()``).
    """

    def __init__(self, store: Any) -> None:
        self.store = store
        self._labels_version: int | None = None
        self._sketches: dict[int, WordSketch] = {}

    def sketches(self) -> dict[int, WordSketch]:
        """The recorded sketches (re-read when the label counter moved)."""
        version = int(self.store.labels_version())
        if version != self._labels_version:
            self._sketches = self.store.label_sketches()
            self._labels_version = version
        return self._sketches

    def alerts(self, state: MixtureState, version: int, threshold: float) -> list[dict[str, Any]]:
        """Alerts for labels that became stale (marking them in ``state.metadata``).

        Parameters
        ----------
        state : MixtureState
            The state about to be checkpointed.
        version : int
            The version the checkpoint will write.
        threshold : float
            ``label_stale_threshold`` (bits).
        """
        routing = routing_state_of(state)
        sketches = self.sketches()
        alerted = {str(k): v for k, v in dict(state.metadata.get(ALERTED_KEY) or {}).items()}
        # forget the marks of labels cleared since (a sketch of theirs no longer exists)
        alerted = {g: v for g, v in alerted.items() if int(g) in sketches}
        out: list[dict[str, Any]] = []
        for group, value in label_divergences(sketches, routing).items():
            sketch = sketches[group]
            if value <= threshold or alerted.get(str(group)) == sketch.recorded:
                continue
            alerted[str(group)] = sketch.recorded
            out.append(
                {
                    "time": time.time(),
                    "kind": ALERT_KIND,
                    "reason": (
                        f"group {group}: its words moved {value:.4f} bits (JS) from those its "
                        f"label was given to at version {sketch.version} > {threshold}; "
                        "check the label, then set it again or PATCH refresh"
                    ),
                    "value": value,
                    "threshold": threshold,
                    "version": version,
                }
            )
        if alerted or ALERTED_KEY in state.metadata:
            state.metadata[ALERTED_KEY] = alerted
        return out
