"""The quality benchmark's metrics (benchmarks/metrics.py) and baselines, against outside references.

No timing here: speed lives in benchmarks/.
"""

import numpy as np
import pytest
from PIL import Image
from sklearn.metrics import average_precision_score

from benchmarks import baselines, metrics, protocol


def _all_pairs(scores: np.ndarray) -> metrics.Predictions:
    nq, nr = scores.shape
    return metrics.Predictions(np.repeat(np.arange(nq), nr), np.tile(np.arange(nr), nq), scores.ravel())


def _case(seed: int, nq: int = 40, nr: int = 30, unmatched: int = 10, ties: bool = False):
    rng = np.random.default_rng(seed)
    scores = rng.random((nq, nr))
    if ties:
        scores = np.round(scores * 8) / 8  # few distinct values, as pHash's 65
    gt = rng.integers(0, nr, nq)
    gt[:unmatched] = -1
    return scores, gt


@pytest.mark.parametrize("ties", [False, True])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_micro_ap_equals_sklearn_average_precision_when_every_true_pair_is_predicted(seed, ties):
    # Reference: sklearn.metrics.average_precision_score (step-wise AP, ties grouped). With every
    # (query, reference) pair among the predictions, DISC21's micro AP (Douze et al. 2021) is the AP
    # of the pooled pairs, since its recall denominator (queries with a match) = positive pairs.
    scores, gt = _case(seed, ties=ties)
    pred = _all_pairs(scores)
    expected = average_precision_score(pred.correct(gt), pred.score)
    assert metrics.micro_ap(pred, gt) == pytest.approx(expected, abs=1e-12)


def test_micro_ap_scales_with_the_share_of_true_pairs_left_out():
    # Dropping some true pairs from the predictions leaves the ranking of the rest unchanged and
    # divides every recall by n_matched / n_found: micro AP = sklearn AP of the kept pairs x that share.
    scores, gt = _case(3)
    pred = _all_pairs(scores)
    correct = pred.correct(gt)
    drop = np.flatnonzero(correct)[::3]
    keep = np.ones(len(pred.q), bool)
    keep[drop] = False
    sub = pred.subset(keep)
    share = sub.correct(gt).sum() / (gt >= 0).sum()
    expected = average_precision_score(sub.correct(gt), sub.score) * share
    assert metrics.micro_ap(sub, gt) == pytest.approx(expected, abs=1e-12)


def test_micro_ap_is_one_for_a_perfect_ranking_and_lower_for_confident_false_matches():
    # Definition check: true pairs ranked above every false pair give AP 1 (common practice).
    scores, gt = _case(4)
    matched = gt >= 0
    scores[np.flatnonzero(matched), gt[matched]] = 2.0
    assert metrics.micro_ap(_all_pairs(scores), gt) == pytest.approx(1.0)
    scores[0, 0] = 3.0  # query 0 has no match: its prediction is false, and now ranked first
    assert metrics.micro_ap(_all_pairs(scores), gt) < 1.0


@pytest.mark.parametrize("seed", [0, 1])
def test_recall_at_1_matches_brute_force_argmax(seed):
    # Reference: a brute-force argmax over the full score matrix (continuous scores: no ties).
    scores, gt = _case(seed)
    matched = np.flatnonzero(gt >= 0)
    brute = np.mean([np.argmax(scores[i]) == gt[i] for i in matched])
    assert metrics.recall_at_1(metrics.top_k(scores, 5), gt) == pytest.approx(brute)
    assert metrics.recall_at_1(_all_pairs(scores), gt) == pytest.approx(brute)


def test_recall_at_1_counts_a_tie_at_the_top_as_its_expected_value():
    # Expected value of a random order among m tied best predictions: 1/m (definition).
    gt = np.array([0, 1])
    pred = metrics.Predictions(np.array([0, 0, 0, 1, 1]), np.array([0, 1, 2, 1, 0]), np.array([0.9, 0.9, 0.9, 0.5, 0.7]))
    assert metrics.recall_at_1(pred, gt) == pytest.approx((1 / 3 + 0) / 2)


def test_recall_at_precision_is_the_best_recall_on_the_pooled_curve():
    # Reference: sklearn.metrics.precision_recall_curve on the same pooled pairs (all pairs present).
    from sklearn.metrics import precision_recall_curve

    scores, gt = _case(5)
    pred = _all_pairs(scores)
    p, r, _ = precision_recall_curve(pred.correct(gt), pred.score)
    for target in (0.2, 0.5, 0.9):
        expected = r[p >= target].max() if (p >= target).any() else 0.0
        ours = metrics.recall_at_precision(pred, gt, target)
        # sklearn adds the point (precision 1, recall 0); it matters only when no real point qualifies.
        assert ours == pytest.approx(expected) or (ours == 0.0 and expected == 0.0)


