"""PCA whitening of descriptors against scikit-learn's PCA(whiten=True)."""

import numpy as np
from sklearn.decomposition import PCA

from indexer.whiten import Whitening, fit_whitening


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
