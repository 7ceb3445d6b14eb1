"""PCA whitening of descriptors, learned on the collection at index time.

A briefly trained encoder ranks well but packs its descriptors into a narrow
cone: unrelated images still score cosines near 0.98, so no fixed threshold
separates copies from look-alikes. Centring the descriptors and whitening them
with a PCA fitted on the collection spreads them out (Jégou and Chum 2012,
"Negative evidences and co-occurrences in image retrieval: the benefit of PCA
and whitening"; common practice in image retrieval). Dividing by the singular
values alone would blow up noise directions when there are few images, so each
is shrunk towards the mean singular value: s + SHRINK * mean(s).

The whitening belongs to a generation: it is fitted when the index is built,
stored beside it, and applied to every query.

Stored vectors may carry a classical descriptor after the learned part
(indexer/learning/classic.py). Only the learned part is whitened; each part is then
normalised and weighed, sqrt(1 - w) and sqrt(w), so the inner product of two
applied vectors is (1 - w) cos_learned + w cos_classic and rows stay unit length.
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core.fsutil import atomic_write_bytes

SHRINK = 0.1
FIT_SAMPLE = 100_000
MIN_FIT_PER_DIM = 2  # fit only with at least 2 * d images
FILE = "whitening.npz"


def _unit(y: np.ndarray) -> np.ndarray:
    return y / np.maximum(np.linalg.norm(y, axis=1, keepdims=True), 1e-12)


@dataclass(frozen=True)
class Whitening:
    mean: np.ndarray  # (d,) of the learned part
    projection: np.ndarray  # (d, d): rotate onto principal axes, then scale
    classic_weight: float = 0.0  # w: the classical part's share of the score (0 when there is none)

    @property
    def learned_dim(self) -> int:
        return int(self.mean.shape[0])

    def apply(self, x: np.ndarray) -> np.ndarray:
        """Whitened, weighed, L2-normalised float32 rows (the generation's space)."""
        x = np.asarray(x, dtype=np.float32)
        d = self.learned_dim
        y = _unit((x[:, :d] - self.mean) @ self.projection)
        if x.shape[1] > d:
            w = self.classic_weight
            y = np.concatenate([np.sqrt(1.0 - w) * y, np.sqrt(w) * _unit(x[:, d:])], axis=1)
        return np.ascontiguousarray(y, dtype=np.float32)

    def to_bytes(self) -> bytes:
        buf = io.BytesIO()
        np.savez(buf, mean=self.mean, projection=self.projection, classic_weight=np.float64(self.classic_weight))
        return buf.getvalue()

    def save(self, path: Path) -> None:
        atomic_write_bytes(Path(path), self.to_bytes())

    @classmethod
    def load(cls, path: Path) -> "Whitening":
        with np.load(Path(path), allow_pickle=False) as data:
            weight = float(data["classic_weight"]) if "classic_weight" in data.files else 0.0
            return cls(data["mean"].astype(np.float32), data["projection"].astype(np.float32), weight)


def fit_whitening(xb: np.ndarray, *, learned_dim: int | None = None, classic_weight: float = 0.0,
                  shrink: float = SHRINK, sample: int = FIT_SAMPLE, seed: int = 0) -> Whitening:
    """Fit centring + shrunk PCA whitening on (a sample of) the learned part of the collection's vectors.

    `learned_dim` is the width of the learned part (default: all columns); the columns after it are
    a classical descriptor that `apply` weighs by `classic_weight` and never whitens."""
    d = int(learned_dim or np.shape(xb)[1])
    if not 0.0 <= classic_weight < 1.0:
        raise ValueError(f"classic_weight must be in [0, 1), got {classic_weight}")
    classic_weight = classic_weight if np.shape(xb)[1] > d else 0.0
    xb = np.asarray(xb, dtype=np.float64)[:, :d]
    n = xb.shape[0]
    if n < MIN_FIT_PER_DIM * d:
        # Too few images to estimate d x d statistics: leave the space as the encoder made it.
        return identity(d, classic_weight)
    if n > sample:
        xb = xb[np.random.default_rng(seed).choice(len(xb), sample, replace=False)]
    mean = xb.mean(axis=0)
    _, s, vt = np.linalg.svd(xb - mean, full_matrices=False)
    scale = 1.0 / (s + shrink * max(s.mean(), 1e-12))
    projection = vt.T * scale
    return Whitening(mean.astype(np.float32), projection.astype(np.float32), classic_weight)


def identity(d: int, classic_weight: float = 0.0) -> Whitening:
    return Whitening(np.zeros(d, np.float32), np.eye(d, dtype=np.float32), classic_weight)