def test_top_k_returns_the_k_largest_of_each_row():
    # Reference: numpy's full sort.
    scores, _ = _case(6)
    pred = metrics.top_k(scores, 4)
    for i in range(scores.shape[0]):
        got = np.sort(pred.score[pred.q == i])
        np.testing.assert_allclose(got, np.sort(scores[i])[-4:])


def test_verdict_counts_calls_and_recall():
    gt = np.array([0, 1, -1])
    pred = metrics.Predictions(np.array([0, 0, 1, 2]), np.array([0, 1, 0, 1]), np.array([0.9, 0.8, 0.95, 0.85]))
    v = metrics.verdict(pred, gt, 0.82)
    assert (v["called"], v["correct"], v["positives"]) == (3, 1, 2)  # 0.9 (right), 0.95 (wrong), 0.85 (no match)
    assert v["precision"] == pytest.approx(1 / 3) and v["recall"] == pytest.approx(1 / 2)


def test_phash_similarity_is_one_minus_the_imagehash_hamming_distance():
    # Reference: imagehash's own ImageHash subtraction (Hamming distance between 64-bit pHashes).
    import imagehash
    import skimage.data

    images = [Image.fromarray(getattr(skimage.data, n)()).convert("RGB") for n in ("astronaut", "camera", "coffee")]
    images.append(protocol.jpeg_roundtrip(images[0], 20))
    bits = baselines.phash_bits(images)
    sims = baselines.phash_similarity(bits, bits)
    hashes = [imagehash.phash(im) for im in images]
    for i in range(len(images)):
        for j in range(len(images)):
            assert sims[i, j] == pytest.approx(1 - (hashes[i] - hashes[j]) / 64)


def test_thumbnail_vectors_are_centred_unit_rows_of_a_box_filtered_grey_image():
    # Reference: Pillow's BOX resize is an area average; for a 64x64 image to 16x16 it is the mean of
    # each 4x4 block, computed here with numpy on Pillow's grayscale conversion.
    import skimage.data

    im = Image.fromarray(skimage.data.astronaut()).resize((64, 64))
    grey = np.asarray(im.convert("L"), np.float64)
    blocks = grey.reshape(16, 4, 16, 4).mean(axis=(1, 3)).ravel()
    blocks -= blocks.mean()
    v = baselines.thumb_vectors([im])[0]
    np.testing.assert_allclose(v, blocks / np.linalg.norm(blocks), atol=2e-2)
    assert np.linalg.norm(v) == pytest.approx(1.0, abs=1e-5)


def test_contrast_corruption_follows_the_imagenet_c_formula():
    # Hendrycks and Dietterich 2019 (ImageNet-C), contrast: (x - per-channel mean) * c + mean,
    # c = 0.4 at severity 1 (constant from memory of their code).
    import skimage.data

    im = Image.fromarray(skimage.data.coffee())
    x = np.asarray(im, np.float64) / 255
    mean = x.mean(axis=(0, 1), keepdims=True)
    expected = np.clip((x - mean) * 0.4 + mean, 0, 1) * 255
    out = np.asarray(protocol.contrast(im, 1, np.random.default_rng(0)), np.float64)
    assert np.abs(out - expected).max() <= 1.0


def test_every_protocol_transform_makes_a_decodable_query_of_the_stated_family():
    import io

    import skimage.data

    im = Image.fromarray(skimage.data.chelsea())
    transforms = protocol.build_transforms()
    assert {t.family for t in transforms} == set(protocol.FAMILIES)
    assert len({t.name for t in transforms}) == len(transforms)
    for t in transforms:
        data, ext = protocol.make_query(im, t, seed=0)
        with Image.open(io.BytesIO(data)) as out:
            assert out.format == ("JPEG" if ext == ".jpg" else "PNG")
            assert min(out.size) >= 8


