"""Re-ranking by geometric verification (indexer/matching/rerank.py), on scikit-image's bundled photos."""

import pytest
from PIL import Image

from nearsight.indexer.matching.rerank import boosted, rerank


def _photo(name):
    import skimage.data

    return Image.fromarray(getattr(skimage.data, name)()).convert("RGB")


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """The left and right halves of scikit-image's brick wall (neighbouring, non-overlapping tiles of one
    texture), and astronaut; the query is a 50 %-area crop of the left half, re-saved as JPEG q75."""
    folder = tmp_path_factory.mktemp("rerank")
    brick = _photo("brick")
    w, h = brick.size
    left, right = brick.crop((0, 0, w // 2, h)), brick.crop((w // 2, 0, w, h))
    paths = {}
    for name, im in (("left", left), ("right", right), ("astronaut", _photo("astronaut"))):
        paths[name] = folder / f"{name}.png"
        im.save(paths[name])
    lw, lh = left.size
    crop = left.crop((lw // 8, lh // 8, lw // 8 + int(lw * 0.71), lh // 8 + int(lh * 0.71)))
    crop.save(folder / "query.jpg", quality=75)
    with Image.open(folder / "query.jpg") as im:
        return paths, im.convert("RGB")


def test_the_crop_is_verified_and_moves_above_a_neighbouring_tile(files):
    paths, query = files
    # The descriptor ranked the neighbouring tile first, as a texture-minded encoder does.
    results = [{"id": 2, "similarity": 0.93, "duplicate": True}, {"id": 1, "similarity": 0.90, "duplicate": True},
               {"id": 3, "similarity": 0.20, "duplicate": False}]
    candidates = {1: str(paths["left"]), 2: str(paths["right"]), 3: str(paths["astronaut"])}
    out = rerank(query, [dict(r) for r in results], candidates, top=3, threshold=0.92)
    assert [r["id"] for r in out] == [1, 2, 3]
    first = out[0]
    assert first["evidence"]["verified"] and first["descriptor_similarity"] == 0.90
    assert first["similarity"] == pytest.approx(boosted(0.90)) == pytest.approx(0.95)
    assert first["duplicate"]
    # The neighbouring tile fails verification and keeps its score; astronaut is not verified either.
    tile = out[1]
    assert not tile["evidence"]["verified"] and tile["similarity"] == 0.93
    assert not out[2]["evidence"]["verified"] and out[2]["similarity"] == 0.20
    # The matched box (fractions of the candidate) covers where the crop was cut from: x from 1/8 to 0.835.
    x0, y0, x1, y1 = first["evidence"]["box"]
    assert abs(x0 - 0.125) < 0.05 and abs(x1 - 0.835) < 0.05 and abs(y0 - 0.125) < 0.05


def test_only_the_top_candidates_are_verified_and_unreadable_ones_are_skipped(files, tmp_path):
    paths, query = files
    missing = tmp_path / "gone.png"
    results = [{"id": 9, "similarity": 0.8}, {"id": 2, "similarity": 0.7}, {"id": 1, "similarity": 0.6}]
    out = rerank(query, [dict(r) for r in results], {9: str(missing), 2: str(paths["right"]), 1: str(paths["left"])},
                 top=2)
    by_id = {r["id"]: r for r in out}
    assert "evidence" not in by_id[9]  # could not be read: left as it was
    assert "evidence" in by_id[2] and "evidence" not in by_id[1]  # beyond the top 2: not verified
    # (`Searcher.neighbours` gives every result evidence=None and its descriptor score before re-ranking.)
    assert [r["similarity"] for r in out] == sorted((r["similarity"] for r in out), reverse=True)


def test_more_candidates_are_verified_only_when_the_best_is_not(files):
    """`rerank_more`: the crop's own tile ranked fourth by the descriptor is verified and moves first
    when the first two fail; when the best candidate verifies, nothing past `top` is checked."""
    from nearsight.indexer.matching.rerank import rerank_more

    paths, query = files
    candidates = {1: str(paths["left"]), 2: str(paths["right"]), 3: str(paths["astronaut"]), 4: str(paths["right"])}
    results = [{"id": 2, "similarity": 0.9}, {"id": 3, "similarity": 0.89}, {"id": 4, "similarity": 0.87},
               {"id": 1, "similarity": 0.85}]
    without = rerank_more(query, [dict(r) for r in results], candidates, top=2, more=0)
    assert without[0]["id"] == 2 and "evidence" not in {r["id"]: r for r in without}[1]
    more = rerank_more(query, [dict(r) for r in results], candidates, top=2, more=2)
    assert more[0]["id"] == 1 and more[0]["evidence"]["verified"]
    assert more[0]["similarity"] == pytest.approx(boosted(0.85)) == pytest.approx(0.925)
    # The left tile first: verified at once, so the other candidates past top=1 stay unchecked.
    first = rerank_more(query, [dict(results[3])] + [dict(r) for r in results[:3]], candidates, top=1, more=3)
    assert first[0]["id"] == 1 and all("evidence" not in r for r in first[1:])




@pytest.mark.parametrize("length", [6, 40])
def test_a_candidate_placed_after_the_head_is_verified_whatever_its_score_and_the_lists_length(files, length):
    """A candidate put right after the head (as region descriptors place theirs) is among the next `more`
    checked even when its score is the lowest: the list is not re-sorted before choosing them, so the
    answer does not depend on how many results were asked for."""
    from nearsight.indexer.matching.rerank import rerank_more

    paths, query = files
    candidates = {1: str(paths["left"])} | {i: str(paths["right" if i % 2 else "astronaut"]) for i in range(2, 100)}
    look_alikes = [{"id": i, "similarity": 0.9 - 0.001 * i} for i in range(2, 2 + length)]
    results = look_alikes[:2] + [{"id": 1, "similarity": 0.3}] + look_alikes[2:]
    out = {r["id"]: r for r in rerank_more(query, results, candidates, top=2, more=3)}
    assert out[1]["evidence"]["verified"] and out[1]["similarity"] == pytest.approx(boosted(0.3))

# scikit-image's bundled photos (skimage.data); `cat` is left out, being chelsea again.
FINE_PHOTOS = ("astronaut", "coffee", "chelsea", "rocket", "camera", "brick", "grass", "gravel", "immunohistochemistry", "hubble_deep_field", "retina", "page", "text", "moon", "coins", "clock")


@pytest.fixture(scope="module")
def fifths(tmp_path_factory):
    """Per photo (at most 512 px): its small copy (VERIFY_SIDE, as the store keeps it), a crop keeping 0.45 of each
    side (a fifth of the area) at the photo's own resolution, where it was cut (fractions), and the strip left
    of the crop as a file of its own (a neighbouring tile: no pixel in common with the crop)."""
    from nearsight.indexer.matching.rerank import VERIFY_SIDE

    folder = tmp_path_factory.mktemp("fifths")
    out = {}
    for name in FINE_PHOTOS:
        im = _photo(name)
        im.thumbnail((512, 512))
        w, h = im.size
        x0, y0, x1, y1 = int(0.3 * w), int(0.35 * h), int(0.75 * w), int(0.8 * h)
        small = im.copy()
        small.thumbnail((VERIFY_SIDE, VERIFY_SIDE))
        small.save(folder / f"{name}-small.png")
        im.crop((0, 0, x0, h)).save(folder / f"{name}-strip.png")
        out[name] = (str(folder / f"{name}-small.png"), im.crop((x0, y0, x1, y1)), (x0 / w, y0 / h, x1 / w, y1 / h),
                     str(folder / f"{name}-strip.png"))
    return out


def test_the_fine_check_confirms_a_fifth_of_a_photo_that_the_small_copy_is_too_coarse_for(fifths):
    """`rerank_fine`: the photo's small copy is enlarged to twice the side with four times the keypoints,
    so a crop keeping a fifth of it meets it at its own scale. Measured 2026-12-03 on these 16 photos:
    6 crops verify at VERIFY_SIDE (`rerank`), 14 with the fine check (retina's and clock's smooth areas
    give no keypoints); the floor leaves one photo of room. The reference for the box is where the crop
    was cut."""
    from nearsight.indexer.matching.rerank import rerank, rerank_fine

    plain, fine = 0, 0
    for name, (small, crop, cut, _strip) in fifths.items():
        results = rerank(crop, [{"id": 1, "similarity": 0.6}], {1: small}, top=1)
        plain += results[0]["evidence"]["verified"]
        out = rerank_fine(crop, [dict(r) for r in results], {1: small}, count=1)
        evidence = out[0]["evidence"]
        assert evidence["verified"] or not results[0]["evidence"]["verified"], name  # never lost
        if evidence["verified"]:
            fine += 1
            assert out[0]["similarity"] == pytest.approx(boosted(0.6), abs=1e-6)
            assert max(abs(a - b) for a, b in zip(evidence["box"], cut)) < 0.03, (name, evidence["box"], cut)
    print(f"a fifth of a photo verified: {plain} at the small copy's side, {fine} with the fine check, "
          f"of {len(fifths)}")
    assert fine >= 13 and fine > plain


def test_the_fine_check_confirms_no_neighbouring_tile_or_other_photo(fifths):
    """The crop against the strip beside it (same photo, no pixel in common) and against every other
    photo's small copy: nothing verifies, and nothing's score moves."""
    from nearsight.indexer.matching.rerank import rerank_fine

    names = list(fifths)
    for i, name in enumerate(names):
        _small, crop, _cut, strip = fifths[name]
        others = {2 + j: fifths[other][0] for j, other in enumerate(names) if other != name}
        candidates = {1: strip, **others}
        results = [{"id": ident, "similarity": 0.5} for ident in candidates]
        out = rerank_fine(crop, [dict(r) for r in results], candidates, count=len(candidates))
        assert not [r["id"] for r in out if (r.get("evidence") or {}).get("verified")], name
        assert all(r["similarity"] == 0.5 for r in out)


def test_the_fine_check_runs_only_when_the_best_is_still_unconfirmed(fifths):
    """`rerank_more(..., fine=N)`: the fine check is the last round; a query whose best verified earlier
    pays nothing for it, and a hard crop's original moves first once it confirms."""
    from nearsight.indexer.matching.rerank import rerank_more

    small, crop, _cut, strip = fifths["rocket"]  # 0 inliers at the small copy's side (measured)
    results = [{"id": 1, "similarity": 0.8}, {"id": 2, "similarity": 0.7}]
    without = rerank_more(crop, [dict(r) for r in results], {1: strip, 2: small}, top=2, more=0)
    assert not any(r["evidence"]["verified"] for r in without)
    finely = rerank_more(crop, [dict(r) for r in results], {1: strip, 2: small}, top=2, more=0, fine=2)
    assert finely[0]["id"] == 2 and finely[0]["evidence"]["verified"]
    # The copy itself first: verified at once, so the strip is never checked finely (its evidence stays None).
    copy_first = rerank_more(crop, [{"id": 3, "similarity": 0.9}, {"id": 1, "similarity": 0.8, "evidence": None}],
                             {3: small, 1: strip}, top=1, more=0, fine=2)
    assert copy_first[0]["id"] == 3 and copy_first[0]["evidence"]["verified"]
    assert copy_first[1]["evidence"] is None


def test_the_fine_check_reaches_the_querys_own_candidates_behind_other_views_ones(fifths, monkeypatch):
    """Candidates found through another view (here marked as regions, scoring higher) fill the `count` places;
    the query's own best candidates (FINE_DIRECT of them) are checked too, so the original of a hard crop that
    the image as given found second still confirms."""
    from nearsight.indexer.matching import rerank as rerank_module
    from nearsight.indexer.matching.rerank import FINE_DIRECT, rerank_fine

    small, crop, _cut, strip = fifths["rocket"]
    others = {10 + j: fifths[name][0] for j, name in enumerate(("coffee", "chelsea", "camera", "brick"))}
    results = [{"id": i, "similarity": 0.9 - 0.01 * j, "_other_view": "region"} for j, i in enumerate(others)]
    results += [{"id": 1, "similarity": 0.5}, {"id": 2, "similarity": 0.45}]  # the strip beside it, then the copy
    candidates = {**others, 1: strip, 2: small}
    out = rerank_fine(crop, [dict(r) for r in results], candidates, count=2)
    assert FINE_DIRECT >= 2
    copy = next(r for r in out if r["id"] == 2)
    assert copy["evidence"]["verified"] and copy["similarity"] == pytest.approx(boosted(0.45), abs=1e-6)
    assert [r["id"] for r in out if (r.get("evidence") or {}).get("verified")] == [2]
    # Without those places, the copy behind the other views' candidates is never checked.
    monkeypatch.setattr(rerank_module, "FINE_DIRECT", 0)
    out = rerank_fine(crop, [dict(r) for r in results], candidates, count=2)
    assert not any((r.get("evidence") or {}).get("verified") for r in out)


def test_the_fine_check_leaves_a_query_without_keypoints_as_it_was(fifths):
    """A flat grey query has no ORB keypoints (nothing for FAST to find): no candidate is read or changed."""
    from nearsight.indexer.matching.rerank import rerank_fine

    small = fifths["astronaut"][0]
    results = [{"id": 1, "similarity": 0.7, "evidence": None}]
    out = rerank_fine(Image.new("RGB", (300, 200), (128, 128, 128)), [dict(r) for r in results], {1: small}, count=1)
    assert out == results


def _iou(a, b):
    """Intersection over union of two (x0, y0, x1, y1) boxes, as the PASCAL VOC detection measure defines it."""
    ix = max(0.0, min(a[2], b[2]) - max(a[0], b[0]))
    iy = max(0.0, min(a[3], b[3]) - max(a[1], b[1]))
    inter = ix * iy
    union = (a[2] - a[0]) * (a[3] - a[1]) + (b[2] - b[0]) * (b[3] - b[1]) - inter
    return inter / union


@pytest.mark.parametrize("name, corner", [("astronaut", (0.05, 0.1)), ("coffee", (0.2, 0.15)),
                                          ("chelsea", (0.1, 0.2)), ("rocket", (0.2, 0.05))])
def test_the_match_box_of_a_60_percent_crop_covers_where_it_was_cut(name, corner, tmp_path):
    """The evidence box (fractions of the candidate) against the crop's true region: IoU >= 0.7."""
    photo = _photo(name)
    photo.save(tmp_path / "original.png")
    w, h = photo.size
    side = 0.6 ** 0.5  # 60 % of the area, the aspect kept
    true = (corner[0], corner[1], corner[0] + side, corner[1] + side)
    photo.crop((round(true[0] * w), round(true[1] * h), round(true[2] * w), round(true[3] * h))).save(
        tmp_path / "crop.jpg", quality=85)
    with Image.open(tmp_path / "crop.jpg") as im:
        query = im.convert("RGB")
    (result,) = rerank(query, [{"id": 1, "similarity": 0.5}], {1: str(tmp_path / "original.png")}, top=1)
    assert result["evidence"]["verified"], result["evidence"]
    iou = _iou(result["evidence"]["box"], true)
    assert iou >= 0.7


@pytest.mark.parametrize("name, corner", [("astronaut", (0.05, 0.1)), ("chelsea", (0.1, 0.2))])
def test_the_match_box_is_drawn_on_both_images(name, corner, tmp_path):
    """The other way round, as a review page compares a keeper (the original, as the query) with its crop:
    `query_box` (fractions of the query) covers where the crop was cut, IoU >= 0.7 (PASCAL VOC's measure),
    and `box` (fractions of the candidate, here the whole crop) covers nearly all of the crop."""
    photo = _photo(name)
    w, h = photo.size
    side = 0.6 ** 0.5
    true = (corner[0], corner[1], corner[0] + side, corner[1] + side)
    photo.crop((round(true[0] * w), round(true[1] * h), round(true[2] * w), round(true[3] * h))).save(
        tmp_path / "crop.jpg", quality=85)
    (result,) = rerank(photo, [{"id": 1, "similarity": 0.5}], {1: str(tmp_path / "crop.jpg")}, top=1)
    evidence = result["evidence"]
    assert evidence["verified"], evidence
    assert _iou(evidence["query_box"], true) >= 0.7
    assert _iou(evidence["box"], (0.0, 0.0, 1.0, 1.0)) >= 0.85
