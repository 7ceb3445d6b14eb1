"""The classical weight is fitted on the collection's own synthetic copies (indexer/matching/fusion.py)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image
from sklearn.metrics import average_precision_score

from nearsight.indexer.building.build import load_vectors
from nearsight.indexer.matching.fusion import AP_TOLERANCE, WEIGHT_GRID, choose_weight, fit_classic_weight
from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store
from nearsight.indexer.learning.train import TrainConfig
from nearsight.indexer.matching.whiten import fit_whitening


def _unit(x):
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def _planted(informative: str, n=300, m=120, dl=16, dc=12, seed=0):
    """Collection vectors (learned | classic) and copies whose informative part is their original's plus
    a little noise, and whose other part is fresh noise."""
    rng = np.random.default_rng(seed)
    xb = np.hstack([_unit(rng.standard_normal((n, dl))), _unit(rng.standard_normal((n, dc)))]).astype(np.float32)
    targets = rng.choice(n, m, replace=False)
    learned = _unit(rng.standard_normal((m, dl)))
    classic = _unit(rng.standard_normal((m, dc)))
    if informative == "learned":
        learned = _unit(xb[targets, :dl] + 0.3 * rng.standard_normal((m, dl)))
    else:
        classic = _unit(xb[targets, dl:] + 0.3 * rng.standard_normal((m, dc)))
    return xb, np.hstack([learned, classic]).astype(np.float32), targets, dl


def _reference_ap(xb, xq, targets, dl, w):
    """Fused score written out with NumPy, average precision from scikit-learn."""
    white = fit_whitening(xb[:, :dl])
    lb, lq = white.apply(xb[:, :dl]), white.apply(xq[:, :dl])
    cb, cq = _unit(xb[:, dl:]), _unit(xq[:, dl:])
    sims = (1 - w) * lq @ lb.T + w * cq @ cb.T
    pos = sims[np.arange(len(xq)), targets]
    sims[np.arange(len(xq)), targets] = -np.inf
    return average_precision_score(np.r_[np.ones(len(xq)), np.zeros(len(xq))], np.r_[pos, sims.max(axis=1)])


def test_the_weight_follows_the_informative_part():
    for informative, side in (("learned", lambda w: w <= 0.3), ("classic", lambda w: w >= 0.7)):
        xb, xq, targets, dl = _planted(informative)
        fit = choose_weight(xb, xq, targets, dl)
        assert side(fit.weight), (informative, fit.average_precision)
        for w in (0.2, 0.5, 0.8):
            assert abs(fit.average_precision[w] - _reference_ap(xb, xq, targets, dl, w)) < 1e-6
        assert fit.average_precision[fit.weight] >= max(fit.average_precision.values()) - AP_TOLERANCE
        assert set(fit.average_precision) == set(WEIGHT_GRID)


def test_the_fit_reads_only_the_store_s_own_images(tmp_path, monkeypatch):
    """Benchmark data cannot reach the fit: it gets nothing but the store, and every image it reads is a
    catalogued file or that file's small copy inside the store."""
    photos = tmp_path / "photos"
    photos.mkdir()
    rng = np.random.default_rng(0)
    for i in range(30):
        Image.fromarray(rng.integers(0, 256, (6, 8, 3), dtype=np.uint8)).resize((96, 72), Image.BICUBIC) \
            .save(photos / f"{i:02d}.jpg", quality=92)
    outside = tmp_path / "benchmark"  # a folder the store was never told about
    outside.mkdir()
    Image.new("RGB", (64, 64), "red").save(outside / "query.png")
    tiny = TrainConfig(arch="tiny", dim=16, size=32, embed_size=None, batch_size=8, steps=2, minutes=None, heldout=4, workers=0,
                       checkpoint_every_s=3600)
    settings = load_settings(environ={}, overrides={"workers": 1})
    with Store.open(tmp_path / "store", create=True, settings=settings) as store:
        run_index(store, [photos], progress=False, train_config=tiny, calibrate=False)
        model = store.read_pointer("models/CURRENT")
        ids, xb = load_vectors(store, model)
        read = []
        from nearsight.indexer.reading import images as image_module

        real = image_module.read_image
        monkeypatch.setattr(image_module, "read_image", lambda src, *a, **k: (read.append(Path(src)), real(src, *a, **k))[1])
        fit = fit_classic_weight(store, store.models_dir / model, ids, xb, originals=25)
        assert fit.copies == 50 and fit.weight in WEIGHT_GRID
        assert read and all(p.is_relative_to(store.root) or p.is_relative_to(photos) for p in read)
        assert not any(p.is_relative_to(outside) for p in read)
