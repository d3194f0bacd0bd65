"""Unit checks of the model core's own machinery: scaled statistics, stepwise updates,
vocabulary bounds, routing edge cases, serialisation and drift measures."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.spatial.distance import jensenshannon

from mixture.config import MixtureConfig
from mixture.describe import align_groups, describe_groups
from mixture.drift import js_divergence, total_variation, weight_drift, word_drift
from mixture.em import fit_batch_em, fit_texts
from mixture.errors import ConfigError, InputError, StateFormatError
from mixture.online import OnlineLearner, stepwise_update
from mixture.routing import route_counts, route_texts
from mixture.serialize import state_from_bytes, state_to_bytes
from mixture.stats import MixtureState, derive_parameters, warm_start_step
from mixture.vocabulary import Vocabulary

THEMES = [
    "ferry ticket booking refund price card seat fare",
    "delay storm cancel late wind wave harbour swell",
    "lost bag phone found cabin left wallet keys",
]


def _themed_texts(n: int, seed: int = 0) -> tuple[list[str], np.ndarray]:
    rng = np.random.default_rng(seed)
    vocab = [t.split() for t in THEMES]
    filler = ["hello", "please", "thanks", "today", "island", "morning"]
    labels = rng.integers(len(vocab), size=n)
    texts = [" ".join([*rng.choice(vocab[t], 8), *rng.choice(filler, 3)]) for t in labels]
    return texts, labels


def _random_state(n_words: int, k: int, seed: int = 0) -> MixtureState:
    rng = np.random.default_rng(seed)
    vocab = Vocabulary()
    for i in range(n_words):
        vocab.add(f"w{i}")
    config = MixtureConfig(n_groups=k, batch_size=16, warmup_documents=k)
    counts = rng.gamma(0.5, 2.0, size=(n_words, k))
    docs = rng.uniform(5, 20, size=k)
    return MixtureState.from_counts(config, vocab, counts, docs, documents_learned=int(docs.sum()))


def _random_batch(m: int, n_words: int, seed: int) -> sp.csr_matrix:
    rng = np.random.default_rng(seed)
    dense = rng.poisson(0.3, size=(m, n_words)).astype(float)
    dense[:, n_words // 2 :] = 0.0  # the batch touches only half the words
    dense[:, 0] += 1.0  # every document has evidence
    return sp.csr_matrix(dense)


def test_stepwise_update_matches_the_dense_formula():
    """The O(batch) scaled update equals s <- (1 - eta) s + eta s_batch done densely
    (Liang and Klein 2009, eq. for stepwise EM), in count units."""
    state = _random_state(40, 3)
    for step in range(5):
        before_avg_word = state.unscaled_word[: state.capacity] * state.running_scale
        before_avg_docs = state.unscaled_docs * state.running_scale
        params = state.parameters()
        batch = _random_batch(16, 40, seed=step)
        log_joint = batch @ params.log_word_prob + params.log_weights
        resp = np.exp(log_joint - log_joint.max(1, keepdims=True))
        resp /= resp.sum(1, keepdims=True)
        eta = state.config.step_size(state.step)
        expect_word = (1 - eta) * before_avg_word + eta * (batch.T @ resp) / 16
        expect_docs = (1 - eta) * before_avg_docs + eta * resp.sum(0) / 16
        stepwise_update(state, batch)
        got_word = state.unscaled_word[: state.capacity] * state.running_scale
        np.testing.assert_allclose(got_word, expect_word, rtol=1e-12, atol=1e-15)
        np.testing.assert_allclose(
            state.unscaled_docs * state.running_scale, expect_docs, rtol=1e-12
        )
        np.testing.assert_allclose(
            state.unscaled_total, state.unscaled_word[: state.capacity].sum(0), rtol=1e-10
        )


def test_scale_folds_before_underflow_and_keeps_parameters():
    state = _random_state(30, 2)
    state.running_scale = 1e-130  # below the fold threshold after one more step
    state.unscaled_word *= 1e130
    state.unscaled_docs *= 1e130
    state.unscaled_total *= 1e130
    state.touch()
    before = state.parameters()
    np.testing.assert_allclose(state.expected_documents().sum(), state.effective_documents)
    stepwise_update(state, sp.csr_matrix((4, 30)))  # no evidence: nothing changes
    state.fold_scale()
    assert state.running_scale == 1.0
    np.testing.assert_allclose(state.parameters().log_word_prob, before.log_word_prob, rtol=1e-12)
    stepwise_update(state, _random_batch(16, 30, 3))
    assert np.all(np.isfinite(state.parameters().log_word_prob))


def test_effective_documents_is_the_count_for_an_exact_running_average():
    """With alpha = 1 and the warm-start step, every batch weighs 1/n: Kish's effective
    sample size equals the number of documents (Kish 1965, n_eff = 1 / sum w^2)."""
    config = MixtureConfig(n_groups=2, step_exponent=1.0, batch_size=10, warmup_documents=10)
    state = _random_state(20, 2)
    state.config = config
    state.weight_square_sum = 1.0 / 10
    state.step = warm_start_step(config, 10)
    assert config.step_size(state.step) == pytest.approx(0.5)
    for i in range(5):
        stepwise_update(state, _random_batch(10, 20, i))
    assert state.effective_documents == pytest.approx(60.0)


def test_a_unit_cut_into_smaller_batches_is_one_step():
    """A partial unit is that fraction of a step: four batches of a quarter unit keep exactly
    the share (1 - eta) of the old statistics that one whole unit keeps, and move the
    schedule by one step. (Derivation: (1 - eta_m)^(M/m) = 1 - eta with
    eta_m = 1 - (1 - eta)^(m/M); here eta is held by the floor, so it does not move.)"""
    config = MixtureConfig(n_groups=3, batch_size=16, warmup_documents=3, half_life_documents=64)
    eta = config.eta_floor
    results = []
    for sizes in ([16], [4, 4, 4, 4]):
        state = _random_state(40, 3)
        state.config = config
        state.step = 1e9  # far along the schedule: eta is the floor
        before = state.running_scale
        for i, size in enumerate(sizes):
            stepwise_update(state, _random_batch(size, 40, seed=i))
        assert state.step == pytest.approx(1e9 + 1.0)
        results.append(state.running_scale / before)
    assert results[0] == pytest.approx(1.0 - eta, rel=1e-12)
    assert results[1] == pytest.approx(1.0 - eta, rel=1e-12)


def test_a_trickle_of_single_documents_keeps_the_effective_sample_size():
    """Kish's effective size (1 / sum w^2) after a unit's worth of documents one at a time
    is about what one batch of them gives; a full step per document would collapse it."""
    config = MixtureConfig(n_groups=3, batch_size=16, warmup_documents=3)
    sizes = []
    for pieces in (1, 16):
        state = _random_state(40, 3)
        state.config = config
        for unit in range(4):
            batch = _random_batch(16, 40, seed=unit)
            for i in range(pieces):
                rows = slice(i * 16 // pieces, (i + 1) * 16 // pieces)
                stepwise_update(state, batch[rows])
        sizes.append(state.effective_documents)
    assert sizes[1] == pytest.approx(sizes[0], rel=0.05)


def test_eta_floor_is_a_half_life_in_documents():
    config = MixtureConfig(batch_size=100, half_life_documents=10_000)
    eta = config.eta_floor
    assert (1 - eta) ** (10_000 / 100) == pytest.approx(0.5)
    assert config.step_size(10**9) == pytest.approx(eta)


def test_alpha_out_of_range_is_refused_with_its_name():
    for alpha in (0.5, 0.3, 1.2, float("nan")):
        with pytest.raises(ConfigError, match="step_exponent"):
            MixtureConfig(step_exponent=alpha)
    with pytest.raises(ConfigError, match="n_groups"):
        MixtureConfig(n_groups=0)
    with pytest.raises(ConfigError, match="unknown configuration field"):
        MixtureConfig.from_dict({"groups": 3})


def test_online_learner_warms_up_then_learns_stepwise():
    texts, _ = _themed_texts(900, seed=1)
    learner = OnlineLearner(MixtureConfig(n_groups=3, warmup_documents=300, batch_size=50))
    first = learner.learn(texts[:200])
    assert not first.warmed_up and not learner.state.warmed_up
    assert learner.state.pending is not None and learner.state.pending.shape[0] == 200
    second = learner.learn(texts[200:450])
    assert second.warmed_up and learner.state.warmed_up
    assert second.steps == 3  # 150 documents past the warm-up, in batches of 50
    learner.learn(texts[450:])
    assert learner.state.documents_learned == 900
    # A state checkpointed mid-warm-up resumes with its buffer intact.
    buffered = OnlineLearner(MixtureConfig(n_groups=3, warmup_documents=300))
    buffered.learn(texts[:100])
    resumed = OnlineLearner.from_state(state_from_bytes(state_to_bytes(buffered.state)))
    assert resumed.state.pending.shape[0] == 100
    resumed.learn(texts[100:400])
    assert resumed.state.warmed_up


def test_vocabulary_limit_retires_rarest_and_never_reuses_ids():
    rng = np.random.default_rng(2)
    common = [f"common{i}" for i in range(30)]
    config = MixtureConfig(n_groups=2, vocabulary_limit=40, warmup_documents=20, batch_size=20)
    learner = OnlineLearner(config)
    seen: dict[str, int] = {}
    for round_ in range(30):
        texts = [" ".join([*rng.choice(common, 10), f"rare{round_}x{j}"]) for j in range(20)]
        learner.learn(texts)
        vocab = learner.state.vocabulary
        assert vocab.n_active <= 40
        for word in (f"rare{round_}x{j}" for j in range(20)):
            word_id = vocab.lookup(word)
            if word_id >= 0:
                assert seen.setdefault(word, word_id) == word_id or vocab.generation > 0
    vocab = learner.state.vocabulary
    assert all(vocab.lookup(w) >= 0 for w in common)  # frequent words survive pruning
    ids = [vocab.lookup(w) for w in common]
    assert len(set(ids)) == len(ids)


def test_document_without_known_words_gets_the_prior_and_a_flag():
    state, _ = fit_texts(_themed_texts(300)[0], MixtureConfig(n_groups=3, n_restarts=1))
    routing = route_texts(state, ["zzzz qqqq", "ferry ticket refund"])
    assert routing.no_evidence.tolist() == [True, False]
    np.testing.assert_allclose(routing.posterior[0], state.weights(), rtol=1e-12)
    assert routing.unknown_tokens[0] == 2 and routing.known_tokens[0] == 0
    assert np.isnan(routing.log_likelihood_per_token[0])


def test_very_long_document_does_not_underflow():
    state, _ = fit_texts(_themed_texts(300)[0], MixtureConfig(n_groups=3, n_restarts=1))
    text = " ".join(["ferry ticket storm wave lost bag"] * 20_000)  # 120k tokens
    routing = route_texts(state, [text])
    assert np.all(np.isfinite(routing.posterior))
    assert routing.posterior.sum() == pytest.approx(1.0)
    assert routing.known_tokens[0] == 120_000


def test_map_group_and_margin():
    params = derive_parameters(
        np.array([[9.0, 1.0], [1.0, 9.0]]), np.array([3.0, 1.0]), None, 1.0, 0.0
    )
    routing = route_counts(params, sp.csr_matrix([[1.0, 1.0], [0.0, 3.0]]))
    # Equal evidence: prior times likelihood, so the larger group wins the tie.
    assert routing.group.tolist() == [0, 1]
    np.testing.assert_allclose(routing.posterior[0], [0.75, 0.25])
    np.testing.assert_allclose(routing.margin[0], 0.5)


def test_state_bytes_round_trip_and_tamper_detection():
    texts, _ = _themed_texts(400)
    state, _ = fit_texts(texts, MixtureConfig(n_groups=3, n_restarts=1))
    state.watermark = "1700000000000-3"
    state.metadata = {"model": "ferry", "note": "ünïcode"}
    data = state_to_bytes(state)
    loaded = state_from_bytes(data)
    assert loaded.watermark == state.watermark and loaded.metadata == state.metadata
    np.testing.assert_array_equal(
        route_texts(loaded, texts).posterior, route_texts(state, texts).posterior
    )
    flipped = bytearray(data)
    flipped[len(flipped) // 2] ^= 0xFF
    with pytest.raises(StateFormatError, match="checksum"):
        state_from_bytes(bytes(flipped))
    with pytest.raises(StateFormatError, match="magic"):
        state_from_bytes(b"PK\x03\x04" + data[4:])
    with pytest.raises(StateFormatError, match="truncated"):
        state_from_bytes(data[:10])
    with pytest.raises(StateFormatError, match="version"):
        state_from_bytes(data[:8] + b"\x09\x00" + data[10:])


def test_js_divergence_matches_scipy():
    """scipy.spatial.distance.jensenshannon returns the JS distance (square root of the
    divergence); with base=2 its square is our divergence in bits."""
    rng = np.random.default_rng(4)
    for _ in range(20):
        p, q = rng.dirichlet(np.ones(7)), rng.dirichlet(np.ones(7) * 0.3)
        assert js_divergence(p, q) == pytest.approx(jensenshannon(p, q, base=2) ** 2, abs=1e-12)
    assert js_divergence([1, 0], [0, 1]) == pytest.approx(1.0)
    assert total_variation([0.5, 0.5], [1.0, 0.0]) == pytest.approx(0.5)


def test_alignment_recovers_a_permutation_and_drift_is_zero_after_it():
    texts, _ = _themed_texts(600, seed=3)
    config = MixtureConfig(n_groups=3, n_restarts=1)
    state_a, _ = fit_texts(texts, config, seed=0)
    state_b = state_a.copy()
    perm = np.array([2, 0, 1])
    state_b.unscaled_word = state_b.unscaled_word[:, perm]
    state_b.unscaled_docs = state_b.unscaled_docs[perm]
    state_b.unscaled_total = state_b.unscaled_total[perm]
    state_b.touch()
    match = align_groups(state_a, state_b)
    np.testing.assert_array_equal(match, perm)
    assert weight_drift(state_a, state_b) == pytest.approx(0.0, abs=1e-12)
    np.testing.assert_allclose(word_drift(state_a, state_b), 0.0, atol=1e-12)


def test_describe_groups_names_the_themes():
    texts, _ = _themed_texts(600, seed=5)
    state, _ = fit_texts(texts, MixtureConfig(n_groups=3, n_restarts=2))
    summaries = describe_groups(state, top_n=5)
    theme_sets = [set(t.split()) for t in THEMES]
    for summary in summaries:
        words = {w for w, _ in summary.distinctive_terms}
        assert any(words <= theme for theme in theme_sets), words
        assert all(lift > 1.0 for _, lift in summary.distinctive_terms)
    assert sum(s.weight for s in summaries) == pytest.approx(1.0)


def test_fit_is_reproducible_and_rejects_bad_input():
    texts, _ = _themed_texts(200)
    config = MixtureConfig(n_groups=3, n_restarts=2)
    a, _ = fit_texts(texts, config, seed=7)
    b, _ = fit_texts(texts, config, seed=7)
    np.testing.assert_array_equal(a.expected_word_counts(), b.expected_word_counts())
    with pytest.raises(InputError, match="empty corpus"):
        fit_batch_em(sp.csr_matrix((0, 5)), config)
    with pytest.raises(ConfigError, match="n_groups"):
        fit_batch_em(sp.csr_matrix(np.ones((2, 5))), config)
    with pytest.raises(InputError, match="negative"):
        fit_batch_em(sp.csr_matrix(-np.ones((5, 5))), config)
    with pytest.raises(InputError, match="non-finite"):
        fit_batch_em(np.full((5, 5), np.nan), config)


def test_few_document_path_equals_the_sparse_path():
    """route_texts takes a direct path for a handful of documents; it must give route_counts's
    answer (the sparse products) to rounding."""
    from mixture.counting import count_texts
    from mixture.routing import SMALL_BATCH

    texts, _ = _themed_texts(400, seed=8)
    state, _ = fit_texts(texts, MixtureConfig(n_groups=3, n_restarts=1))
    probes = [*texts[:20], "qqqq zzzz", "the and of", "ferry ferry ferry unknownword", ""]
    for start in range(0, len(probes), 3):
        chunk = probes[start : start + 3]
        fast = route_texts(state, chunk)
        batch = count_texts(chunk, state.tokenizer, state.vocabulary, grow=False)
        core = route_counts(state.parameters(), batch.counts, batch.unknown_tokens)
        np.testing.assert_allclose(fast.posterior, core.posterior, rtol=0, atol=1e-12)
        np.testing.assert_array_equal(fast.group, core.group)
        np.testing.assert_allclose(fast.margin, core.margin, rtol=0, atol=1e-12)
        np.testing.assert_allclose(
            fast.log_likelihood_per_token, core.log_likelihood_per_token, rtol=1e-12
        )
        np.testing.assert_array_equal(fast.known_tokens, core.known_tokens)
        np.testing.assert_array_equal(fast.unknown_tokens, core.unknown_tokens)
        np.testing.assert_array_equal(fast.no_evidence, core.no_evidence)
    assert len(route_texts(state, probes[: SMALL_BATCH + 1])) == SMALL_BATCH + 1
    with pytest.raises(InputError, match="document 1"):
        route_texts(state, ["ok", 3])


# ---- zero pseudo-counts and huge batches (regressions) ----------------------------------------
def _without_word_smoothing(config: MixtureConfig) -> MixtureConfig:
    """The config with word_pseudocount = 0, past validation (the service requires > 0; the
    kernels must stay exact at zero whatever the configuration accepts)."""
    object.__setattr__(config, "word_pseudocount", 0.0)
    return config


def test_zero_word_pseudocount_gives_the_mle_and_a_uniform_emptied_group():
    """With beta = 0 the word distributions are the maximum-likelihood relative frequencies
    C_wk / sum_v C_vk (the textbook multinomial MLE) and -inf for unseen words; an emptied
    group (no mass) gets the limit of Lidstone smoothing as beta -> 0, which is exactly 1 / V
    for every beta > 0 (beta / (V beta)). Before: nan parameters for the emptied group."""
    counts = np.array([[3.0, 0.0, 0.0], [1.0, 2.0, 0.0], [0.0, 2.0, 0.0], [0.0, 0.0, 0.0]])
    docs = np.array([2.0, 1.0, 0.0])
    params = derive_parameters(counts, docs, None, 0.0, 0.0)
    assert not np.isnan(params.log_word_prob).any() and not np.isnan(params.log_weights).any()
    with np.errstate(divide="ignore"):
        mle = np.log(counts[:, :2] / counts[:, :2].sum(axis=0))
    np.testing.assert_array_equal(np.isneginf(params.log_word_prob[:, :2]), np.isneginf(mle))
    finite = np.isfinite(mle)
    np.testing.assert_allclose(params.log_word_prob[:, :2][finite], mle[finite], rtol=1e-12)
    np.testing.assert_allclose(params.log_word_prob[:, 2], np.log(0.25), rtol=1e-12)
    smoothed = derive_parameters(counts, docs, None, 1e-3, 0.0)
    np.testing.assert_allclose(smoothed.log_word_prob[:, 2], params.log_word_prob[:, 2])
    # Weights: a = 0 is the MLE N_k / N, and a group without documents has weight zero.
    np.testing.assert_allclose(np.exp(params.log_weights), [2 / 3, 1 / 3, 0.0], atol=1e-15)
    # Retired words stay -inf, and the emptied group is uniform over the active ones.
    active = np.array([True, True, True, False])
    masked = derive_parameters(counts, docs, active, 0.0, 1.0)
    assert np.isneginf(masked.log_word_prob[3]).all()
    np.testing.assert_allclose(masked.log_word_prob[:3, 2], np.log(1 / 3), rtol=1e-12)


def _zero_smoothing_state() -> MixtureState:
    vocab = Vocabulary(["ferry", "ticket", "storm", "wave"])
    config = _without_word_smoothing(MixtureConfig(n_groups=2, batch_size=4, warmup_documents=2))
    # Group 0 has seen only ferry/ticket, group 1 only storm/wave.
    counts = np.array([[4.0, 0.0], [2.0, 0.0], [0.0, 3.0], [0.0, 1.0]])
    return MixtureState.from_counts(config, vocab, counts, np.array([3.0, 1.0]), 4)


@pytest.mark.parametrize("n_copies", [1, 3])  # few-documents path (<= 8 texts) and batch path
def test_a_document_impossible_in_every_group_gets_the_prior_on_both_paths(n_copies):
    """Zero likelihood under every group has no posterior (Bayes' rule divides by zero); the
    rule for a document without evidence applies: the prior, flagged. A document impossible
    in one group only has posterior 1 for the other (scipy.special.softmax of the joint, as
    the reference). Before: nan posteriors on the batch path, ZeroDivisionError on the
    few-documents path."""
    from scipy.special import softmax

    state = _zero_smoothing_state()
    texts = ["ferry storm", "ferry ticket ferry", "nothing known here"] * n_copies
    if n_copies > 1:
        texts += ["wave"] * 4  # past the few-documents path's size
    routing = route_texts(state, texts)
    assert not np.isnan(routing.posterior).any()
    prior = state.weights()
    np.testing.assert_allclose(routing.posterior[0], prior, rtol=1e-12)
    assert routing.no_evidence[0] and routing.group[0] == int(np.argmax(prior))
    assert np.isnan(routing.log_likelihood_per_token[0])
    params = state.parameters()
    ids = [state.vocabulary.lookup(w) for w in ("ferry", "ticket", "ferry")]
    joint = params.log_word_prob[ids].sum(axis=0) + params.log_weights
    np.testing.assert_allclose(routing.posterior[1], softmax(joint), atol=1e-15)
    assert routing.posterior[1].tolist() == [1.0, 0.0] and not routing.no_evidence[1]
    np.testing.assert_allclose(routing.posterior[2], prior, rtol=1e-12)
    assert routing.no_evidence[2]


def test_both_routing_paths_agree_on_impossible_documents():
    state = _zero_smoothing_state()
    texts = ["ferry storm", "wave ticket", "storm wave", "ferry", "unknown words"]
    few = route_texts(state, texts)
    batch = route_texts(state, texts * 2)  # more than eight documents: the sparse path
    np.testing.assert_allclose(batch.posterior[:5], few.posterior, rtol=1e-12, atol=1e-15)
    np.testing.assert_array_equal(batch.group[:5], few.group)
    np.testing.assert_array_equal(batch.no_evidence[:5], few.no_evidence)
    np.testing.assert_allclose(batch.margin[:5], few.margin, rtol=1e-12)


def test_counts_on_retired_words_do_not_give_nan_posteriors():
    """Even with smoothing, a retired word's row is -inf in every group: counts given to
    route_counts on such a column made the whole row nan before."""
    state = _random_state(6, 3)
    state.vocabulary.retire(np.array([5]))
    state.touch()
    counts = sp.csr_matrix(np.array([[0, 0, 0, 0, 0, 2.0], [1.0, 0, 0, 0, 0, 0]]))
    routing = route_counts(state.parameters(), counts)
    assert not np.isnan(routing.posterior).any()
    np.testing.assert_allclose(routing.posterior[0], state.weights(), rtol=1e-12)
    assert routing.no_evidence.tolist() == [True, False]


def test_stepwise_learning_without_word_smoothing_stays_finite():
    """New words arrive with zero counts in every group, so under beta = 0 every document with
    a new word is impossible in every group: it learns with the prior as responsibilities
    instead of turning the statistics into nan."""
    texts, _ = _themed_texts(60, seed=3)
    learner = OnlineLearner(
        _without_word_smoothing(MixtureConfig(n_groups=3, batch_size=8, warmup_documents=20))
    )
    learner.learn(texts[:30])
    report = learner.learn([*texts[30:], "entirely novel words arrive", "more novel words"])
    state = learner.state
    assert not np.isnan(state.unscaled_word).any() and not np.isnan(state.unscaled_docs).any()
    params = state.parameters()
    assert not np.isnan(params.log_word_prob).any() and not np.isnan(params.log_weights).any()
    assert np.isfinite(report.log_likelihood_per_token)
    novel = state.vocabulary.lookup("novel")
    np.testing.assert_allclose(
        state.expected_word_counts()[novel] / state.expected_word_counts()[novel].sum(),
        np.ones(3) / 3,
        atol=0.5,  # learned from the prior (responsibilities = weights), spread over groups
    )
    assert (state.expected_word_counts()[novel] > 0).all()


def test_stepwise_update_with_far_more_documents_than_batch_size_is_units_of_it():
    """The schedule counts units of batch_size documents (Liang and Klein 2009 apply one step
    per mini-batch): 40 units given at once are 40 updates, the same as the units given one by
    one. Before: eta rounded to 1 for the whole batch, the running scale to 0 and the gain to
    infinity (nan statistics)."""
    state = _random_state(40, 3)
    units = state.copy()
    batch = sp.vstack([_random_batch(16, 40, seed=s) for s in range(40)], format="csr")
    report = stepwise_update(state, batch)
    assert report.steps == 40 and report.documents == 640
    assert np.isfinite(state.running_scale) and state.running_scale > 0
    assert np.isfinite(state.unscaled_word).all()
    for start in range(0, 640, 16):
        stepwise_update(units, batch[start : start + 16])
    assert state.step == pytest.approx(units.step)
    np.testing.assert_allclose(
        state.expected_word_counts(), units.expected_word_counts(), rtol=1e-12
    )
    np.testing.assert_allclose(state.effective_documents, units.effective_documents)


def test_drift_and_descriptions_of_an_emptied_group_without_word_smoothing():
    """An emptied group under beta = 0 is uniform over the active words (the limit of its
    Lidstone smoothing, as in derive_parameters), so its JS divergence to another group is
    scipy's jensenshannon(uniform, other, base=2) ** 2. Before: 0 / 0 = nan distributions,
    and js_divergence refused them."""
    vocab = Vocabulary(["ferry", "ticket", "storm", "wave"])
    config = _without_word_smoothing(MixtureConfig(n_groups=2, batch_size=4, warmup_documents=2))
    counts = np.array([[4.0, 0.0], [2.0, 0.0], [1.0, 0.0], [1.0, 0.0]])
    emptied = MixtureState.from_counts(config, vocab, counts, np.array([3.0, 0.0]), 3)
    other_counts = np.array([[4.0, 1.0], [2.0, 0.0], [1.0, 3.0], [1.0, 1.0]])
    other = MixtureState.from_counts(config, vocab.copy(), other_counts, np.array([3.0, 2.0]), 5)
    drift = word_drift(emptied, other, aligned=False)
    assert np.isfinite(drift).all()
    theirs = other_counts[:, 1] / other_counts[:, 1].sum()
    assert drift[1] == pytest.approx(jensenshannon(np.full(4, 0.25), theirs, base=2) ** 2)
    summaries = describe_groups(emptied, top_n=2, min_count=0.0)
    assert [p for _, p in summaries[1].top_terms] == pytest.approx([0.25, 0.25])


def test_js_divergence_is_zero_where_scipy_rounds_below_zero():
    """scipy's jensenshannon takes the square root of a sum that rounding can leave below
    zero (nan) for distributions one ulp apart; the divergence of such a pair is 0."""
    from scipy.spatial.distance import jensenshannon as scipy_js

    rng = np.random.default_rng(0)
    for _ in range(20_000):
        p = rng.dirichlet(np.ones(rng.integers(2, 50)))
        q = p.copy()
        j = rng.integers(p.size)
        q[j] = np.nextafter(q[j], 1.0)
        with np.errstate(invalid="ignore"):
            if np.isnan(scipy_js(p, q, base=2)):
                break
    else:
        pytest.fail("no rounding case found")
    assert js_divergence(p, q) == pytest.approx(0.0, abs=1e-15)


def test_validate_counts_takes_a_float64_csr_as_it_is() -> None:
    # The learning path's count matrices are CSR float64 already: no new matrix a unit. Its
    # duplicates are still summed and its indices sorted (compared with the dense matrix,
    # numpy's own sum of the same entries); other inputs give a new CSR float64 matrix.
    from mixture.em import validate_counts

    data, indices, indptr = np.array([1.0, 2.0, 1.0]), np.array([2, 0, 2]), np.array([0, 3])
    messy = sp.csr_matrix((data, indices, indptr), shape=(1, 4))
    dense = messy.toarray()
    checked = validate_counts(messy)
    assert checked is messy
    assert checked.has_canonical_format and np.array_equal(checked.toarray(), dense)
    assert checked.indices.tolist() == [0, 2] and checked.data.tolist() == [2.0, 2.0]
    as_int = sp.csr_matrix(dense.astype(np.int64))
    converted = validate_counts(as_int)
    assert converted is not as_int and converted.dtype == np.float64
    assert np.array_equal(converted.toarray(), dense)
