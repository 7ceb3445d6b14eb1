"""Per-sample photometric edits on batches of images, for the batched training views.

Each function takes a float batch x (n, 3, H, W) in [0, 1] and one parameter
per sample, with a neutral value (factor 1, sigma 0, quality 0 ...) for samples
the edit skips, so one call serves a whole batch whose samples differ. Edits
that touch a few samples write them into x in place (a copy of the whole batch
per edit would cost more than most edits) and return x. None draws random
numbers except `add_noise` and `add_haze`, which take the generator that drew
the parameters.
"""

from __future__ import annotations

import io
import math
import string
from concurrent.futures import ThreadPoolExecutor
from functools import lru_cache

import numpy as np
import torch
import torch.nn.functional as F
from PIL import Image, ImageDraw, ImageFont

# Rec. ITU-R BT.601 luma weights, as torchvision's rgb_to_grayscale and Pillow's convert("L").
LUMA = (0.299, 0.587, 0.114)
OVERLAY_BANK_SIZE = 64
_OVERLAY_SEED = 20240917  # any fixed number: the bank is the same in every run
SNOW_BANK_SIZE = 32
_SNOW_SEED = 20261204


def _luma(x: torch.Tensor) -> torch.Tensor:
    return torch.einsum("nchw,c->nhw", x, torch.tensor(LUMA, dtype=x.dtype)).unsqueeze(1)


def _hue_rotation(angle: torch.Tensor) -> torch.Tensor:
    """(n, 3, 3) rotations of RGB space about the grey axis (1, 1, 1) by `angle` radians (Rodrigues)."""
    k = torch.tensor([[0.0, -1.0, 1.0], [1.0, 0.0, -1.0], [-1.0, 1.0, 0.0]]) / math.sqrt(3.0)
    kk = k @ k
    eye = torch.eye(3)
    return eye + torch.sin(angle)[:, None, None] * k + (1 - torch.cos(angle))[:, None, None] * kk


# The orders of the three colour channels: index 0 leaves them as they are; 5 swaps red and blue.
CHANNEL_ORDERS = ((0, 1, 2), (0, 2, 1), (1, 0, 2), (1, 2, 0), (2, 0, 1), (2, 1, 0))


def adjust_colour(x: torch.Tensor, brightness: torch.Tensor, contrast: torch.Tensor, saturation: torch.Tensor,
                  hue: torch.Tensor, grayscale: torch.Tensor, channels: torch.Tensor | None = None) -> torch.Tensor:
    """Brightness, contrast, saturation, hue (in that order, as ColorJitter's fixed order), then grayscale,
    then the channels put in the order `channels` (an index into CHANNEL_ORDERS, 0 = as they are).

    Brightness scales the pixels; contrast blends with the mean luma of the
    brightened image; saturation blends with the pixel's luma; hue rotates the
    colour about the grey axis by hue * 360 degrees (a "hue-ish" shift: it keeps
    the mean and the grey axis, not HSV's exact hue). Composed in one affine map
    per sample (one batched matrix product), clamped to [0, 1] once at the end
    rather than after every step as torchvision does.
    """
    n, c, h, w = x.shape
    lum = torch.tensor(LUMA)
    ones = torch.ones(3)
    sat = saturation[:, None, None] * torch.eye(3) + (1 - saturation)[:, None, None] * torch.outer(ones, lum)
    matrix = _hue_rotation(2 * math.pi * hue) @ sat
    grey = torch.outer(ones, lum).expand(n, 3, 3)
    matrix = torch.where(grayscale[:, None, None], grey @ matrix, matrix) * (brightness * contrast)[:, None, None]
    if channels is not None:
        orders = torch.eye(3)[torch.tensor(CHANNEL_ORDERS)]  # (6, 3, 3): row i of order k picks channel k[i]
        matrix = orders[channels] @ matrix
    mean = (x.mean(dim=(2, 3)) @ lum) * brightness  # grey is a fixed point of every matrix above
    bias = ((1 - contrast) * mean)[:, None, None].expand(n, 3, 1)
    return torch.baddbmm(bias, matrix, x.reshape(n, c, h * w)).view(n, c, h, w).clamp_(0.0, 1.0)


