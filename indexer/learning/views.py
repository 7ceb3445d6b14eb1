"""Random views for contrastive training, built from torchvision.transforms.v2.

Two views of one image are a positive pair (SimCLR, Chen et al. 2020). For copy
detection the views imitate what copies go through: strong crops, moderate
colour change, re-compression, borders, overlaid text and shapes. All
strengths live in `ViewRecipe`, which is stored in the model card as a dict.

Two implementations read the same recipe. `make_views` here works on one PIL
image at a time (cheap geometric ops and drawing) and ends as a normalised float
tensor (3, size, size); fine-tuning uses it. `indexer.learning.batch_views` makes whole
batches of view pairs on uint8 tensors with per-sample parameters, which is
what contrastive training uses by default (benchmarks/results/train-views.md).
Fields marked "batched" are read only by the batched views.
"""

from __future__ import annotations

import string
from dataclasses import asdict, dataclass, fields
from typing import Any, Callable

import torch
from PIL import Image, ImageDraw, ImageFont, ImageOps
from torchvision.transforms import v2

from ..core.errors import UsageError
from .encoder import IMAGENET_MEAN, IMAGENET_STD


@dataclass(frozen=True)
class ViewRecipe:
    """Augmentation strengths; probabilities are per view.

    Ranges are (low, high) sampled uniformly unless said otherwise; colour factors
    (brightness, contrast, saturation) are torchvision ColorJitter strengths s,
    giving a factor in [1 - s, 1 + s]; hue is a fraction of a full turn.
    """

    crop_scale: tuple[float, float] = (0.2, 1.0)  # RandomResizedCrop area fraction (per-image views)
    # Batched: of each pair, one moderate view keeps at least half of the picture, one hard view
    # may keep a tenth; the fraction is of the entry's region (the whole picture or one part).
    moderate_crop_scale: tuple[float, float] = (0.5, 1.0)
    hard_crop_scale: tuple[float, float] = (0.1, 1.0)
    crop_ratio: tuple[float, float] = (3 / 4, 4 / 3)  # width / height of the crop box, log-uniform
    flip_p: float = 0.5
    rotate_p: float = 0.2
    rotate_degrees: float = 8.0
    # A photo of a print or a screen taken at a slant: one edge of the view narrower than the
    # opposite one (a keystone), by up to perspective_max of the side. Off by default: with 0.2
    # the quality benchmark moved within run-to-run spread (µAP 0.976 -> 0.977, crops' recall@1
    # 0.914 -> 0.932, overlays' 0.944 -> 0.931, JPEG's 0.994 -> 0.991, against pHash's 0.995;
    # benchmarks/results/quality-keystone.md), and a keystoned copy is found without it
    # (benchmarks/results/stress.md: 1.000).
    perspective_p: float = 0.0
    perspective_max: float = 0.25
    jitter_p: float = 0.8
    brightness: float = 0.4
    contrast: float = 0.4
    saturation: float = 0.3
    hue: float = 0.05
    grayscale_p: float = 0.1
    blur_p: float = 0.2
    blur_sigma: tuple[float, float] = (0.1, 1.5)
    jpeg_p: float = 0.4
    jpeg_quality: tuple[int, int] = (30, 90)
    border_p: float = 0.3
    border_frac: tuple[float, float] = (0.02, 0.12)
    overlay_p: float = 0.3
    # Batched only.
    gamma_p: float = 0.2
    gamma: tuple[float, float] = (0.7, 1.4)  # exponent, log-uniform
    strong_contrast_p: float = 0.05
    strong_contrast: tuple[float, float] = (1.6, 2.5)  # contrast factor, clipped to [0, 1] afterwards
    noise_p: float = 0.2  # then one of Gaussian, shot or impulse noise, equally likely
    noise_sigma: tuple[float, float] = (0.01, 0.08)  # Gaussian noise, in units of the full pixel range
    shot_photons: tuple[float, float] = (30.0, 300.0)  # shot noise: variance x / photons, log-uniform
    impulse_amount: tuple[float, float] = (0.002, 0.02)  # fraction of pixels set to black or white
    pixelate_p: float = 0.1
    pixelate_factor: tuple[int, int] = (2, 6)  # block side in pixels, inclusive
    overlay_scale: tuple[float, float] = (0.15, 0.5)  # overlay width as a fraction of the view side
    # Weather: fog (a smooth bright veil that takes contrast away) and falling snow.
    haze_p: float = 0.2
    haze_strength: tuple[float, float] = (1.0, 3.0)  # the veil's weight; contrast falls to 1 / (1 + strength)
    haze_decay: tuple[float, float] = (1.4, 2.0)  # how fast the veil's finer detail fades (higher: smoother)
    snow_p: float = 0.1
    snow_keep: tuple[float, float] = (0.55, 0.85)  # share of the picture kept as it is under the snow
    # Recolourings that editors make: the hue turned anywhere round the circle (instead of the jitter's small
    # shift), the colour channels put in another order (red swapped with blue ...), tones above a threshold
    # inverted (solarised). Off: measured on the quality benchmark (benchmarks/results/recolour.md), they found the
    # benchmark's hue-180 edits (µAP 0.85 -> 0.94-0.96) and solarised ones (0.76 -> 0.80) but cost crops
    # (recall@1 0.941 -> 0.910 with 10 % / 5 % / 5 %, 0.929 with 5 % recoloured only) and fog (µAP 0.63 / 0.51 / 0.21
    # by severity -> 0.59 / 0.43-0.44 / 0.12-0.14), overall µAP 0.967 -> 0.962 and 0.965.
    recolour_p: float = 0.0
    channel_swap_p: float = 0.0
    solarize_p: float = 0.0
    solarize_threshold: tuple[float, float] = (0.4, 0.8)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def validate(self) -> None:
        """Raise UsageError unless probabilities lie in [0, 1] and ranges are ordered and in bounds."""
        try:
            problems = self._problems()
        except (TypeError, ValueError, IndexError) as exc:  # a string, None or a wrong-length range
            raise UsageError(f"bad view recipe: {exc}") from exc
        if problems:
            raise UsageError("bad view recipe: " + "; ".join(problems))

    def _problems(self) -> list[str]:
        problems = []
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(f.default, tuple):
                if not (isinstance(value, tuple) and len(value) == 2 and all(map(_is_number, value))
                        and 0 <= value[0] <= value[1]):
                    problems.append(f"{f.name} must be a range (low, high) with 0 <= low <= high, got {value!r}")
            elif not _is_number(value):
                problems.append(f"{f.name} must be a number, got {value!r}")
            elif f.name.endswith("_p") and not 0.0 <= value <= 1.0:
                problems.append(f"{f.name} must be in [0, 1], got {value}")
        if problems:
            return problems
        for name in ("crop_scale", "moderate_crop_scale", "hard_crop_scale"):
            low, high = getattr(self, name)
            if not 0 < low <= high <= 1:
                problems.append(f"{name} must satisfy 0 < low <= high <= 1, got {(low, high)}")
        checks = [
            (self.crop_ratio[0] > 0, f"crop_ratio must be positive, got {self.crop_ratio}"),
            (self.rotate_degrees >= 0, f"rotate_degrees must be >= 0, got {self.rotate_degrees}"),
            (0 <= self.perspective_max < 1, f"perspective_max must lie in [0, 1), got {self.perspective_max}"),
            (self.border_frac[1] < 0.5, f"border_frac must stay below 0.5, got {self.border_frac}"),
            (self.blur_sigma[0] > 0, f"blur_sigma must be positive, got {self.blur_sigma}"),
            (self.gamma[0] > 0 and self.shot_photons[0] > 0, "gamma and shot_photons must be positive"),
            (self.pixelate_factor[0] >= 1, f"pixelate_factor must be >= 1, got {self.pixelate_factor}"),
            (self.solarize_threshold[1] <= 1, f"solarize_threshold must lie in [0, 1], got {self.solarize_threshold}"),
            (1 <= self.jpeg_quality[0] and self.jpeg_quality[1] <= 100, "jpeg_quality must lie in 1..100"),
            (0 < self.overlay_scale[1] <= 1, f"overlay_scale must lie in (0, 1], got {self.overlay_scale}"),
            (self.impulse_amount[1] <= 1, f"impulse_amount must be <= 1, got {self.impulse_amount}"),
        ]
        return problems + [message for ok, message in checks if not ok]

    @classmethod
    def from_dict(cls, values: dict[str, Any]) -> "ViewRecipe":
        known = {f.name for f in fields(cls)}
        unknown = set(values) - known
        if unknown:
            raise UsageError(f"unknown view recipe fields: {', '.join(sorted(unknown))}")
        return cls(**{k: tuple(v) if isinstance(v, list) else v for k, v in values.items()})


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _rand(low: float = 0.0, high: float = 1.0) -> float:
    return low + (high - low) * torch.rand(()).item()


