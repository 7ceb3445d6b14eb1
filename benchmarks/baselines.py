"""The two baselines the quality benchmark measures nearsight against, scored by brute force.

* pHash: the 64-bit DCT perceptual hash as the `imagehash` package computes it
  (`imagehash.phash`, hash_size 8: 32x32 grayscale, 2-D DCT, the 8x8 lowest frequencies
  against their median). Similarity = 1 - Hamming distance / 64.
* Thumbnail: 16x16 grayscale (Pillow's BOX filter, an area average), mean-centred and
  L2-normalised; similarity = cosine.

Both decode every file at full size with Pillow (EXIF orientation applied), as a simple
tool would.
"""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

import numpy as np
from PIL import Image, ImageOps

from .metrics import Predictions, concat, top_k

THUMB_SIDE = 16
PHASH_BITS = 64


def _open(path: Path) -> Image.Image:
    with Image.open(path) as im:
        return ImageOps.exif_transpose(im).convert("RGB")


def phash_bits(images: Sequence[Image.Image]) -> np.ndarray:
    """(n, 64) uint8 bits of imagehash.phash for each image."""
    import imagehash

    return np.stack([imagehash.phash(im).hash.astype(np.uint8).ravel() for im in images])


def thumb_vectors(images: Sequence[Image.Image]) -> np.ndarray:
    """(n, 256) float32: 16x16 grayscale thumbnail, mean-centred, unit length."""
    rows = []
    for im in images:
        x = np.asarray(im.convert("L").resize((THUMB_SIDE, THUMB_SIDE), Image.Resampling.BOX), np.float64).ravel()
        x -= x.mean()
        rows.append(x / max(np.linalg.norm(x), 1e-12))
    return np.asarray(rows, dtype=np.float32)


def describe_files(paths: Sequence[Path], block: int = 64) -> dict[str, np.ndarray]:
    """{"phash": bits, "thumbnail": vectors} for files, decoded once each."""
    bits, thumbs = [], []
    for start in range(0, len(paths), block):
        images = [_open(p) for p in paths[start : start + block]]
        bits.append(phash_bits(images))
        thumbs.append(thumb_vectors(images))
    return {"phash": np.concatenate(bits), "thumbnail": np.concatenate(thumbs)}


def phash_similarity(bq: np.ndarray, bb: np.ndarray) -> np.ndarray:
    """1 - Hamming / 64 for every (query, reference) pair of bit rows."""
    q, b = bq.astype(np.float32), bb.astype(np.float32)
    agree = q @ b.T + (1 - q) @ (1 - b).T
    return agree / PHASH_BITS


def search(name: str, xq: np.ndarray, xb: np.ndarray, k: int, block: int = 512) -> Predictions:
    """Top-k predictions of every query against every reference, exhaustively."""
    parts = []
    for start in range(0, len(xq), block):
        if name == "phash":
            sims = phash_similarity(xq[start : start + block], xb)
        else:
            sims = xq[start : start + block] @ xb.T
        parts.append(top_k(sims, k, q_offset=start))
    return concat(parts)
