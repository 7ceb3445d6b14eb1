"""Batches of view pairs made in the training process, every sample with its own random parameters.

A torchvision.transforms.v2 call on a batch draws one set of parameters for
the whole batch; here every view draws its own crop box, flip, rotation,
border, colour change, recolouring, solarisation, fog, snow, blur, noise, pixelation, overlay and JPEG quality
(`sample_view_params`), then the whole batch is edited at once: one affine
map per sample (the grid `affine_grid` would build) and one `grid_sample` for
the geometry (crop, flip, rotation, border), then the per-sample edits of
`pixel_ops`. Strengths and probabilities come from the one `ViewRecipe`.

Of each pair, view 1 is a moderate crop (`recipe.moderate_crop_scale`) and
view 2 a hard one (`recipe.hard_crop_scale`), both inside the entry's region
(`view_sources.plan_entries`). Every random number comes from the generator
passed in, so a seed fixes a batch exactly (a resumed run sees the same batches),
whether or not the two view sets are rendered in parallel threads.
"""

from __future__ import annotations

import math
from concurrent.futures import Executor
from dataclasses import dataclass, fields

import torch
import torch.nn.functional as F

from .encoder import IMAGENET_MEAN, IMAGENET_STD
from .pixel_ops import (
    CHANNEL_ORDERS,
    OVERLAY_BANK_SIZE,
    SNOW_BANK_SIZE,
    add_haze,
    add_noise,
    add_snow,
    adjust_colour,
    adjust_gamma,
    composite_overlays,
    gaussian_blur,
    jpeg_round_trip,
    overlay_bank,
    pixelate,
    snow_bank,
    solarize,
)
from .view_sources import SourceBank, plan_entries, sample_crop_boxes
from .views import ViewRecipe


@dataclass
class ViewParams:
    """Per-sample parameters of n views, one row per view; neutral values mean "not applied"."""

    boxes: torch.Tensor  # (n, 4) crop box x0, y0, w, h in source pixels
    flip: torch.Tensor  # (n,) bool, horizontal
    angle: torch.Tensor  # (n,) rotation in degrees
    keystone: torch.Tensor  # (n, 2) how much narrower one edge is than the opposite, across x / y; sign: which edge
    inner: torch.Tensor  # (n, 2) half width, half height of the picture inside its border (1, 1 = no border)
    border_colour: torch.Tensor  # (n, 3) in [0, 1]
    brightness: torch.Tensor  # (n,) factor
    contrast: torch.Tensor  # (n,) factor (jitter times strong contrast)
    saturation: torch.Tensor  # (n,) factor
    hue: torch.Tensor  # (n,) fraction of a turn
    grayscale: torch.Tensor  # (n,) bool
    channels: torch.Tensor  # (n,) index into pixel_ops.CHANNEL_ORDERS, 0 = as they are
    solarize: torch.Tensor  # (n,) tones at or above it inverted, 2 = none
    gamma: torch.Tensor  # (n,) exponent
    blur_sigma: torch.Tensor  # (n,) pixels, 0 = no blur
    pixelate: torch.Tensor  # (n,) block side, 1 = none
    noise_sigma: torch.Tensor  # (n,) Gaussian noise std, 0 = none
    shot: torch.Tensor  # (n,) 1 / photons, 0 = none
    impulse: torch.Tensor  # (n,) fraction of pixels, 0 = none
    overlay: torch.Tensor  # (n,) index into the overlay bank, -1 = none
    overlay_place: torch.Tensor  # (n, 2) position as a fraction of the free room
    jpeg_quality: torch.Tensor  # (n,) 0 = no re-encoding
    haze: torch.Tensor  # (n,) the fog veil's weight, 0 = none
    haze_decay: torch.Tensor  # (n,) how smooth the veil is
    snow: torch.Tensor  # (n,) index into the snow bank, -1 = none
    snow_keep: torch.Tensor  # (n,) share of the picture kept under the snow
    snow_flip: torch.Tensor  # (n,) bool, the snow layer mirrored

    def select(self, rows: torch.Tensor) -> "ViewParams":
        """The parameters of the given rows only."""
        return ViewParams(**{f.name: getattr(self, f.name)[rows] for f in fields(self)})


def _uniform(n: int, bounds: tuple[float, float], gen: torch.Generator) -> torch.Tensor:
    return bounds[0] + (bounds[1] - bounds[0]) * torch.rand(n, generator=gen)


def _log_uniform(n: int, bounds: tuple[float, float], gen: torch.Generator) -> torch.Tensor:
    return torch.exp(_uniform(n, (math.log(bounds[0]), math.log(bounds[1])), gen))


