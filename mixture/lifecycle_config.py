"""Settings of the group lifecycle: novelty, birth, merge and retirement.

Nested in :class:`mixture.config.MixtureConfig` as ``lifecycle`` (like the tokenizer's). Each
threshold is stated with the principle behind it; see mixture.lifecycle for the decisions.

Defaults and where they come from
---------------------------------
enabled = False
    The layers above the model core (checkpoint events, labels, the API) still index groups by
    position with a fixed count; the lifecycle is switched on per model until they follow.
max_groups = None
    The ceiling on births; None means twice ``n_groups`` (the range the benchmarks ask a model
    with an unknown number of topics to land in). When more buffer components pass the birth
    test than the ceiling leaves room for, each further component (strongest first) is born
    if, together with the merge of the pair of groups that loses least evidence (ln BF of one
    Dirichlet-multinomial group against two on the pair's statistics,
    mixture.lifecycle.cheapest_merge), it still passes ``birth_log_bayes_factor``. The
    principle: at a fixed number of groups, a birth and a merge are one move of the model,
    and the sum of their log Bayes factors is the evidence for it, held to the birth's own
    standard; a merge keeps both groups' documents, where a retirement forgets them. Failing
    that, groups whose posterior share stayed under ``retire_share`` for at least one whole
    window give their places (the quietest first; a retirement otherwise waits
    ``retire_windows``): a ceiling spent on a topic that stopped while a documented new one
    waits is the worse use of it. Measured on BBC drift (seeds 0-9, bench/README.md), the
    merges against the quiet groups' retirement alone: arrival / end NMI 0.473 / 0.541 ->
    0.512 / 0.694 (K given), 0.468 / 0.582 -> 0.478 / 0.625 (from 2 groups); WordNet
    unchanged (the ceiling does not bind there).
check_every_documents = 1000, check_every_tokens = None
    Decisions run when the evidence window (of the retirement, overlap and novelty evidence)
    holds this many learned documents, or earlier, once its documents hold the token cadence:
    None means the model's ``warmup_tokens`` (40,000). The principle: a decision rests on as
    much text as the model itself takes to be enough to fit its starting groups (the warm-up,
    stated in tokens on the project's sweep), so long documents are judged as often as their
    evidence allows and short ones no more often than every 1,000 (the document cap, a bounded
    cadence). On WordNet glosses (about 10 tokens) the cap binds and nothing changes; on BBC
    articles (about 220 tokens) a window is about 180 articles instead of 1,000, i.e. about 12
    decisions in the 2,127-article stream instead of 2. Measured on the drift streams of
    bench_quality, seeds 0-2 (bench/README.md): BBC end NMI 0.443 -> 0.492 (K given) and
    0.378 -> 0.603 (from 2 groups), WordNet unchanged. 0 keeps the documents-only cadence.
novelty_z = 3.0
    A document is novel when its per-token log-likelihood under its MAP group lies more than
    this many standard deviations below the group's recent mean. Under a normal approximation
    a one-sided 3-sigma event has probability 0.13%, so a stationary stream sends about one
    document in 740 to the buffer; the birth test has to reject such strays, not the filter.
novel_unknown_share = 0.5
    A document is also novel when more than this share of its tokens are words the model had
    never seen before this batch ("mostly unknown words").
typicality_half_life = 1000.0, typicality_min_documents = 30
    The typicality of a group is an exponentially weighted mean and variance (a document's
    weight halves after this many further documents of the group); a group is judged only once
    it holds 30 documents' worth, the usual size at which a sample variance is taken as stable
    (common practice, no source).
buffer_documents = 500, buffer_horizon_documents = 5000
    The novelty buffer keeps at most this many documents, and none older than the horizon (a
    new topic shows itself within it; older strays would only feed spurious clusters).
birth_min_documents = 20
    A new group needs at least this many founding documents (a handful of repeats is not a
    topic; rule of thumb, no source).
birth_log_bayes_factor = 5.0
    A birth needs ln BF > 5 for "one new Dirichlet-multinomial group" against "each from the
    mixture as it stood when the document arrived": Kass and Raftery (1995) call 2 ln BF > 10
    very strong evidence. Several components of one buffer may pass at one decision; each is
    born (up to the ceiling). How many components the buffer holds is itself chosen by
    evidence, with no setting: the local fit's components (at most four) are joined while one
    Dirichlet-multinomial group explains a pair better than two (ln BF > 0, the same closed
    form with the assignments and a BIC penalty for the second weight;
    mixture.lifecycle.join_components). Measured on the drift streams (seeds 0-2,
    bench/README.md): BBC end NMI 0.492 -> 0.562 (K given), 0.603 -> 0.632 (from 2); WordNet
    -0.004 to +0.002. A pair is joined only when one new group is the most probable of the
    four hypotheses for it (two new groups, one, only the first part new, only the second):
    the join's closed form compares new groups with each other only, and on short glosses
    one new group explains a new topic's component and a component of strays the mixture
    explains better than two, so the union was born or rejected as one, mostly rejected
    (branch ``splits``, bench/README.md; means over seeds, arrival / end / live):
    WordNet 45 from 2 groups 0.235 / 0.253 / 16.0 -> 0.238 / 0.262 / 18.7, K given 0.237 /
    0.250 / 30.7 -> 0.239 / 0.254 / 31.0; WordNet 26 from 2 0.268 / 0.315 / 15.7 -> 0.274 /
    0.322 / 19.0, K given 0.290 / 0.330 / 32.0 -> 0.291 / 0.334 / 32.7; BBC (seeds 0-9)
    unchanged at K given, end 0.582 -> 0.585 from 2; the shuffled null stream unchanged (no
    birth).
warm_up_splits = False
    The warm-up fit always keeps only the groups its documents support: its groups are joined
    while one Dirichlet-multinomial group explains a pair better than two (ln BF > 0, the
    buffer's join; mixture.warm_groups), so ``n_groups`` is the most the model starts with and
    the slots its warm-up does not support stay free for births. Measured on the drift
    streams, seeds 0-2 (bench/README.md): end NMI +0.009 (WordNet 26, K given), +0.006
    (WordNet 45, K given; arrival -0.006), unchanged from 2 groups and on BBC (no join
    passes: BBC's warm-up is all business, and its sub-topics are distinct groups by this
    test); the shuffled null stream unchanged (end 0.344 -> 0.345). With this on, the warm-up
    fit's groups are also split first, while a two-component cut of a group passes the birth
    test's threshold (``birth_log_bayes_factor``, both halves at least
    ``birth_min_documents``), up to the ceiling. Off by default because on long documents
    every sub-topic of the warm-up's topic passes (BBC from 2 groups: halves of 20-42
    business articles at ln BF 780-1,900), the sub-topics hold the ceiling's slots and then
    retire when the topic stops: BBC end NMI -0.155 (from 2) and -0.110 (K given). On short
    glosses it helps a model started small: WordNet 26 from 2 groups end +0.009 and live
    groups 13.7 -> 24.7, WordNet 45 live 15.7 -> 21.0 (end +0.001, arrival -0.006).
birth_check_novel_documents = None
    Besides at the window's end, the birth test runs as soon as the novelty buffer holds this
    many documents that arrived since the last test (None: ``birth_min_documents``; 0: only
    at the window's end). The principle: a birth rests on the buffer's evidence, not on the
    window's, and a component needs ``birth_min_documents`` founders, so that many new novel
    documents is the least new evidence that can make a new group; merges and retirements
    keep the window. No test runs between windows before the first window after the warm-up
    closes: until then the typicality is the warm-up fit's in-sample score of its own
    documents, so the buffer also holds the fit's sampling error (on BBC drift a birth of 26
    business articles 76 articles after the warm-up, a sub-topic, became a group that took
    every later topic and ended the novelty: end NMI 0.564 -> 0.500 at K given, 0.637 ->
    0.496 from 2); the price is that a topic starting at the warm-up's end waits for the
    first window. The cost is bounded by the buffer: one local fit per test, at most one a
    unit; on the WordNet 45 drift stream (K given, seed 0) 106 tests instead of 29 and
    learning 7.7 CPU s instead of 5.8 (lifecycle off 4.9: kept 0.64 instead of 0.85), on
    WordNet 26 3.8 s instead of 2.8 (off 2.5: kept 0.67 instead of 0.90); the stationary
    stream of bench_worker's lifecycle pair is unchanged.
    Measured (seeds 0-2, bench/README.md; decisions on BBC already close with every unit of
    256 articles, so only WordNet, whose windows are 1,000 glosses, changes): end NMI
    WordNet 26 0.316 -> 0.331 (K given) and 0.313 -> 0.315 (from 2), WordNet 45 0.242 ->
    0.249 and 0.250 -> 0.253; arrival +0.008, -0.004, +0.008 and +0.006.
merge_overlap = 0.5
    Two groups merge only when at least half of the smaller group's posterior mass in the last
    window is shared with the other (overlap coefficient of the soft memberships): for most of
    its documents the pair cannot be told apart.
merge_divergence = 0.1
    ... and when their word distributions are close: squared Jensen-Shannon distance in bits
    below 0.1, i.e. one word tells less than a tenth of a bit about which of the two groups it
    came from (JS is that mutual information under an equal mix). A guard against merging two
    distinct topics that share ambiguous short messages (rule of thumb, no source).
forget_by_own_traffic = True
    Stepwise EM shrinks every group's statistics by (1 - eta) per unit, whether or not the
    group received any of the unit's documents, so on a stream whose topics move, a group
    whose topic stopped fades and the next topic takes it over. With this on, a group's word
    statistics shrink by (1 - eta) ** u, u its share of the unit over its mixture weight
    (capped at 1): forgetting counted in the group's own documents, as when each component
    keeps a running average of the documents it explains (per-component step sizes; the
    weights still follow the whole stream, so retirement is unchanged). The cap: a group
    forgets no faster than the stream (without it, a surge into a faded group speeds up the
    take-over, and every drift stream scored lower). Measured on the drift streams of
    bench_quality (bench/README.md): end NMI +0.005 to +0.03 on WordNet, BBC within its
    seed noise.
retire_share = 0.001, retire_windows = 2
    A group is retired when its posterior mass stayed below this share of the documents for
    this many whole windows in a row. With a 1000-document window that is under one document's
    worth per window; a live group with a 1% share expects 10 per window, and the Poisson
    chance of it falling to one or fewer twice running is about 2.5e-7. A window cut short by
    the token cadence holds fewer (long) documents, so the same two windows are weaker
    evidence there: at 180 documents a 1% group expects 1.8 a window and stays at zero twice
    running with chance about 0.03 (a known weakness; scaling ``retire_windows`` by the
    window's documents was not tried).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, fields
from typing import Any

from mixture.checks import check_float, check_int
from mixture.errors import ConfigError


@dataclass(frozen=True)
class LifecycleConfig:
    """How groups are born, merged and retired while the model learns.

    Parameters
    ----------
    enabled : bool
        Run the lifecycle in :class:`mixture.online.OnlineLearner`.
    max_groups : int or None
        Ceiling on the number of groups (None: twice the starting ``n_groups``).
    check_every_documents : int
        Cadence of the decisions and length of the evidence window, in documents (a cap).
    check_every_tokens : int or None
        The window also closes once its documents hold this many tokens (None: the model's
        ``warmup_tokens``; 0: documents only).
    novelty_z : float
        Standard deviations below a group's typicality that make a document novel.
    novel_unknown_share : float
        Share of never-seen tokens above which a document is novel.
    typicality_half_life : float
        Half-life, in a group's documents, of its typicality statistics.
    typicality_min_documents : int
        Documents' worth a group needs before its typicality judges anything.
    buffer_documents : int
        Capacity of the novelty buffer.
    buffer_horizon_documents : int
        Buffered documents older than this (in stream positions) are dropped.
    birth_min_documents : int
        Founding documents a birth needs.
    birth_log_bayes_factor : float
        Natural-log Bayes factor a birth needs.
    warm_up_splits : bool
        Also split the warm-up fit's groups by the birth test's Bayes factor (the joins always
        run; mixture.warm_groups).
    birth_check_novel_documents : int or None
        New buffered documents since the last birth test that start another one before the
        window closes (None: ``birth_min_documents``; 0: births only at the window's end).
    merge_overlap : float
        Posterior overlap coefficient a merge needs, in (0, 1].
    merge_divergence : float
        Squared JS distance (bits) under which two groups may merge, in (0, 1].
    retire_share : float
        Posterior share under which a group counts as quiet in a window, in [0, 1).
    retire_windows : int
        Whole quiet windows in a row before a retirement.
    forget_by_own_traffic : bool
        Word statistics forget in proportion to each group's own traffic.
    """

    enabled: bool = False
    max_groups: int | None = None
    check_every_documents: int = 1000
    check_every_tokens: int | None = None
    novelty_z: float = 3.0
    novel_unknown_share: float = 0.5
    typicality_half_life: float = 1000.0
    typicality_min_documents: int = 30
    buffer_documents: int = 500
    buffer_horizon_documents: int = 5000
    birth_min_documents: int = 20
    birth_log_bayes_factor: float = 5.0
    warm_up_splits: bool = False
    birth_check_novel_documents: int | None = None
    merge_overlap: float = 0.5
    merge_divergence: float = 0.1
    retire_share: float = 0.001
    retire_windows: int = 2
    forget_by_own_traffic: bool = True

    def __post_init__(self) -> None:
        if not isinstance(self.enabled, bool):
            raise ConfigError(f"lifecycle.enabled must be true or false; got {self.enabled!r}")
        if self.max_groups is not None:
            check_int(self, "max_groups", 1, 10_000, prefix="lifecycle.")
        check_int(self, "check_every_documents", 1, 100_000_000, prefix="lifecycle.")
        if self.check_every_tokens is not None:
            check_int(self, "check_every_tokens", 0, 1_000_000_000, prefix="lifecycle.")
        check_float(self, "novelty_z", 0.0, 100.0, prefix="lifecycle.")
        check_float(self, "novel_unknown_share", 0.0, 1.0, prefix="lifecycle.")
        check_float(self, "typicality_half_life", 1.0, 1e12, prefix="lifecycle.")
        check_int(self, "typicality_min_documents", 1, 1_000_000, prefix="lifecycle.")
        check_int(self, "buffer_documents", 1, 100_000, prefix="lifecycle.")
        check_int(self, "buffer_horizon_documents", 1, 1_000_000_000, prefix="lifecycle.")
        check_int(self, "birth_min_documents", 2, 100_000, prefix="lifecycle.")
        if self.birth_min_documents > self.buffer_documents:
            raise ConfigError(
                f"lifecycle.birth_min_documents ({self.birth_min_documents}) must not exceed "
                f"lifecycle.buffer_documents ({self.buffer_documents}): no birth could happen"
            )
        check_float(self, "birth_log_bayes_factor", 0.0, 1e9, prefix="lifecycle.")
        if not isinstance(self.warm_up_splits, bool):
            raise ConfigError(
                f"lifecycle.warm_up_splits must be true or false; got {self.warm_up_splits!r}"
            )
        if self.birth_check_novel_documents is not None:
            check_int(self, "birth_check_novel_documents", 0, 100_000, prefix="lifecycle.")
        check_float(self, "merge_overlap", 1e-9, 1.0, prefix="lifecycle.")
        check_float(self, "merge_divergence", 1e-9, 1.0, prefix="lifecycle.")
        check_float(self, "retire_share", 0.0, 0.999, prefix="lifecycle.")
        check_int(self, "retire_windows", 1, 1_000_000, prefix="lifecycle.")
        if not isinstance(self.forget_by_own_traffic, bool):
            raise ConfigError(
                "lifecycle.forget_by_own_traffic must be true or false; "
                f"got {self.forget_by_own_traffic!r}"
            )

    def ceiling(self, n_groups: int) -> int:
        """The effective ``max_groups`` for a model that starts with ``n_groups``."""
        return 2 * n_groups if self.max_groups is None else self.max_groups

    def birth_check_every(self) -> int:
        """New buffered documents that start a birth test between windows (0: never)."""
        if self.birth_check_novel_documents is None:
            return self.birth_min_documents
        return self.birth_check_novel_documents

    def window_tokens(self, warmup_tokens: int) -> int:
        """The token cadence: ``check_every_tokens``, or the warm-up's tokens when None (0: off)."""
        return warmup_tokens if self.check_every_tokens is None else self.check_every_tokens

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dict."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> LifecycleConfig:
        """Build from a dict; unknown keys and bad values raise ConfigError naming the field."""
        if not isinstance(data, dict):
            raise ConfigError("lifecycle must be a JSON object")
        unknown = sorted(set(data) - {f.name for f in fields(cls)})
        if unknown:
            raise ConfigError(f"unknown lifecycle field(s): {', '.join(unknown)}")
        return cls(**data)
