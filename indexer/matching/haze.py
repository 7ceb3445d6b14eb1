"""A hazy query seen through the haze: the dark channel prior (He, Sun and Tang, "Single image haze removal
using dark channel prior", CVPR 2009).

In a clear photograph most patches hold some pixel that is dark in at least one colour channel, so the
minimum over a patch and the channels (the dark channel) is near 0. Haze adds the airlight A in proportion
1 - t(x): I = J t + A (1 - t). The dark channel of I / A then estimates 1 - t, and J = (I - A) / t + A.
A fogged copy (a bright veil over 60-70 % of the contrast) is far from its original for the encoder and
for ORB alike; the same copy dehazed is much nearer (`Searcher._with_dehazed`).

The transmission is smoothed with a Gaussian of the patch's size instead of the paper's soft matting (or
a guided filter): the dehazed image only has to be found and verified, not looked at.
"""

from __future__ import annotations

import cv2
import numpy as np
from PIL import Image

PATCH_SHARE = 1 / 30  # the patch's side as a share of the image's longer side (15 px at 450 px, as He et al.)
OMEGA = 0.95  # haze kept for depth, He et al.'s value
T_MIN = 0.1  # the lowest transmission divided by, He et al.'s value
AIRLIGHT_SHARE = 0.001  # the brightest 0.1 % of the dark channel give the airlight (He et al.)
# A query is tried dehazed when a tenth of its dark channel is at least this bright: a veil leaves few dark
# patches anywhere. Measured on the quality benchmark's queries (144 fogged, 400 others; one-off script):
# 0.92 of the fogged ones and 0.20 of the others pass (the others: bright skies, snow, paper); with the
# mean dark channel at 0.2 instead, 0.99 and 0.33. It only saves work: what counts is verification.
HAZY_DARK_TENTH = 0.1


def _patch(shape: tuple[int, ...]) -> np.ndarray:
    side = max(3, int(round(max(shape[:2]) * PATCH_SHARE))) | 1
    return np.ones((side, side), np.uint8)


def dark_channel(x: np.ndarray, kernel: np.ndarray | None = None) -> np.ndarray:
    """min over a square patch of min over the channels, for an (h, w, 3) float32 image."""
    r, g, b = cv2.split(x)  # NumPy's min over a length-3 last axis is several times slower
    return cv2.erode(cv2.min(cv2.min(r, g), b), _patch(x.shape) if kernel is None else kernel,
                     borderType=cv2.BORDER_REFLECT)


def _unit(image: Image.Image, side: int | None = None) -> np.ndarray:
    """The image as float32 RGB in [0, 1], shrunk (area-averaged) to at most `side` on its longer side."""
    x = np.asarray(image.convert("RGB"))
    h, w = x.shape[:2]
    if side is not None and max(h, w) > side:
        f = side / max(h, w)
        x = cv2.resize(x, (max(1, round(w * f)), max(1, round(h * f))), interpolation=cv2.INTER_AREA)
    return x.astype(np.float32) / 255.0


DETECT_SIDE = 128  # looks_hazy and the transmission work on a thumbnail of this longer side: the veil is smooth


def looks_hazy(image: Image.Image) -> bool:
    """Whether a tenth of the image's dark channel (on a DETECT_SIDE thumbnail) is at least HAZY_DARK_TENTH."""
    return float(np.quantile(dark_channel(_unit(image, DETECT_SIDE)), 0.1)) >= HAZY_DARK_TENTH


def airlight(x: np.ndarray, dark: np.ndarray) -> np.ndarray:
    """The mean colour of the pixels whose dark channel is in its brightest AIRLIGHT_SHARE."""
    n = max(1, int(dark.size * AIRLIGHT_SHARE))
    brightest = np.argpartition(dark.ravel(), -n)[-n:]
    return np.maximum(x.reshape(-1, 3)[brightest].mean(axis=0), 0.05)


def dehazed(image: Image.Image, max_side: int | None = None) -> Image.Image:
    """`image` with its haze removed by the dark channel prior (RGB; the same size, or at most `max_side`).
    The airlight and the transmission are estimated on a DETECT_SIDE thumbnail (the veil is smooth, and
    the transmission is smoothed anyway) and the transmission is scaled up bilinearly."""
    x = _unit(image, max_side)
    small = _unit(image, DETECT_SIDE)
    kernel = _patch(small.shape)
    a = airlight(small, dark_channel(small, kernel))
    t = 1.0 - OMEGA * dark_channel(small / a, kernel)
    t = cv2.GaussianBlur(t, (0, 0), float(kernel.shape[0]))
    t = cv2.resize(t, (x.shape[1], x.shape[0]), interpolation=cv2.INTER_LINEAR)
    j = (x - a) / np.maximum(t, T_MIN)[..., None] + a
    return Image.fromarray(np.clip(j * 255.0 + 0.5, 0, 255).astype(np.uint8))
