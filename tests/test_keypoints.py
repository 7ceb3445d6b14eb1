"""Keypoints kept beside the small copies (indexer/matching/keypoints.py): the same features OpenCV's ORB finds,
read back exactly, ignored when not usable, and the same verification answers with or without them."""

import json

import numpy as np
import pytest
from PIL import Image

from nearsight.indexer.matching import aligned, keypoints
from nearsight.indexer.matching import rerank
from nearsight.indexer.matching.rerank import VERIFY_SIDE, fine_config, verify_config
from nearsight.indexer.matching.verify import verify_candidates, working_grey


def _photo(name):
    import skimage.data

    return Image.fromarray(getattr(skimage.data, name)()).convert("RGB")


def _small_copy(root, digest, image):
    """A store's small-copy layout, thumbs/ab/<hash>.jpg, written as the scan writes it."""
    from nearsight.indexer.reading.images import save_thumbnail

    path = root / "thumbs" / digest[:2] / f"{digest}.jpg"
    copy = image.copy()
    copy.thumbnail((VERIFY_SIDE, VERIFY_SIDE))
    save_thumbnail(copy, path)
    return path


@pytest.fixture
def copies(tmp_path):
    """Small copies of scikit-image's astronaut, the left half of its brick wall, and a flat grey picture."""
    brick = _photo("brick")
    w, h = brick.size
    images = {"astronaut": _photo("astronaut"), "brick": brick.crop((0, 0, w // 2, h)),
              "flat": Image.new("RGB", (300, 200), (128, 128, 128))}
    return {name: _small_copy(tmp_path, f"{i:02x}" + "ab" * 31, im) for i, (name, im) in enumerate(images.items())}


def _opencv_orb(path, config):
    """Reference: OpenCV's ORB on the small copy brought to the working side (Pillow reads the JPEG)."""
    import cv2

    with Image.open(path) as im:
        grey = working_grey(im.convert("RGB"), config.max_side, config.stretch)
    orb = cv2.ORB_create(nfeatures=config.n_features, fastThreshold=config.fast_threshold)
    kps, desc = orb.detectAndCompute(grey, None)
    return np.array([kp.pt for kp in kps], np.float32).reshape(-1, 2), desc, (grey.shape[1], grey.shape[0])


@pytest.mark.parametrize("which, config", [(0, verify_config()), (1, fine_config())])
def test_kept_keypoints_are_what_opencvs_orb_finds_on_the_small_copy(copies, which, config):
    for name in ("astronaut", "brick"):
        path = copies[name]
        keypoints.write(path, keypoints.find(path))
        kept = keypoints.load(path, which)
        xy, desc, work_size = _opencv_orb(path, config)
        assert len(kept) == len(xy) > 0 and not kept.reason
        np.testing.assert_array_equal(kept.xy, xy)  # exact: stored as float32, as OpenCV gives them
        np.testing.assert_array_equal(kept.descriptors, desc)
        assert kept.work_size == work_size
        with Image.open(path) as im:
            assert kept.size == im.size
    # The fine set has the same density at twice the side: up to 4 times as many keypoints.
    assert len(keypoints.load(copies["astronaut"], 1)) > 2 * len(keypoints.load(copies["astronaut"], 0))


def test_a_flat_picture_keeps_its_reason_and_no_keypoints(copies):
    path = copies["flat"]
    keypoints.write(path, keypoints.find(path))
    kept = keypoints.load(path, 0)
    assert len(kept) == 0 and "no keypoints" in kept.reason


def test_a_torn_or_foreign_sidecar_counts_as_missing(copies):
    path = copies["astronaut"]
    data = keypoints.find(path)
    keypoints.write(path, data[: len(data) - 100])
    assert keypoints.load(path, 0) is None
    keypoints.write(path, data.replace(keypoints.signature(), b"x" * len(keypoints.signature()), 1))
    assert keypoints.load(path, 0) is None
    keypoints.write(path, b"")
    assert keypoints.load(path, 0) is None


def test_a_small_copy_made_again_or_other_settings_make_the_sidecar_stale(copies, monkeypatch):
    """A small copy re-written at another size no longer matches its sidecar; a sidecar made by other settings
    (another OpenCV, say) is found stale by the index run's check and made again."""
    from nearsight.indexer.reading.images import save_thumbnail

    path = copies["astronaut"]
    keypoints.write(path, keypoints.find(path))
    assert keypoints._current(path) and keypoints.load(path, 0) is not None
    with Image.open(path) as im:
        smaller = im.convert("RGB").resize((im.width // 2, im.height // 2))
    save_thumbnail(smaller, path)  # as `verify --repair` would make it at another side
    assert keypoints.load(path, 0) is None
    keypoints.write(path, keypoints.find(path))
    assert keypoints.load(path, 0).size == smaller.size
    keypoints.signature.cache_clear()
    monkeypatch.setattr("cv2.__version__", "0.0.0-other")
    try:
        assert not keypoints._current(path) and keypoints.load(path, 0) is None
    finally:
        keypoints.signature.cache_clear()


def test_a_users_own_file_is_never_looked_beside(tmp_path):
    own = tmp_path / "holiday" / "beach.jpg"
    own.parent.mkdir()
    _photo("astronaut").save(own)
    keypoints.sidecar(own).write_bytes(b"anything")
    assert not keypoints.is_small_copy(own)
    assert keypoints.load(own, 0) is None


def test_verification_answers_the_same_with_or_without_kept_keypoints(copies, tmp_path, monkeypatch):
    """A 50 %-area crop of the brick half, re-saved as JPEG: every result's score and evidence are equal."""
    brick = _photo("brick")
    brick = brick.crop((0, 0, brick.width // 2, brick.height))
    w, h = brick.size
    brick.crop((w // 8, h // 8, w // 8 + int(w * 0.71), h // 8 + int(h * 0.71))).save(tmp_path / "q.jpg", quality=75)
    query = Image.open(tmp_path / "q.jpg").convert("RGB")
    candidates = {1: str(copies["brick"]), 2: str(copies["astronaut"]), 3: str(copies["flat"])}
    results = [{"id": 2, "similarity": 0.8}, {"id": 3, "similarity": 0.75}, {"id": 1, "similarity": 0.7}]

    def answer():
        rerank._features_at.cache_clear()
        rerank._fine_features_at.cache_clear()
        return rerank.rerank_more(query, [dict(r) for r in results], candidates, top=1, more=2, fine=2)

    without = answer()
    for path in copies.values():
        keypoints.write(path, keypoints.find(path))
    # With the sidecars there, no candidate's small copy may be decoded again: doing so now fails loudly.
    def refuse(*args, **kwargs):
        raise AssertionError("a candidate's keypoints were found again instead of read")

    monkeypatch.setattr(rerank, "read_image", refuse)
    with_kept = answer()
    monkeypatch.undo()
    assert json.dumps(with_kept, sort_keys=True) == json.dumps(without, sort_keys=True)
    assert with_kept[0]["id"] == 1 and with_kept[0]["evidence"]["verified"]
    direct = verify_candidates(query, [keypoints.load(copies["brick"], 0)], config=verify_config())[0]
    assert direct.verified and direct.inliers == with_kept[0]["evidence"]["inliers"]


@pytest.mark.parametrize("keep", [True, False])
def test_an_index_run_keeps_every_small_copys_keypoints_unless_told_not_to(tmp_path, keep):
    from nearsight.indexer.building.pipeline import run_index
    from nearsight.indexer.core.settings import load_settings
    from nearsight.indexer.storage.store import Store
    from tests.test_pipeline import TINY, _scene

    photos = tmp_path / "photos"
    photos.mkdir()
    for i in range(12):
        _scene(photos / f"{i:02d}.jpg", i)
    settings = load_settings(environ={}, overrides={"keep_keypoints": str(keep).lower()})
    with Store.open(tmp_path / "store", create=True, settings=settings) as store:
        summary = run_index(store, [photos], progress=False, train_config=TINY)
        small = sorted(store.thumbs_dir.rglob("*.jpg"))
        kept = sorted(store.thumbs_dir.rglob("*" + keypoints.SUFFIX))
        frames = sorted(store.thumbs_dir.rglob("*" + aligned.SUFFIX))
    assert len(small) == 12
    if keep:
        assert [p.with_suffix(".jpg") for p in kept] == small and "keypoints" in summary["stages"]
        assert all(keypoints.load(p, 1) is not None for p in small)
        # The same-frame check's band images are kept in the same pass (indexer/matching/aligned.py).
        assert [p.with_suffix(".jpg") for p in frames] == small
        assert all(aligned.load(p) is not None for p in small)
    else:
        assert kept == [] and frames == [] and "keypoints" not in summary["stages"]
