"""Asked pairs for groups: a mirrored copy and a tight crop of a real photo join its group, found through the
query path; a neighbouring tile of another photo does not.

Photos: scikit-image's bundled open data (skimage.data.astronaut, grass, camera, coffee, chelsea, rocket).
The rule under test, "strongly verified" = geometric verification with at least twice the inliers it needs,
is this project's (indexer/matching/query_verdict.py); the minimum itself is VerifyConfig.min_inliers.
"""

import pytest
from PIL import ImageOps

from nearsight.indexer.building.build import whitened_vectors
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.matching.generations import require_current
from nearsight.indexer.matching.pair_ask import asked_pairs, strongly_verified
from nearsight.indexer.matching.query import Searcher
from nearsight.indexer.matching.query_verdict import strong_inliers
from nearsight.indexer.matching.verify import VerifyConfig
from nearsight.indexer.storage.store import Store

from .test_pair_verify import index_photos


@pytest.fixture(scope="module")
def asked_store(tmp_path_factory):
    def copies(astronaut, folder):
        ImageOps.mirror(astronaut).save(folder / "astronaut-mirrored.jpg", quality=85)
        astronaut.crop((96, 0, 336, 240)).save(folder / "astronaut-crop.jpg", quality=85)  # 39 % of the area

    return index_photos(tmp_path_factory.mktemp("asked"), copies)


def test_strong_means_twice_the_inliers_verification_needs():
    assert strong_inliers() == 2 * VerifyConfig().min_inliers
    strong = strong_inliers()
    assert strongly_verified({"evidence": {"verified": True, "inliers": strong}}, strong)
    assert not strongly_verified({"evidence": {"verified": True, "inliers": strong - 1}}, strong)
    assert not strongly_verified({"evidence": {"verified": False, "inliers": 500}}, strong)
    assert not strongly_verified({"evidence": None}, strong)


def test_a_same_frame_match_alone_never_joins_a_group():
    # The same-frame check (indexer/matching/aligned.py) confirms query results, not group pairs: the same edit
    # on two different photos (a white frame, a turned picture's filled corners) correlates like a copy.
    strong = strong_inliers()
    confirmed = {"evidence": {"verified": True, "inliers": 0, "correlation": 0.99}}
    assert not strongly_verified(confirmed, strong)


def test_every_file_asked_finds_its_mirrored_copy_and_crop_but_not_a_neighbouring_tile(asked_store):
    store_dir, folder = asked_store
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        gen = require_current(store)
        ids, xb = whitened_vectors(store, gen.meta["model"], gen.load_whitening())
        t_near = float(gen.meta["thresholds"]["near"])
        a, b, sims = asked_pairs(Searcher(store), ids, xb, t_near=t_near)
        name = {int(i): p.name for i, p in ((i, folder / store.catalog.file(int(i))["relpath"]) for i in ids)}
        groups = gen.load_groups()["groups"]
    found = {frozenset((name[int(x)], name[int(y)])): float(s) for x, y, s in zip(a, b, sims)}
    assert frozenset(("astronaut.png", "astronaut-mirrored.jpg")) in found
    assert frozenset(("astronaut.png", "astronaut-crop.jpg")) in found
    assert frozenset(("grass-left.png", "grass-right.png")) not in found
    assert all(s >= t_near for s in found.values())  # a verified pair's score, never below the threshold
    assert all(int(x) < int(y) for x, y in zip(a, b))  # each pair once (canonical)
    # The index run asked them too: the mirrored copy is in the original's near-duplicate group.
    near = [{m["path"].rsplit("/", 1)[-1] for m in g["members"] if m["tier"] != "similar"} for g in groups]
    assert any({"astronaut.png", "astronaut-mirrored.jpg"} <= members for members in near)
