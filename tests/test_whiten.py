"""PCA whitening of descriptors against scikit-learn's PCA(whiten=True)."""

import numpy as np
from sklearn.decomposition import PCA

from nearsight.indexer.matching.whiten import Whitening, fit_whitening


def _anisotropic(n=2000, d=16, seed=0):
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((n, d)) * np.linspace(5.0, 0.2, d) + 3.0  # a narrow, off-centre cone
    return (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32)


def test_unshrunk_whitening_matches_sklearn_pca_up_to_scale_and_sign():
    xb = _anisotropic()
    ours = fit_whitening(xb, shrink=0.0)
    # Reference: scikit-learn's PCA with whiten=True, before our final L2 normalisation.
    ref = PCA(whiten=True, svd_solver="full").fit(xb.astype(np.float64))
    y_ref = ref.transform(xb)
    y_ours = (xb - ours.mean) @ ours.projection
    # sklearn scales by sqrt(n - 1) / s, we by 1 / s: columns agree up to that factor and a sign.
    factor = np.sqrt(len(xb) - 1)
    for j in range(xb.shape[1]):
        a, b = y_ours[:, j] * factor, y_ref[:, j]
        assert min(np.abs(a - b).max(), np.abs(a + b).max()) < 1e-2 * np.abs(b).max()


def test_whitening_spreads_a_narrow_cone():
    xb = _anisotropic()
    raw = xb @ xb.T
    white = fit_whitening(xb).apply(xb)
    spread = white @ white.T
    off = ~np.eye(len(xb), dtype=bool)
    assert raw[off].mean() > 0.5          # the cone: unrelated vectors look alike
    assert abs(spread[off].mean()) < 0.05  # whitened: unrelated vectors are near orthogonal
    np.testing.assert_allclose(np.linalg.norm(white, axis=1), 1.0, atol=1e-5)


def test_too_few_vectors_leave_the_space_alone():
    xb = _anisotropic(n=20, d=16)
    w = fit_whitening(xb)
    np.testing.assert_allclose(w.apply(xb), xb, atol=1e-6)


def test_round_trip(tmp_path):
    w = fit_whitening(_anisotropic())
    w.save(tmp_path / "w.npz")
    loaded = Whitening.load(tmp_path / "w.npz")
    np.testing.assert_array_equal(loaded.projection, w.projection)
    np.testing.assert_array_equal(loaded.mean, w.mean)


def test_fused_score_is_the_weighted_sum_of_the_two_cosines():
    """With a classical part, <apply(x), apply(y)> = (1 - w) cos(whitened learned) + w cos(classic)
    (the definition of the fused score; the cosines are computed here with NumPy directly)."""
    rng = np.random.default_rng(3)
    learned = _anisotropic(n=200, d=16)
    classic = rng.standard_normal((200, 9)).astype(np.float32)
    stored = np.hstack([learned, classic])
    w = 0.3
    fused = fit_whitening(stored, learned_dim=16, classic_weight=w)
    white = fit_whitening(learned)  # the learned part alone, as before fusion
    y = fused.apply(stored)
    np.testing.assert_allclose(np.linalg.norm(y, axis=1), 1.0, atol=1e-5)
    wl = white.apply(learned)
    cu = classic / np.linalg.norm(classic, axis=1, keepdims=True)
    expected = (1 - w) * (wl @ wl.T) + w * (cu @ cu.T)
    np.testing.assert_allclose(y @ y.T, expected, atol=1e-5)


def test_fused_whitening_round_trip_keeps_the_weight(tmp_path):
    stored = np.hstack([_anisotropic(n=100, d=8), _anisotropic(n=100, d=5, seed=1)])
    fused = fit_whitening(stored, learned_dim=8, classic_weight=0.4)
    fused.save(tmp_path / "w.npz")
    loaded = Whitening.load(tmp_path / "w.npz")
    assert loaded.classic_weight == 0.4
    np.testing.assert_allclose(loaded.apply(stored), fused.apply(stored), atol=1e-6)