def solarize(x: torch.Tensor, threshold: torch.Tensor) -> torch.Tensor:
    """Every value at or above the sample's `threshold` inverted (1 - x), as Pillow's ImageOps.solarize does;
    a threshold above 1 leaves a sample as it is. In place."""
    chosen = torch.nonzero(threshold <= 1).flatten()
    if len(chosen) == 0:
        return x
    part = x[chosen]
    x[chosen] = torch.where(part >= threshold[chosen, None, None, None], 1 - part, part)
    return x


def adjust_gamma(x: torch.Tensor, gamma: torch.Tensor) -> torch.Tensor:
    """x ** gamma per sample (gamma 1 leaves a sample as it is); in place."""
    chosen = torch.nonzero(gamma != 1).flatten()
    if len(chosen) == 0:
        return x
    x[chosen] = x[chosen].clamp(min=0.0).pow(gamma[chosen, None, None, None])
    return x


def _gaussian_kernels(sigma: torch.Tensor, radius: int) -> torch.Tensor:
    """(n, 2 radius + 1) normalised 1-D Gaussian kernels, as torchvision's _get_gaussian_kernel1d."""
    t = torch.arange(-radius, radius + 1, dtype=torch.float32)
    k = torch.exp(-0.5 * (t[None, :] / sigma[:, None]) ** 2)
    return k / k.sum(dim=1, keepdim=True)


def gaussian_blur(x: torch.Tensor, sigma: torch.Tensor, radius: int) -> torch.Tensor:
    """Separable Gaussian blur, each sample with its sigma (0 = untouched), reflect padding, in place."""
    chosen = torch.nonzero(sigma > 0).flatten()
    if len(chosen) == 0:
        return x
    sub = x[chosen]
    m, c, h, w = sub.shape
    k = _gaussian_kernels(sigma[chosen], radius).repeat_interleave(c, dim=0)  # (m * c, K)
    flat = F.pad(sub.reshape(1, m * c, h, w), (radius, radius, radius, radius), mode="reflect")
    flat = F.conv2d(flat, k[:, None, None, :], groups=m * c)
    flat = F.conv2d(flat, k[:, None, :, None], groups=m * c)
    x[chosen] = flat.reshape(m, c, h, w)
    return x


def pixelate(x: torch.Tensor, factor: torch.Tensor) -> torch.Tensor:
    """Average over blocks of `factor` pixels, then blow back up with nearest neighbours (1 = untouched); in place."""
    h, w = x.shape[-2:]
    for f in torch.unique(factor).tolist():
        if f <= 1:
            continue
        chosen = torch.nonzero(factor == f).flatten()
        small = F.interpolate(x[chosen], size=(max(1, round(h / f)), max(1, round(w / f))), mode="area")
        x[chosen] = F.interpolate(small, size=(h, w), mode="nearest")
    return x


def add_noise(x: torch.Tensor, sigma: torch.Tensor, shot: torch.Tensor, impulse: torch.Tensor,
              gen: torch.Generator) -> torch.Tensor:
    """Gaussian noise (std sigma), shot noise (variance x * shot, i.e. 1 / photons) and impulse noise.

    Impulse noise sets a fraction `impulse` of the pixels to black or white
    (salt and pepper, all channels at once). Zero parameters leave a sample as it is. In place.
    """
    noisy = torch.nonzero((sigma > 0) | (shot > 0)).flatten()
    salted = torch.nonzero(impulse > 0).flatten()
    if len(noisy):
        sub = x[noisy]
        std = torch.sqrt(sigma[noisy, None, None, None] ** 2 + sub * shot[noisy, None, None, None])
        x[noisy] = sub.addcmul_(std, torch.randn(sub.shape, generator=gen)).clamp_(0.0, 1.0)
    if len(salted):
        sub = x[salted]
        u = torch.rand((len(salted), 1) + sub.shape[2:], generator=gen)
        amount = impulse[salted, None, None, None]
        x[salted] = torch.where(u < amount / 2, 1.0, torch.where(u > 1 - amount / 2, 0.0, sub))
    return x