def _coin(n: int, p: float, gen: torch.Generator) -> torch.Tensor:
    return torch.rand(n, generator=gen) < p


def _sample_geometry(regions: torch.Tensor, scale: torch.Tensor, r: ViewRecipe,
                     gen: torch.Generator) -> dict[str, torch.Tensor]:
    """Crop box, flip, rotation and border; bars (not frames) take the hidden part off the box, keeping proportions."""
    n = len(regions)
    boxes = sample_crop_boxes(regions, scale, r.crop_ratio, gen)
    flip = _coin(n, r.flip_p, gen)
    angle = torch.where(_coin(n, r.rotate_p, gen), _uniform(n, (-r.rotate_degrees, r.rotate_degrees), gen), 0.0)
    tilt = torch.where(_coin(n, r.perspective_p, gen), _uniform(n, (-r.perspective_max, r.perspective_max), gen), 0.0)
    across_y = _coin(n, 0.5, gen)
    keystone = torch.stack([torch.where(across_y, 0.0, tilt), torch.where(across_y, tilt, 0.0)], dim=1)
    bordered = _coin(n, r.border_p, gen)
    keep = 1 - 2 * _uniform(n, r.border_frac, gen)
    mode = torch.randint(0, 3, (n,), generator=gen)  # 0: frame, 1: bars top and bottom, 2: bars left and right
    inner_x = torch.where(bordered & (mode != 1), keep, 1.0)
    inner_y = torch.where(bordered & (mode != 2), keep, 1.0)
    bars_x, bars_y = bordered & (mode == 2), bordered & (mode == 1)
    x0, y0, w, h = boxes.unbind(1)
    new_w, new_h = torch.where(bars_x, w * keep, w), torch.where(bars_y, h * keep, h)
    boxes = torch.stack([x0 + (w - new_w) / 2, y0 + (h - new_h) / 2, new_w, new_h], dim=1)
    return {"boxes": boxes, "flip": flip, "angle": angle, "keystone": keystone,
            "inner": torch.stack([inner_x, inner_y], dim=1),
            "border_colour": torch.rand(n, 3, generator=gen)}


def _sample_colour(n: int, r: ViewRecipe, gen: torch.Generator) -> dict[str, torch.Tensor]:
    jitter = _coin(n, r.jitter_p, gen)

    def factor(strength: float) -> torch.Tensor:
        return torch.where(jitter, _uniform(n, (max(0.0, 1 - strength), 1 + strength), gen), 1.0)

    brightness, contrast, saturation = factor(r.brightness), factor(r.contrast), factor(r.saturation)
    contrast = contrast * torch.where(_coin(n, r.strong_contrast_p, gen), _uniform(n, r.strong_contrast, gen), 1.0)
    hue = torch.where(jitter, _uniform(n, (-r.hue, r.hue), gen), 0.0)
    hue = torch.where(_coin(n, r.recolour_p, gen), _uniform(n, (-0.5, 0.5), gen), hue)
    swapped = _coin(n, r.channel_swap_p, gen)
    return {"brightness": brightness, "contrast": contrast, "saturation": saturation, "hue": hue,
            "grayscale": _coin(n, r.grayscale_p, gen),
            "gamma": torch.where(_coin(n, r.gamma_p, gen), _log_uniform(n, r.gamma, gen), 1.0),
            "channels": torch.where(swapped, torch.randint(1, len(CHANNEL_ORDERS), (n,), generator=gen), 0),
            "solarize": torch.where(_coin(n, r.solarize_p, gen), _uniform(n, r.solarize_threshold, gen), 2.0)}


def _sample_degradations(n: int, r: ViewRecipe, gen: torch.Generator) -> dict[str, torch.Tensor]:
    noisy, kind = _coin(n, r.noise_p, gen), torch.randint(0, 3, (n,), generator=gen)
    low_q, high_q = r.jpeg_quality
    low_f, high_f = r.pixelate_factor
    return {
        "blur_sigma": torch.where(_coin(n, r.blur_p, gen), _uniform(n, r.blur_sigma, gen), 0.0),
        "pixelate": torch.where(_coin(n, r.pixelate_p, gen), torch.randint(low_f, high_f + 1, (n,), generator=gen), 1),
        "noise_sigma": torch.where(noisy & (kind == 0), _uniform(n, r.noise_sigma, gen), 0.0),
        "shot": torch.where(noisy & (kind == 1), 1 / _log_uniform(n, r.shot_photons, gen), 0.0),
        "impulse": torch.where(noisy & (kind == 2), _uniform(n, r.impulse_amount, gen), 0.0),
        "overlay": torch.where(_coin(n, r.overlay_p, gen),
                               torch.randint(0, OVERLAY_BANK_SIZE, (n,), generator=gen), -1),
        "overlay_place": torch.rand(n, 2, generator=gen),
        "jpeg_quality": torch.where(_coin(n, r.jpeg_p, gen), torch.randint(low_q, high_q + 1, (n,), generator=gen), 0),
    }


