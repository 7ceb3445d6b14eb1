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
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .fsutil import atomic_write_bytes

SHRINK = 0.1
FIT_SAMPLE = 100_000
MIN_FIT_PER_DIM = 2  # fit only with at least 2 * d images
FILE = "whitening.npz"


@dataclass(frozen=True)
class Whitening:
    mean: np.ndarray  # (d,)
    projection: np.ndarray  # (d, d): rotate onto principal axes, then scale

    def apply(self, x: np.ndarray) -> np.ndarray:
        """Whitened, L2-normalised float32 rows."""
        y = (np.asarray(x, dtype=np.float32) - self.mean) @ self.projection
        norms = np.linalg.norm(y, axis=1, keepdims=True)
        return np.ascontiguousarray(y / np.maximum(norms, 1e-12), dtype=np.float32)

    def to_bytes(self) -> bytes:
        buf = io.BytesIO()
        np.savez(buf, mean=self.mean, projection=self.projection)
        return buf.getvalue()

    def save(self, path: Path) -> None:
        atomic_write_bytes(Path(path), self.to_bytes())

    @classmethod
    def load(cls, path: Path) -> "Whitening":
        with np.load(Path(path), allow_pickle=False) as data:
            return cls(data["mean"].astype(np.float32), data["projection"].astype(np.float32))


def fit_whitening(xb: np.ndarray, *, shrink: float = SHRINK, sample: int = FIT_SAMPLE, seed: int = 0) -> Whitening:
    """Fit centring + shrunk PCA whitening on (a sample of) the collection's vectors."""
    xb = np.asarray(xb, dtype=np.float64)
    n, d = xb.shape
    if n < MIN_FIT_PER_DIM * d:
        # Too few images to estimate d x d statistics: leave the space as the encoder made it.
        return identity(d)
    if n > sample:
        xb = xb[np.random.default_rng(seed).choice(len(xb), sample, replace=False)]
    mean = xb.mean(axis=0)
    _, s, vt = np.linalg.svd(xb - mean, full_matrices=False)
    scale = 1.0 / (s + shrink * max(s.mean(), 1e-12))
    projection = vt.T * scale
    return Whitening(mean.astype(np.float32), projection.astype(np.float32))


def identity(d: int) -> Whitening:
    return Whitening(np.zeros(d, np.float32), np.eye(d, dtype=np.float32))
