"""Query-adaptive score normalisation (benchmarks/score_norm.py, measured by the quality benchmark's
ablation) against a hand computation.

Definition (Pizzi et al. 2022, sec. 3.3, with the reference's statistic added as in the
local scaling of Conneau et al. 2018): s'(x, y) = s(x, y) - beta (b(x) + b(y)) / 2, where
b is the mean similarity to the background neighbours ranked 2..k+1, never counting itself.
"""

import numpy as np
import pytest

from benchmarks.score_norm import Background, fit_background, none


def _unit(rows):
    x = np.asarray(rows, np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def test_statistic_and_adjusted_scores_match_a_hand_computation():
    bg = _unit([[1, 0, 0], [0, 1, 0], [0, 0, 1], [1, 1, 0]])
    background = Background(bg, np.array([10, 11, 12, 13]), beta=0.5, k=2)
    q = _unit([[1, 0, 0]])
    # Similarities of q to the four: 1, 0, 0, 1/sqrt(2). Sorted: 1, .7071, 0, 0.
    # Skip the closest (1), average the next k = 2: (0.7071 + 0) / 2.
    by_hand = (1 / np.sqrt(2) + 0.0) / 2
    np.testing.assert_allclose(background.statistic(q), [by_hand], atol=1e-6)
    # As member 10 of the background, it does not count itself: left are 0, 0, .7071;
    # skip .7071, average 0 and 0.
    np.testing.assert_allclose(background.statistic(q, np.array([10])), [0.0], atol=1e-6)
    sims = np.array([[0.9, 0.4]], np.float32)
    b_refs = np.array([[0.2, 0.6]], np.float32)
    expected = [[0.9 - 0.5 * (by_hand + 0.2) / 2, 0.4 - 0.5 * (by_hand + 0.6) / 2]]
    np.testing.assert_allclose(background.adjust(sims, background.statistic(q), b_refs), expected, atol=1e-6)


def test_beta_zero_changes_nothing_and_the_sample_comes_from_the_collection():
    x = _unit(np.random.default_rng(0).standard_normal((50, 8)))
    assert np.all(none(8).statistic(x) == 0)
    fitted = fit_background(x, np.arange(50), beta=1.0, size=20, k=5)
    assert len(fitted.vectors) == 20 and set(fitted.ids) <= set(range(50))
    rows = {tuple(v) for v in x[fitted.ids]}
    assert all(tuple(v) in rows for v in fitted.vectors)


def test_statistic_against_brute_force_on_random_vectors():
    """Brute force with NumPy's sort over the whole background, one query at a time."""
    rng = np.random.default_rng(1)
    bg = _unit(rng.standard_normal((40, 6)))
    ids = np.arange(100, 140)
    background = Background(bg, ids, beta=1.0, k=7)
    xq = np.vstack([_unit(rng.standard_normal((5, 6))), bg[:3]])
    qids = np.array([-1] * 5 + [100, 101, 102])
    expected = []
    for x, i in zip(xq, qids):
        sims = np.array([x @ b for b, j in zip(bg, ids) if j != i])
        expected.append(np.sort(sims)[::-1][1:8].mean())
    np.testing.assert_allclose(background.statistic(xq, qids), expected, atol=1e-5)


def test_query_background_statistic_used_by_similar_matches_a_hand_computation():
    """indexer.matching.query.background_statistic: the mean of ranks 2..k+1 of a query's similarities (the
    product's form of the same normalisation, with the generation's index as the background)."""
    from nearsight.indexer.matching.query import background_statistic

    sims = [0.2, 0.95, 0.5, 0.4, 0.1]
    # Sorted: .95, .5, .4, .2, .1; skip .95; k = 3 -> (.5 + .4 + .2) / 3.
    assert background_statistic(sims, k=3) == pytest.approx((0.5 + 0.4 + 0.2) / 3)
    assert background_statistic(sims, k=10) == pytest.approx((0.5 + 0.4 + 0.2 + 0.1) / 4)
    assert background_statistic([0.9]) == 0.0
    # Scores at or above the generation's copy threshold are the query's copies, not its background:
    # with a threshold of 0.45, .5 is skipped too -> (.4 + .2 + .1) / 3.
    assert background_statistic(sims, k=10, copy_threshold=0.45) == pytest.approx((0.4 + 0.2 + 0.1) / 3)
