"""The benchmark's query protocol: how each query is made from its original.

Modelled on two published benchmarks, written here from their definitions (no code of
theirs is imported; constants marked "from memory" are as we remember the papers and
their released code):

* Copydays (Douze et al. 2009, "Evaluation of GIST descriptors for web-scale image
  search"): a JPEG quality ladder (75, 50, 30, 20, 15, 10, 8, 5, 3; from memory), crops
  removing 10 to 80 % of the surface (10, 15, 20, 30, 40, 50, 60, 70, 80 %; from memory)
  and "strong" attacks. Copydays' strong attacks were made by hand (print and scan,
  painting, blur, heavy crops); ours are seeded combinations in that spirit. Copydays does
  not fix the crop position here: ours is drawn at random (seeded), aspect ratio kept.
* ImageNet-C (Hendrycks and Dietterich 2019, "Benchmarking Neural Network Robustness to
  Common Corruptions and Perturbations"), severities 1 to 3 of gaussian, shot and impulse
  noise, defocus and gaussian blur, brightness, contrast, saturate, JPEG and pixelate. The
  severity constants are from memory of the paper's released code; ImageNet-C works on
  224 px images and pixel-sized constants (blur radii) are used unchanged on our 200-470 px
  originals. The `imagecorruptions` package no longer imports with current setuptools,
  NumPy and scikit-image, hence this reimplementation.
* Our own additions: overlays (captions, text, shapes), borders, flips, small rotations,
  grayscale and a hue shift.

A transform maps an RGB image and a seeded `numpy.random.Generator` to an RGB image and
the encoding the query file is saved with: ("JPEG", quality) or ("PNG", None).

Each transform has a severity within its family, so results can be read per severity. The
mapping is ours (a judgement of how much of the original survives, not a published scale):

| family | mild | moderate | strong |
|---|---|---|---|
| jpeg | quality >= 30 | quality 10-20 | quality < 10 |
| crop | keeps >= 70 % of the area | keeps 51-69 % | keeps <= 50 % |
| strong | - | - | all (Copydays' "strong" attacks) |
| noise, blur, colour, digital (ImageNet-C) | severity 1 | severity 2 | severity 3 |
| colour (ours) | - | grayscale, hue shift by 36 degrees | - |
| overlay | caption band (15 % of the height), two lines of text | shape over 12 % | shape over 30 % |
| border | white, 5 % a side | black, 15 % a side | letterbox to 16:9 (bars fill 44 % of a square tile's frame) |
| flip | - | mirror (left-right) | upside down |
| rotate | 2 degrees | 5 degrees (cropped or filled) | 10 degrees |
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass
from typing import Callable

import numpy as np
from PIL import Image, ImageDraw, ImageEnhance, ImageFilter, ImageFont, ImageOps
from scipy import ndimage

PNG = ("PNG", None)


MILD, MODERATE, STRONG = "mild", "moderate", "strong"
SEVERITY_LEVELS = (MILD, MODERATE, STRONG)


@dataclass(frozen=True)
class Transform:
    name: str
    family: str
    apply: Callable[[Image.Image, np.random.Generator], tuple[Image.Image, tuple]]
    severity: str  # MILD, MODERATE or STRONG within the family (the table in the module docstring)


# -- helpers ----------------------------------------------------------------------------------
def _float(im: Image.Image) -> np.ndarray:
    return np.asarray(im.convert("RGB"), dtype=np.float64) / 255.0


def _image(x: np.ndarray) -> Image.Image:
    return Image.fromarray(np.uint8(np.clip(x, 0.0, 1.0) * 255.0 + 0.5))


def jpeg_roundtrip(im: Image.Image, quality: int) -> Image.Image:
    buf = io.BytesIO()
    im.convert("RGB").save(buf, "JPEG", quality=quality)
    buf.seek(0)
    return Image.open(buf).convert("RGB")


def crop_area(im: Image.Image, keep: float, rng: np.random.Generator) -> Image.Image:
    """Keep `keep` of the surface, same aspect ratio, at a random position."""
    w, h = im.size
    cw, ch = max(8, round(w * math.sqrt(keep))), max(8, round(h * math.sqrt(keep)))
    x, y = int(rng.integers(0, w - cw + 1)), int(rng.integers(0, h - ch + 1))
    return im.crop((x, y, x + cw, y + ch))


def rotate_crop(im: Image.Image, degrees: float) -> Image.Image:
    """Rotate, then keep the largest centred rectangle of the original aspect without corners."""
    w, h = im.size
    a = math.radians(abs(degrees))
    # the inscribed rectangle of the same aspect ratio (common practice, from the rotation geometry)
    scale = 1.0 / (math.cos(a) + max(w / h, h / w) * math.sin(a))
    out = im.rotate(degrees, resample=Image.Resampling.BICUBIC)
    cw, ch = w * scale, h * scale
    box = ((w - cw) / 2, (h - ch) / 2, (w + cw) / 2, (h + ch) / 2)
    return out.crop(tuple(round(v) for v in box))


def _font(px: int) -> ImageFont.ImageFont:
    try:
        return ImageFont.load_default(size=max(8, px))
    except TypeError:  # Pillow without FreeType: the fixed bitmap font
        return ImageFont.load_default()


WORDS = ("harbour", "lantern", "meadow", "gazette", "weekend", "archive", "copper", "morning", "ferry", "orchard")


def _words(rng: np.random.Generator, n: int) -> str:
    return " ".join(WORDS[int(i)] for i in rng.integers(0, len(WORDS), n))


def caption_band(im: Image.Image, rng: np.random.Generator, height: float = 0.15) -> Image.Image:
    """A dark band across the foot with invented words on it."""
    out = im.convert("RGB").copy()
    w, h = out.size
    band = max(10, round(h * height))
    draw = ImageDraw.Draw(out)
    draw.rectangle((0, h - band, w, h), fill=(20, 20, 24))
    draw.text((band // 4, h - band + band // 6), _words(rng, 3), fill=(240, 240, 240), font=_font(int(band * 0.6)))
    return out


def text_overlay(im: Image.Image, rng: np.random.Generator) -> Image.Image:
    """Two lines of invented words written over the picture, in a random colour."""
    out = im.convert("RGB").copy()
    w, h = out.size
    draw = ImageDraw.Draw(out)
    colour = tuple(int(c) for c in rng.integers(0, 256, 3))
    for line in range(2):
        y = int(rng.uniform(0.1, 0.8) * h)
        draw.text((int(rng.uniform(0.0, 0.3) * w), y), _words(rng, 2), fill=colour, font=_font(h // 9))
    return out


def shape_overlay(im: Image.Image, rng: np.random.Generator, area: float = 0.12) -> Image.Image:
    """An opaque logo-like ellipse and rectangle covering about `area` of the picture."""
    out = im.convert("RGB").copy()
    w, h = out.size
    draw = ImageDraw.Draw(out)
    side = math.sqrt(area * w * h)
    x, y = rng.uniform(0, w - side), rng.uniform(0, h - side)
    draw.ellipse((x, y, x + side, y + side), fill=tuple(int(c) for c in rng.integers(0, 256, 3)))
    draw.rectangle((x + side * 0.25, y + side * 0.4, x + side * 0.75, y + side * 0.6),
                   fill=tuple(int(c) for c in rng.integers(0, 256, 3)))
    return out


def border(im: Image.Image, frac: float, colour: tuple[int, int, int]) -> Image.Image:
    w, h = im.size
    return ImageOps.expand(im.convert("RGB"), border=max(1, round(frac * max(w, h))), fill=colour)


def letterbox(im: Image.Image, aspect: float = 16 / 9) -> Image.Image:
    """Black bars to a 16:9 frame (or pillar bars when the picture is wider than that)."""
    w, h = im.size
    if w / h < aspect:
        size = (round(h * aspect), h)
    else:
        size = (w, round(w / aspect))
    canvas = Image.new("RGB", size, (0, 0, 0))
    canvas.paste(im.convert("RGB"), ((size[0] - w) // 2, (size[1] - h) // 2))
    return canvas


# -- ImageNet-C corruptions (Hendrycks and Dietterich 2019); severity 1..5, constants from memory ---------
def gaussian_noise(im, severity, rng):
    c = [0.08, 0.12, 0.18, 0.26, 0.38][severity - 1]
    x = _float(im)
    return _image(x + rng.normal(size=x.shape, scale=c))


def shot_noise(im, severity, rng):
    c = [60, 25, 12, 5, 3][severity - 1]
    return _image(rng.poisson(_float(im) * c) / c)


def impulse_noise(im, severity, rng):
    # salt-and-pepper on each value, as skimage.util.random_noise(mode="s&p", amount=c) does
    c = [0.03, 0.06, 0.09, 0.17, 0.27][severity - 1]
    x = _float(im)
    hit = rng.random(x.shape) < c
    x[hit] = (rng.random(int(hit.sum())) < 0.5).astype(np.float64)
    return _image(x)


def gaussian_blur(im, severity, rng):
    c = [1, 2, 3, 4, 6][severity - 1]
    return _image(ndimage.gaussian_filter(_float(im), sigma=(c, c, 0), mode="nearest"))


def _disk(radius: float, alias_blur: float) -> np.ndarray:
    """The aliased disk kernel, slightly smoothed (ImageNet-C's defocus kernel)."""
    half = 8 if radius <= 8 else int(radius)
    grid = np.arange(-half, half + 1)
    xx, yy = np.meshgrid(grid, grid)
    disk = (xx**2 + yy**2 <= radius**2).astype(np.float64)
    disk /= disk.sum()
    return ndimage.gaussian_filter(disk, sigma=alias_blur, radius=1 if radius <= 8 else 2, mode="mirror")


def defocus_blur(im, severity, rng):
    radius, alias = [(3, 0.1), (4, 0.5), (6, 0.5), (8, 0.5), (10, 0.5)][severity - 1]
    x = _float(im)
    kernel = _disk(radius, alias)
    return _image(np.stack([ndimage.convolve(x[..., ch], kernel, mode="mirror") for ch in range(3)], axis=-1))


def _hsv_edit(im, edit):
    from skimage import color

    hsv = color.rgb2hsv(_float(im))
    edit(hsv)
    return _image(color.hsv2rgb(np.clip(hsv, 0.0, 1.0)))


def brightness(im, severity, rng):
    c = [0.1, 0.2, 0.3, 0.4, 0.5][severity - 1]

    def edit(hsv):
        hsv[..., 2] = np.clip(hsv[..., 2] + c, 0, 1)
    return _hsv_edit(im, edit)


def contrast(im, severity, rng):
    c = [0.4, 0.3, 0.2, 0.1, 0.05][severity - 1]
    x = _float(im)
    means = x.mean(axis=(0, 1), keepdims=True)
    return _image((x - means) * c + means)


def saturate(im, severity, rng):
    scale, shift = [(0.3, 0), (0.1, 0), (2, 0), (5, 0.1), (20, 0.2)][severity - 1]

    def edit(hsv):
        hsv[..., 1] = np.clip(hsv[..., 1] * scale + shift, 0, 1)
    return _hsv_edit(im, edit)


def jpeg_compression(im, severity, rng):
    return jpeg_roundtrip(im, [25, 18, 15, 10, 7][severity - 1])


def pixelate(im, severity, rng):
    c = [0.6, 0.5, 0.4, 0.3, 0.25][severity - 1]
    w, h = im.size
    small = im.convert("RGB").resize((max(1, int(w * c)), max(1, int(h * c))), Image.Resampling.BOX)
    return small.resize((w, h), Image.Resampling.BOX)


IMAGENET_C = {"noise": (gaussian_noise, shot_noise, impulse_noise), "blur": (defocus_blur, gaussian_blur),
              "colour": (brightness, contrast, saturate), "digital": (jpeg_compression, pixelate)}
SEVERITIES = (1, 2, 3)


# -- Copydays-style "strong" combinations (ours, seeded) ------------------------------------
def strong_print_scan(im, rng):
    x = rotate_crop(im.convert("RGB"), float(rng.choice([-3.0, 3.0])))
    x = x.filter(ImageFilter.GaussianBlur(1.2))
    x = ImageEnhance.Contrast(x).enhance(0.8)
    arr = _float(x) ** 1.2
    x = _image(arr + rng.normal(size=arr.shape, scale=0.04))
    x = x.resize((max(8, round(x.width * 0.7)), max(8, round(x.height * 0.7))), Image.Resampling.LANCZOS)
    return x, ("JPEG", 60)


def strong_crop_colour(im, rng):
    x = crop_area(im.convert("RGB"), 0.4, rng)
    x = ImageEnhance.Color(x).enhance(1.8)
    x = ImageEnhance.Brightness(x).enhance(0.85)
    return x, ("JPEG", 40)


def strong_overlay_border(im, rng):
    x = caption_band(crop_area(im.convert("RGB"), 0.7, rng), rng)
    return border(x, 0.08, (236, 226, 200)), ("JPEG", 50)


def strong_tiny(im, rng):
    w, h = im.size
    x = im.convert("RGB").resize((max(8, w // 4), max(8, h // 4)), Image.Resampling.BILINEAR)
    x = ImageEnhance.Contrast(x.resize((w, h), Image.Resampling.BICUBIC)).enhance(1.3)
    return x, ("JPEG", 30)


def _png(fn):
    return lambda im, rng: (fn(im.convert("RGB"), rng), PNG)


def _corruption(fn, severity):
    return lambda im, rng: (fn(im.convert("RGB"), severity, rng), PNG)


def jpeg_severity(quality: int) -> str:
    return MILD if quality >= 30 else MODERATE if quality >= 10 else STRONG


def crop_severity(removed_pct: int) -> str:
    """Keeping >= 70 % of the area is mild, <= 50 % strong."""
    return MILD if removed_pct <= 30 else STRONG if removed_pct >= 50 else MODERATE


IMAGENET_C_SEVERITY = {1: MILD, 2: MODERATE, 3: STRONG}


def build_transforms() -> list[Transform]:
    """Every transform of the protocol, in report order."""
    out = [Transform(f"jpeg-q{q}", "jpeg", (lambda q: lambda im, rng: (im.convert("RGB"), ("JPEG", q)))(q),
                     jpeg_severity(q))
           for q in (75, 50, 30, 20, 15, 10, 8, 5, 3)]
    out += [Transform(f"crop-{pct}", "crop", (lambda keep: _png(lambda im, rng: crop_area(im, keep, rng)))(1 - pct / 100),
                      crop_severity(pct))
            for pct in (10, 15, 20, 30, 40, 50, 60, 70, 80)]
    out += [Transform(f"strong-{name}", "strong", fn, STRONG) for name, fn in (
        ("print-scan", strong_print_scan), ("crop-colour", strong_crop_colour),
        ("overlay-border", strong_overlay_border), ("tiny", strong_tiny))]
    for family, fns in IMAGENET_C.items():
        out += [Transform(f"{fn.__name__}-{s}", family, _corruption(fn, s), IMAGENET_C_SEVERITY[s])
                for fn in fns for s in SEVERITIES]
    out += [Transform("grayscale", "colour", _png(lambda im, rng: im.convert("L").convert("RGB")), MODERATE),
            Transform("hue-shift", "colour", _png(lambda im, rng: _hsv_edit(im, _shift_hue)), MODERATE)]
    out += [Transform("overlay-caption", "overlay", _png(caption_band), MILD),
            Transform("overlay-text", "overlay", _png(text_overlay), MILD),
            Transform("overlay-shape", "overlay", _png(shape_overlay), MODERATE),
            Transform("overlay-shape-large", "overlay", _png(lambda im, rng: shape_overlay(im, rng, 0.3)), STRONG)]
    out += [Transform("border-white-5", "border", _png(lambda im, rng: border(im, 0.05, (255, 255, 255))), MILD),
            Transform("border-black-15", "border", _png(lambda im, rng: border(im, 0.15, (0, 0, 0))), MODERATE),
            Transform("letterbox-16x9", "border", _png(lambda im, rng: letterbox(im)), STRONG)]
    out += [Transform("flip-mirror", "flip", _png(lambda im, rng: ImageOps.mirror(im)), MODERATE),
            Transform("flip-vertical", "flip", _png(lambda im, rng: ImageOps.flip(im)), STRONG)]
    out += [Transform(f"rotate-{d}", "rotate", (lambda d: _png(lambda im, rng: rotate_crop(im, d)))(d),
                      {2: MILD, 5: MODERATE, 10: STRONG}[d]) for d in (2, 5, 10)]
    out.append(Transform("rotate-5-filled", "rotate",
                         _png(lambda im, rng: im.rotate(-5, resample=Image.Resampling.BICUBIC, expand=True,
                                                        fillcolor=(255, 255, 255))), MODERATE))
    return out


def _shift_hue(hsv):
    hsv[..., 0] = (hsv[..., 0] + 0.1) % 1.0


FAMILIES = ("jpeg", "crop", "strong", "noise", "blur", "colour", "digital", "overlay", "border", "flip", "rotate")


def make_query(im: Image.Image, transform: Transform, seed: int) -> tuple[bytes, str]:
    """The query file's bytes and extension for `transform` applied to `im` with `seed`."""
    out, (fmt, quality) = transform.apply(im, np.random.default_rng(seed))
    buf = io.BytesIO()
    if fmt == "JPEG":
        out.convert("RGB").save(buf, "JPEG", quality=quality)
        return buf.getvalue(), ".jpg"
    out.convert("RGB").save(buf, "PNG", compress_level=1)
    return buf.getvalue(), ".png"
