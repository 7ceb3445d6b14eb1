"""Classical global descriptors stored beside the learned one.

A low-frequency DCT of a small luma thumbnail is the real-valued core of pHash: it is
nearly untouched by re-compression, resizing, blur, noise and colour changes, exactly
where a briefly trained encoder is weakest, and it fails where the encoder is strong
(crops, overlays, borders). A generation weighs the two cosines into one score
(`indexer.matching.whiten.Whitening`), so FAISS, grouping and calibration see a single vector.

Names: ``"dct8"`` keeps the 8 x 8 lowest frequencies of a 32 x 32 thumbnail without the
constant term (63 numbers, the block pHash thresholds against its median; common
practice, Zauner 2010), ``"dctK"`` for other K; ``"thumb16"`` is the 16 x 16 thumbnail
itself, mean-centred. Every descriptor is mean-free and unit length, so a brightness or
contrast change that maps luma y -> a y + b leaves it unchanged.
"""

from __future__ import annotations

import math
import re
from typing import TYPE_CHECKING

from ..core.errors import UsageError

if TYPE_CHECKING:
    import torch

# PyTorch is imported inside the functions that compute: the names and sizes (`classic_dim`) are read by
# code that must not import it (a query on ONNX Runtime, indexer/learning/runtime.py).
DEFAULT_CLASSIC = "dct8"
# The classical cosine's share of a score (benchmarks/results/ablation.md).
DEFAULT_CLASSIC_WEIGHT = 0.5
THUMB_SIDE = 32  # the thumbnail the DCT is taken of, as in pHash
_DCT = re.compile(r"dct(\d+)$")


def _parse(name: str) -> tuple[str, int]:
    if name == "thumb16":
        return "thumb", 16
    match = _DCT.match(name)
    if match and 2 <= int(match.group(1)) <= THUMB_SIDE:
        return "dct", int(match.group(1))
    raise UsageError(f"unknown classical descriptor {name!r}; use dctK (2 <= K <= {THUMB_SIDE}), thumb16 or none")


def check_classic(name: str | None) -> None:
    """Raise UsageError for a name `classic_descriptor` does not know (None means no classical part)."""
    if name is not None:
        _parse(name)


def classic_dim(name: str | None) -> int:
    """Number of values the named descriptor has (0 for None)."""
    if not name:
        return 0
    kind, k = _parse(name)
    return k * k - 1 if kind == "dct" else k * k


def dct_matrix(n: int, dtype=None) -> torch.Tensor:
    """Orthonormal DCT-II matrix C (n x n): C @ y is the DCT of a column y (scipy.fft.dct's norm="ortho");
    float32 unless `dtype` says otherwise."""
    import torch

    dtype = dtype or torch.float32
    k = torch.arange(n, dtype=torch.float64)[:, None]
    i = torch.arange(n, dtype=torch.float64)[None, :]
    c = torch.cos(math.pi * (2 * i + 1) * k / (2 * n)) * math.sqrt(2.0 / n)
    c[0] /= math.sqrt(2.0)
    return c.to(dtype)


# Rec. ITU-R BT.601 luma weights (the ones Pillow's convert("L") uses).
LUMA_WEIGHTS = (0.299, 0.587, 0.114)


def luma(p: torch.Tensor) -> torch.Tensor:
    """(B, 3, H, W) pixels in [0, 1] -> (B, 1, H, W) BT.601 luma."""
    import torch

    w = torch.tensor(LUMA_WEIGHTS, dtype=p.dtype, device=p.device).view(1, 3, 1, 1)
    return (p * w).sum(dim=1, keepdim=True)


def classic_descriptor(p: torch.Tensor, name: str) -> torch.Tensor:
    """(B, 3, H, W) pixels in [0, 1] -> (B, classic_dim(name)) unit rows."""
    import torch.nn.functional as F

    kind, k = _parse(name)
    y = luma(p)
    if kind == "thumb":
        t = F.adaptive_avg_pool2d(y, k).flatten(1)
        t = t - t.mean(dim=1, keepdim=True)
        return F.normalize(t, dim=1)
    t = F.adaptive_avg_pool2d(y, THUMB_SIDE)[:, 0]  # area average, like Pillow's BOX filter
    c = dct_matrix(THUMB_SIDE, p.dtype).to(p.device)
    coeffs = (c @ t @ c.T)[:, :k, :k].flatten(1)[:, 1:]  # drop the constant term (mean luma)
    return F.normalize(coeffs, dim=1)