def fractal_noise(n: int, size: int, decay: torch.Tensor, gen: torch.Generator, octaves: int = 6) -> torch.Tensor:
    """(n, 1, size, size) smooth random fields in [0, 1]: uniform noise on grids of 2, 4, 8 ... cells a side,
    each enlarged bilinearly to `size` and weighted by decay**-k for the k-th finer grid (per sample), then
    stretched to [0, 1]. A stand-in for the plasma fractal of fog: most of its energy at low frequencies."""
    field = torch.zeros(n, 1, size, size)
    for k in range(octaves):
        cells = min(2 ** (k + 1), size)
        grid = torch.rand(n, 1, cells, cells, generator=gen)
        field += F.interpolate(grid, size=(size, size), mode="bilinear", align_corners=False) \
            * decay.pow(-k)[:, None, None, None]
    low = field.amin(dim=(1, 2, 3), keepdim=True)
    high = field.amax(dim=(1, 2, 3), keepdim=True)
    return (field - low) / (high - low).clamp(min=1e-6)


def add_haze(x: torch.Tensor, strength: torch.Tensor, decay: torch.Tensor, gen: torch.Generator) -> torch.Tensor:
    """Fog: a smooth bright veil (`fractal_noise`) added with weight `strength` (0 = none), the sum brought back
    to [0, 1] by 1 / (1 + strength), as ImageNet-C's fog does (from memory). Contrast falls to 1 / (1 + strength)
    and the veil's brightness varies across the picture. In place."""
    chosen = torch.nonzero(strength > 0).flatten()
    if len(chosen) == 0:
        return x
    s = strength[chosen, None, None, None]
    veil = fractal_noise(len(chosen), x.shape[-1], decay[chosen], gen)
    x[chosen] = (x[chosen] + s * veil) / (1 + s)
    return x


def _snow_layer(rng: np.random.Generator, size: int) -> np.ndarray:
    """One layer of falling snow (size x size, [0, 1]): sparse bright flakes from thresholded Gaussian noise on a
    coarser grid, streaked by a motion blur at a random slant (ImageNet-C's snow, from memory, simplified)."""
    from scipy import ndimage

    zoom = rng.uniform(2.0, 4.0)
    coarse = max(2, round(size / zoom))
    loc = rng.uniform(0.1, 0.55)
    flakes = np.clip(rng.normal(loc=loc, scale=0.3, size=(coarse, coarse)), 0, 1)
    flakes = np.asarray(Image.fromarray(np.uint8(flakes * 255)).resize((size, size), Image.Resampling.BICUBIC),
                        dtype=np.float32) / 255.0
    flakes[flakes < loc + 0.3 * rng.uniform(1.0, 1.6)] = 0  # 5-16 % of the noise's values are flakes
    length, angle = max(2, round(size * rng.uniform(0.03, 0.1))), math.radians(rng.uniform(-135, -45))
    kernel = np.zeros((2 * length + 1, 2 * length + 1), np.float32)
    for t in range(length + 1):  # one-sided, Gaussian weights along the streak
        weight = math.exp(-t * t / (2 * (length / 3) ** 2))
        kernel[length + round(-t * math.sin(angle)), length + round(t * math.cos(angle))] += weight
    streaked = ndimage.convolve(flakes, kernel / kernel.sum(), mode="wrap")
    return np.clip(streaked + np.rot90(streaked, 2), 0, 1)


@lru_cache(maxsize=4)
def snow_bank(size: int) -> torch.Tensor:
    """SNOW_BANK_SIZE snow layers (k, 1, size, size) in [0, 1]; made once per size, the same in every run."""
    rng = np.random.default_rng(_SNOW_SEED)
    return torch.from_numpy(np.stack([_snow_layer(rng, size) for _ in range(SNOW_BANK_SIZE)]))[:, None]


def add_snow(x: torch.Tensor, which: torch.Tensor, keep: torch.Tensor, bank: torch.Tensor,
             flip: torch.Tensor) -> torch.Tensor:
    """Snow: the picture whitened towards its luma (keep of it stays, as ImageNet-C's snow does, from memory),
    then layer bank[which[i]] (mirrored where `flip`) added; -1 = none. In place."""
    chosen = torch.nonzero(which >= 0).flatten()
    if len(chosen) == 0:
        return x
    sub = x[chosen]
    k = keep[chosen, None, None, None]
    sub = k * sub + (1 - k) * torch.maximum(sub, _luma(sub) * 1.5 + 0.5)
    layers = bank[which[chosen]]
    layers = torch.where(flip[chosen, None, None, None], layers.flip(-1), layers)
    x[chosen] = (sub + layers).clamp_(0.0, 1.0)
    return x


def _random_text(rng: np.random.Generator) -> str:
    letters = string.ascii_letters + string.digits
    return "".join(rng.choice(list(letters), size=int(rng.integers(3, 9))))


