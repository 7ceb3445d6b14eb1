"""Turn a scene plan into pixels: sky, hills, ground, water, objects, then print tone and ageing.

The order of noise draws is fixed by the plan, so the same plan gives the same
scene; the `frame` generator only drives what differs between two exposures or
prints (grain, dust, scratches).
"""

from __future__ import annotations

import numpy as np

from ._objects import DRAW
from ._paint import blend, blur, bricks, rgb, ridge, smooth_noise, vertical_gradient
from ._scenes import render_margin

# ITU-R BT.601 luma weights, the ones Pillow's convert("L") uses.
LUMA = (0.299, 0.587, 0.114)
SEPIA_DARK, SEPIA_LIGHT = rgb([0.16, 0.10, 0.06]), rgb([1.0, 0.93, 0.78])


def render(plan: dict, frame: np.random.Generator, camera: tuple[int, int] = (0, 0)) -> np.ndarray:
    """Draw `plan` and return an (h, w, 3) uint8 array; `camera` shifts the frame within the render margin."""
    recipe = plan["recipe"]
    w, h = recipe["size"]
    m = render_margin(recipe["size"])
    H, W = h + 2 * m, w + 2 * m
    ctx = {"light": recipe["light"], "nrng": np.random.default_rng(plan["noise_seed"]),
           "lit_windows": recipe["time"] == "dusk", "salt": plan["noise_seed"] % 997}
    hz = int(plan["horizon"] * H)
    img = _sky(plan, ctx, H, W, hz)
    for hill in plan["hills"]:
        _hill(img, hill, ctx, hz)
    _ground(img, plan, ctx, hz)
    for item in plan["back"]:
        DRAW[item["type"]](img, item, ctx)
    if plan["water"]:
        _water(img, plan["water"], ctx)
    for item in plan["front"]:
        DRAW[item["type"]](img, item, ctx)
    dx, dy = camera
    img = _finish(img[:, m + dy:m + dy + h, m + dx:m + dx + w], recipe, frame)
    np.clip(img, 0, 1, out=img)
    img *= 255
    img += 0.5
    return np.ascontiguousarray(img.astype(np.uint8).transpose(1, 2, 0))


def _luma(img: np.ndarray) -> np.ndarray:
    return LUMA[0] * img[0] + LUMA[1] * img[1] + LUMA[2] * img[2]