def _sample_weather(n: int, r: ViewRecipe, gen: torch.Generator) -> dict[str, torch.Tensor]:
    return {"haze": torch.where(_coin(n, r.haze_p, gen), _uniform(n, r.haze_strength, gen), 0.0),
            "haze_decay": _uniform(n, r.haze_decay, gen),
            "snow": torch.where(_coin(n, r.snow_p, gen), torch.randint(0, SNOW_BANK_SIZE, (n,), generator=gen), -1),
            "snow_keep": _uniform(n, r.snow_keep, gen),
            "snow_flip": _coin(n, 0.5, gen)}


def sample_view_params(regions: torch.Tensor, scale: torch.Tensor, recipe: ViewRecipe,
                       gen: torch.Generator) -> ViewParams:
    """Independent parameters for n views: view i crops inside regions[i] with area fraction in scale[i]."""
    n = len(regions)
    return ViewParams(**_sample_geometry(regions, scale, recipe, gen), **_sample_colour(n, recipe, gen),
                      **_sample_degradations(n, recipe, gen), **_sample_weather(n, recipe, gen))


def _output_coords(size: int) -> torch.Tensor:
    """Pixel centres of a size x size output in grid_sample's normalised units (align_corners=False)."""
    return (2 * torch.arange(size, dtype=torch.float32) + 1) / size - 1