def _render_overlay(rng: np.random.Generator, width: int) -> np.ndarray:
    """One RGBA overlay `width` pixels wide: a caption band with text, bare text, or a filled shape."""
    kind = int(rng.integers(0, 3))
    height = max(4, round(width * (rng.uniform(0.2, 0.45) if kind < 2 else rng.uniform(0.6, 1.0))))
    im = Image.new("RGBA", (width, height), (0, 0, 0, 0))
    draw = ImageDraw.Draw(im)

    def colour(alpha_low: int) -> tuple[int, int, int, int]:
        return tuple(int(v) for v in rng.integers(0, 256, 3)) + (int(rng.integers(alpha_low, 256)),)

    if kind == 0:
        draw.rectangle((0, 0, width, height), fill=colour(160))
    if kind < 2:
        font = ImageFont.load_default(size=max(6, int(height * 0.7)))
        draw.text((max(1, height // 6), max(0, height // 10)), _random_text(rng), fill=colour(200), font=font)
    elif rng.random() < 0.5:
        draw.ellipse((0, 0, width - 1, height - 1), fill=colour(120))
    else:
        draw.rectangle((0, 0, width - 1, height - 1), fill=colour(120))
    return np.asarray(im)


@lru_cache(maxsize=4)
def overlay_bank(size: int, scale: tuple[float, float]) -> tuple[torch.Tensor, ...]:
    """OVERLAY_BANK_SIZE RGBA overlays (4, h, w) in [0, 1], widths `scale` x `size`; rendered once per size."""
    rng = np.random.default_rng(_OVERLAY_SEED)
    bank = []
    for _ in range(OVERLAY_BANK_SIZE):
        width = max(4, min(size, round(size * rng.uniform(*scale))))
        rgba = _render_overlay(rng, width)[: size]
        bank.append(torch.from_numpy(rgba.copy()).permute(2, 0, 1).float().div_(255.0))
    return tuple(bank)


def composite_overlays(x: torch.Tensor, bank: tuple[torch.Tensor, ...], which: torch.Tensor,
                       place: torch.Tensor) -> torch.Tensor:
    """Alpha-composite bank[which[i]] onto sample i with its top-left corner at place[i] (x, y) (-1 = none).

    Places are fractions in [0, 1] of the room left beside the overlay, so it always fits. In place.
    """
    chosen = torch.nonzero(which >= 0).flatten().tolist()
    h, w = x.shape[-2:]
    for i in chosen:
        rgba = bank[int(which[i])]
        oh, ow = rgba.shape[-2:]
        left, top = round(float(place[i, 0]) * (w - ow)), round(float(place[i, 1]) * (h - oh))
        patch = x[i, :, top : top + oh, left : left + ow]
        alpha = rgba[3:]
        patch.mul_(1 - alpha).add_(rgba[:3] * alpha)
    return x


def _jpeg(pixels: np.ndarray, quality: int) -> np.ndarray:
    buf = io.BytesIO()
    Image.fromarray(pixels).save(buf, format="JPEG", quality=quality)
    buf.seek(0)
    with Image.open(buf) as im:
        return np.asarray(im.convert("RGB"))


def jpeg_round_trip(x: torch.Tensor, quality: torch.Tensor) -> torch.Tensor:
    """Re-encode the samples of x (n, 3, H, W) in [0, 1] whose quality is > 0 as 8-bit JPEG with Pillow.

    Only those samples are quantised to 8 bits. Pillow releases the GIL while it
    encodes and decodes, so they are spread over torch's intra-op thread count. In place.
    """
    chosen = torch.nonzero(quality > 0).flatten()
    if len(chosen) == 0:
        return x
    hwc = x[chosen].mul(255.0).round_().clamp_(0, 255).to(torch.uint8).permute(0, 2, 3, 1).contiguous().numpy()
    jobs = [(hwc[k], int(quality[i])) for k, i in enumerate(chosen.tolist())]
    threads = min(torch.get_num_threads(), len(jobs))
    if threads > 1:
        with ThreadPoolExecutor(threads) as pool:
            decoded = list(pool.map(lambda job: _jpeg(*job), jobs))
    else:
        decoded = [_jpeg(*job) for job in jobs]
    x[chosen] = torch.from_numpy(np.stack(decoded)).permute(0, 3, 1, 2).float().div_(255.0)
    return x
