"""Model configuration: one validated, serialisable record.

Defaults and where they come from
---------------------------------
word_pseudocount = 0.1
    Additive (Lidstone) smoothing of each group's word distribution. Add-one smoothing gives
    every group V pseudo-tokens; with V in the tens of thousands that outweighs the real text of
    a small group and flattens the distributions that tell groups apart. 0.1 keeps every
    probability positive (no -inf for a word unseen in a group) while the pseudo-mass V * 0.1
    stays below the text of a group that holds a few hundred messages. Common practice, no
    single source; the corpus tests check it on two open corpora it was not tuned on.
weight_pseudocount = 1.0
    A symmetric Dirichlet(1 + 1) on the mixture weights, i.e. add-one on expected documents: a
    group that loses all its documents keeps a small positive weight, so it can be re-seeded
    rather than vanish with a log weight of -inf.
step_exponent = 0.7
    The stepwise EM step size is eta_k = (k + 2) ** -alpha. alpha must lie in (0.5, 1] for the
    Robbins-Monro conditions (sum eta = inf, sum eta^2 < inf); Liang and Klein (2009) report
    alpha in 0.5-0.7 with mini-batches in the hundreds as robust across their tasks.
annealing_steps = 60
    Deterministic annealing (Ueda and Nakano 1998) before plain EM: the likelihood is raised
    to a power that climbs geometrically from 1 / (mean document length) to 1 in this many
    steps. On long documents plain EM posteriors are hard from the first step and EM stays in
    the seeds' local optimum; on both open corpora of the tests, annealing raised the MAP
    objective reached from the same seeds (and the agreement with the reference labels).
warmup_tokens = 40_000, warmup_documents = 10_000 (a cap), provisional_documents = 100
    The warm-up's quality follows its tokens, not its documents: a sweep of the warm-up's share
    of two open corpora (bench.bench_quality, DEVELOPERS.md "Known gap") found that about
    40,000 tokens left a mean gap of 0.05 NMI or less against batch EM on both, whether they
    came as 177 news articles or 4,000 dictionary glosses. So the warm-up ends at the first
    document that brings the buffer to ``warmup_tokens`` tokens (about 100 articles of 400
    tokens), or at ``warmup_documents`` documents if that comes first: the document count is
    a CAP, so a stream of very short messages (4 tokens: 10,000 of them for 40k tokens) still
    ends its warm-up in a bounded number of messages, and configurations stored before the
    token rule (which name warmup_documents = 1000) keep a warm-up of at most 1000 documents.
    ``warmup_tokens = 0`` switches the token rule off (the warm-up is then warmup_documents
    documents, the rule before). Until the warm-up ends, a provisional fit of the buffer
    answers routing requests: at ``provisional_documents`` documents with tokens (100:
    common practice for "enough to say something", no source; the corpus test measures it),
    then at every doubling, so the refits cost O(final buffer) in all.
unlabelled_weight = 1.0, labelled_limit = 10_000
    lambda of EM-lambda (Nigam, McCallum, Thrun and Mitchell 2000): each unlabelled document
    weighs lambda in the M-step, each labelled document (a correction or an example message)
    weighs 1. lambda = 1 is their basic EM, every document counting once: the principled
    default, not tuned to any corpus (bench/README.md measures 0.1 and 0.3 too). The limit
    bounds the labelled documents one state holds (each is a row of counts kept in the state;
    10,000 rows of a few hundred words are a few megabytes; common practice, no source).
half_life_documents = None
    With a floor eta_min on the step size the statistics forget exponentially: a document's
    weight halves after h = batch_size * ln(0.5) / ln(1 - eta_min) documents. We let the user
    state h (a number of documents, which people can reason about) and derive eta_min.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field, fields
from typing import Any

from mixture.checks import check_float as _check_float
from mixture.checks import check_int as _check_int
from mixture.errors import ConfigError
from mixture.lifecycle_config import LifecycleConfig
from mixture.tokenizer import TokenizerConfig


@dataclass(frozen=True)
class MixtureConfig:
    """Configuration of one mixture of unigram language models.

    Parameters
    ----------
    n_groups : int
        Number of mixture components K.
    vocabulary_limit : int
        Most active words kept; past it the rarest words (by expected count) are retired.
    word_pseudocount : float
        Additive smoothing of the word distributions (> 0: with 0, a group that has never
        seen a word gives it probability 0, so an emptied group has no distribution at all
        and a document of words each unseen in some group has no finite posterior).
    weight_pseudocount : float
        Symmetric Dirichlet pseudo-count on the mixture weights (>= 0).
    step_exponent : float
        alpha of the stepwise EM step size eta_k = (k + 2) ** -alpha, in (0.5, 1].
    batch_size : int
        Mini-batch size of stepwise EM.
    half_life_documents : float or None
        When set, floors eta so that old documents' influence halves every this many documents.
    warmup_tokens : int
        Tokens buffered and fitted with batch EM before stepwise learning starts (0: no token
        rule, the warm-up is ``warmup_documents`` documents).
    warmup_documents : int
        Cap of the warm-up in documents with tokens: it ends at the first of ``warmup_tokens``
        tokens and this many documents (and never before ``n_groups`` documents).
    provisional_documents : int
        Documents with tokens after which a provisional fit of the warm-up buffer answers
        routing requests, refitted at every doubling until the warm-up ends (0: none).
    n_restarts, max_iter, tolerance
        Batch EM: independent seeded runs (best MAP objective wins), iterations per run, and
        the relative change of the objective below which a run has converged.
    annealing_steps : int
        Tempered E-steps at the start of each batch EM run (0 switches annealing off).
    unlabelled_weight : float
        lambda of EM-lambda (Nigam et al. 2000): the weight of each unlabelled document in
        the M-step, in (0, 1]; labelled documents weigh 1.
    labelled_limit : int
        Most labelled documents (corrections and examples) a state holds (>= 0).
    tokenizer : TokenizerConfig
        How text becomes tokens.
    lifecycle : LifecycleConfig
        Births, merges and retirements of groups; ``n_groups`` is then the starting count.
    """

    n_groups: int = 8
    vocabulary_limit: int = 100_000
    word_pseudocount: float = 0.1
    weight_pseudocount: float = 1.0
    step_exponent: float = 0.7
    batch_size: int = 256
    half_life_documents: float | None = None
    warmup_tokens: int = 40_000
    warmup_documents: int = 10_000
    provisional_documents: int = 100
    n_restarts: int = 4
    max_iter: int = 100
    tolerance: float = 1e-6
    annealing_steps: int = 60
    unlabelled_weight: float = 1.0
    labelled_limit: int = 10_000
    tokenizer: TokenizerConfig = field(default_factory=TokenizerConfig)
    lifecycle: LifecycleConfig = field(default_factory=LifecycleConfig)

    def __post_init__(self) -> None:
        _check_int(self, "n_groups", 1, 10_000)
        _check_int(self, "vocabulary_limit", 1, 50_000_000)
        _check_float(self, "word_pseudocount", 0.0, 1e6, low_open=True)
        _check_float(self, "weight_pseudocount", 0.0, 1e9)
        if not (
            isinstance(self.step_exponent, int | float)
            and math.isfinite(self.step_exponent)
            and 0.5 < self.step_exponent <= 1.0
        ):
            raise ConfigError(
                f"step_exponent must lie in (0.5, 1] so that stepwise EM converges "
                f"(sum of steps infinite, sum of squares finite); got {self.step_exponent!r}"
            )
        _check_int(self, "batch_size", 1, 1_000_000)
        if self.half_life_documents is not None:
            _check_float(self, "half_life_documents", 1.0, 1e15)
            if self.half_life_documents < self.batch_size:
                raise ConfigError(
                    f"half_life_documents ({self.half_life_documents}) must be at least "
                    f"batch_size ({self.batch_size}): a shorter memory forgets within one batch"
                )
        _check_int(self, "warmup_tokens", 0, 1_000_000_000)
        _check_int(self, "warmup_documents", 0, 10_000_000)
        _check_int(self, "provisional_documents", 0, 10_000_000)
        _check_int(self, "n_restarts", 1, 1000)
        _check_int(self, "max_iter", 1, 100_000)
        _check_float(self, "tolerance", 0.0, 1.0)
        _check_int(self, "annealing_steps", 0, 10_000)
        _check_float(self, "unlabelled_weight", 0.0, 1.0, low_open=True)
        _check_int(self, "labelled_limit", 0, 10_000_000)
        if not isinstance(self.tokenizer, TokenizerConfig):
            raise ConfigError("tokenizer must be a TokenizerConfig")
        if not isinstance(self.lifecycle, LifecycleConfig):
            raise ConfigError("lifecycle must be a LifecycleConfig")
        if self.lifecycle.ceiling(self.n_groups) < self.n_groups:
            raise ConfigError(
                f"lifecycle.max_groups ({self.lifecycle.max_groups}) is below n_groups "
                f"({self.n_groups}), the starting count"
            )

    @property
    def eta_floor(self) -> float:
        """Smallest stepwise step size, from ``half_life_documents`` (0 when unset)."""
        if self.half_life_documents is None:
            return 0.0
        batches = self.half_life_documents / self.batch_size
        return 1.0 - 0.5 ** (1.0 / batches)

    def step_size(self, step: float) -> float:
        """Stepwise EM step size eta_k of a whole unit of ``batch_size`` documents at progress
        ``step`` (units learned since the schedule's start; fractional after partial units)."""
        return max((step + 2.0) ** -self.step_exponent, self.eta_floor)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dict (the tokenizer config nested)."""
        out = asdict(self)
        out["tokenizer"] = self.tokenizer.to_dict()
        out["lifecycle"] = self.lifecycle.to_dict()
        return out

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> MixtureConfig:
        """Build from a dict; unknown keys and bad values raise ConfigError naming the field."""
        if not isinstance(data, dict):
            raise ConfigError("configuration must be a JSON object")
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(data) - known)
        if unknown:
            raise ConfigError(f"unknown configuration field(s): {', '.join(unknown)}")
        values = dict(data)
        if "tokenizer" in values and not isinstance(values["tokenizer"], TokenizerConfig):
            values["tokenizer"] = TokenizerConfig.from_dict(values["tokenizer"] or {})
        if "lifecycle" in values and not isinstance(values["lifecycle"], LifecycleConfig):
            values["lifecycle"] = LifecycleConfig.from_dict(values["lifecycle"] or {})
        return cls(**values)

    def replace(self, **changes: Any) -> MixtureConfig:
        """A copy with some fields changed (validated)."""
        values = {f.name: getattr(self, f.name) for f in fields(self)}
        values.update(changes)
        return MixtureConfig(**values)
