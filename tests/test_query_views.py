"""Extra views of a query: the picture inside a frame, and the mirror image.

Frames are checked against Pillow's own bounding box of what differs from the frame colour
(ImageChops.difference + getbbox), on scikit-image's bundled photos (open data). Mirror
scoring is checked against a brute-force NumPy computation over every indexed vector.
"""

import io

import faiss
import numpy as np
import pytest
from PIL import Image, ImageChops, ImageOps
from skimage import data

from nearsight.indexer.matching.frames import ANALYSIS_SIDE, frame_box, inside_frame
from nearsight.indexer.matching.query import _better_of, _settle_views

PHOTOS = ("astronaut", "coffee", "chelsea", "rocket", "hubble_deep_field")  # the last: dark sky at its edges


def _photo(name: str) -> Image.Image:
    return Image.fromarray(getattr(data, name)()).convert("RGB")


def _pillow_box(framed: Image.Image, colour) -> tuple[int, int, int, int]:
    """Pillow's bounding box of the pixels that differ from the frame colour."""
    return ImageChops.difference(framed, Image.new("RGB", framed.size, colour)).getbbox()


FRAMES = [(0.05, (255, 255, 255)), (0.15, (0, 0, 0)), (0.1, (90, 60, 30))]


@pytest.mark.parametrize("name, share, colour", [(n, s, c) for n in PHOTOS for s, c in FRAMES
                                                 if not (n == "hubble_deep_field" and c == (0, 0, 0))])
def test_a_frame_is_found_where_pillow_says_the_picture_is(name, share, colour):
    im = _photo(name)
    framed = ImageOps.expand(im, border=round(share * max(im.size)), fill=colour)
    box = frame_box(framed)
    reference = _pillow_box(framed, colour)
    assert box is not None
    # At most 2 lines of the picture are lost per side at the analysis scale (one blended
    # line plus rounding), i.e. about 2 / ANALYSIS_SIDE of the side; never any frame left inside.
    tolerance = 2 * max(framed.size) / ANALYSIS_SIDE + 1
    assert all(abs(a - b) <= tolerance for a, b in zip(box, reference)), (box, reference)
    assert box[0] >= reference[0] and box[1] >= reference[1] and box[2] <= reference[2] and box[3] <= reference[3]


def test_dark_sky_in_a_black_frame_is_not_cut_into():
    """Where the picture's edge has the frame's colour on every side, frame and picture cannot be told
    apart: no frame is reported (the query is searched as given), and never a box inside the picture."""
    im = _photo("hubble_deep_field")
    framed = ImageOps.expand(im, border=round(0.15 * max(im.size)), fill=(0, 0, 0))
    box = frame_box(framed)
    reference = _pillow_box(framed, (0, 0, 0))
    assert box is None or (box[0] <= reference[0] and box[1] <= reference[1]
                           and box[2] >= reference[2] and box[3] >= reference[3])


def test_letterbox_bars_of_a_jpeg_are_found():
    im = _photo("chelsea")  # 451 x 300
    canvas = Image.new("RGB", (451, round(451 * 9 / 16) + 120), (0, 0, 0))
    canvas.paste(im, (0, 60))
    buf = io.BytesIO()
    canvas.save(buf, "JPEG", quality=75)  # JPEG rings at the bars' edge: the band test must tolerate it
    box = frame_box(Image.open(io.BytesIO(buf.getvalue())))
    assert box is not None
    left, top, right, bottom = box
    assert (left, right) == (0, 451)
    assert 60 <= top <= 66 and 360 - 6 <= bottom <= 360


@pytest.mark.parametrize("name", ("astronaut", "coffee", "chelsea", "rocket"))
def test_photos_without_a_frame_have_none(name):
    assert frame_box(_photo(name)) is None
    assert inside_frame(_photo(name)) is None


def test_a_thin_line_or_a_frame_that_leaves_too_little_is_not_a_frame():
    im = _photo("coffee")
    assert frame_box(ImageOps.expand(im, border=2, fill=(255, 255, 255))) is None  # under 2 % of the side
    tiny = im.resize((60, 40))
    assert frame_box(ImageOps.expand(tiny, border=80, fill=(0, 0, 0))) is None  # picture under 40 % of a side


