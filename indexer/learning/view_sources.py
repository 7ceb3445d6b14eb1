"""Where batched training views come from: cached pictures, the regions a batch uses, crop boxes.

Every training picture is decoded once into one uint8 square of side
`cache_side * size`, top-left aligned; its real width and height (`extents`)
are kept so that crops never reach the padding. A batch entry is a region of
one picture: usually the whole picture, but for a share of the pictures two
entries are two non-overlapping parts of it (left and right halves, or two
opposite quadrants). NT-Xent then treats the two parts as negatives of each
other: hard negatives that look alike (same colours, same textures), as tiles
of one photo do in real collections.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterable

import numpy as np
import torch

from ..core.errors import UsageError

# Two regions of one picture are separated by this many pixels on each side of the cut, so
# that bilinear sampling (which reads up to half a pixel beyond a sample point) never reads
# a pixel of the other region.
REGION_GAP = 1.0
# A picture is split only if each part keeps at least this many pixels across.
MIN_REGION_SIDE = 8.0
# RandomResizedCrop's number of tries before its fallback (torchvision's value).
CROP_TRIES = 10


@dataclass
class SourceBank:
    """Decoded pictures in one (n, 3, side, side) uint8 tensor; picture i fills [0, w_i) x [0, h_i).

    Past the picture, one column and one row repeat its edge; the rest is black.
    """

    pixels: torch.Tensor
    extents: torch.Tensor  # (n, 2) float: width, height in pixels

    @property
    def side(self) -> int:
        return int(self.pixels.shape[-1])

    def __len__(self) -> int:
        return int(self.pixels.shape[0])


def build_source_bank(arrays: Iterable[np.ndarray], capacity: int, side: int) -> SourceBank:
    """Pack HWC uint8 arrays (longest side <= `side`) into a SourceBank; at most `capacity` of them."""
    pixels = torch.zeros(capacity, 3, side, side, dtype=torch.uint8)
    extents = torch.zeros(capacity, 2)
    count = 0
    for array in arrays:
        h, w = array.shape[:2]
        if array.ndim != 3 or array.shape[2] != 3 or h > side or w > side:
            raise UsageError(f"a cached picture must be RGB with sides <= {side}, got shape {array.shape}")
        if count >= capacity:
            raise UsageError(f"more pictures than the bank's capacity of {capacity}")
        array = array if array.flags.writeable else array.copy()  # torch wants writable memory
        picture = pixels[count]
        picture[:, :h, :w] = torch.from_numpy(np.ascontiguousarray(array)).permute(2, 0, 1)
        # One more column and row repeating the edge: bilinear sampling reads up to half a
        # pixel past a crop box, and at the picture's edge it must read the edge again
        # (as torchvision's resize clamps), not the black padding.
        if w < side:
            picture[:, :h, w] = picture[:, :h, w - 1]
        if h < side:
            picture[:, h, : min(w + 1, side)] = picture[:, h - 1, : min(w + 1, side)]
        extents[count] = torch.tensor([w, h], dtype=torch.float32)
        count += 1
    if count < capacity:  # unreadable files left slots empty: give their memory back
        pixels, extents = pixels[:count].clone(), extents[:count].clone()
    return SourceBank(pixels, extents)


def whole_regions(extents: torch.Tensor) -> torch.Tensor:
    """(n, 4) regions x0, y0, x1, y1 covering each picture of (n, 2) extents."""
    return torch.cat([torch.zeros_like(extents), extents], dim=1)


def split_regions(extents: torch.Tensor, gen: torch.Generator) -> tuple[torch.Tensor, torch.Tensor]:
    """Two non-overlapping regions (each (n, 4) x0, y0, x1, y1) per picture of (n, 2) extents.

    Half the time the halves across the longer side, else two opposite quadrants
    (top-left with bottom-right, or top-right with bottom-left), at random.
    """
    n = len(extents)
    w, h = extents[:, 0], extents[:, 1]
    mode = torch.randint(0, 4, (n,), generator=gen)  # 0, 1: halves; 2, 3: the two diagonals
    cx, cy = w / 2, h / 2
    wide = w >= h
    zero = torch.zeros(n)
    # Halves: cut the longer side at its middle.
    half_a = torch.where(wide[:, None], torch.stack([zero, zero, cx - REGION_GAP, h], 1),
                         torch.stack([zero, zero, w, cy - REGION_GAP], 1))
    half_b = torch.where(wide[:, None], torch.stack([cx + REGION_GAP, zero, w, h], 1),
                         torch.stack([zero, cy + REGION_GAP, w, h], 1))
    top_left = torch.stack([zero, zero, cx - REGION_GAP, cy - REGION_GAP], 1)
    bottom_right = torch.stack([cx + REGION_GAP, cy + REGION_GAP, w, h], 1)
    top_right = torch.stack([cx + REGION_GAP, zero, w, cy - REGION_GAP], 1)
    bottom_left = torch.stack([zero, cy + REGION_GAP, cx - REGION_GAP, h], 1)
    halves, main_diagonal = (mode < 2)[:, None], (mode == 2)[:, None]
    a = torch.where(halves, half_a, torch.where(main_diagonal, top_left, top_right))
    b = torch.where(halves, half_b, torch.where(main_diagonal, bottom_right, bottom_left))
    return a, b


def can_split(extents: torch.Tensor) -> torch.Tensor:
    """(n,) bool: both parts of any split would keep MIN_REGION_SIDE pixels across."""
    return extents.min(dim=1).values >= 2 * (MIN_REGION_SIDE + REGION_GAP)


def plan_entries(extents: torch.Tensor, n_split: int, gen: torch.Generator) -> tuple[torch.Tensor, torch.Tensor]:
    """Batch entries for the m pictures of (m, 2) extents: (picture position per entry, region per entry).

    Every picture gives one entry; the first `n_split` pictures that are large
    enough to split give a second one, and their two entries are two
    non-overlapping regions of the picture (`split_regions`), appended at the end.
    """
    m = len(extents)
    regions = whole_regions(extents)
    split = torch.nonzero(can_split(extents)).flatten()[: max(0, n_split)]
    first, second = split_regions(extents[split], gen)
    regions[split] = first
    positions = torch.cat([torch.arange(m), split])
    return positions, torch.cat([regions, second])


def sample_crop_boxes(regions: torch.Tensor, scale: torch.Tensor, ratio: tuple[float, float],
                      gen: torch.Generator) -> torch.Tensor:
    """RandomResizedCrop boxes (n, 4) x0, y0, w, h, one inside each region, drawn independently.

    As torchvision's RandomResizedCrop.get_params, vectorised and without rounding:
    an area fraction uniform in scale[i] = (low, high) of region i, an aspect
    ratio log-uniform in `ratio`; the first of CROP_TRIES draws that fits is
    kept, else the whole region cut to the nearest allowed ratio, centred.
    """
    n = len(regions)
    rw, rh = regions[:, 2] - regions[:, 0], regions[:, 3] - regions[:, 1]
    area = (rw * rh)[:, None]
    low, high = scale[:, :1], scale[:, 1:]
    fraction = low + (high - low) * torch.rand(n, CROP_TRIES, generator=gen)
    log_lo, log_hi = math.log(ratio[0]), math.log(ratio[1])
    aspect = torch.exp(log_lo + (log_hi - log_lo) * torch.rand(n, CROP_TRIES, generator=gen))
    w = torch.sqrt(area * fraction * aspect)
    h = torch.sqrt(area * fraction / aspect)
    fits = (w <= rw[:, None]) & (h <= rh[:, None])
    pick = fits.to(torch.uint8).argmax(dim=1, keepdim=True)
    w, h = w.gather(1, pick).squeeze(1), h.gather(1, pick).squeeze(1)
    # Fallback (torchvision's): the whole region, cut to the allowed ratio.
    fallback_w = torch.where(rw / rh > ratio[1], rh * ratio[1], rw)
    fallback_h = torch.where(rw / rh < ratio[0], rw / ratio[0], rh)
    found = fits.any(dim=1)
    w, h = torch.where(found, w, fallback_w), torch.where(found, h, fallback_h)
    x0 = regions[:, 0] + (rw - w) * torch.rand(n, generator=gen)
    y0 = regions[:, 1] + (rh - h) * torch.rand(n, generator=gen)
    return torch.stack([x0, y0, w, h], dim=1)