def _randint(low: int, high: int) -> int:
    """Uniform integer in [low, high] (inclusive) from torch's global RNG, which DataLoader seeds per worker."""
    return int(torch.randint(low, high + 1, ()).item())


def _rand_color() -> tuple[int, int, int]:
    return tuple(int(c) for c in torch.randint(0, 256, (3,)))


class RandomBorder(v2.Transform):
    """With probability p, add a solid border of random colour (frame or letterbox bars) to a PIL image."""

    def __init__(self, p: float, frac: tuple[float, float]):
        super().__init__()
        self.p, self.frac = p, frac

    def forward(self, im: Image.Image) -> Image.Image:
        if _rand() >= self.p:
            return im
        pad = max(1, round(max(im.size) * _rand(*self.frac)))
        mode = _randint(0, 2)
        sides = (pad, pad, pad, pad) if mode == 0 else (0, pad, 0, pad) if mode == 1 else (pad, 0, pad, 0)
        return ImageOps.expand(im, border=sides, fill=_rand_color())


class RandomOverlay(v2.Transform):
    """With probability p, draw 1-3 random rectangles, ellipses or short strings on a PIL image."""

    _LETTERS = string.ascii_letters + string.digits

    def __init__(self, p: float):
        super().__init__()
        self.p = p

    def forward(self, im: Image.Image) -> Image.Image:
        if _rand() >= self.p:
            return im
        im = im.copy()
        w, h = im.size
        draw = ImageDraw.Draw(im, "RGBA")
        for _ in range(_randint(1, 3)):
            fill = _rand_color() + (_randint(120, 255),)
            x0, y0 = _randint(0, w - 1), _randint(0, h - 1)
            side = max(4, round(min(w, h) * _rand(0.08, 0.3)))
            shape = _randint(0, 2)
            if shape == 0:
                draw.rectangle((x0, y0, x0 + side, y0 + side // 2 + 1), fill=fill)
            elif shape == 1:
                draw.ellipse((x0, y0, x0 + side, y0 + side), fill=fill)
            else:
                text = "".join(self._LETTERS[_randint(0, len(self._LETTERS) - 1)] for _ in range(_randint(3, 8)))
                font = ImageFont.load_default(size=max(6, side // 2))
                draw.text((x0 - side, y0), text, fill=fill, font=font)
        return im


def make_views(recipe: ViewRecipe, size: int) -> Callable[[Image.Image], torch.Tensor]:
    """Return a transform turning an RGB PIL image into one random normalised view (3, size, size)."""
    r = recipe
    return v2.Compose(
        [
            v2.RandomResizedCrop(size, scale=r.crop_scale, ratio=r.crop_ratio, antialias=True),
            # Border after the crop, so it survives into the view; then back to size x size the
            # way `preprocess` does it (shorter side, centre crop).
            RandomBorder(r.border_p, r.border_frac),
            v2.Resize(size, antialias=True),
            v2.CenterCrop(size),
            v2.RandomHorizontalFlip(r.flip_p),
            v2.RandomApply([v2.RandomRotation(r.rotate_degrees, interpolation=v2.InterpolationMode.BILINEAR)], p=r.rotate_p),
            v2.RandomPerspective(r.perspective_max, p=r.perspective_p),
            v2.RandomApply([v2.ColorJitter(r.brightness, r.contrast, r.saturation, r.hue)], p=r.jitter_p),
            v2.RandomGrayscale(r.grayscale_p),
            RandomOverlay(r.overlay_p),
            v2.ToImage(),
            v2.RandomApply([v2.JPEG(list(r.jpeg_quality))], p=r.jpeg_p),
            v2.RandomApply([v2.GaussianBlur(kernel_size=7, sigma=r.blur_sigma)], p=r.blur_p),
            v2.ToDtype(torch.float32, scale=True),
            v2.Normalize(IMAGENET_MEAN, IMAGENET_STD),
        ]
    )