def test_speckle_corruption_matches_scikit_image_speckle_noise():
    # ImageNet-C's extra speckle noise, x + x * N(0, c) with c = 0.15 at severity 1 (constant from memory of its
    # code), is scikit-image's random_noise(mode="speckle", var=c**2): same formula, same generator stream.
    import skimage.data
    import skimage.util

    im = Image.fromarray(skimage.data.coffee())
    x = np.asarray(im, np.float64) / 255
    expected = skimage.util.random_noise(x, mode="speckle", var=0.15**2, rng=5, clip=True) * 255
    out = np.asarray(protocol.speckle_noise(im, 1, np.random.default_rng(5)), np.float64)
    assert np.abs(out - expected).max() <= 1.0


@pytest.mark.parametrize("angle", [0.0, 90.0, 30.0])
def test_motion_blur_kernel_is_a_one_sided_gaussian_line_at_its_angle(angle):
    # ImageMagick's motion blur (what ImageNet-C's motion_blur calls): Gaussian weights (scipy.stats.norm) along
    # a line from the pixel towards `angle`, on one side only.
    from scipy import stats

    radius, sigma = 10, 3.0
    kernel = protocol._motion_kernel(radius, sigma, angle)
    assert kernel.sum() == pytest.approx(1.0)
    weights = stats.norm.pdf(np.arange(radius + 1), scale=sigma)
    a = np.radians(angle)
    # Each step t lands on the rounded point t (cos a, -sin a) from the centre (image rows grow downwards).
    along = np.zeros_like(kernel)
    for t, w in enumerate(weights):
        along[radius + round(-t * np.sin(a)), radius + round(t * np.cos(a))] += w
    np.testing.assert_allclose(kernel, along / along.sum(), atol=1e-12)
    if angle == 0.0:
        assert kernel[:, :radius].sum() == 0 and kernel[radius, radius:].sum() == pytest.approx(1.0)


def test_sepia_edit_applies_the_usual_sepia_toning_coefficients():
    # The sepia matrix image editors commonly publish (common practice; coefficients from memory):
    # R' = .393 R + .769 G + .189 B, G' = .349 R + .686 G + .168 B, B' = .272 R + .534 G + .131 B, clipped.
    import skimage.data

    im = Image.fromarray(skimage.data.coffee())
    r, g, b = np.moveaxis(np.asarray(im, np.float64), -1, 0)
    expected = np.clip(np.stack([.393 * r + .769 * g + .189 * b, .349 * r + .686 * g + .168 * b,
                                 .272 * r + .534 * g + .131 * b], axis=-1), 0, 255)
    out = np.asarray(protocol.sepia(im), np.float64)
    assert np.abs(out - expected).max() <= 1.0


def test_vignette_keeps_the_centre_and_darkens_the_corners_by_the_strength():
    # The vignette's stated formula: each pixel times 1 - strength * (its distance from the centre over the
    # corner's)^2, so the centre keeps its value and the corners drop to 1 - strength.
    im = Image.new("RGB", (201, 101), (200, 160, 120))
    out = np.asarray(protocol.vignette(im, 0.5), np.float64)
    np.testing.assert_allclose(out[50, 100], [200, 160, 120], atol=0.5)
    corner = 1 - 0.5 * ((100 / 100.5) ** 2 + (50 / 50.5) ** 2) / 2  # the corner pixel's centre is half a pixel in
    np.testing.assert_allclose(out[0, 0], np.array([200, 160, 120]) * corner, atol=0.6)
    assert (out[50, :, 0] <= out[50, 100, 0] + 0.5).all()


@pytest.mark.parametrize("seed", [0, 1])
def test_bench_groups_chaining_figures_against_brute_force(seed):
    """bench_groups' groupings that chain: components against a NumPy transitive closure (boolean matrix
    products until nothing changes); every star group has a centre paired with each other member."""
    from benchmarks.bench_groups import component_groups, star_groups

    rng = np.random.default_rng(seed)
    n = 40
    a = rng.integers(0, n, 45)
    b = rng.integers(0, n, 45)
    a, b = a[a != b], b[a != b]
    adj = np.eye(n, dtype=bool)
    adj[a, b] = adj[b, a] = True
    reach = adj.copy()
    while True:
        step = (reach.astype(int) @ adj.astype(int)) > 0
        if (step == reach).all():
            break
        reach = step
    touched = np.unique(np.r_[a, b])
    expected = {frozenset(np.flatnonzero(reach[i]).tolist()) for i in touched}
    assert {frozenset(g) for g in component_groups(a, b)} == expected

    stars = star_groups(a, b)
    seen = [x for g in stars for x in g]
    assert len(seen) == len(set(seen))  # disjoint
    for g in stars:
        assert len(g) >= 2 and any(all(adj[c, m] for m in g) for c in g)
