"""Restarts of batch EM: annealed and plain runs from the same seeds, and starved-group revival.

Why both kinds of run
---------------------
Deterministic annealing (Ueda and Nakano 1998) tempers the likelihood by a power tau that climbs
from 1 / (mean document length) to 1. At the first temperatures every document carries about
one token's worth of evidence, which is above the critical temperature of every cluster of a
corpus of short texts: all K seeds collapse onto a handful of coincident groups (measured: 150
seeds on an invented corpus of 150 small topics became 1 distinct group within six steps; 45
seeds on WordNet glosses became 7). Groups separate again only as tau passes their critical
temperatures (Rose 1998), and with many small topics those lie close to tau = 1, so at the end
of the schedule copies are still coincident; they then compete for the same documents and all
but one starve (92 of 150 groups under a tenth of the uniform weight, 5-8 of 45 on WordNet).
On long documents with few large topics the same schedule is what lifts EM out of the seeds'
first guess. Neither run is right for every corpus, so seedings are run both ways (plain from
half of them, :func:`seeding_kinds`) and the final MAP objective, the quantity EM maximises,
picks the result: no threshold on K, on the document length or on the corpus is involved.
With the revival below, the annealed run won on every corpus measured (BBC at K = 5, 20, 50,
WordNet at 6, 26, 45, the invented corpus at 150; bench/README.md).

Why revival is split-style, after annealing, and not undone by the objective
-------------------------------------------------------------------------------
A group is starved when it holds less than a tenth of the uniform share of documents
(``1 / (10 K)``; common practice, no source). Starved groups are revived only once tau is 1
(a group revived at a lower temperature collapses again, which is what made the earlier
re-seeding of single documents thrash: 49 re-seeds on WordNet at K = 45, and still 7 groups
starved) and only after EM has converged. Each starved group takes over one half of one of
the largest groups: the donor's documents are cut in two by the same seeding as the fit
(k-means++ with the model's divergence), and the half the donor explains worse per token goes
to the starved group, as in the split step of split-and-merge EM (Ueda, Nakano, Ghahramani
and Hinton 2000). EM then runs to convergence again; at most ``_REVIVAL_ROUNDS`` rounds.

The MAP objective alone would sometimes keep groups empty: the Dirichlet prior that the word
pseudo-count beta stands for gives ``beta * sum_w log theta_k(w)``, highest for a uniform
theta_k, so a group that leaves the uniform distribution pays about ``beta * V`` times the
drop in its log-probabilities of unseen words (about 700 nats at V = 21k, beta = 0.1, for a
group of 100 glosses), more than a few short texts gain in likelihood. The user asked for K
groups, so the fit maximises the objective over solutions that use them all: the revival is
kept, and among restarts the one with the fewest starved groups wins, then the highest MAP
objective.

Labelled documents (semi-supervised EM, Nigam, McCallum, Thrun and Mitchell 2000)
---------------------------------------------------------------------------------
With :class:`FixedResponsibilities` some rows of the corpus are labelled: their
responsibilities are one-hot on their group from the seeding on, re-fixed after every E-step
(at every temperature of the annealing and of plain EM) and never moved by a revival; each
unlabelled row weighs ``lambda`` in the M-step (EM-lambda). The objective is then::

    sum_labelled log(pi_y p(d | y)) + lambda * sum_unlabelled log sum_k pi_k p(d | k) + log prior

which EM with the labelled terms fixed never lowers (Dempster, Laird and Rubin 1977: the
labelled terms are complete-data terms, and a positive weight on a document's term keeps the
lower-bound argument). A group is starved when its weighted documents fall under
``STARVED_SHARE / K`` of the weighted total.

Two starts: the examples, and an unsupervised fit matched to them
------------------------------------------------------------------
Seeded from their examples, groups are shaped by the labels but can end up naming the wrong
clusters: one short example per class pulls its group too weakly against thousands of
unlabelled documents, and EM keeps the clusters in a partly permuted order (WordNet glosses,
one per class: 0.35 accuracy as labelled, 0.71 after Hungarian matching; bench/README.md). So
the labels also get to NAME clusters: the unlabelled documents are fitted without labels (the
same restarts), each seeded group takes the component that maximises the labelled documents'
log-likelihood of the whole assignment (:func:`match_components`, the Hungarian method), and
plain semi-supervised EM runs from those posteriors (annealing would undo the start), the
labelled rows fixed as in every run. The final semi-supervised MAP objective above picks between
the runs of both starts, by the same rank as among restarts: it is the quantity EM ascends, and
the data, the labels and lambda are the same in every start, so the objectives compare. When
labelled documents seed every group the seeding draws nothing; the examples start then runs one
seeding, the others would repeat it (revivals aside).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from mixture.config import MixtureConfig
from mixture.sweep import EMSweep

Seeder = Callable[[sp.csr_matrix, int, np.random.Generator], np.ndarray]
# Makes the sweep of one run: (counts, counts_t, K, active, word and weight pseudo-counts).
# EMSweep runs on this machine's cores; a distributed sweep (archive/) is an EMSweep whose
# E-step runs elsewhere.
SweepFactory = Callable[
    [sp.csr_matrix, sp.csr_matrix, int, np.ndarray | None, float, float], EMSweep
]

# A group under this share of the uniform weight 1 / K is starved (common practice, no source).
STARVED_SHARE = 0.1
# Revival rounds per run: each round is a split of donors plus EM to convergence.
_REVIVAL_ROUNDS = 3

ANNEALED = "annealed"
PLAIN = "plain"
# Starts of a run (RestartSummary.start).
SEEDS_START = "seeds"
MATCHED_START = "matched"


@dataclass
class RestartSummary:
    """One restart: how it started, what it reached, how many groups it revived.

    Attributes
    ----------
    seeding : int
        Index of the seeding (runs with the same index start from the same seed assignment).
    kind : str
        ``"annealed"`` or ``"plain"``.
    objective : float
        Final MAP objective (log-likelihood plus log prior), at temperature 1.
    n_iter : int
        EM iterations at temperature 1 (revival rounds included).
    reseeds : int
        Starved groups revived (each revival is a split of a large group).
    starved : int
        Groups still under ``STARVED_SHARE / K`` of the documents at the end.
    start : str
        Where the run's groups began: ``"seeds"`` (k-means++ seeding, with labelled documents
        seeding their groups from their examples) or ``"matched"`` (an unsupervised fit's
        components matched to the labelled classes; semi-supervised fits only).
    """

    seeding: int
    kind: str
    objective: float
    n_iter: int
    reseeds: int
    starved: int
    start: str = "seeds"

    def to_dict(self) -> dict:
        """Plain JSON-able dict."""
        return dict(self.__dict__)


@dataclass
class FitReport:
    """What a batch EM fit did.

    Attributes
    ----------
    objective_trace : list of float
        MAP objective before each M-step of the best run once annealing is over
        (non-decreasing between re-seeds).
    restart_objectives : list of float
        Final objective of every restart, in the order of ``restarts``.
    restarts : list of RestartSummary
        Every restart (seeding, annealed or plain, objective, re-seeds).
    best_restart : int
        Index into ``restarts`` of the run kept: the highest final MAP objective among the
        runs with the fewest starved groups (none, unless revival ran out of rounds).
    n_iter : int
        Iterations of the best run after annealing.
    converged : bool
        Whether the best run met the tolerance before max_iter.
    reseeded : list of int
        Groups of the best run revived because they were starved.
    reseed_iterations : list of int
        Iterations (indices into objective_trace) right after a re-seed.
    documents : int
        Unlabelled documents with at least one token that took part in the fit.
    labelled_documents : int
        Labelled documents with at least one token (fixed responsibilities).
    """

    objective_trace: list[float] = field(default_factory=list)
    restart_objectives: list[float] = field(default_factory=list)
    restarts: list[RestartSummary] = field(default_factory=list)
    best_restart: int = 0
    n_iter: int = 0
    converged: bool = False
    reseeded: list[int] = field(default_factory=list)
    reseed_iterations: list[int] = field(default_factory=list)
    documents: int = 0
    labelled_documents: int = 0

    @property
    def winner(self) -> RestartSummary | None:
        """The restart kept (None before any restart ran)."""
        return self.restarts[self.best_restart] if self.restarts else None


def restart_kinds(config: MixtureConfig) -> tuple[str, ...]:
    """Runs made from each seeding: annealed and plain, or plain only without annealing."""
    return (ANNEALED, PLAIN) if config.annealing_steps > 0 else (PLAIN,)


def seeding_kinds(config: MixtureConfig, kinds: tuple[str, ...]) -> list[tuple[str, ...]]:
    """The runs made from each seeding when ``kinds`` are asked for.

    One kind alone runs from every seeding. Both: annealed from every seeding, plain from the
    first half of them (at least one). On every corpus measured the annealed run with revival
    won (bench/README.md); the plain runs guard the corpora where annealing is the wrong path,
    and half of them keep the fit within 1.5 times the cost of annealed runs alone when a
    plain run costs as much as an annealed one (on short texts plain EM takes many more
    iterations to settle than EM after annealing).
    """
    if not (ANNEALED in kinds and PLAIN in kinds):
        return [tuple(kinds)] * config.n_restarts
    plain_seedings = max(1, config.n_restarts // 2)
    return [
        (ANNEALED, PLAIN) if seeding < plain_seedings else (ANNEALED,)
        for seeding in range(config.n_restarts)
    ]


def iteration_bound(
    config: MixtureConfig, kinds: tuple[str, ...], labelled: bool = False, seeds: bool = True
) -> int:
    """Upper bound on the progress calls of a fit (each EM iteration calls once).

    With ``labelled`` the fit also makes the matched start (:func:`fit_restarts`): an
    unsupervised fit with the same restarts, then one plain run; ``seeds`` False leaves out
    the runs from the seeds start.
    """
    per_run = {
        ANNEALED: config.annealing_steps + config.max_iter * (1 + _REVIVAL_ROUNDS),
        PLAIN: config.max_iter * (1 + _REVIVAL_ROUNDS),
    }
    runs = sum(per_run[kind] for runs in seeding_kinds(config, kinds) for kind in runs)
    matched = runs + per_run[PLAIN] if labelled else 0
    return (runs if seeds or not labelled else 0) + matched


@dataclass
class FixedResponsibilities:
    """Labelled rows of a batch fit and the weight of every row (semi-supervised EM).

    Attributes
    ----------
    rows : ndarray of int
        Row indices (into the fit's counts) of the labelled documents.
    groups : ndarray of int
        Array position of each labelled row's group.
    row_weight : ndarray of shape (n_docs,)
        ``unlabelled_weight`` for unlabelled rows, 1 for labelled rows.
    seeder : callable (counts, K, rng) -> assignment
        The seeding of the whole corpus that keeps the labelled rows in their groups (seeded
        groups start from their documents; mixture.em.seed_assignment_with_labels).
    """

    rows: np.ndarray
    groups: np.ndarray
    row_weight: np.ndarray
    seeder: Seeder

    def __post_init__(self) -> None:
        self.movable = np.ones(self.row_weight.shape[0], dtype=bool)
        self.movable[self.rows] = False
        self._local: tuple[int, sp.csr_matrix] | None = None

    def fix(self, resp: np.ndarray) -> np.ndarray:
        """Set the labelled rows one-hot on their groups, in place."""
        if self.rows.size:
            resp[self.rows] = 0.0
            resp[self.rows, self.groups] = 1.0
        return resp

    def weighted(self, resp: np.ndarray) -> np.ndarray:
        """Responsibilities times row weights: what the M-step sums."""
        return resp * self.row_weight[:, None]

    def objective(self, sweep: EMSweep, log_norm: np.ndarray) -> float:
        """The semi-supervised MAP objective of the sweep's parameters (module docstring)."""
        unlabelled = self.movable
        total = float(self.row_weight[unlabelled] @ log_norm[unlabelled])
        if self.rows.size:
            params = sweep.parameters()
            if self._local is None or self._local[0] != id(sweep):
                self._local = (id(sweep), sp.csr_matrix(sweep.counts[self.rows]))
            local = self._local[1]
            own = np.asarray(local @ params.log_word_prob)[np.arange(self.rows.size), self.groups]
            total += float(own.sum() + params.log_weights[self.groups].sum())
        return total + sweep.log_prior


@dataclass
class _Run:
    objective: float
    word_counts: np.ndarray
    doc_counts: np.ndarray
    report: FitReport
    summary: RestartSummary


def fit_restarts(
    counts: sp.csr_matrix,
    counts_t: sp.csr_matrix,
    lengths: np.ndarray,
    config: MixtureConfig,
    seed: int,
    active: np.ndarray | None,
    seeder: Seeder,
    kinds: tuple[str, ...],
    progress: Callable[[], None] | None,
    sweep_factory: SweepFactory = EMSweep,
    fixed: FixedResponsibilities | None = None,
    starts: tuple[str, ...] = (SEEDS_START, MATCHED_START),
) -> tuple[np.ndarray, np.ndarray, FitReport]:
    """Runs from every seeding as :func:`seeding_kinds` plans them; the highest final MAP
    objective among the runs with every group alive wins (fewest starved groups first, should
    none have all).

    Runs of one seeding start from the same seed assignment; revival draws from a generator
    of its own per run, so adding or removing a kind does not change the other kind's result.
    With ``fixed`` the labelled rows keep their groups throughout (module docstring) and the
    seeding is ``fixed.seeder``; the word and document counts returned are the weighted
    M-step's (``lambda`` times the unlabelled plus the labelled).

    With labelled rows one more run competes, the matched start (module docstring): the
    unlabelled rows are fitted without labels (these same restarts), the components are
    matched to the seeded groups by :func:`match_components`, and plain semi-supervised EM
    runs from there. It is ranked with the others by the same rule. ``starts`` names the
    starts to run (for comparisons; one of them alone is a fit of its own).
    """
    unknown = set(starts) - {SEEDS_START, MATCHED_START}
    if not starts or unknown:
        raise ValueError(f"starts must name 'seeds' and/or 'matched'; got {starts!r}")
    if fixed is None or not fixed.rows.size:
        starts = (SEEDS_START,)  # nothing to match without labelled rows
    best: _Run | None = None
    summaries: list[RestartSummary] = []
    root = np.random.default_rng(seed)
    plan = seeding_kinds(config, kinds)
    # When labelled documents seed every group the seeding draws nothing: every seeding is
    # the same assignment, so one is run (its revivals aside, the others would repeat it).
    seeded_all = fixed is not None and np.unique(fixed.groups).size == config.n_groups
    for seeding, child in enumerate(root.spawn(config.n_restarts)):
        if SEEDS_START not in starts or (seeded_all and seeding > 0):
            break
        # The seeding draws from the restart's own generator, as before plain runs were added
        # (an annealed run without starved groups is the fit of then); revival draws from
        # generators spawned off it, one per kind.
        assignment = (fixed.seeder if fixed is not None else seeder)(counts, config.n_groups, child)
        revival_rngs = dict(zip((ANNEALED, PLAIN), child.spawn(2), strict=True))
        for kind in plan[seeding]:
            run = _one_run(
                counts,
                counts_t,
                lengths,
                config,
                assignment,
                kind,
                revival_rngs[kind],
                active,
                seeder,
                progress,
                sweep_factory,
                fixed,
            )
            run.summary.seeding = seeding
            summaries.append(run.summary)
            if best is None or _rank(run) > _rank(best):
                best = run
                best.report.best_restart = len(summaries) - 1
    if MATCHED_START in starts:
        assert fixed is not None
        matched = _matched_run(
            counts,
            counts_t,
            lengths,
            config,
            seed,
            active,
            seeder,
            kinds,
            progress,
            sweep_factory,
            fixed,
        )
        matched.summary.seeding = config.n_restarts
        summaries.append(matched.summary)
        if best is None or _rank(matched) > _rank(best):
            best = matched
            best.report.best_restart = len(summaries) - 1
    assert best is not None
    report = best.report
    report.restarts = summaries
    report.restart_objectives = [summary.objective for summary in summaries]
    return best.word_counts, best.doc_counts, report


def match_components(log_joint: np.ndarray, groups: np.ndarray, n_groups: int) -> np.ndarray:
    """Which component of an unsupervised fit each group position takes.

    The labelled documents' log joints ``log pi_k + log p(d | k)`` are summed per labelled
    class; the Hungarian method (``scipy.optimize.linear_sum_assignment``, Kuhn 1955) gives
    every seeded group the component that maximises the labelled log-likelihood of the whole
    assignment (one component per group). Groups no labelled document names take the
    remaining components in their order.

    Parameters
    ----------
    log_joint : ndarray of shape (L, K)
        Labelled documents' log joints under the unsupervised fit.
    groups : ndarray of shape (L,) of int
        Each labelled document's group position.
    n_groups : int

    Returns
    -------
    ndarray of shape (K,) of int
        ``order[g]`` is the component group position ``g`` starts from (a permutation).
    """
    from scipy.optimize import linear_sum_assignment

    seeded = np.unique(groups)
    score = np.zeros((seeded.size, n_groups))
    for i, group in enumerate(seeded):
        score[i] = log_joint[groups == group].sum(axis=0)
    _, columns = linear_sum_assignment(score, maximize=True)
    order = np.full(n_groups, -1, dtype=np.int64)
    order[seeded] = columns
    order[order < 0] = np.setdiff1d(np.arange(n_groups), columns)
    return order


def _matched_run(
    counts: sp.csr_matrix,
    counts_t: sp.csr_matrix,
    lengths: np.ndarray,
    config: MixtureConfig,
    seed: int,
    active: np.ndarray | None,
    seeder: Seeder,
    kinds: tuple[str, ...],
    progress: Callable[[], None] | None,
    sweep_factory: SweepFactory,
    fixed: FixedResponsibilities,
) -> _Run:
    """The matched start: an unsupervised fit of the unlabelled rows (the same restarts, on
    this machine's cores), its components matched to the labelled classes, then plain
    semi-supervised EM from there (with ``sweep_factory``)."""
    from mixture.stats import derive_parameters

    unlabelled = np.flatnonzero(fixed.movable)
    if unlabelled.size < config.n_groups:
        # Too few unlabelled rows for an unsupervised fit of K groups: start from the labels'
        # own fit instead (the seeded start, run plain).
        start = None
    else:
        part = sp.csr_matrix(counts[unlabelled])
        word_counts, doc_counts, _ = fit_restarts(
            part,
            part.T.tocsr(),
            lengths[unlabelled],
            config,
            seed,
            active,
            seeder,
            kinds,
            progress,
            # On this machine's cores: the start is a means, and every sweep the factory makes
            # is then one of the semi-supervised fit (labelled rows one-hot, rows weighted).
            EMSweep,
        )
        params = derive_parameters(
            word_counts, doc_counts, active, config.word_pseudocount, config.weight_pseudocount
        )
        log_joint = np.asarray(counts @ params.log_word_prob) + params.log_weights
        order = match_components(log_joint[fixed.rows], fixed.groups, config.n_groups)
        start = log_joint[:, order]
        start -= start.max(axis=1, keepdims=True)
        np.exp(start, out=start)
        start /= start.sum(axis=1, keepdims=True)
    assignment = np.zeros(counts.shape[0], dtype=np.int64)
    if start is None:
        assignment = fixed.seeder(counts, config.n_groups, np.random.default_rng(seed))
    run = _one_run(
        counts,
        counts_t,
        lengths,
        config,
        assignment,
        PLAIN,
        np.random.default_rng([seed, config.n_restarts]),
        active,
        seeder,
        progress,
        sweep_factory,
        fixed,
        start_resp=start,
    )
    run.summary.start = MATCHED_START
    return run


def _rank(run: _Run) -> tuple[int, float]:
    """Runs with fewer starved groups first, then the higher MAP objective."""
    return (-run.summary.starved, run.objective)


def _one_run(
    counts: sp.csr_matrix,
    counts_t: sp.csr_matrix,
    lengths: np.ndarray,
    config: MixtureConfig,
    assignment: np.ndarray,
    kind: str,
    rng: np.random.Generator,
    active: np.ndarray | None,
    seeder: Seeder,
    progress: Callable[[], None] | None,
    sweep_factory: SweepFactory = EMSweep,
    fixed: FixedResponsibilities | None = None,
    start_resp: np.ndarray | None = None,
) -> _Run:
    """One run from a hard ``assignment``, or from soft responsibilities ``start_resp``
    (shape (n_docs, K), the matched start) when given."""
    n_docs = counts.shape[0]
    k = config.n_groups
    sweep = sweep_factory(
        counts, counts_t, k, active, config.word_pseudocount, config.weight_pseudocount
    )
    if start_resp is not None:
        resp = np.array(start_resp, dtype=np.float64)
    else:
        resp = np.zeros((n_docs, k))
        resp[np.arange(n_docs), assignment] = 1.0
    if fixed is not None:
        fixed.fix(resp)
    _m_step(sweep, resp, fixed, after_e_step=False)
    report = FitReport(documents=n_docs)
    if fixed is not None:
        report.documents = int(fixed.movable.sum())
        report.labelled_documents = int(fixed.rows.size)

    # Deterministic annealing (Ueda and Nakano 1998): the E-step raises the likelihood to a
    # power tau that climbs geometrically from 1 / (mean document length) to 1. At the start
    # a document's tempered evidence is about one token's worth, so responsibilities are soft
    # and groups can trade documents; hard, length-driven posteriors would freeze the seeds'
    # first guess (the local optimum plain EM falls into on long documents).
    if kind == ANNEALED and config.annealing_steps > 0:
        start = 1.0 / max(float(lengths.mean()), 1.0)
        for tau in np.geomspace(start, 1.0, config.annealing_steps + 1)[:-1]:
            resp, _ = sweep.e_step(float(tau))
            if progress is not None:
                progress()
            _m_step(sweep, resp, fixed)

    objective, resp = _converge(sweep, config, report, progress, fixed)
    mass = n_docs if fixed is None else float(fixed.row_weight.sum())
    floor = STARVED_SHARE * mass / k
    reseeds = 0
    for _ in range(_REVIVAL_ROUNDS):
        starved = np.flatnonzero(sweep.doc_counts < floor)
        if starved.size == 0:
            break
        movable = None if fixed is None else fixed.movable
        revived = _split_donors(sweep, resp, starved, lengths, seeder, rng, movable)
        if not revived:
            break
        reseeds += len(revived)
        report.reseeded.extend(revived)
        _m_step(sweep, resp, fixed, after_e_step=False)
        report.reseed_iterations.append(len(report.objective_trace))
        objective, resp = _converge(sweep, config, report, progress, fixed)

    doc_counts = sweep.doc_counts.copy()
    summary = RestartSummary(
        seeding=0,
        kind=kind,
        objective=objective,
        n_iter=report.n_iter,
        reseeds=reseeds,
        starved=int(np.count_nonzero(doc_counts < floor)),
    )
    return _Run(objective, sweep.word_counts(), doc_counts, report, summary)


def _m_step(
    sweep: EMSweep,
    resp: np.ndarray,
    fixed: FixedResponsibilities | None,
    *,
    after_e_step: bool = True,
) -> None:
    """The M-step; with labelled rows from the fixed, weighted responsibilities (``resp`` is
    fixed in place first)."""
    if fixed is None:
        if after_e_step:
            sweep.m_step_after_e_step(resp)
        else:
            sweep.m_step(resp)
        return
    # Not m_step_after_e_step: a distributed sweep's reduced statistics know neither the
    # fixed rows nor the weights.
    sweep.m_step(fixed.weighted(fixed.fix(resp)))


def _converge(
    sweep: EMSweep,
    config: MixtureConfig,
    report: FitReport,
    progress: Callable[[], None] | None,
    fixed: FixedResponsibilities | None = None,
) -> tuple[float, np.ndarray]:
    """Plain EM from the sweep's parameters until the objective settles or max_iter.

    Returns the objective of the parameters of the last E-step and its responsibilities.
    After a break on convergence the sweep's statistics are those parameters' own; after
    max_iter they are one M-step further (EM only raises the objective).
    """
    previous = -np.inf
    objective = -np.inf
    resp = np.empty((0, 0))
    for _ in range(config.max_iter):
        resp, log_norm = sweep.e_step()
        if fixed is None:
            objective = float(log_norm.sum()) + sweep.log_prior
        else:
            fixed.fix(resp)
            objective = fixed.objective(sweep, log_norm)
        report.objective_trace.append(objective)
        report.n_iter += 1
        if progress is not None:
            progress()
        if np.isfinite(previous) and abs(objective - previous) <= config.tolerance * abs(objective):
            report.converged = True
            return objective, resp
        previous = objective
        _m_step(sweep, resp, fixed)
    report.converged = False
    return objective, resp


def _split_donors(
    sweep: EMSweep,
    resp: np.ndarray,
    starved: np.ndarray,
    lengths: np.ndarray,
    seeder: Seeder,
    rng: np.random.Generator,
    movable: np.ndarray | None = None,
) -> list[int]:
    """Give each starved group the worse-explained half of one of the largest groups.

    ``resp`` is changed in place (hard assignments for the moved documents). Returns the
    groups revived (fewer than the starved ones when donors run out). Only ``movable`` rows
    (the unlabelled ones; all by default) are moved: a labelled document keeps its group.
    """
    counts = sweep.counts
    owner = resp.argmax(axis=1)
    if movable is not None:
        owner = np.where(movable, owner, -1)
    starved_set = set(int(g) for g in starved)
    donors = [int(g) for g in np.argsort(-sweep.doc_counts) if int(g) not in starved_set]
    log_word_prob = sweep.parameters().log_word_prob
    revived: list[int] = []
    for group, donor in zip(starved, donors, strict=False):
        members = np.flatnonzero(owner == donor)
        if members.size < 2:
            continue
        part = sp.csr_matrix(counts[members])
        halves = seeder(part, 2, rng)
        if halves.min() == halves.max():
            continue
        fit = np.asarray(part @ log_word_prob[:, donor]).ravel() / lengths[members]
        worse = int(np.argmin([fit[halves == h].mean() for h in (0, 1)]))
        moved = members[halves == worse]
        resp[moved] = 0.0
        resp[moved, int(group)] = 1.0
        revived.append(int(group))
    return revived
