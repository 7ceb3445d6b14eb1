"""Query-adaptive score normalisation: one meaning for a score, whatever the query.

A raw cosine says how close two images are, not how unusual that closeness is: a
query of a textured photo has many neighbours at 0.9, a plain portrait few. Each
vector therefore gets a background statistic b, the mean of its similarities to
the nearest members of a background set drawn from the collection itself, and a
pair scores

    s'(x, y) = s(x, y) - beta * (b(x) + b(y)) / 2

(Pizzi et al. 2022, "A self-supervised descriptor for image copy detection",
sec. 3.3 subtract beta times the query's statistic; the reference's is added here
so that a pair inside the collection scores the same whichever side asks, and
so that "hub" images close to many others are discounted too, the local scaling of
Conneau et al. 2018). The statistic skips each vector's single closest background
member (its own copy, when it has one in the collection), averaging ranks 2 to k+1,
and a vector never counts itself.

Measured in benchmarks/ablation.py, not adopted by nearsight: on the quality
benchmark it moved µAP by about +0.02 and recall at precision 0.99 by about 0, less
than fusion and verification gave (benchmarks/results/ablation.md, "Ablation").
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

BACKGROUND_SIZE = 2_000  # vectors drawn from the collection (a sample of larger ones)
BACKGROUND_K = 10  # neighbours averaged (Pizzi et al. use 10, from memory)
DEFAULT_BETA = 1.0
_BLOCK = 4096


@dataclass(frozen=True)
class Background:
    """A generation's background set: vectors in its space, the file ids they are, beta and k."""

    vectors: np.ndarray  # (m, d) float32, unit rows
    ids: np.ndarray  # (m,) int64: which file each row is (-1 for none)
    beta: float = DEFAULT_BETA
    k: int = BACKGROUND_K

    def statistic(self, x: np.ndarray, ids: np.ndarray | None = None) -> np.ndarray:
        """b for each row of `x`: mean similarity to its background neighbours ranked 2..k+1.

        `ids` (one per row, or None for queries from outside) keeps a vector from counting itself."""
        x = np.asarray(x, np.float32)
        if self.beta == 0 or len(self.vectors) == 0 or len(x) == 0:
            return np.zeros(len(x), np.float32)
        take = min(self.k + 1, len(self.vectors))
        out = np.empty(len(x), np.float32)
        for start in range(0, len(x), _BLOCK):
            sims = x[start : start + _BLOCK] @ self.vectors.T
            if ids is not None:
                sims[np.asarray(ids[start : start + _BLOCK])[:, None] == self.ids[None, :]] = -np.inf
            top = -np.partition(-sims, take - 1, axis=1)[:, :take]
            top = np.sort(top, axis=1)[:, ::-1]
            body = top[:, 1:] if take > 1 else top  # skip the closest one (its copy, if any)
            body = np.where(np.isfinite(body), body, np.nan)
            out[start : start + _BLOCK] = np.nan_to_num(np.nanmean(body, axis=1), nan=0.0)
        return out

    def adjust(self, sims: np.ndarray, b_x: np.ndarray, b_y: np.ndarray) -> np.ndarray:
        """s' = s - beta (b_x + b_y) / 2 for a (n, k) matrix with b_x per row and b_y per entry (or per row)."""
        b_x = np.asarray(b_x, np.float32).reshape(-1, *([1] * (np.ndim(sims) - 1)))
        return (np.asarray(sims, np.float32) - self.beta * 0.5 * (b_x + np.asarray(b_y, np.float32))).astype(np.float32)


def none(d: int) -> Background:
    """No normalisation (beta 0): generations published before it existed."""
    return Background(np.zeros((0, d), np.float32), np.zeros(0, np.int64), beta=0.0)


def fit_background(xb: np.ndarray, ids: np.ndarray, *, beta: float = DEFAULT_BETA, size: int = BACKGROUND_SIZE,
                   k: int = BACKGROUND_K, seed: int = 0) -> Background:
    """A seeded sample of `size` rows of the collection (all of a smaller one) as the background set."""
    xb = np.asarray(xb, np.float32)
    ids = np.asarray(ids, np.int64)
    if beta == 0 or len(xb) < 2:
        return none(xb.shape[1] if xb.ndim == 2 else 0)
    pick = np.sort(np.random.default_rng(seed).choice(len(xb), min(size, len(xb)), replace=False))
    return Background(np.ascontiguousarray(xb[pick]), ids[pick], beta=beta, k=k)
