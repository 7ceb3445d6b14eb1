"""Geometric verification (indexer/matching/verify.py) on real photos: scikit-image's bundled `skimage.data`.

Every copy here is made with Pillow from a photo, so the truth (the crop box, the scale,
the mirror, the rotation) comes from how the copy was built, not from the verifier.
No timing: the cost per pair lives in benchmarks/bench_verify.py.
"""

import io
import json

import numpy as np
import pytest
from PIL import Image

from benchmarks.bench_verify import block_differences
from nearsight.indexer.core.errors import UsageError
from nearsight.indexer.matching.verify import Verification, VerifyConfig, extract_features, verify_candidates, verify_pair


def photo(name: str) -> Image.Image:
    import skimage.data

    return Image.fromarray(getattr(skimage.data, name)()).convert("RGB")


def jpeg(im: Image.Image, quality: int) -> Image.Image:
    """Re-save through Pillow's JPEG encoder, as a copy posted elsewhere would be."""
    buf = io.BytesIO()
    im.save(buf, "JPEG", quality=quality)
    buf.seek(0)
    return Image.open(buf).convert("RGB")


def tiles(im: Image.Image, n: int = 3) -> dict[tuple[int, int], Image.Image]:
    """Non-overlapping cells of an n x n grid, keyed by (column, row)."""
    w, h = im.size
    return {(i, j): im.crop((i * w // n, j * h // n, (i + 1) * w // n, (j + 1) * h // n))
            for i in range(n) for j in range(n)}


def iou(a, b) -> float:
    """Intersection over union of two (x0, y0, x1, y1) boxes (the Jaccard index; common practice)."""
    ix = max(0, min(a[2], b[2]) - max(a[0], b[0]))
    iy = max(0, min(a[3], b[3]) - max(a[1], b[1]))
    inter = ix * iy
    return inter / ((a[2] - a[0]) * (a[3] - a[1]) + (b[2] - b[0]) * (b[3] - b[1]) - inter)


# -- copies verify ---------------------------------------------------------------------------------
@pytest.mark.parametrize("name", ["astronaut", "coffee", "chelsea", "rocket"])
@pytest.mark.parametrize("area", [0.5, 0.3])
def test_a_resaved_resized_crop_verifies_and_its_box_is_the_crop(name, area):
    im = photo(name)
    w, h = im.size
    cw, ch = round(w * area ** 0.5), round(h * area ** 0.5)
    x0, y0 = (w - cw) // 3, (h - ch) * 2 // 3  # off-centre, so a box stuck in the middle would not pass
    crop = jpeg(im.crop((x0, y0, x0 + cw, y0 + ch)), 75).resize((round(cw * 0.8), round(ch * 0.8)))
    v = verify_pair(crop, im)
    assert v.verified, v.reason
    assert not v.mirrored
    # Floor 0.8: a box a few pixels off on a 200-400 px crop still has an IoU above 0.9
    # (the benchmark's worst crop box was 0.957), while a box shifted by a tenth of its
    # side both ways has 0.81 / 1.19 = 0.68 and fails.
    assert iou(v.box, (x0, y0, x0 + cw, y0 + ch)) >= 0.8
    # The copy was shrunk to 80 %, so one copy pixel spans 1 / 0.8 photo pixels.
    assert v.scale == pytest.approx(1 / 0.8, rel=0.05)
    assert abs(v.angle) < 2


def test_a_mirrored_copy_verifies_as_mirrored():
    im = photo("astronaut")
    flipped = jpeg(im.transpose(Image.Transpose.FLIP_LEFT_RIGHT), 75).resize((300, 300))
    v = verify_pair(flipped, im)
    assert v.verified and v.mirrored, v.reason
    # Mirroring x -> (width - 1) - x: the transform's x coefficient is negative, of size 512 / 300.
    assert v.transform[0][0] == pytest.approx(-512 / 300, rel=0.05)
    assert iou(v.box, (0, 0, 512, 512)) >= 0.9


def test_a_rotated_copy_verifies_with_its_angle():
    im = photo("coffee")
    rotated = jpeg(im.rotate(8, resample=Image.Resampling.BICUBIC), 75)  # Pillow turns counter-clockwise
    v = verify_pair(rotated, im)
    assert v.verified, v.reason
    assert v.angle == pytest.approx(8, abs=1)
    assert v.scale == pytest.approx(1, rel=0.05)


def test_the_candidate_may_be_the_crop():
    """The other way round: the query is the whole photo, the candidate a crop of it."""
    im = photo("chelsea")
    crop = im.crop((100, 50, 400, 250))
    v = verify_pair(im, crop)
    assert v.verified, v.reason
    assert v.box == (0, 0, 300, 200)  # the photo covers all of the crop (clipped to it)


@pytest.mark.parametrize("mode", ["L", "RGBA", "P", "I;16"])
def test_other_pillow_modes_verify(mode):
    im = photo("camera")  # a grey photo; the copy is a crop in another mode
    crop = im.crop((64, 64, 448, 448))
    if mode == "I;16":  # 16-bit grey, as a scanner writes it: the 8-bit values times 257
        copy = Image.fromarray(np.asarray(crop.convert("L")).astype(np.uint16) * 257)
    elif mode == "RGBA":  # opaque where the photo is, with a transparent band on the right edge
        copy = crop.convert("RGBA")
        alpha = np.full(copy.size[::-1], 255, np.uint8)
        alpha[:, -20:] = 0
        copy.putalpha(Image.fromarray(alpha))
    else:
        copy = crop.convert(mode)
    assert copy.mode == mode
    v = verify_pair(copy, im)
    assert v.verified, v.reason
    assert iou(v.box, (64, 64, 448, 448)) >= 0.8


# -- non-copies do not -------------------------------------------------------------------------------
def neighbour_pairs():
    """Every pair of side-by-side cells of a 3 x 3 grid, in one direction."""
    cells = [(i, j) for i in range(3) for j in range(3)]
    return [(a, b) for a in cells for b in cells if (b[0] - a[0], b[1] - a[1]) in ((1, 0), (0, 1))]


# skimage's grass photo holds a cloned region: cells (2, 0) and (2, 1) share about
# 90 x 90 px (see test_the_cloned_region_in_grass_is_found_and_is_real). Not a non-copy.
GRASS_CLONE = ((2, 0), (2, 1))


@pytest.mark.parametrize("name", ["brick", "grass", "gravel", "astronaut", "page"])
def test_neighbouring_tiles_do_not_verify(name):
    """Same texture, same light, no shared pixels: the hardest non-copies for a keypoint matcher.

    `page` (a scanned page of text) repeats the same glyphs along each line.
    """
    cells = tiles(photo(name))
    pairs = [p for p in neighbour_pairs() if not (name == "grass" and p == GRASS_CLONE)]
    assert len(pairs) >= 11
    for a, b in pairs:
        for query, candidate in ((cells[a], cells[b]), (cells[b], cells[a])):
            v = verify_pair(query, candidate)
            assert not v.verified, (name, a, b, v)
            assert v.reason


def test_the_cloned_region_in_grass_is_found_and_is_real():
    """The verifier matches grass cells (2, 0) and (2, 1); the raw pixels confirm they share a region.

    Oracle: warp the query onto the candidate with the returned transform and compare grey
    levels in 16-px blocks (benchmarks/bench_verify.block_differences). Truly shared pixels
    give blocks a few grey levels apart, unrelated grass tens of levels.
    """
    cells = tiles(photo("grass"))
    v = verify_pair(cells[GRASS_CLONE[0]], cells[GRASS_CLONE[1]])
    assert v.verified, v.reason
    diffs = block_differences(cells[GRASS_CLONE[0]], cells[GRASS_CLONE[1]], v.transform)
    assert len(diffs) >= 20
    assert np.percentile(diffs, 10) < 10 < 20 < np.median(diffs)
    # Control: the same comparison 40 px away from the found transform sees no shared region.
    moved = np.array(v.transform) + [[0, 0, 40], [0, 0, 0]]
    assert np.percentile(block_differences(cells[GRASS_CLONE[0]], cells[GRASS_CLONE[1]], moved), 10) > 15


def test_different_photos_do_not_verify():
    names = ["astronaut", "coffee", "chelsea", "rocket", "camera", "brick"]
    photos = [photo(n) for n in names]
    for i, query in enumerate(photos):
        others = photos[:i] + photos[i + 1:]
        for v in verify_candidates(query, others):
            assert not v.verified, (names[i], v)
            assert v.box is None


@pytest.mark.parametrize("names", [("coffee", "chelsea"), ("astronaut", "rocket"), ("brick", "grass")])
def test_the_same_caption_on_two_photos_is_not_a_copy(names):
    """Two different photos carrying the same caption share those pixels, but are not copies."""
    from PIL import ImageDraw, ImageFont

    def captioned(im: Image.Image) -> Image.Image:
        im = im.resize((512, round(512 * im.height / im.width)))
        draw = ImageDraw.Draw(im)
        draw.rectangle((0, im.height - 72, 512, im.height), fill=(20, 20, 24))
        draw.text((12, im.height - 62), "harbour gazette 2019", fill=(240, 240, 240),
                  font=ImageFont.load_default(size=48))
        return im

    v = verify_pair(captioned(photo(names[0])), captioned(photo(names[1])))
    assert not v.verified, v
    assert v.inliers >= 12  # the caption itself does match: the spread gate is what turns it away
    assert "cover" in v.reason


# -- the batched helper ------------------------------------------------------------------------------
def test_verify_candidates_agrees_with_verify_pair():
    im = photo("rocket")
    w, h = im.size
    query = jpeg(im.crop((w // 4, h // 4, w * 3 // 4, h * 3 // 4)), 75)
    candidates = [photo("coffee"), im, im.transpose(Image.Transpose.FLIP_LEFT_RIGHT), Image.new("RGB", (64, 64))]
    batched = verify_candidates(query, candidates)
    assert [v.verified for v in batched] == [False, True, True, False]
    assert batched[2].mirrored
    for v, candidate in zip(batched, candidates):
        assert v == verify_pair(query, candidate)
    assert verify_candidates(query, []) == []


# -- degenerate input --------------------------------------------------------------------------------
@pytest.mark.parametrize("bad, words", [
    (Image.new("RGB", (300, 200), (128, 128, 128)), "no keypoints"),
    (Image.new("RGB", (10, 10), (200, 10, 10)), "too small"),
    (Image.new("L", (0, 0)), "too small"),
    (Image.new("RGBA", (300, 300), (0, 0, 0, 0)), "no keypoints"),  # fully transparent
])
def test_degenerate_images_give_a_reason_not_an_error(bad, words):
    im = photo("astronaut")
    for v, side in ((verify_pair(bad, im), "query"), (verify_pair(im, bad), "candidate")):
        assert isinstance(v, Verification)
        assert not v.verified
        assert v.reason.startswith(side) and words in v.reason
        assert v.box is None and v.inliers == 0
    assert len(extract_features(bad)) == 0


def test_to_dict_is_plain_json():
    im = photo("coffee")
    v = verify_pair(im.crop((0, 0, 400, 300)), im)
    d = json.loads(json.dumps(v.to_dict()))
    assert d["verified"] is True and d["box"] == list(v.box)
    assert np.allclose(d["transform"], v.transform)
    assert set(d) >= {"verified", "inliers", "matches", "inlier_ratio", "box", "scale", "mirrored", "reason"}
    assert json.loads(json.dumps(verify_pair(Image.new("L", (5, 5)), im).to_dict()))["box"] is None


def test_bad_arguments_raise_usage_errors():
    im = photo("coffee")
    with pytest.raises(UsageError, match="PIL image"):
        verify_pair(np.zeros((100, 100, 3), np.uint8), im)
    with pytest.raises(UsageError, match="candidate 1"):
        verify_candidates(im, [im, "coffee.jpg"])
    with pytest.raises(UsageError):
        VerifyConfig(min_inliers=2)
    with pytest.raises(UsageError):
        verify_pair(im, im, max_side=10)


def test_overrides_reach_the_config():
    """`min_inliers` given as a keyword gates the same match that the default lets through."""
    im = photo("astronaut")
    crop = im.crop((100, 100, 400, 400))
    loose = verify_pair(crop, im)
    assert loose.verified
    strict = verify_pair(crop, im, min_inliers=loose.inliers + 1)
    assert not strict.verified and "too few" in strict.reason


def _opencv_ratio_matches(query, candidate, ratio: float) -> np.ndarray:
    """The same matching written with OpenCV's brute-force Hamming matcher (cv2.BFMatcher.knnMatch,
    k=2), Lowe's ratio test and one query keypoint per candidate keypoint: the reference."""
    import cv2

    best: dict[int, tuple[float, int]] = {}
    for pair in cv2.BFMatcher(cv2.NORM_HAMMING).knnMatch(query.descriptors, candidate.descriptors, k=2):
        first = pair[0]
        if len(pair) == 2 and first.distance >= ratio * pair[1].distance:
            continue
        if first.trainIdx not in best or first.distance < best[first.trainIdx][0]:
            best[first.trainIdx] = (first.distance, first.queryIdx)
    return np.array(sorted((qi, ci) for ci, (_, qi) in best.items()), np.int64).reshape(-1, 2)


@pytest.mark.parametrize("pair", [("coffee", "crop"), ("astronaut", "mirror"), ("brick", "tile"), ("chelsea", "rocket")])
def test_ratio_matches_agree_with_opencv_brute_force_matching(pair):
    """The Hamming distance table finds the same ratio-test matches as OpenCV's BFMatcher on real photos:
    a copy, a mirror image, a neighbouring tile and an unrelated photo."""
    from nearsight.indexer.matching.verify import ratio_matches

    name, kind = pair
    im = photo(name)
    w, h = im.size
    other = {"crop": lambda: jpeg(im.crop((w // 5, h // 6, w, h)), 60),
             "mirror": lambda: im.transpose(Image.Transpose.FLIP_LEFT_RIGHT),
             "tile": lambda: tiles(im)[(1, 1)],
             "rocket": lambda: photo("rocket")}[kind]()
    cfg = VerifyConfig()
    q, c = extract_features(other, cfg), extract_features(im, cfg)
    for ratio in (0.7, cfg.ratio, 1.0):
        assert np.array_equal(ratio_matches(q, c, ratio), _opencv_ratio_matches(q, c, ratio))


@pytest.mark.parametrize("m", [1, 2, 7, 600])
def test_nearest_two_against_scipy_hamming_distances(m):
    """The two smallest Hamming distances of each row and the nearest one's index, against SciPy's
    `cdist(..., "hamming")` on the unpacked bits (a share of the 256 bits, so times 256) and NumPy's
    argmin (the lowest index among equals). Codes drawn near one another so that ties occur."""
    from scipy.spatial.distance import cdist

    from nearsight.indexer.matching.verify import nearest_two

    rng = np.random.default_rng(m)
    xb = rng.integers(0, 256, (m, 32), dtype=np.uint8)
    xb[-1] = xb[0]  # a repeated code: its copies below tie between rows 0 and m - 1
    flips = (rng.random((300, 256)) < 0.05).astype(np.uint8)
    xq = np.bitwise_xor(xb[rng.integers(0, m, 300)], np.packbits(flips, axis=1))
    xq[:5] = xb[0]  # exact copies: distance 0 (to two rows of xb, when it has more than one)
    want = np.rint(cdist(np.unpackbits(xq, axis=1), np.unpackbits(xb, axis=1), "hamming") * 256)
    first, second, nearest = nearest_two(xq, xb)
    ranked = np.sort(want, axis=1)
    assert np.array_equal(first, ranked[:, 0])
    assert np.array_equal(second, ranked[:, 1] if m > 1 else np.full(300, np.inf))
    assert np.array_equal(nearest, want.argmin(axis=1))


def test_query_keypoints_found_once_give_the_same_verdicts():
    """Verifying with the query's keypoints kept (verify.QueryFeatures) equals verifying the image."""
    from nearsight.indexer.matching.verify import QueryFeatures

    im = photo("coffee")
    query = jpeg(im.crop((0, 0, 380, 300)), 70).transpose(Image.Transpose.FLIP_LEFT_RIGHT)
    candidates = [im, photo("chelsea"), tiles(im)[(2, 2)]]
    kept = QueryFeatures(query)
    assert verify_candidates(kept, candidates) == verify_candidates(query, candidates)
    assert verify_candidates(kept, candidates[:1])[0].mirrored  # found through the kept mirrored keypoints


@pytest.mark.parametrize("name", ["astronaut", "coffee", "rocket"])
def test_an_upside_down_copy_verifies_as_a_mirror_turned_half_a_turn(name):
    """Pillow's top-to-bottom flip is the mirror image turned 180 degrees: verification finds it
    mirrored, at a half turn, with the whole candidate as its box."""
    im = photo(name)
    v = verify_pair(jpeg(im.transpose(Image.Transpose.FLIP_TOP_BOTTOM), 75), im)
    assert v.verified and v.mirrored, v.reason
    assert abs(abs(v.angle) - 180) < 3
    assert iou(v.box, (0, 0, *im.size)) > 0.95


def test_the_contrast_stretch_agrees_with_scikit_image_rescale_intensity():
    """`stretch_contrast` is a linear map of the two percentiles onto 0 and 255, as scikit-image's
    `exposure.rescale_intensity(in_range=(lo, hi), out_range=(0, 255))` computes it (clipped outside)."""
    from skimage import exposure

    from nearsight.indexer.matching.verify import MIN_STRETCH_RANGE, stretch_contrast

    grey = np.asarray(photo("moon").convert("L"))
    dark = (grey // 4 + 10).astype(np.uint8)  # a faded copy: levels 10-73
    lo, hi = np.percentile(dark, (1.0, 99.5))
    expected = exposure.rescale_intensity(dark.astype(np.float64), in_range=(lo, hi), out_range=(0.0, 255.0))
    got = stretch_contrast(dark, (1.0, 99.5))
    assert got.dtype == np.uint8
    assert np.abs(got.astype(np.float64) - expected).max() <= 0.5 + 1e-6  # rounding only
    assert got.min() == 0 and got.max() == 255
    flat = np.full((64, 64), 120, np.uint8)
    flat[::7, ::5] += MIN_STRETCH_RANGE - 1  # a near-flat picture is left as it is, noise not amplified
    assert np.array_equal(stretch_contrast(flat, (1.0, 99.5)), flat)


FADED = ["coffee", "chelsea", "rocket", "brick", "moon", "retina"]


@pytest.mark.parametrize("name", FADED)
def test_a_faded_blurred_copy_verifies_with_the_stretch(name):
    """A copy at a tenth of the contrast, blurred (Pillow's ImageEnhance and GaussianBlur), verifies against its
    original; without the stretch FAST finds too few corners on it (measured once on these six photos: none of
    them verified, every one did with the stretch on 36-259 inliers)."""
    from PIL import ImageEnhance, ImageFilter

    im = photo(name)
    faded = ImageEnhance.Contrast(im).enhance(0.1).filter(ImageFilter.GaussianBlur(1.5))
    with_stretch = verify_pair(im, faded, config=VerifyConfig(max_side=256))
    assert with_stretch.verified, with_stretch.reason
    without = verify_pair(im, faded, config=VerifyConfig(max_side=256, stretch=None))
    assert with_stretch.inliers > without.inliers


@pytest.mark.parametrize("name", ["brick", "gravel", "astronaut"])
def test_faded_neighbouring_tiles_do_not_verify(name):
    """The stretch amplifies a faded tile's texture too; its neighbours, faded the same way, still do not verify."""
    from PIL import ImageEnhance

    cells = {key: ImageEnhance.Contrast(cell).enhance(0.15) for key, cell in tiles(photo(name)).items()}
    for a, b in neighbour_pairs():
        v = verify_pair(cells[a], cells[b], config=VerifyConfig(max_side=256))
        assert not v.verified, (name, a, b, v)


@pytest.mark.parametrize("name", ["moon", "camera", "hubble_deep_field"])
def test_grey_percentiles_agree_with_numpy(name):
    """The histogram read-off gives numpy.percentile's default (linear) values exactly, edges included."""
    from nearsight.indexer.matching.verify import grey_percentiles

    grey = np.asarray(photo(name).convert("L"))
    for part in (grey, grey[:7, :5], grey[:1, :1]):
        qs = (0.0, 1.0, 37.3, 99.5, 100.0)
        assert np.allclose(grey_percentiles(part, qs), np.percentile(part, qs), rtol=0, atol=1e-9)


def test_a_bad_stretch_is_refused():
    with pytest.raises(UsageError, match="stretch"):
        VerifyConfig(stretch=(99.5, 1.0))
    with pytest.raises(UsageError, match="stretch"):
        VerifyConfig(stretch=(0.0, 101.0))
