"""Verified pairs for groups: a crop of a real photo joins its group, a neighbouring tile does not.

Photos: scikit-image's bundled open data (skimage.data.astronaut, skimage.data.grass).
"""

from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from nearsight.indexer.building.build import load_vectors
from nearsight.indexer.matching.generations import require_current
from nearsight.indexer.matching.groups import build_groups
from nearsight.indexer.matching.pair_verify import (
    common_share, complete_components, shared_footprint_pairs, verified_pairs, verified_score)
from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store

from .test_pipeline import TINY


def index_photos(root: Path, astronaut_copies) -> tuple[Path, Path]:
    """A store indexed (tiny training, no calibration) from scikit-image's astronaut at 384 px with the files
    `astronaut_copies(astronaut, folder)` writes, two neighbouring tiles of its grass photo and four other
    photos; returns (store directory, photo folder)."""
    import skimage.data

    folder = root / "photos"
    folder.mkdir()
    astronaut = Image.fromarray(skimage.data.astronaut()).convert("RGB").resize((384, 384))
    astronaut.save(folder / "astronaut.png")
    astronaut_copies(astronaut, folder)
    grass = Image.fromarray(skimage.data.grass()).convert("RGB")
    grass.crop((0, 0, 256, 256)).save(folder / "grass-left.png")
    grass.crop((256, 0, 512, 256)).save(folder / "grass-right.png")  # touches the left tile, shares no pixel
    for name in ("camera", "coffee", "chelsea", "rocket"):  # other photos: enough files to train on
        Image.fromarray(getattr(skimage.data, name)()).convert("RGB").save(folder / f"{name}.png")
    store_dir = root / "store"
    with Store.open(store_dir, create=True, settings=load_settings(environ={})) as store:
        run_index(store, [folder], progress=False, train_config=TINY, calibrate=False)
    return store_dir, folder


@pytest.fixture(scope="module")
def photo_store(tmp_path_factory):
    def copies(astronaut, folder):
        astronaut.resize((192, 192), Image.Resampling.LANCZOS).save(folder / "astronaut-small.jpg", quality=80)
        astronaut.crop((40, 40, 361, 361)).save(folder / "astronaut-crop.jpg", quality=85)  # 70 % of the area

    return index_photos(tmp_path_factory.mktemp("pairs"), copies)


def test_verified_score_is_never_below_the_threshold_once_stored():
    # float32(0.815) is 0.81499999...: a verified pair stored at the threshold must still pass it.
    for t in (0.815, 0.6, 0.93, 0.3333):
        v = verified_score(t - 0.5, t)
        assert v.dtype == np.float32 and float(v) >= t
    assert float(verified_score(0.9, 0.5)) == pytest.approx(0.95)  # halfway to 1 (rerank.boosted)


def test_missing_pairs_of_a_small_component_are_verified(photo_store):
    store_dir, folder = photo_store
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        file_id = {name: store.catalog.file_id_for_path(folder / name) for name in
                   ("astronaut.png", "astronaut-small.jpg", "astronaut-crop.jpg", "grass-left.png", "grass-right.png")}
        ids = np.array(sorted(file_id.values()), np.int64)
        xb = np.eye(len(ids), dtype=np.float32)  # every cosine 0, under any floor: only the pairs and verification count
        a_, s_, c_ = file_id["astronaut.png"], file_id["astronaut-small.jpg"], file_id["astronaut-crop.jpg"]
        gl, gr = file_id["grass-left.png"], file_id["grass-right.png"]
        # The descriptor tied the small copy to both, but left the crop and its original apart; it put the
        # two grass tiles just above the similar threshold.
        pairs = (np.array([min(a_, s_), min(s_, c_), min(gl, gr)]), np.array([max(a_, s_), max(s_, c_), max(gl, gr)]),
                 np.array([0.95, 0.9, 0.7], np.float32))
        a, b, sims = complete_components(store, ids, xb, pairs, t_near=0.8)
        # Confirmation through a third file changes nothing here: the crop verifies directly, and the
        # grass tiles' component has two files.
        shared = complete_components(store, ids, xb, pairs, t_near=0.8, shared_part=0.5)
    for x, y in zip((a, b, sims), shared):
        np.testing.assert_array_equal(x, y)
    found = {(int(x), int(y)): float(v) for x, y, v in zip(a, b, sims)}
    assert found[(min(a_, c_), max(a_, c_))] >= 0.8  # the crop verified against its original
    assert found[(min(gl, gr), max(gl, gr))] == pytest.approx(0.7)  # the neighbouring tile did not
    assert len(found) == 4
    # With the verified pair, the three copies form one near-duplicate group; the tiles stay "similar".
    meta = {i: {"path": str(i), "content_hash": str(i), "width": 1, "height": 1, "file_size": 1, "format": "PNG",
                "mtime": 0.0} for i in ids.tolist()}
    groups = build_groups(a, b, sims, meta, t_near=0.8, t_similar=0.6, vectors=lambda sub: xb[np.searchsorted(ids, sub)])
    tiers = {frozenset(m.id for m in g.members): g.tier for g in groups}
    assert tiers == {frozenset({a_, s_, c_}): "near-duplicate", frozenset({gl, gr}): "similar"}


