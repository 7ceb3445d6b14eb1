"""Painting primitives for the procedural archive photos: noise, textures, compositing.

Images are float32 RGB arrays in [0, 1] stored channel-first, shape (3, H, W),
painted in place: a colour (3, 1, 1) or an alpha plane (H, W) then broadcasts
along whole rows, which numpy does many times faster than along a trailing
axis of length 3. Randomness comes only from the numpy Generators passed in,
so a render repeats exactly for the same seed.
"""

from __future__ import annotations

import numpy as np
from PIL import Image, ImageDraw

SUPERSAMPLE = 2  # shapes are drawn at 2x and box-reduced: cheap anti-aliasing


def rgb(values) -> np.ndarray:
    """A colour shaped (3, 1, 1) to broadcast over (3, H, W) planes."""
    return np.asarray(values, dtype=np.float32).reshape(3, 1, 1)


def smooth_noise(rng: np.random.Generator, h: int, w: int, scale: float,
                 octaves: int = 4, gain: float = 0.5, stretch: float = 1.0) -> np.ndarray:
    """Fractal value noise of shape (h, w), zero mean and unit deviation.

    `scale` is the size in pixels of the coarsest feature; `stretch` > 1 makes
    features wider than tall (clouds, water streaks). Each octave is a small
    random grid upsampled bicubically; the octaves are summed at a reduced
    resolution (a third of the finest feature size) and upsampled once.
    """
    finest = max(scale / 2 ** (octaves - 1), 2.0) * min(stretch, 1.0)
    step = max(int(finest / 3), 1)
    sh, sw = -(-h // step), -(-w // step)
    out = np.zeros((sh, sw), np.float32)
    amp = 1.0
    for octave in range(octaves):
        cell = max(scale / 2**octave, 2.0)
        gh, gw = int(h / cell) + 2, int(w / (cell * stretch)) + 2
        grid = rng.random((gh, gw), dtype=np.float32)
        out += amp * np.asarray(Image.fromarray(grid).resize((sw, sh), Image.Resampling.BICUBIC))
        amp *= gain
    if step > 1:
        out = np.asarray(Image.fromarray(out).resize((w, h), Image.Resampling.BICUBIC))
    out = out - out.mean()
    out /= out.std() + 1e-6
    return out


def ridge(rng: np.random.Generator, n: int, scale: float, octaves: int = 5) -> np.ndarray:
    """1-D fractal noise of length n (zero mean, unit deviation) with cosine interpolation."""
    x = np.arange(n, dtype=np.float32)
    out = np.zeros(n, np.float32)
    amp = 1.0
    for octave in range(octaves):
        cell = max(scale / 2**octave, 2.0)
        points = rng.standard_normal(int(n / cell) + 3).astype(np.float32)
        t = x / cell
        i = t.astype(np.int64)
        s = (1 - np.cos(np.pi * (t - i))) / 2
        out += amp * (points[i] * (1 - s) + points[i + 1] * s)
        amp *= 0.5
    out -= out.mean()
    out /= out.std() + 1e-6
    return out


def hash01(ids: np.ndarray, salt: int = 0) -> np.ndarray:
    """Deterministic pseudo-random value in [0, 1) per integer id (multiplicative hashing)."""
    h = (ids.astype(np.uint64) * np.uint64(2654435761) + np.uint64(salt * 40503 + 97)) % np.uint64(2**32)
    h = (h ^ (h >> np.uint64(13))) * np.uint64(1274126177) % np.uint64(2**32)
    return (h.astype(np.float64) / 2**32).astype(np.float32)


def bricks(u: np.ndarray, v: np.ndarray, mortar: float = 0.08, salt: int = 0):
    """Running-bond brick pattern over brick coordinates (u across, v down, 1 unit per brick).

    Returns (mortar_mask, per_brick_jitter), both float32 and broadcast to u/v's shape.
    """
    row = np.floor(v)
    shifted = u + 0.5 * (row % 2)
    col = np.floor(shifted)
    fu, fv = shifted - col, v - row
    edge = np.minimum(np.minimum(fu, 1 - fu) * 2.2, np.minimum(fv, 1 - fv))
    mask = np.clip((mortar - edge) / (mortar * 0.5) + 1, 0, 1).astype(np.float32)
    ids = (row.astype(np.int64) % 4096) * 4096 + (col.astype(np.int64) % 4096)
    return mask, hash01(ids, salt)


def wood_grain(rng: np.random.Generator, h: int, w: int, scale: float) -> np.ndarray:
    """Wood-grain shading in about [0.75, 1.05] with the grain running horizontally."""
    warp = smooth_noise(rng, h, w, scale * 4, octaves=2, stretch=4.0)
    y = np.arange(h, dtype=np.float32)[:, None]
    return 0.9 + 0.15 * np.sin((y / max(scale, 1.0) + warp * 1.5) * np.pi).astype(np.float32)


def shape_mask(h: int, w: int, shapes) -> np.ndarray:
    """Alpha mask (h, w) in [0, 1] for a list of (method, xy, options) ImageDraw calls in patch pixels."""
    k = SUPERSAMPLE
    im = Image.new("L", (max(w, 1) * k, max(h, 1) * k), 0)
    draw = ImageDraw.Draw(im)
    for method, xy, options in shapes:
        scaled = [float(c) * k for c in xy]
        options = dict(options)
        if "width" in options:
            options["width"] = max(1, int(round(options["width"] * k)))
        fill = options.pop("fill", 255)
        getattr(draw, method)(scaled, fill=fill, **options)
    return np.asarray(im.reduce(k), dtype=np.float32) / 255.0


def blend(img: np.ndarray, alpha: np.ndarray, colour, top: int = 0, left: int = 0) -> None:
    """Alpha-composite `colour` (a colour, or a (3, h, w) surface) through `alpha` (h, w) onto img at (top, left).

    The patch is clipped at the image edges, so objects may hang over them.
    """
    h, w = alpha.shape
    H, W = img.shape[-2:]
    y0, x0, y1, x1 = max(top, 0), max(left, 0), min(top + h, H), min(left + w, W)
    if y0 >= y1 or x0 >= x1:
        return
    a = alpha[y0 - top:y1 - top, x0 - left:x1 - left]
    c = np.asarray(colour, np.float32)
    if c.ndim == 1:
        c = c.reshape(3, 1, 1)
    elif c.shape[-2:] != (1, 1):
        c = c[:, y0 - top:y1 - top, x0 - left:x1 - left]
    region = img[:, y0:y1, x0:x1]
    step = c - region
    step *= a
    region += step


def blur(img: np.ndarray) -> np.ndarray:
    """Separable [1, 2, 1] / 4 blur over the last two axes, edges replicated; a light lens softness."""
    b = img * 2
    b[..., 1:, :] += img[..., :-1, :]
    b[..., :1, :] += img[..., :1, :]
    b[..., :-1, :] += img[..., 1:, :]
    b[..., -1:, :] += img[..., -1:, :]
    c = b * 2
    c[..., 1:] += b[..., :-1]
    c[..., :1] += b[..., :1]
    c[..., :-1] += b[..., 1:]
    c[..., -1:] += b[..., -1:]
    c *= 1 / 16
    return c


def vertical_gradient(h: int, w: int, top, bottom, power: float = 1.0) -> np.ndarray:
    """A (3, h, w) image fading from colour `top` to colour `bottom`."""
    t = (np.linspace(0, 1, h, dtype=np.float32) ** power)[None, :, None]
    out = np.empty((3, h, w), np.float32)
    out[...] = rgb(top) * (1 - t) + rgb(bottom) * t
    return out