def _view_coords(params: ViewParams, size: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Per view, the output pixel centres (x, y) after its keystone, broadcastable to (n, size, size).

    A keystone k across x makes the view's x extent shrink linearly from one edge to the other:
    x -> x (1 - |k| (1 + sign(k) y) / 2), so the edge at y = sign(k) spans 1 - |k| of the width and
    the opposite edge all of it; across y likewise with x and y swapped. Every point stays inside
    the square, so a view still reads only its own crop box (hard-negative regions stay apart)."""
    o = _output_coords(size)
    ox, oy = o[None, None, :], o[None, :, None]
    k = params.keystone
    if not bool((k != 0).any()):
        return ox, oy
    kx, ky = k[:, 0, None, None], k[:, 1, None, None]
    gx = ox * (1 - kx.abs() * (1 + torch.sign(kx) * oy) / 2)
    gy = oy * (1 - ky.abs() * (1 + torch.sign(ky) * ox) / 2)
    return gx, gy


def _affine_coefficients(params: ViewParams, side: int) -> list[torch.Tensor]:
    """Per view, (a, b, c) of x and of y: source = a * out_x + b * out_y + c, all in normalised units.

    The map (what `affine_grid` computes from theta, written out because two
    broadcast multiply-adds are several times faster on CPU): output -> inside
    the border -> mirrored -> box-sized -> rotated about the box centre.
    """
    x0, y0, bw, bh = params.boxes.unbind(1)
    cos, sin = torch.cos(torch.deg2rad(params.angle)), torch.sin(torch.deg2rad(params.angle))
    sx = torch.where(params.flip, -1.0, 1.0) * bw / side / params.inner[:, 0]
    sy = bh / side / params.inner[:, 1]
    cx, cy = 2 * (x0 + bw / 2) / side - 1, 2 * (y0 + bh / 2) / side - 1
    return [cos * sx, -sin * sy, cx, sin * sx, cos * sy, cy]


def _fill_outside(out: torch.Tensor, coefficients: list[torch.Tensor], params: ViewParams, regions: torch.Tensor,
                  side: int, coords: tuple[torch.Tensor, torch.Tensor]) -> None:
    """Black where a rotation took a sample point outside its region; the border colour outside the picture."""
    n, _c, size, _ = out.shape
    o = _output_coords(size)
    rotated = torch.nonzero(params.angle != 0).flatten()
    if len(rotated):
        ax, bx, cx, ay, by, cy = (k[rotated, None, None] for k in coefficients)
        gx, gy = (g.expand(n, size, size)[rotated] for g in coords)
        px = (ax * gx + bx * gy + cx + 1) * (side / 2)
        py = (ay * gx + by * gy + cy + 1) * (side / 2)
        r = regions[rotated, :, None, None]
        outside = (px < r[:, 0]) | (px > r[:, 2]) | (py < r[:, 1]) | (py > r[:, 3])
        out[rotated] = out[rotated].masked_fill_(outside[:, None], 0.0)
    bordered = torch.nonzero((params.inner < 1).any(dim=1)).flatten()
    if len(bordered):
        inner = params.inner[bordered]
        in_border = ((o[None, None, :].abs() > inner[:, 0, None, None])
                     | (o[None, :, None].abs() > inner[:, 1, None, None]))
        colour = params.border_colour[bordered, :, None, None]
        out[bordered] = torch.where(in_border[:, None], colour, out[bordered])


def warp(src: torch.Tensor, params: ViewParams, regions: torch.Tensor, size: int) -> torch.Tensor:
    """Crop, tilt (keystone), flip, rotate and border sources (n, 3, S, S) in [0, 1] into views (n, 3, size, size).

    Bilinear sampling reads at most half a pixel beyond a crop box; the bank
    repeats each picture's last row and column there (`build_source_bank`), and
    split regions keep a gap, so a view reads only its own region. Points a
    rotation takes outside the region read black (as torchvision's rotation
    fills its corners).
    """
    side = src.shape[-1]
    coefficients = _affine_coefficients(params, side)
    ax, bx, cx, ay, by, cy = (c[:, None, None] for c in coefficients)
    ox, oy = coords = _view_coords(params, size)
    grid = torch.stack([ax * ox + bx * oy + cx, ay * ox + by * oy + cy], dim=-1)
    out = F.grid_sample(src, grid, mode="bilinear", padding_mode="border", align_corners=False)
    _fill_outside(out, coefficients, params, regions, side, coords)
    return out


def blur_radius(recipe: ViewRecipe) -> int:
    """Half-width of the blur kernel: three of the largest sigma (common practice)."""
    return max(1, math.ceil(3 * recipe.blur_sigma[1]))


def render_views(bank: SourceBank, picture_ids: torch.Tensor, regions: torch.Tensor, params: ViewParams,
                 recipe: ViewRecipe, size: int, gen: torch.Generator) -> torch.Tensor:
    """Views (n, 3, size, size) in [0, 1] of pictures `picture_ids` with their regions and parameters."""
    x = warp(bank.pixels[picture_ids].float().div_(255.0), params, regions, size)
    x = adjust_colour(x, params.brightness, params.contrast, params.saturation, params.hue, params.grayscale,
                      params.channels)
    x = adjust_gamma(x, params.gamma)
    x = solarize(x, params.solarize)
    x = add_haze(x, params.haze, params.haze_decay, gen)
    x = add_snow(x, params.snow, params.snow_keep, snow_bank(size), params.snow_flip)
    x = composite_overlays(x, overlay_bank(size, tuple(recipe.overlay_scale)), params.overlay, params.overlay_place)
    x = gaussian_blur(x, params.blur_sigma, blur_radius(recipe))
    x = pixelate(x, params.pixelate)
    x = add_noise(x, params.noise_sigma, params.shot, params.impulse, gen)
    return jpeg_round_trip(x, params.jpeg_quality)


def _normalise(x: torch.Tensor) -> torch.Tensor:
    """encoder.normalize_tensor's (x - mean) / std as one multiply-add."""
    std = torch.tensor(IMAGENET_STD).view(1, 3, 1, 1)
    mean = torch.tensor(IMAGENET_MEAN).view(1, 3, 1, 1)
    return torch.addcmul(-mean / std, x, 1 / std)


def make_view_pairs(bank: SourceBank, picture_ids: torch.Tensor, n_split: int, recipe: ViewRecipe, size: int,
                    gen: torch.Generator, pool: Executor | None = None) -> tuple[torch.Tensor, torch.Tensor]:
    """Normalised views (v1, v2), each (B, 3, size, size), of the pictures `picture_ids` of `bank`.

    B is len(picture_ids) plus the pictures split into two regions (at most
    `n_split`). All parameters are drawn here from `gen`; the two view sets are
    then rendered independently (in `pool`'s threads if given), each with its
    own generator for noise, so the result does not depend on the threads.
    """
    positions, regions = plan_entries(bank.extents[picture_ids], n_split, gen)
    ids = picture_ids[positions]
    b = len(ids)
    scale = torch.tensor([recipe.moderate_crop_scale] * b + [recipe.hard_crop_scale] * b)
    params = sample_view_params(regions.repeat(2, 1), scale, recipe, gen)
    seeds = torch.randint(0, 2**62, (2,), generator=gen).tolist()

    def render(j: int) -> torch.Tensor:
        rows = torch.arange(j * b, (j + 1) * b)
        noise = torch.Generator().manual_seed(seeds[j])
        return _normalise(render_views(bank, ids, regions, params.select(rows), recipe, size, noise))

    v1, v2 = pool.map(render, (0, 1)) if pool is not None else map(render, (0, 1))
    return v1, v2