def test_mirror_max_scoring_equals_brute_force_over_both_views():
    rng = np.random.default_rng(0)
    xb = rng.normal(size=(500, 32)).astype(np.float32)
    xb /= np.linalg.norm(xb, axis=1, keepdims=True)
    q, qm = rng.normal(size=(2, 32)).astype(np.float32)
    q, qm = q / np.linalg.norm(q), qm / np.linalg.norm(qm)
    index = faiss.IndexFlatIP(32)
    index.add(xb)
    n = 40
    D, I = index.search(np.stack([q, qm]), n)
    merged = _better_of([(float(d), int(i)) for d, i in zip(D[0], I[0])],
                        [(float(d), int(i)) for d, i in zip(D[1], I[1])])
    brute = np.maximum(xb @ q, xb @ qm)  # NumPy, every vector
    top = np.argsort(-brute)[:n]
    assert [i for _, _, i in merged[:n]] == top.tolist()
    np.testing.assert_allclose([d for d, _, _ in merged[:n]], brute[top], rtol=0, atol=1e-5)
    assert [m for _, m, _ in merged[:n]] == (xb[top] @ qm > xb[top] @ q).tolist()


def test_mirror_scores_enter_only_the_verified_head_and_stay_only_when_verified():
    direct = [(0.9, 1), (0.8, 2), (0.7, 3), (0.6, 4)]
    mirrored = [(0.95, 5), (0.85, 3), (0.65, 6), (0.62, 4)]
    merged = _better_of(direct, mirrored, head=2)
    # Best per id: 5 .95 (mirror), 1 .9, 3 .85 (mirror), 2 .8, 6 .65 (mirror), 4 .62 (mirror). Only the
    # first two are the head: 3 and 4 fall back to their direct scores, 6 (mirror only) is left out.
    assert merged == [(0.95, True, 5), (0.9, False, 1), (0.8, False, 2), (0.7, False, 3), (0.6, False, 4)]
    results = [{"id": i, "similarity": d, "descriptor_similarity": d, "evidence": None,
                **({"_other_view": True} if m else {})} for d, m, i in merged]
    unverified = [dict(r) for r in results]
    _settle_views(unverified, dict((i, d) for d, i in direct), 0.0)
    assert [r["id"] for r in unverified] == [1, 2, 3, 4]  # 5 was only found through the mirror
    results[0]["evidence"] = {"verified": True, "mirrored": True}
    _settle_views(results, dict((i, d) for d, i in direct), 0.0)
    assert results[0]["id"] == 5 and "_other_view" not in results[0]


def test_a_captioned_band_at_the_foot_is_a_frame_and_its_caption_stays_outside():
    from PIL import ImageDraw, ImageFont

    im = _photo("coffee")  # 600 x 400
    w, h = im.size
    band = 60
    captioned = im.copy()
    draw = ImageDraw.Draw(captioned)
    draw.rectangle((0, h - band, w, h), fill=(20, 20, 24))
    draw.text((15, h - band + 12), "harbour lantern 1987", fill=(240, 240, 240), font=ImageFont.load_default(28))
    box = frame_box(captioned)
    assert box is not None
    assert box[:3] == (0, 0, w)
    assert h - band - 4 <= box[3] <= h - band  # the caption's band is cut off, at most 4 lines of picture with it


TURNS = {"mirror": ImageOps.mirror, "flip": ImageOps.flip,
         "left": lambda im: im.transpose(Image.Transpose.ROTATE_90),
         "right": lambda im: im.transpose(Image.Transpose.ROTATE_270)}


@pytest.mark.parametrize("name", ["astronaut", "coffee", "chelsea", "rocket"])
@pytest.mark.parametrize("turn", sorted(TURNS))
def test_a_turned_view_made_from_the_encoder_s_square_is_what_the_turned_picture_gives(name, turn):
    # `Searcher._squares`: the other views turn the query's square at the model's input side instead of bringing
    # each turned large picture down again. Reference: Pillow's resize of the turned picture itself
    # (`resize_center_crop` of it). A mirror or flip is exact; a quarter turn swaps the order of Pillow's two
    # separable passes, which can round one grey level the other way.
    from nearsight.indexer.learning.inputs import resize_center_crop, square_batch

    im = _photo(name)
    square = Image.fromarray(square_batch([im], 128)[0])
    ours = np.asarray(TURNS[turn](square), dtype=int)
    reference = np.asarray(resize_center_crop(TURNS[turn](im), 128), dtype=int)
    assert ours.shape == reference.shape == (128, 128, 3)
    assert np.abs(ours - reference).max() <= (0 if turn in ("mirror", "flip") else 1)
