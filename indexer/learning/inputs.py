"""What the encoder is fed, without PyTorch: pictures brought to one square side, then standardised.

Shared by the PyTorch path (`encoder.preprocess`) and the ONNX Runtime path (indexer/learning/runtime.py), so
both see the same pixels. Importing this module never imports torch.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from PIL import Image

# ImageNet channel statistics (common practice). They are kept even though we never
# use ImageNet weights: any fixed standardisation works, and one set in one place
# keeps training views, the held-out check and embedding consistent.
IMAGENET_MEAN = (0.485, 0.456, 0.406)
IMAGENET_STD = (0.229, 0.224, 0.225)


# From this many pictures (to resize, for `square_batch`) on, `square_batch` and `standardised` share a batch
# among the cores: below it, handing work to threads costs about what it saves.
PARALLEL_BATCH = 8


def rgb(im: Image.Image) -> Image.Image:
    return im if im.mode == "RGB" else im.convert("RGB")


def resize_center_crop(im: Image.Image, size: int) -> Image.Image:
    """Scale the shorter side to `size` (bilinear, antialiased by Pillow) and cut the central square."""
    w, h = im.size
    scale = size / min(w, h)
    new_w, new_h = max(size, round(w * scale)), max(size, round(h * scale))
    if (new_w, new_h) != (w, h):
        im = im.resize((new_w, new_h), Image.BILINEAR, reducing_gap=3.0)
    left, top = (new_w - size) // 2, (new_h - size) // 2
    return im.crop((left, top, left + size, top + size))


def square_batch(images: Sequence[Image.Image], size: int) -> np.ndarray:
    """(n, size, size, 3) uint8: each picture's shorter side brought to `size`, its central square cut.

    Choice: unlike letterboxing, no pixels are spent on padding; the cost is that the outer ends of
    very wide or tall images are not seen. Training views are random square crops, so the encoder is
    used to it."""
    if not images:
        return np.zeros((0, size, size, 3), np.uint8)
    out = np.empty((len(images), size, size, 3), np.uint8)

    def fill(rows: slice) -> None:
        for r in range(len(images))[rows]:
            out[r] = np.asarray(resize_center_crop(rgb(images[r]), size), dtype=np.uint8)

    # Pillow resizes with the GIL released: a batch to resize (queries, their parts, calibration's copies) is
    # shared among the cores, one share a core: 32 pictures of 512 x 384 brought to 128 in 0.5 of the time, their
    # 288 parts in 0.87. Pictures whose shorter side is the input side already are only cut, and on the cores
    # they took 1.6-1.8 times as long, the threads waiting for the GIL (2 cores, benchmarks/results/query-views.md).
    _by_rows(fill, len(images), sum(1 for im in images if min(im.size) != size) >= PARALLEL_BATCH)
    return out


def standardised(batch: np.ndarray) -> np.ndarray:
    """(n, 3, size, size) float32 in the encoder's input units from a `square_batch`: [0, 1], then the
    fixed channel statistics, in the same float32 operations as `encoder.normalize_tensor`."""
    import cv2

    # Each channel's 256 possible values are computed once, in those operations, and looked up: the same
    # numbers as computing every pixel (tests/test_runtime.py). The batch is split into its three planes and
    # each is looked up by OpenCV's table look-up (cv2.LUT, into float32), a share of the rows a core: 42 -> 8 ms
    # for 150 pictures of 128 px on one core, against NumPy's take, which first copies the strided levels
    # into an array of 64-bit indices (benchmarks/results/query.md).
    n, h, w, _ = batch.shape
    out = np.empty((n, 3, h, w), np.float32)

    def fill(rows: slice) -> None:
        planes = cv2.split(batch[rows].reshape(-1, w, 3))
        for c in range(3):
            out[rows, c] = cv2.LUT(planes[c], _TABLE[c]).reshape(-1, h, w)

    _by_rows(fill, n, n >= PARALLEL_BATCH)
    return out


def _by_rows(fill, n: int, parallel: bool) -> None:
    """`fill(rows)` of n rows in one contiguous share a core when `parallel`, else of all of them here."""
    from ..core.cores import each_on_cores, usable_cores

    shares = usable_cores() if parallel else 1
    bounds = np.linspace(0, n, shares + 1).astype(int)
    each_on_cores(fill, [slice(a, b) for a, b in zip(bounds[:-1], bounds[1:])])


def _channel_table() -> np.ndarray:
    levels = np.arange(256, dtype=np.float32) / np.float32(255.0)
    mean = np.array(IMAGENET_MEAN, np.float32).reshape(3, 1)
    std = np.array(IMAGENET_STD, np.float32).reshape(3, 1)
    return (levels[None, :] - mean) / std


_TABLE = _channel_table().reshape(3, 256, 1)  # float32: channel c's value for each 8-bit level, as cv2.LUT takes it
