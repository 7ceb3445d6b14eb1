"""Does the main job find copies? Real photos and the demo archive, with a briefly trained encoder.

These train for a minute or two each, so they are marked slow (CI runs them).
"""

import json
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageEnhance, ImageOps

from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.matching.query import Searcher
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store
from nearsight.indexer.learning.train import TrainConfig

from .test_train import skimage_photos


def _centre_crop(im: Image.Image, area: float) -> Image.Image:
    w, h = im.size
    side = np.sqrt(area)
    cw, ch = round(w * side), round(h * side)
    return im.crop(((w - cw) // 2, (h - ch) // 2, (w - cw) // 2 + cw, (h - ch) // 2 + ch))


def _edits(im: Image.Image) -> dict[str, Image.Image]:
    """Common ways a photo gets copied: the first four, then a mirror image, one turned upside down
    (Pillow's top-to-bottom flip), one a quarter-turn off (an orientation tag lost: Pillow's
    transpose ROTATE_90), half the area, and a frame."""
    w, h = im.size
    return {
        "jpeg-q30": im,  # saved below at quality 30
        "crop-70%": _centre_crop(im, 0.7),
        "resize-50%": im.resize((w // 2, h // 2), Image.Resampling.LANCZOS),
        "brighter": ImageEnhance.Brightness(im).enhance(1.3),
        "mirror": ImageOps.mirror(im),
        "upside-down": ImageOps.flip(im),
        "quarter-turn": im.transpose(Image.Transpose.ROTATE_90),
        "crop-50%": _centre_crop(im, 0.5),
        "framed": ImageOps.expand(im, border=round(0.12 * max(w, h)), fill=(0, 0, 0)),
    }


EDIT_KINDS = ("jpeg-q30", "crop-70%", "resize-50%", "brighter", "mirror", "upside-down", "quarter-turn", "crop-50%",
              "framed")


@pytest.fixture(scope="module")
def photo_store(tmp_path_factory):
    """Open data shipped with scikit-image (skimage.data), indexed with a minute of training.

    3 x 3 tiles of every photo are indexed too: hard distractors that share the photo's texture.
    Returns the store folder and, per edit kind, (query path, expected original path) pairs.
    """
    tmp_path = tmp_path_factory.mktemp("quality")
    archive = tmp_path / "archive"
    archive.mkdir()
    queries: dict[str, list[tuple[str, str]]] = {kind: [] for kind in EDIT_KINDS}
    for name, im in skimage_photos():
        im.thumbnail((384, 384))
        im.save(archive / f"{name}.png")
        w, h = im.size
        for i in range(3):
            for j in range(3):
                tile = im.crop((i * w // 3, j * h // 3, (i + 1) * w // 3, (j + 1) * h // 3))
                tile.save(archive / f"{name}_t{i}{j}.jpg", quality=90)
        for kind, edited in _edits(im).items():
            path = tmp_path / "queries" / f"{name}-{kind}.jpg"
            path.parent.mkdir(exist_ok=True)
            edited.save(path, quality=30 if kind == "jpeg-q30" else 90)
            queries[kind].append((str(path), str(archive / f"{name}.png")))
    store_dir = tmp_path / "store"
    with Store.open(store_dir, create=True, settings=load_settings(environ={})) as store:
        # Bounded by steps, not minutes, so a busy machine trains the same encoder.
        run_index(store, [archive], progress=False, train_config=TrainConfig(steps=120, minutes=None, seed=0))
    return store_dir, queries


@pytest.mark.slow
@pytest.mark.parametrize("kind", [
    "jpeg-q30", "crop-70%", "resize-50%",
    # Was a known gap (13 of 16 after 120 steps); with the luma-standardised input and the DCT part
    # of the descriptor, 16 of 16 brightened photos are found first (measured 2026-12-02).
    "brighter",
    # The query's mirror image is searched too, and a mirrored match counts once verified
    # (indexer/matching/query.py); the picture inside a frame is searched too (indexer/matching/frames.py).
    "mirror", "crop-50%", "framed",
    # A query whose best candidate does not verify is also searched turned upside down (indexer/matching/query.py).
    "upside-down",
    # ... and a quarter-turn either way (setting turned_views).
    "quarter-turn",
])
def test_transformed_scikit_image_photos_find_their_original_first(photo_store, kind):
    store_dir, queries = photo_store
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        answers = list(Searcher(store).similar_files([q for q, _ in queries[kind]], k=1))
    misses = [(q, a["results"][0]["path"]) for (q, expected), a in zip(queries[kind], answers)
              if a["results"][0]["path"] != expected]
    print(f"{kind}: rank-1 {len(answers) - len(misses)}/{len(answers)}")
    assert len(misses) <= ALLOWED_MISSES.get(kind, 0), misses


# Floors below 16 of 16, measured 2026-12-02 after 120 steps (15 of 16 each):
# - crop-50%: colorwheel's centre crop finds its centre tile first, which lies wholly inside the crop (the
#   tile's pixels are all in the query, so verification confirms it). Since 2026-12-04 (training views at
#   96 px, with fog and snow) grass's centre crop does the same with its centre tile: 14 of 16;
# - framed: hubble_deep_field's dark sky meets the black frame on every side, so no frame is found
#   (tests/test_query_views.py states that case) and the descriptor alone does not find it first.
ALLOWED_MISSES = {"crop-50%": 2, "framed": 1}


@pytest.mark.slow
def test_demo_archive_duplicates_above_stated_floors(run_cli, tmp_path):
    """The demo's planted near-duplicates after 8 epochs of training (72 steps), in the published groups.

    Floors: group pair precision >= 0.99 and recall >= 0.80 (the planted truth of the invented
    archive, demo_data/). Measured 2026-12-03: precision 1.000, recall 0.893 (0.889 after 12
    epochs, 0.900 after one minute, 131 steps, on an idle 2-core machine), where the groups used
    to find 0.40: the grouping threshold comes from the collection's pairwise estimate and verified
    close pairs join as near-duplicates (indexer/matching/pair_verify.py). An epoch budget, not minutes, so
    that a machine busy with other tests trains the same encoder; the floors leave room for the
    run-to-run variation of multi-threaded training.
    """
    out = tmp_path / "demo"
    proc = run_cli("demo", "--out", out, "--train-epochs", "8", "--json", "--no-progress", check_exit=0)
    report = json.loads(proc.stdout)
    dup = report["duplicates"]
    print(f"demo duplicate pairs: precision {dup['precision']:.3f}, recall {dup['recall']:.3f}, "
          f"look-alikes called {dup['lookalikes_called']}")
    assert dup["precision"] >= 0.99
    assert dup["recall"] >= 0.80
    # Calibration honesty: at the threshold calibrated for precision 0.99, the precision realised on
    # every pair of the archive (planted truth) is at least 0.97; recall is printed, not asserted.
    assert report["calibration"] is not None, report["lines"]
    realised = report["realised_pairs"]
    print(f"calibration: {report['calibration']['headline']}")
    print(f"realised at {realised['threshold']:.3f}: precision {realised['precision']:.3f}, recall {realised['recall']:.3f}")
    assert report["calibration"]["target_precision"] == 0.99
    assert realised["precision"] >= 0.97


@pytest.mark.slow
def test_calibrated_duplicate_verdict_is_honest_on_transformed_scikit_image_photos(photo_store, tmp_path):
    """Calibration honesty on open data: scikit-image's photos and their edited copies (planted
    near-duplicates). At the threshold calibrated for precision 0.99, the precision realised
    on every pair (truth: a photo and its copies) is at least 0.97; recall is printed."""
    import shutil

    from nearsight.indexer.building.build import load_vectors
    from nearsight.indexer.matching.generations import require_current

    _store_dir, queries = photo_store
    collection = tmp_path / "collection"
    collection.mkdir()
    for kind in ("jpeg-q30", "crop-70%", "resize-50%", "brighter"):
        for query, original in queries[kind]:
            shutil.copy(query, collection)
            shutil.copy(original, collection)
    # A store of the photos and their copies only (tiles of one texture are look-alikes that a
    # briefly trained encoder scores like copies), trained on itself as a user's store would be.
    # 32 dimensions, so that its 80 images are enough to fit the whitening (indexer/matching/whiten.py).
    store_dir = tmp_path / "store"
    with Store.open(store_dir, create=True, settings=load_settings(environ={})) as store:
        run_index(store, [collection], progress=False,
                  train_config=TrainConfig(steps=120, minutes=None, seed=0, dim=32))
        gen = require_current(store)
        assert gen.meta["thresholds"]["source"] == "calibrated", gen.meta.get("calibration")
        t = gen.meta["thresholds"]["near"]
        ids, xb = load_vectors(store, gen.meta["model"])
        xb = gen.load_whitening().apply(xb)
        paths = store.catalog.paths_for(ids.tolist())
    photo = [Path(paths[int(i)]).stem.split("-")[0] for i in ids]
    sims = xb @ xb.T
    a, b = np.triu_indices(len(ids), 1)
    truth = np.array([photo[i] == photo[j] for i, j in zip(a, b)])
    called = sims[a, b] >= t
    precision = (called & truth).sum() / max(1, called.sum())
    recall = (called & truth).sum() / truth.sum()
    print(f"threshold {t:.3f}: called {called.sum()}, precision {precision:.3f}, recall {recall:.3f} "
          f"({truth.sum()} planted pairs)")
    assert precision >= 0.97
