"""The same-frame check (indexer/matching/aligned.py): band images as SciPy's filters make them, Pearson's
correlation of them, and on real photos (scikit-image's bundled open data) a heavy JPEG re-save that ORB cannot
confirm is confirmed while a neighbouring tile of the same photo is not."""

import io

import numpy as np
import pytest
from PIL import Image
from scipy import ndimage, stats

from nearsight.indexer.matching import aligned
from nearsight.indexer.matching.aligned import BAND, GRID, MIN_CORRELATION, Frame, band_image, correlation


def _photo(name):
    import skimage.data

    return Image.fromarray(getattr(skimage.data, name)()).convert("RGB")


def _jpeg(image, quality):
    data = io.BytesIO()
    image.save(data, "JPEG", quality=quality)
    return Image.open(io.BytesIO(data.getvalue())).convert("RGB")


def _halves(name, side=256):
    """The left and right halves of a photo at `side` px wide: two tiles that share no pixel."""
    im = _photo(name)
    w, h = im.size
    left, right = im.crop((0, 0, w // 2, h)), im.crop((w // 2, 0, 2 * (w // 2), h))
    size = (side, round(side * h / (w // 2)))
    return left.resize(size), right.resize(size)


@pytest.mark.parametrize("name", ["camera", "coffee"])
def test_the_band_image_is_scipys_difference_of_gaussians_of_the_box_averaged_grid(name):
    im = _photo(name)
    # Reference: Pillow's box resampling to the grid, SciPy's Gaussian filter at both sigmas (its default
    # boundary), then zero mean and unit root mean square.
    grey = np.asarray(im.convert("L").resize((GRID, GRID), Image.Resampling.BOX), np.float64)
    expected = ndimage.gaussian_filter(grey, BAND[0]) - ndimage.gaussian_filter(grey, BAND[1])
    expected -= expected.mean()
    expected /= np.sqrt(np.mean(expected ** 2))
    np.testing.assert_allclose(band_image(im), expected, atol=1e-4)


def test_the_score_is_pearsons_correlation_of_the_band_images():
    a, b = _halves("astronaut")
    c = _jpeg(a, 10)
    fa, fc, fb = Frame(a), Frame(c), Frame(b)
    for x, y in [(fa, fc), (fa, fb)]:
        expected = stats.pearsonr(x.whole.band.ravel().astype(np.float64),
                                  y.whole.band.ravel().astype(np.float64)).statistic
        assert correlation(x, y) == pytest.approx(expected, abs=1e-5)


def test_frames_of_another_shape_and_flat_pictures_are_not_compared():
    a, _ = _halves("astronaut")
    w, h = a.size
    assert correlation(Frame(a), Frame(a.crop((0, 0, w, int(h * 0.8))))) is None  # a crop: ORB's question
    # A resize keeps the frame.
    assert correlation(Frame(a), Frame(a.resize((w // 2, h // 2)))) == pytest.approx(1.0, abs=0.01)
    flat = Image.new("RGB", a.size, (120, 130, 140))
    assert Frame(flat).whole.band is None and correlation(Frame(flat), Frame(flat)) is None


def test_a_shared_frame_does_not_make_two_photos_alike_and_a_framed_copy_matches_its_original():
    from PIL import ImageOps

    left, right = _halves("hubble_deep_field")  # dark: the frame's edge is the strongest structure in it
    framed_left = ImageOps.expand(left, border=24, fill="white")
    framed_right = ImageOps.expand(right, border=24, fill="white")
    # Without looking inside the frame, its sharp inner edge alone makes two different pictures correlate.
    bare = band_image(framed_left).ravel() @ band_image(framed_right).ravel() / GRID ** 2
    assert bare > MIN_CORRELATION
    assert correlation(Frame(framed_left), Frame(framed_right)) < 0.3
    assert correlation(Frame(framed_left), Frame(left)) > 0.9


def test_which_views_are_compared_when_one_or_both_images_have_a_frame():
    from nearsight.indexer.matching.aligned import View

    rng = np.random.default_rng(0)
    x, y, z = (rng.standard_normal((GRID, GRID)).astype(np.float32) for _ in range(3))

    def frame(whole, inside=None):
        f = Frame()
        f.whole, f.inside = whole, inside
        return f

    square, wide = (100, 100), (100, 50)
    # Both framed: the insides alone, though the wholes are the same.
    assert correlation(frame(View(x, square), View(y, square)), frame(View(x, square), View(z, square))) \
        == pytest.approx(float(np.mean(y * z)))
    # One framed: its inside against the other's whole ...
    assert correlation(frame(View(z, square), View(x, square)), frame(View(x, square))) == pytest.approx(float(np.mean(x * x)))
    # ... or, when those differ in shape (a dark edge taken for a frame), whole against whole.
    assert correlation(frame(View(x, square), View(y, wide)), frame(View(x, square))) == pytest.approx(float(np.mean(x * x)))


@pytest.fixture(scope="module")
def rocket(tmp_path_factory):
    """scikit-image's rocket, its left half as the original, that half re-saved at JPEG quality 3 as the query,
    and the right half (a neighbouring tile) as a look-alike, as files."""
    root = tmp_path_factory.mktemp("aligned")
    left, right = _halves("rocket")
    paths = {1: root / "left.png", 2: root / "right.png"}
    left.save(paths[1])
    right.save(paths[2])
    return _jpeg(left, 3), {i: str(p) for i, p in paths.items()}


def test_a_heavy_jpeg_copy_that_keypoints_miss_is_confirmed_and_its_neighbouring_tile_is_not(rocket):
    from nearsight.indexer.matching.rerank import boosted, rerank, verify_config
    from nearsight.indexer.matching.verify import verify_candidates

    query, paths = rocket
    original = Image.open(paths[1]).convert("RGB")
    # Quality 3 leaves flat 8 x 8 blocks: ORB (OpenCV) finds no transform between them.
    assert not verify_candidates(query, [original], config=verify_config())[0].verified

    def results():
        return [{"id": 2, "similarity": 0.62}, {"id": 1, "similarity": 0.60}]

    without = rerank(query, results(), paths, 2)
    assert [r["id"] for r in without] == [2, 1] and not any(r["evidence"]["verified"] for r in without)
    checked = rerank(query, results(), paths, 2, aligned=2)
    best, tile = checked
    assert best["id"] == 1 and best["evidence"]["verified"] and best["evidence"]["correlation"] >= MIN_CORRELATION
    assert best["similarity"] == pytest.approx(boosted(0.60), abs=1e-6) and best["evidence"]["box"] == [0, 0, 1, 1]
    assert tile["id"] == 2 and not tile["evidence"]["verified"] and tile["evidence"]["correlation"] < 0.3
    # Only the first `aligned` unconfirmed results are compared.
    first_only = rerank(query, results(), paths, 2, aligned=1)
    assert {r["id"]: r["evidence"]["correlation"] is None for r in first_only} == {1: True, 2: False}


def test_a_kept_frame_reads_back_as_made_and_a_stale_or_torn_one_is_not_used(tmp_path):
    a, _ = _halves("coffee")
    frame = Frame(a)
    data = aligned.encode(frame, 1234)
    back = aligned.decode(data, 1234)
    assert back.whole.size == frame.whole.size and back.inside is None
    np.testing.assert_allclose(back.whole.band, frame.whole.band, atol=2e-3 * np.abs(frame.whole.band).max())  # float16
    assert correlation(back, frame) == pytest.approx(1.0, abs=1e-4)
    assert aligned.decode(data, 999) is None  # made from another small copy
    assert aligned.decode(data[:-10], 1234) is None  # torn
    assert aligned.decode(b"NSAF0" + data[5:], 1234) is None  # another format
    flat = aligned.decode(aligned.encode(Frame(Image.new("RGB", (64, 48), "grey")), 10), 10)
    assert flat.whole.band is None and flat.whole.size == (64, 48)
    from PIL import ImageOps

    framed = Frame(ImageOps.expand(a, border=20, fill="white"))
    again = aligned.decode(aligned.encode(framed, 7), 7)
    assert again.inside.size == framed.inside.size and aligned.same_shape(again.inside.size, a.size)
    assert correlation(again, frame) == pytest.approx(correlation(framed, frame), abs=1e-3)
    # Read beside a store's small copy only: thumbs/ab/<hash>.jpg.
    digest = "ab" + "0" * 62
    small = tmp_path / "thumbs" / "ab" / f"{digest}.jpg"
    small.parent.mkdir(parents=True)
    a.save(small, "JPEG", quality=90)
    assert aligned.load(small) is None and not aligned.current(small)
    aligned.sidecar(small).write_bytes(aligned.encode(Frame(a), small.stat().st_size))
    assert aligned.current(small) and correlation(aligned.load(small), frame) == pytest.approx(1.0, abs=1e-4)
    mine = tmp_path / "mine.jpg"
    a.save(mine)
    aligned.sidecar(mine).write_bytes(aligned.encode(Frame(a), mine.stat().st_size))
    assert aligned.load(mine) is None  # a user's own file is never looked beside
