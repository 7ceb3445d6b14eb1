"""Synthetic near-duplicate edits: what a copy of a photo typically goes through.

Written with Pillow alone, independently of the torchvision training views in
`views.py`, so a check that uses these edits does not merely measure how well
the encoder learned its own augmentations. Used by the held-out check, by
threshold calibration and by the benchmarks.

Edit kinds (ranges are `EditStrengths` fields):

- ``recompress``: JPEG re-encoding at quality 30-70.
- ``resize``: downscale to 40-80 % of the side length.
- ``crop``: keep a random rectangle of 60-90 % of the area.
- ``color``: brightness, contrast and saturation factors in 0.7-1.3 / 0.6-1.4.
- ``overlay``: a caption band with text, a short string, or a logo-like shape.
- ``border``: a solid frame or letterbox bars of 3-12 % of the side.
- ``rotate``: rotation by 2-5 degrees either way, cropped to drop the corners.
- ``combo``: two or three of the above, then a JPEG re-encode.

Every function takes a NumPy `Generator`, so a seed fixes the edit exactly.
"""

from __future__ import annotations

import io
import math
import string
from dataclasses import dataclass

import numpy as np
from PIL import Image, ImageDraw, ImageEnhance, ImageFont, ImageOps

from ..core.cores import each_on_cores
from ..core.errors import UsageError

EDIT_KINDS = ("recompress", "resize", "crop", "color", "overlay", "border", "rotate", "combo")
SINGLE_KINDS = EDIT_KINDS[:-1]


@dataclass(frozen=True)
class EditStrengths:
    """Ranges (low, high) that each edit samples from uniformly."""

    jpeg_quality: tuple[int, int] = (30, 70)
    resize_scale: tuple[float, float] = (0.4, 0.8)
    crop_area: tuple[float, float] = (0.6, 0.9)
    crop_aspect_jitter: float = 0.25  # log-uniform aspect change of the kept rectangle, +-25 %
    brightness: tuple[float, float] = (0.7, 1.3)
    contrast: tuple[float, float] = (0.7, 1.3)
    saturation: tuple[float, float] = (0.6, 1.4)
    overlay_height: tuple[float, float] = (0.08, 0.18)  # caption band / text height, fraction of image height
    border_frac: tuple[float, float] = (0.03, 0.12)
    rotate_degrees: tuple[float, float] = (2.0, 5.0)
    combo_size: tuple[int, int] = (2, 3)


DEFAULT_STRENGTHS = EditStrengths()


def _uniform(rng: np.random.Generator, bounds: tuple[float, float]) -> float:
    return float(rng.uniform(bounds[0], bounds[1]))


def _rgb(im: Image.Image) -> Image.Image:
    return im if im.mode == "RGB" else im.convert("RGB")


def _random_color(rng: np.random.Generator) -> tuple[int, int, int]:
    return tuple(int(c) for c in rng.integers(0, 256, size=3))


def recompress(im: Image.Image, rng: np.random.Generator, s: EditStrengths = DEFAULT_STRENGTHS) -> Image.Image:
    quality = int(rng.integers(s.jpeg_quality[0], s.jpeg_quality[1] + 1))
    buf = io.BytesIO()
    _rgb(im).save(buf, format="JPEG", quality=quality)
    buf.seek(0)
    out = Image.open(buf)
    out.load()
    return out.convert("RGB")


def resize(im: Image.Image, rng: np.random.Generator, s: EditStrengths = DEFAULT_STRENGTHS) -> Image.Image:
    scale = _uniform(rng, s.resize_scale)
    w, h = im.size
    return _rgb(im).resize((max(8, round(w * scale)), max(8, round(h * scale))), Image.BICUBIC)


def crop(im: Image.Image, rng: np.random.Generator, s: EditStrengths = DEFAULT_STRENGTHS) -> Image.Image:
    w, h = im.size
    area = _uniform(rng, s.crop_area)
    aspect = math.exp(rng.uniform(-s.crop_aspect_jitter, s.crop_aspect_jitter))
    cw = min(w, max(8, round(w * math.sqrt(area * aspect))))
    ch = min(h, max(8, round(h * math.sqrt(area / aspect))))
    left = int(rng.integers(0, w - cw + 1))
    top = int(rng.integers(0, h - ch + 1))
    return _rgb(im).crop((left, top, left + cw, top + ch))


def color(im: Image.Image, rng: np.random.Generator, s: EditStrengths = DEFAULT_STRENGTHS) -> Image.Image:
    out = _rgb(im)
    out = ImageEnhance.Brightness(out).enhance(_uniform(rng, s.brightness))
    out = ImageEnhance.Contrast(out).enhance(_uniform(rng, s.contrast))
    return ImageEnhance.Color(out).enhance(_uniform(rng, s.saturation))


def _random_text(rng: np.random.Generator) -> str:
    letters = string.ascii_letters + string.digits
    words = ["".join(rng.choice(list(letters), size=int(rng.integers(3, 8)))) for _ in range(int(rng.integers(1, 4)))]
    return " ".join(words)


