"""How much the classical descriptor counts: a weight fitted on the collection's own synthetic copies.

A generation scores a pair by (1 - w) cos_learned + w cos_classic (indexer/matching/whiten.py).
The best w depends on the encoder (a briefly trained one leans on the classical part)
and on the collection, so it is fitted at every full build, on nothing but the store:
a seeded sample of its images is edited into synthetic copies with the calibration's
mild edit family (indexer/learning/edits.py), and each candidate w is scored by the average
precision of separating a copy's score to its original from the copy's best score to
any other image of the collection (a sample), a DISC21-style question. Weights within
AP_TOLERANCE of the best count as ties (with a few hundred copies a smaller difference is
noise), and ties go to the weight closest to an even split.
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass, field, replace

import numpy as np

from ..learning.classic import DEFAULT_CLASSIC_WEIGHT

log = logging.getLogger(__name__)

WEIGHT_GRID = tuple(round(w, 2) for w in np.arange(0.1, 0.91, 0.1))
FIT_ORIGINALS = 128  # images edited into copies; 2 copies each
EDITS_PER_ORIGINAL = 2
NEGATIVE_SAMPLE = 20_000  # collection images a copy's best wrong match is sought among
MIN_IMAGES = 20  # below this, the default weight stays
# Average precision over ~250 copies has a standard error of about 0.02 (binomial, at AP ~0.75), so
# differences under half of that decide nothing.
AP_TOLERANCE = 0.01


@dataclass
class WeightFit:
    weight: float
    average_precision: dict[float, float] = field(default_factory=dict)  # by candidate weight
    copies: int = 0
    reason: str = "fitted on synthetic copies of the collection's own images"
    seconds: float = 0.0

    def to_dict(self) -> dict:
        return {"classic_weight": self.weight, "reason": self.reason, "copies": self.copies,
                "average_precision": {f"{w:g}": round(ap, 4) for w, ap in self.average_precision.items()},
                "seconds": round(self.seconds, 2)}


def choose_weight(xb: np.ndarray, xq: np.ndarray, targets: np.ndarray, learned_dim: int, *,
                  same: np.ndarray | None = None, grid=WEIGHT_GRID) -> WeightFit:
    """The weight in `grid` whose fused scores best separate copies from non-copies.

    `xb` (n, d) are the collection's stored vectors, `xq` (m, d) stored vectors of synthetic copies,
    `targets[i]` the row of xb that copy i was made from; `same` (m, n, bool), when given, marks
    other rows that are the same content as the target (left out of the negatives)."""
    from sklearn.metrics import average_precision_score

    from .whiten import fit_whitening

    white = fit_whitening(xb, learned_dim=learned_dim, classic_weight=DEFAULT_CLASSIC_WEIGHT)
    mask = np.zeros((len(xq), len(xb)), bool)
    mask[np.arange(len(xq)), targets] = True
    if same is not None:
        mask |= same
    labels = np.r_[np.ones(len(xq)), np.zeros(len(xq))]
    scores = {}
    for w in grid:
        space = replace(white, classic_weight=float(w))
        vb, vq = space.apply(xb), space.apply(xq)
        sims = vq @ vb.T
        positive = sims[np.arange(len(xq)), targets]
        negative = np.where(mask, -np.inf, sims).max(axis=1)
        scores[float(w)] = float(average_precision_score(labels, np.r_[positive, negative]))
    best = max(scores.values())
    weight = min((w for w, ap in scores.items() if ap >= best - AP_TOLERANCE), key=lambda w: abs(w - 0.5))
    return WeightFit(weight, scores, copies=len(xq))


def fit_classic_weight(store, model_dir, ids: np.ndarray, xb: np.ndarray, *, seed: int = 0,
                       originals: int = FIT_ORIGINALS) -> WeightFit:
    """Fit the weight for a store's collection: `ids`/`xb` are its files and stored vectors (raw)."""
    from ..learning.edits import DEFAULT_STRENGTHS, EDIT_KINDS, edited_copies
    from ..learning.embed import embed_images
    from ..learning.runtime import load_encoder
    from ..reading.images import readable_images

    started = time.monotonic()
    encoder, card = load_encoder(model_dir, store.settings.runtime)
    d, size = int(card["dim"]), int(card["image_size"])
    if xb.shape[1] <= d:
        return WeightFit(0.0, reason="the model stores no classical descriptor")
    if len(ids) < MIN_IMAGES:
        return WeightFit(DEFAULT_CLASSIC_WEIGHT, reason=f"fewer than {MIN_IMAGES} images: the default weight")
    rng = np.random.default_rng(seed)
    sources = store.catalog.pixel_sources(ids.tolist())
    rows = [row for row in np.sort(rng.choice(len(ids), min(originals, len(ids)), replace=False)).tolist()
            if sources.get(int(ids[row])) is not None]
    read_rows = readable_images([(row, store.pixels_path(sources[int(ids[row])])) for row in rows], 2 * size,
                                lambda row, _path, exc: log.debug("weight fit skips %s: %s", ids[row], exc))
    targets = [row for row, _ in read_rows for _ in range(EDITS_PER_ORIGINAL)]
    edited, _kinds = edited_copies([image for _, image in read_rows for _ in range(EDITS_PER_ORIGINAL)], EDIT_KINDS,
                                   DEFAULT_STRENGTHS, rng)
    if len(edited) < 2 * MIN_IMAGES:
        return WeightFit(DEFAULT_CLASSIC_WEIGHT, reason="too few readable images: the default weight")
    pool = np.unique(np.r_[rng.choice(len(ids), min(NEGATIVE_SAMPLE, len(ids)), replace=False), targets])
    where = {int(r): k for k, r in enumerate(pool)}
    hashes = np.array([sources.get(int(i), {}).get("hash") for i in ids[pool]], dtype=object)
    target_rows = np.array([where[t] for t in targets])
    same = hashes[None, :] == hashes[target_rows][:, None]  # byte-identical files are not negatives
    xq = embed_images(encoder, edited, size)
    fit = choose_weight(xb[pool], xq, target_rows, d, same=same)
    fit.seconds = time.monotonic() - started
    log.info("classical weight %.1f fitted on %d synthetic copies in %.1f s (average precision %s)", fit.weight,
             fit.copies, fit.seconds, ", ".join(f"{w:g}: {ap:.3f}" for w, ap in fit.average_precision.items()))
    return fit
