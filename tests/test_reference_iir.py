"""A published worked example: multinomial naive Bayes with add-one smoothing.

Source: C. D. Manning, P. Raghavan and H. Schuetze, *Introduction to Information Retrieval*,
Cambridge University Press 2008, Example 13.1 (section 13.2). The example's figures are recalled
from memory and recomputed by hand below.

Training set (vocabulary of six words: Chinese, Beijing, Shanghai, Macao, Tokyo, Japan):

    doc 1  "Chinese Beijing Chinese"       class c (China)
    doc 2  "Chinese Chinese Shanghai"      class c
    doc 3  "Chinese Macao"                 class c
    doc 4  "Tokyo Japan Chinese"           class not-c
    test   "Chinese Chinese Chinese Tokyo Japan"

By hand: class c holds 8 tokens (Chinese 5, Beijing 1, Shanghai 1, Macao 1), not-c holds 3
(Tokyo 1, Japan 1, Chinese 1); add-one smoothing over |V| = 6:

    P(Chinese | c)  = (5 + 1) / (8 + 6) = 6/14 = 3/7
    P(Tokyo | c)    = P(Japan | c) = (0 + 1) / 14 = 1/14
    P(Chinese | c') = (1 + 1) / (3 + 6) = 2/9
    P(Tokyo | c')   = P(Japan | c') = (1 + 1) / 9 = 2/9
    P(c) = 3/4, P(c') = 1/4 (empirical prior)

    score(c)  = 3/4 * (3/7)^3 * 1/14 * 1/14 = 0.75 * 0.0787172 * 0.0051020 ~= 0.000301
    score(c') = 1/4 * (2/9)^3 * 2/9 * 2/9   = 0.25 * (2/9)^5 = 0.25 * 0.000541867 ~= 0.000135

(the book rounds them to 0.0003 and 0.0001), so the test document goes to c, with posterior
P(c | d) = 0.000301 / (0.000301 + 0.000135) ~= 0.690.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import scipy.sparse as sp

from mixture.em import m_step
from mixture.routing import route_counts
from mixture.stats import derive_parameters

WORDS = ["chinese", "beijing", "shanghai", "macao", "tokyo", "japan"]
TRAIN = [
    ("Chinese Beijing Chinese", 0),
    ("Chinese Chinese Shanghai", 0),
    ("Chinese Macao", 0),
    ("Tokyo Japan Chinese", 1),
]
TEST = "Chinese Chinese Chinese Tokyo Japan"


def _counts(texts: list[str]) -> sp.csr_matrix:
    # Counted by hand (whitespace split, casefold) so the check does not lean on our tokenizer.
    index = {w: i for i, w in enumerate(WORDS)}
    dense = np.zeros((len(texts), len(WORDS)))
    for d, text in enumerate(texts):
        for token in text.casefold().split():
            dense[d, index[token]] += 1
    return sp.csr_matrix(dense)


def test_manning_raghavan_schuetze_example_13_1() -> None:
    # Source: Manning, Raghavan and Schuetze (2008), Example 13.1, add-one smoothing.
    counts = _counts([t for t, _ in TRAIN])
    resp = np.zeros((len(TRAIN), 2))
    resp[np.arange(len(TRAIN)), [c for _, c in TRAIN]] = 1.0  # hard assignments
    word_counts, doc_counts = m_step(counts, resp)
    params = derive_parameters(
        word_counts, doc_counts, None, word_pseudocount=1.0, weight_pseudocount=0.0
    )
    prob = np.exp(params.log_word_prob)
    c, not_c = 0, 1
    chinese, tokyo, japan = WORDS.index("chinese"), WORDS.index("tokyo"), WORDS.index("japan")
    assert abs(prob[chinese, c] - 3 / 7) < 1e-12
    assert abs(prob[tokyo, c] - 1 / 14) < 1e-12
    assert abs(prob[japan, c] - 1 / 14) < 1e-12
    assert abs(prob[chinese, not_c] - 2 / 9) < 1e-12
    assert abs(prob[tokyo, not_c] - 2 / 9) < 1e-12
    assert abs(prob[japan, not_c] - 2 / 9) < 1e-12
    np.testing.assert_allclose(np.exp(params.log_weights), [3 / 4, 1 / 4], rtol=0, atol=1e-12)

    test_counts = _counts([TEST])
    scores = np.exp(np.asarray(test_counts @ params.log_word_prob)[0] + params.log_weights)
    exact_c = Fraction(3, 4) * Fraction(3, 7) ** 3 * Fraction(1, 14) ** 2
    exact_not_c = Fraction(1, 4) * Fraction(2, 9) ** 5
    assert abs(scores[c] - float(exact_c)) < 1e-15
    assert abs(scores[not_c] - float(exact_not_c)) < 1e-15
    assert round(scores[c], 4) == 0.0003  # the book's rounded figures
    assert round(scores[not_c], 4) == 0.0001

    routing = route_counts(params, test_counts)
    assert routing.group[0] == c
    expected_posterior = float(exact_c / (exact_c + exact_not_c))
    assert abs(routing.posterior[0, c] - expected_posterior) < 1e-12
    assert abs(expected_posterior - 0.690) < 1e-3
    assert abs(routing.margin[0] - (2 * expected_posterior - 1)) < 1e-12
    assert routing.known_tokens[0] == 5
