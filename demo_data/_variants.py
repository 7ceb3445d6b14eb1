"""The near-duplicate edits planted in the archive, each a pure function of an upright image and its params.

`draw_params` picks the random parameters of one edit (recorded in the truth
file); `apply` performs it with Pillow. Re-encoding (JPEG quality) happens when
the result is saved, so "recompressed" needs no pixel edit here.
"""

from __future__ import annotations

import math

import numpy as np
from PIL import Image, ImageDraw, ImageEnhance, ImageFont

NEAR_KINDS = ("recompressed", "resized", "cropped", "colour-edited", "captioned", "bordered", "rotated", "burst")
MOUNTS = {"white": (246, 245, 240), "cream": (236, 226, 200), "black": (18, 18, 18)}


def _u(rng: np.random.Generator, lo: float, hi: float, digits: int = 3) -> float:
    return round(float(rng.uniform(lo, hi)), digits)


def _signed(rng: np.random.Generator, lo: float, hi: float) -> float:
    return round(float(rng.uniform(lo, hi)) * (1 if rng.random() < 0.5 else -1), 3)


def draw_params(kind: str, rng: np.random.Generator, size: tuple[int, int], caption: str) -> dict:
    """Random parameters for one edit of an upright image of `size` (w, h)."""
    w, h = size
    if kind == "recompressed":
        return {"quality": int(rng.integers(30, 61))}
    if kind == "resized":
        scale = _u(rng, 0.5, 0.7)
        return {"scale": scale, "size": [round(w * scale), round(h * scale)], "quality": int(rng.integers(85, 93))}
    if kind == "cropped":
        area = _u(rng, 0.7, 0.9)
        squash = _u(rng, 0.92, 1.08)
        cw = min(round(w * math.sqrt(area) * squash), w)
        ch = min(round(w * h * area / cw), h)
        left, top = int(rng.integers(0, w - cw + 1)), int(rng.integers(0, h - ch + 1))
        return {"box": [left, top, left + cw, top + ch], "area": round(cw * ch / (w * h), 3),
                "quality": int(rng.integers(80, 93))}
    if kind == "colour-edited":
        return {"brightness": round(1 + _signed(rng, 0.08, 0.2), 3), "contrast": round(1 + _signed(rng, 0.1, 0.25), 3),
                "saturation": _u(rng, 0.6, 1.5), "warmth": _signed(rng, 0.03, 0.08),
                "quality": int(rng.integers(80, 93))}
    if kind == "captioned":
        style = "band" if rng.random() < 0.5 else "overlay"
        return {"text": caption, "style": style, "quality": int(rng.integers(82, 93))}
    if kind == "bordered":
        mount = list(MOUNTS)[int(rng.integers(len(MOUNTS)))]
        return {"width": round(min(w, h) * _u(rng, 0.04, 0.1)), "colour": mount}
    if kind == "rotated":
        return {"degrees": _signed(rng, 1.0, 4.0), "corners": "cropped" if rng.random() < 0.5 else "filled",
                "quality": int(rng.integers(85, 93))}
    raise ValueError(f"unknown edit kind: {kind!r}")


def apply(kind: str, img: Image.Image, params: dict) -> Image.Image:
    """Perform one edit on an upright RGB image; returns a new image."""
    if kind == "recompressed":
        return img.copy()
    if kind == "resized":
        return img.resize(tuple(params["size"]), Image.Resampling.LANCZOS)
    if kind == "cropped":
        return img.crop(tuple(params["box"]))
    if kind == "colour-edited":
        return colour_edit(img, params)
    if kind == "captioned":
        return caption(img, params["text"], params["style"])
    if kind == "bordered":
        w = params["width"]
        framed = Image.new("RGB", (img.width + 2 * w, img.height + 2 * w), MOUNTS[params["colour"]])
        framed.paste(img, (w, w))
        return framed
    if kind == "rotated":
        return rotate(img, params["degrees"], params["corners"])
    raise ValueError(f"unknown edit kind: {kind!r}")


def colour_edit(img: Image.Image, params: dict) -> Image.Image:
    """Brightness, contrast and saturation as Pillow's ImageEnhance defines them, then a warm/cool shift."""
    out = ImageEnhance.Brightness(img).enhance(params["brightness"])
    out = ImageEnhance.Contrast(out).enhance(params["contrast"])
    out = ImageEnhance.Color(out).enhance(params["saturation"])
    warm = params["warmth"]
    a = np.asarray(out, dtype=np.float32) * np.asarray([1 + warm, 1.0, 1 - warm], np.float32)
    return Image.fromarray((np.clip(a, 0, 255) + 0.5).astype(np.uint8))


def caption(img: Image.Image, text: str, style: str) -> Image.Image:
    """A newsletter caption: a light band added under the photo, or a dark strip laid over its foot."""
    size = max(11, round(img.width / 28))
    font = ImageFont.load_default(size=size)
    band = round(size * 2.2)
    if style == "band":
        out = Image.new("RGB", (img.width, img.height + band), (240, 236, 226))
        out.paste(img, (0, 0))
        ImageDraw.Draw(out).text((img.width / 2, img.height + band / 2), text, font=font, fill=(40, 36, 32),
                                 anchor="mm")
        return out
    overlay = Image.new("RGBA", img.size, (0, 0, 0, 0))
    draw = ImageDraw.Draw(overlay)
    draw.rectangle((0, img.height - band, img.width, img.height), fill=(0, 0, 0, 140))
    draw.text((round(size * 0.8), img.height - band / 2), text, font=font, fill=(255, 255, 255, 255), anchor="lm")
    return Image.alpha_composite(img.convert("RGBA"), overlay).convert("RGB")


def inner_scale(w: int, h: int, degrees: float) -> float:
    """Largest s such that a centred s*w x s*h rectangle fits inside the w x h frame rotated by `degrees`.

    A corner (s*w/2, s*h/2) rotated back must stay inside the frame:
    s * (w cos t + h sin t) <= w and s * (w sin t + h cos t) <= h.
    """
    t = math.radians(abs(degrees))
    return min(w / (w * math.cos(t) + h * math.sin(t)), h / (w * math.sin(t) + h * math.cos(t)))


def rotate(img: Image.Image, degrees: float, corners: str) -> Image.Image:
    """A slightly skewed rescan: rotate, then crop the empty corners away or leave them scanner-lid white."""
    if corners == "filled":
        return img.rotate(degrees, resample=Image.Resampling.BICUBIC, fillcolor=(248, 248, 246))
    turned = img.rotate(degrees, resample=Image.Resampling.BICUBIC)
    s = inner_scale(img.width, img.height, degrees) * 0.995
    cw, ch = int(img.width * s), int(img.height * s)
    left, top = (img.width - cw) // 2, (img.height - ch) // 2
    return turned.crop((left, top, left + cw, top + ch))