def test_each_images_closest_neighbours_are_verified_from_the_index(photo_store):
    store_dir, folder = photo_store
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        gen = require_current(store)
        ids, xb = load_vectors(store, gen.meta["model"])
        xb = gen.load_whitening().apply(xb)
        index = gen.load_index()
        # Every neighbour counts (floor -1) and nothing is near yet (t_near 1.0): all 9 x 8 / 2 pairs are candidates.
        a, b, sims = verified_pairs(store, index, ids, xb, top=8, floor=-1.0, t_near=1.0)
        names = {i: Path(store.catalog.image_meta([i])[i]["path"]).name for i in ids.tolist()}
    verified = {frozenset((names[int(x)], names[int(y)])) for x, y in zip(a, b)}
    astronauts = {"astronaut.png", "astronaut-small.jpg", "astronaut-crop.jpg"}
    assert verified == {frozenset(p) for p in [("astronaut.png", "astronaut-small.jpg"),
                                                ("astronaut.png", "astronaut-crop.jpg"),
                                                ("astronaut-small.jpg", "astronaut-crop.jpg")]}
    assert all(names[int(x)] in astronauts for x in a) and (sims >= 1.0 - 1e-6).all()


def test_common_share_is_the_overlap_coefficient_of_pixel_masks():
    # The overlap coefficient (Szymkiewicz-Simpson: |A ∩ B| / min(|A|, |B|)) counted on NumPy pixel masks.
    rng = np.random.default_rng(5)
    for _ in range(300):
        boxes = []
        for _ in range(2):
            x0, y0 = rng.integers(0, 40, 2)
            w, h = rng.integers(0, 25, 2)
            boxes.append((int(x0), int(y0), int(x0 + w), int(y0 + h)))
        masks = []
        for x0, y0, x1, y1 in boxes:
            m = np.zeros((70, 70), bool)
            m[y0:y1, x0:x1] = True
            masks.append(m)
        smaller = min(masks[0].sum(), masks[1].sum())
        expected = (masks[0] & masks[1]).sum() / smaller if smaller else 0.0
        assert common_share(*boxes) == pytest.approx(expected)


def test_two_crops_showing_one_part_of_a_photo_are_confirmed_through_it_and_a_distant_crop_is_not():
    """Real ORB footprints (opencv-python-headless) of three crops of scikit-image's astronaut in the photo: crops
    A and B share 0.87 of the smaller's area, C shares no pixel with A and 0.05 of itself with B (hand computation
    from the boxes below). Only A and B are confirmed through the photo, and no pair is confirmed without a leg."""
    import skimage.data

    from nearsight.indexer.matching.verify import verify_candidates

    photo = Image.fromarray(skimage.data.astronaut()).convert("RGB")  # 512 x 512
    crops = {"A": (0, 0, 300, 512), "B": (40, 40, 340, 480), "C": (330, 0, 512, 512)}
    ids = {"photo": 0, "A": 1, "B": 2, "C": 3}
    legs = {}
    for name, box in crops.items():
        (v,) = verify_candidates(photo.crop(box), [photo])
        assert v.verified and v.inliers >= 24, (name, v)
        # its footprint in the photo is the crop's box, to within 4 % of the photo's side
        assert np.abs(np.subtract(v.box, box)).max() <= 0.04 * 512, (name, v.box)
        legs[(ids[name], ids["photo"])] = v
    members = [[0, 1, 2, 3]]
    assert shared_footprint_pairs(members, legs, set(), share=0.5, strong=24) == [(1, 2)]
    # Every pair already confirmed or verified: nothing to add. Legs under `strong` inliers: none serve.
    assert shared_footprint_pairs(members, legs, {(1, 2)}, share=0.5, strong=24) == []
    assert shared_footprint_pairs(members, legs, set(), share=0.5, strong=10_000) == []
    # The share is a real bound: at 0.9 the A-B overlap (0.87) no longer confirms them.
    assert shared_footprint_pairs(members, legs, set(), share=0.9, strong=24) == []
