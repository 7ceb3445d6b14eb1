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
    return np.stack([np.asarray(resize_center_crop(rgb(im), size), dtype=np.uint8) for im in images])


def standardised(batch: np.ndarray) -> np.ndarray:
    """(n, 3, size, size) float32 in the encoder's input units from a `square_batch`: [0, 1], then the
    fixed channel statistics, in the same float32 operations as `encoder.normalize_tensor`."""
    x = np.ascontiguousarray(batch.transpose(0, 3, 1, 2)).astype(np.float32) / np.float32(255.0)
    mean = np.array(IMAGENET_MEAN, np.float32).reshape(3, 1, 1)
    std = np.array(IMAGENET_STD, np.float32).reshape(3, 1, 1)
    return (x - mean) / std