def overlay(im: Image.Image, rng: np.random.Generator, s: EditStrengths = DEFAULT_STRENGTHS) -> Image.Image:
    """Draw one of: a caption band with text, a bare short string, a logo-like shape."""
    out = _rgb(im).copy()
    w, h = out.size
    band = max(6, round(h * _uniform(rng, s.overlay_height)))
    draw = ImageDraw.Draw(out, "RGBA")
    font = ImageFont.load_default(size=max(6, int(band * 0.7)))
    style = int(rng.integers(0, 3))
    if style == 0:  # caption band at top or bottom
        top = 0 if rng.random() < 0.5 else h - band
        draw.rectangle((0, top, w, top + band), fill=_random_color(rng) + (255,))
        draw.text((band // 4, top + band // 8), _random_text(rng), fill=_random_color(rng) + (255,), font=font)
    elif style == 1:  # free text somewhere
        x, y = int(rng.integers(0, max(1, w // 2))), int(rng.integers(0, max(1, h - band)))
        draw.text((x, y), _random_text(rng), fill=_random_color(rng) + (255,), font=font)
    else:  # logo-like shape in a corner, partly transparent
        side = max(6, round(min(w, h) * _uniform(rng, (0.1, 0.22))))
        x = int(rng.choice([side // 4, w - side - side // 4]))
        y = int(rng.choice([side // 4, h - side - side // 4]))
        fill = _random_color(rng) + (int(rng.integers(140, 256)),)
        box = (x, y, x + side, y + side)
        (draw.ellipse if rng.random() < 0.5 else draw.rectangle)(box, fill=fill)
    return out


def border(im: Image.Image, rng: np.random.Generator, s: EditStrengths = DEFAULT_STRENGTHS) -> Image.Image:
    """A frame on all four sides or letterbox bars on two opposite sides."""
    w, h = im.size
    pad = max(1, round(max(w, h) * _uniform(rng, s.border_frac)))
    fill = (0, 0, 0) if rng.random() < 0.4 else (255, 255, 255) if rng.random() < 0.5 else _random_color(rng)
    mode = int(rng.integers(0, 3))
    sides = (pad, pad, pad, pad) if mode == 0 else (0, pad, 0, pad) if mode == 1 else (pad, 0, pad, 0)
    return ImageOps.expand(_rgb(im), border=sides, fill=fill)


def rotate(im: Image.Image, rng: np.random.Generator, s: EditStrengths = DEFAULT_STRENGTHS) -> Image.Image:
    """Rotate about the centre, then keep the largest centred rectangle of the same aspect without corners."""
    degrees = _uniform(rng, s.rotate_degrees) * (1 if rng.random() < 0.5 else -1)
    w, h = im.size
    out = _rgb(im).rotate(degrees, resample=Image.BICUBIC, expand=False)
    theta = math.radians(abs(degrees))
    # The scaled rectangle (k w, k h) fits inside the rotated w x h frame iff both
    # k (w cos + h sin) <= w and k (w sin + h cos) <= h (project its corner on the frame axes).
    k = min(w / (w * math.cos(theta) + h * math.sin(theta)), h / (w * math.sin(theta) + h * math.cos(theta)))
    cw, ch = max(8, int(w * k)), max(8, int(h * k))
    left, top = (w - cw) // 2, (h - ch) // 2
    return out.crop((left, top, left + cw, top + ch))


_EDITS = {
    "recompress": recompress,
    "resize": resize,
    "crop": crop,
    "color": color,
    "overlay": overlay,
    "border": border,
    "rotate": rotate,
}


def combo(im: Image.Image, rng: np.random.Generator, s: EditStrengths = DEFAULT_STRENGTHS) -> Image.Image:
    """Two or three distinct single edits in random order, then a JPEG re-encode (reposts are re-encoded)."""
    count = int(rng.integers(s.combo_size[0], s.combo_size[1] + 1))
    candidates = [k for k in SINGLE_KINDS if k != "recompress"]
    for kind in rng.choice(candidates, size=count, replace=False):
        im = _EDITS[str(kind)](im, rng, s)
    return recompress(im, rng, s)


def apply_edit(
    im: Image.Image, kind: str, rng: np.random.Generator, strengths: EditStrengths = DEFAULT_STRENGTHS
) -> Image.Image:
    """Apply one named edit; the result is a new RGB image (the input is left untouched)."""
    if kind == "combo":
        return combo(im, rng, strengths)
    if kind not in _EDITS:
        raise UsageError(f"unknown edit kind {kind!r}; choose one of {', '.join(EDIT_KINDS)}")
    return _EDITS[kind](im, rng, strengths)


def edited_copies(images: list, kinds: tuple[str, ...], strengths: EditStrengths, rng) -> tuple[list, list[str]]:
    """One edit of each image, its kind drawn from `kinds`, on every core (Pillow releases the GIL): the kinds
    and a seed per copy are drawn from `rng` in order first, so the copies do not depend on the threads."""
    drawn = [(str(rng.choice(list(kinds))), int(rng.integers(2**63))) for _ in images]

    def edit(job):
        image, (kind, seed) = job
        return apply_edit(image, kind, np.random.default_rng(seed), strengths)

    return each_on_cores(edit, list(zip(images, drawn))), [kind for kind, _ in drawn]


def random_edit(
    im: Image.Image,
    rng: np.random.Generator,
    kinds: tuple[str, ...] = EDIT_KINDS,
    strengths: EditStrengths = DEFAULT_STRENGTHS,
) -> Image.Image:
    """Apply one edit whose kind is drawn uniformly from `kinds`.

    The kind drawn is recorded in the result's ``info["edit"]`` for per-kind reports.
    """
    if not kinds:
        raise UsageError("random_edit needs at least one edit kind")
    kind = str(rng.choice(list(kinds)))
    edited = apply_edit(im, kind, rng, strengths)
    edited.info["edit"] = kind
    return edited