def _sky(plan, ctx, H: int, W: int, hz: int) -> np.ndarray:
    sky = plan["sky"]
    img = vertical_gradient(H, W, sky["top"], sky["bottom"], power=0.7)
    rows = max(hz, 2)
    if plan["sun"]:
        _sun(img, plan["sun"], rows)
    n = smooth_noise(ctx["nrng"], rows, W, W * sky["cloud_scale"], octaves=5, stretch=2.5)
    threshold = np.quantile(n[:: 4, :: 4], 1 - sky["clouds"])
    cover = np.clip((n - threshold) / 0.9, 0, 1)
    fade = np.clip(np.linspace(1.6, -0.2, rows, dtype=np.float32) / 1.2, 0, 1)[:, None]
    underside = np.clip(n - np.roll(n, -max(rows // 40, 2), axis=0), -1, 1)
    cloud = rgb([0.97, 0.96, 0.94]) * (0.9 + 0.1 * underside)
    blend(img[:, :rows], cover * fade * 0.9, cloud)
    return img


def _sun(img, sun, rows: int) -> None:
    """Sun or moon disc with a soft glow, computed only in its neighbourhood of the sky."""
    H, W = img.shape[-2:]
    r = sun["r"] * min(H, W)
    cx, cy, reach = sun["x"] * W, sun["y"] * H, int(r * 8)
    y0, y1 = max(int(cy) - reach, 0), min(int(cy) + reach, rows)
    x0, x1 = max(int(cx) - reach, 0), min(int(cx) + reach, W)
    if y0 >= y1 or x0 >= x1:
        return
    y, x = np.ogrid[y0:y1, x0:x1]
    d = np.hypot(x - cx, y - cy).astype(np.float32)
    colour = rgb([0.95, 0.95, 0.9]) if sun["moon"] else rgb([1.0, 0.92, 0.7])
    glow = np.exp(-(d / (r * 4)) ** 2) * (0.15 if sun["moon"] else 0.4)
    region = img[:, y0:y1, x0:x1]
    region += glow * (colour - region)
    blend(region, np.clip(r - d + 1, 0, 1), colour)


def _hill(img, hill, ctx, hz: int) -> None:
    H, W = img.shape[-2:]
    line = ridge(ctx["nrng"], W, W * hill["scale"])
    crest = (hill["base"] - hill["amp"] * (0.6 + 0.35 * line)) * H
    top = int(max(crest.min(), 0))
    bottom = max(int(hill["base"] * H) + 4, top + 2)
    y = np.arange(top, bottom, dtype=np.float32)[:, None]
    alpha = np.clip(y - crest[None, :] + 0.5, 0, 1)
    slope = np.gradient(crest) / max(hill["amp"] * H, 1) * W * 0.05
    shade = 1 - 0.25 * np.clip(slope * ctx["light"], -1, 1)
    bumps = smooth_noise(ctx["nrng"], bottom - top, W, W * 0.05, octaves=3)
    depth = np.clip((y - crest) / (H * 0.15), 0, 1)
    surface = rgb(hill["colour"]) * (shade[None, :] * (1 - 0.15 * depth) + 0.06 * bumps)
    haze = img[:, max(top - 1, 0), W // 2].reshape(3, 1, 1)
    surface = surface * (1 - hill["haze"]) + haze * hill["haze"]
    blend(img, alpha, surface, top, 0)


def _ground(img, plan, ctx, hz: int) -> None:
    H, W = img.shape[-2:]
    ground = plan["ground"]
    h = H - hz
    y = np.arange(h, dtype=np.float32)[:, None] + 1
    x = np.arange(W, dtype=np.float32)[None, :]
    large = smooth_noise(ctx["nrng"], h, W, W * 0.3, octaves=3)
    base = rgb(ground["colour"])
    if ground["kind"] == "cobbles":
        vx = ground["vanish"] * W
        v = np.log(y / 2) * 14
        u = (x - vx) / (y + H * 0.05) * 12
        mortar, jitter = bricks(u, v, mortar=0.12, salt=ctx["salt"])
        surface = base * ((0.75 + 0.35 * jitter) * (1 - 0.45 * mortar) + 0.05 * large)
    elif ground["kind"] == "field":
        vx = ground["vanish"] * W
        furrows = 0.5 + 0.5 * np.sin((x - vx) / (y + H * 0.02) * 60)
        fields = smooth_noise(ctx["nrng"], h, W, W * 0.25, octaves=2, stretch=3.0)
        patches = np.clip(fields * 2, 0, 1)
        colour = base * (1 - patches) + rgb(ground["crop"]) * patches
        surface = colour * (0.82 + 0.18 * furrows + 0.04 * large)
    else:
        streaks = smooth_noise(ctx["nrng"], h, W, max(W * 0.01, 2), octaves=2, stretch=0.25)
        amount = 0.03 if ground["kind"] == "snow" else 0.08
        surface = base * (1 + 0.1 * large + amount * streaks)
    haze = np.exp(-y / (H * 0.06)) * 0.45
    surface = surface * (1 - haze) + rgb(plan["sky"]["bottom"]) * haze
    img[:, hz:] = surface


def _water(img, water, ctx) -> None:
    """Mirror everything above the waterline, broken up by horizontal ripples, and tint it."""
    H, W = img.shape[-2:]
    top, bottom = int(water["top"] * H), int(water["bottom"] * H)
    rows = bottom - top
    if rows < 2:
        return
    y = np.arange(rows)[:, None]
    waves = smooth_noise(ctx["nrng"], rows, W, max(W * 0.04, 4), octaves=3, stretch=6.0)
    depth = (y / rows).astype(np.float32)
    shift = (waves * water["ripple"] * (1 + depth * 8)).astype(np.int64)
    src_y = np.clip(top - 1 - y, 0, H - 1)
    src_x = np.clip(np.arange(W)[None, :] + shift, 0, W - 1)
    reflection = img[:, src_y, src_x]
    mix = 0.65 - 0.35 * depth
    surface = reflection * mix + rgb(water["colour"]) * (1 - mix)
    surface = surface * (1 - 0.2 * depth) + 0.08 * np.clip(waves - 1.6, 0, 1)
    img[:, top:bottom] = surface


def _finish(img, recipe, frame) -> np.ndarray:
    """Light and vignette, the print's tone, then softness, film grain, dust and the odd scratch.

    Monochrome prints are finished on the luma plane alone and coloured at the end.
    """
    H, W = img.shape[-2:]
    x = np.linspace(-1, 1, W, dtype=np.float32)[None, :]
    y = np.linspace(-1, 1, H, dtype=np.float32)[:, None]
    r2 = (x * x + y * y) / 2
    gain = (1 + 0.08 * recipe["light"] * x) * (1 - float(frame.uniform(0.15, 0.4)) * r2 * np.sqrt(r2))
    tone = recipe["tone"]
    sigma = float(frame.uniform(0.015, 0.045))
    if tone in ("black-and-white", "sepia"):
        luma = blur(_luma(img) * gain)
        luma += _grain(frame, H, W, sigma)
        _dust(luma, frame)
        luma = np.clip(luma, 0, 1)
        if tone == "sepia":
            t = luma ** float(frame.uniform(0.85, 1.15))
            return SEPIA_DARK + (SEPIA_LIGHT - SEPIA_DARK) * t
        g = np.clip((luma - 0.5) * float(frame.uniform(1.05, 1.3)) + 0.5, 0, 1)
        return g * rgb([1.0, 0.99, 0.97])
    img = img * gain
    np.clip(img, 0, 1, out=img)
    luma = _luma(img)
    if tone == "faded":
        # Cyan dye fades first in old colour prints, leaving a warm, low-contrast cast.
        img *= 0.7
        img += luma * 0.3
        img *= 0.78 * rgb([1.06, 0.96, 0.84])
        img += 0.1
    else:
        img *= 0.9
        img += luma * 0.1
    img = blur(img)
    img += _grain(frame, H, W, sigma)
    _dust(img, frame)
    return img


def _grain(frame, H: int, W: int, sigma: float) -> np.ndarray:
    """Film grain of deviation `sigma`: a sum of two uniforms (triangular, deviation sqrt(1/6)), cheap to draw."""
    grain = frame.random((H, W), dtype=np.float32)
    grain += frame.random((H, W), dtype=np.float32)
    grain -= 1
    grain *= sigma / np.sqrt(1 / 6)
    return grain


def _dust(img, frame) -> None:
    """Dust specks (light or dark) and now and then a thin light scratch, in place."""
    H, W = img.shape[-2:]
    for _ in range(int(frame.integers(4, 30))):
        y, x = int(frame.integers(H)), int(frame.integers(W))
        r = int(frame.integers(1, 3))
        img[..., max(y - r, 0):y + r, max(x - r, 0):x + r] = 0.95 if frame.random() < 0.6 else 0.1
    if frame.random() < 0.35:
        x, y0 = int(frame.integers(W)), int(frame.integers(H // 2))
        length = int(frame.integers(H // 4, H // 2))
        cols = np.clip(x + np.cumsum(frame.integers(-1, 2, length)) // 8, 0, W - 1)
        rows = np.arange(y0, min(y0 + length, H))
        img[..., rows, cols[:len(rows)]] = img[..., rows, cols[:len(rows)]] * 0.6 + 0.3
