"""Batched training views: per-sample parameters, geometry and pixel edits against reference libraries.

References: torchvision.transforms.v2.functional (resized_crop, horizontal_flip,
gaussian_blur, adjust_brightness / contrast / saturation / gamma,
rgb_to_grayscale) and Pillow (box-filter downscale + nearest upscale,
Image.alpha_composite), on photos shipped with scikit-image.
"""

import math

import numpy as np
import pytest
import torch
from PIL import Image
from torchvision.transforms.v2 import functional as TF

from nearsight.indexer.learning.batch_views import (ViewParams, make_view_pairs, render_views, sample_view_params, warp)
from nearsight.indexer.core.errors import UsageError
from nearsight.indexer.learning.pixel_ops import (CHANNEL_ORDERS, OVERLAY_BANK_SIZE, SNOW_BANK_SIZE, add_haze,
                                                  add_noise, add_snow, adjust_colour, adjust_gamma, composite_overlays,
                                                  gaussian_blur, jpeg_round_trip, overlay_bank, pixelate, snow_bank,
                                                  solarize)
from nearsight.indexer.learning.view_sources import (REGION_GAP, build_source_bank, plan_entries, sample_crop_boxes,
                                  split_regions, whole_regions)
from nearsight.indexer.learning.views import ViewRecipe

SIDE = 192


def photo(name: str, side: int = SIDE) -> np.ndarray:
    import skimage.data

    im = Image.fromarray(getattr(skimage.data, name)()).convert("RGB")
    im.thumbnail((side, side))
    return np.asarray(im)


@pytest.fixture(scope="module")
def bank():
    arrays = [photo(n) for n in ("astronaut", "coffee", "chelsea", "rocket", "camera", "coins")]
    return build_source_bank(arrays, len(arrays), SIDE)


def no_edits(**overrides) -> ViewRecipe:
    """A recipe that only crops (every probability 0), with chosen overrides."""
    values = dict(flip_p=0.0, rotate_p=0.0, perspective_p=0.0, jitter_p=0.0, grayscale_p=0.0, blur_p=0.0, jpeg_p=0.0, border_p=0.0,
                  overlay_p=0.0, gamma_p=0.0, strong_contrast_p=0.0, noise_p=0.0, pixelate_p=0.0, haze_p=0.0, snow_p=0.0,
                  recolour_p=0.0, channel_swap_p=0.0, solarize_p=0.0)
    values.update(overrides)
    return ViewRecipe(**values)


def identity_params(boxes: torch.Tensor, **overrides) -> ViewParams:
    """Parameters that crop `boxes` and change nothing else."""
    n = len(boxes)
    values = dict(boxes=boxes, flip=torch.zeros(n, dtype=torch.bool), angle=torch.zeros(n), keystone=torch.zeros(n, 2),
                  inner=torch.ones(n, 2), border_colour=torch.zeros(n, 3), brightness=torch.ones(n),
                  contrast=torch.ones(n), saturation=torch.ones(n), hue=torch.zeros(n),
                  grayscale=torch.zeros(n, dtype=torch.bool), channels=torch.zeros(n, dtype=torch.int64),
                  solarize=torch.full((n,), 2.0), gamma=torch.ones(n), blur_sigma=torch.zeros(n),
                  pixelate=torch.ones(n, dtype=torch.int64), noise_sigma=torch.zeros(n), shot=torch.zeros(n),
                  impulse=torch.zeros(n), overlay=torch.full((n,), -1), overlay_place=torch.zeros(n, 2),
                  jpeg_quality=torch.zeros(n, dtype=torch.int64), haze=torch.zeros(n), haze_decay=torch.full((n,), 2.0),
                  snow=torch.full((n,), -1), snow_keep=torch.ones(n), snow_flip=torch.zeros(n, dtype=torch.bool))
    values.update(overrides)
    return ViewParams(**values)


# --- (a) per-sample parameters ------------------------------------------------------------------


def test_every_view_draws_its_own_parameters_within_the_recipe(bank):
    recipe = ViewRecipe(flip_p=0.5, rotate_p=1.0, perspective_p=1.0, jitter_p=1.0, blur_p=1.0, jpeg_p=1.0,
                        pixelate_p=1.0, overlay_p=1.0, gamma_p=1.0, border_p=1.0, haze_p=1.0, snow_p=1.0, recolour_p=0.0)
    n = 64
    regions = whole_regions(bank.extents[torch.arange(n) % len(bank)])
    scale = torch.tensor([recipe.hard_crop_scale] * n)
    p = sample_view_params(regions, scale, recipe, torch.Generator().manual_seed(0))
    # Distinct values across one batch: one draw per sample, not one per batch (as a transforms.v2
    # call on a batch would give).
    for name in ("angle", "brightness", "contrast", "saturation", "hue", "gamma", "blur_sigma", "haze", "haze_decay",
                 "snow_keep"):
        assert torch.unique(getattr(p, name)).numel() == n, name
    assert torch.unique(p.boxes, dim=0).shape[0] == n
    assert 0 < int(p.flip.sum()) < n
    for name in ("pixelate", "jpeg_quality", "overlay", "snow"):
        assert torch.unique(getattr(p, name)).numel() > 1, name
    # Within the recipe's ranges.
    assert p.angle.abs().max() <= recipe.rotate_degrees
    # One keystone a view, across x or across y, of its own size and side.
    assert ((p.keystone != 0).sum(dim=1) == 1).all()
    assert p.keystone.abs().max() <= recipe.perspective_max
    assert torch.unique(p.keystone.abs().sum(dim=1)).numel() == n
    assert 0 < int((p.keystone[:, 0] != 0).sum()) < n
    for name, strength in (("brightness", recipe.brightness), ("saturation", recipe.saturation)):
        values = getattr(p, name)
        assert values.min() >= 1 - strength and values.max() <= 1 + strength, name
    assert p.hue.abs().max() <= recipe.hue
    assert recipe.gamma[0] <= p.gamma.min() and p.gamma.max() <= recipe.gamma[1]
    assert recipe.blur_sigma[0] <= p.blur_sigma.min() and p.blur_sigma.max() <= recipe.blur_sigma[1]
    assert recipe.pixelate_factor[0] <= p.pixelate.min() and p.pixelate.max() <= recipe.pixelate_factor[1]
    assert recipe.jpeg_quality[0] <= p.jpeg_quality.min() and p.jpeg_quality.max() <= recipe.jpeg_quality[1]
    assert 0 <= p.overlay.min() and p.overlay.max() < OVERLAY_BANK_SIZE
    assert recipe.haze_strength[0] <= p.haze.min() and p.haze.max() <= recipe.haze_strength[1]
    assert 0 <= p.snow.min() and p.snow.max() < SNOW_BANK_SIZE
    assert recipe.snow_keep[0] <= p.snow_keep.min() and p.snow_keep.max() <= recipe.snow_keep[1]
    hidden = 1 - p.inner.min(dim=1).values  # the border takes 2 x frac of one side or both
    assert (hidden >= 2 * recipe.border_frac[0] - 1e-6).all() and (hidden <= 2 * recipe.border_frac[1] + 1e-6).all()


@pytest.mark.parametrize("scale", [(0.5, 1.0), (0.1, 1.0)])
def test_crop_boxes_lie_in_their_region_with_area_and_ratio_in_range(scale):
    gen = torch.Generator().manual_seed(1)
    n = 500
    # Regions whose own aspect lies in the ratio range, so torchvision's fallback (the whole region) is in range too.
    w = 40 + 150 * torch.rand(n, generator=gen)
    h = w / torch.exp(math.log(3 / 4) + math.log(16 / 9) * torch.rand(n, generator=gen))
    x0, y0 = 10 * torch.rand(n, generator=gen), 10 * torch.rand(n, generator=gen)
    regions = torch.stack([x0, y0, x0 + w, y0 + h], dim=1)
    boxes = sample_crop_boxes(regions, torch.tensor([scale] * n), (3 / 4, 4 / 3), gen)
    bx, by, bw, bh = boxes.unbind(1)
    eps = 1e-4
    assert (bx >= regions[:, 0] - eps).all() and (by >= regions[:, 1] - eps).all()
    assert (bx + bw <= regions[:, 2] + eps).all() and (by + bh <= regions[:, 3] + eps).all()
    fraction = bw * bh / (w * h)
    assert fraction.min() >= scale[0] - eps and fraction.max() <= scale[1] + eps
    assert (bw / bh).min() >= 3 / 4 - eps and (bw / bh).max() <= 4 / 3 + eps
    # Positions spread over the room left (uniform, as RandomResizedCrop's).
    assert torch.unique(bx).numel() == n


def test_view_pairs_differ_within_a_batch(bank):
    gen = torch.Generator().manual_seed(2)
    v1, v2 = make_view_pairs(bank, torch.arange(len(bank)), 0, ViewRecipe(), 64, gen)
    assert v1.shape == v2.shape == (len(bank), 3, 64, 64) and v1.dtype == torch.float32
    assert not torch.equal(v1, v2)
    # Views of one picture drawn in one batch differ (per-sample parameters).
    a, _ = make_view_pairs(bank, torch.zeros(len(bank), dtype=torch.int64), 0, ViewRecipe(), 64, gen)
    assert all(not torch.equal(a[0], a[i]) for i in range(1, len(bank)))


def test_view_one_is_the_moderate_crop_and_view_two_the_hard_one(bank):
    # Moderate = the whole picture, hard = a tenth of it: view 1 is then exactly the square
    # astronaut photo resized (torchvision's resize, bilinear, no antialiasing), view 2 is not.
    recipe = no_edits(moderate_crop_scale=(1.0, 1.0), hard_crop_scale=(0.1, 0.1))
    v1, v2 = make_view_pairs(bank, torch.tensor([0]), 0, recipe, 64, torch.Generator().manual_seed(0))
    from nearsight.indexer.learning.encoder import normalize_tensor

    expected = normalize_tensor(TF.resize(_as_float(photo("astronaut")), [64, 64], antialias=False))
    assert (v1[0] - expected).abs().max() < 1e-4
    assert (v2[0] - expected).abs().mean() > 0.1


# --- (b) geometry against torchvision ------------------------------------------------------------


def _as_float(array: np.ndarray) -> torch.Tensor:
    return torch.from_numpy(array.copy()).permute(2, 0, 1).float().div(255.0)


@pytest.mark.parametrize("box", [(30, 20, 120, 90), (0, 0, 192, 128), (50, 40, 80, 80)])
def test_affine_crop_matches_torchvision_resized_crop(box):
    image = _as_float(photo("chelsea"))  # 192 x 128
    src = torch.zeros(1, 3, SIDE, SIDE)
    src[0, :, : image.shape[1], : image.shape[2]] = image
    left, top, width, height = box
    size = 64
    region = torch.tensor([[0.0, 0.0, image.shape[2], image.shape[1]]])
    params = identity_params(torch.tensor([box], dtype=torch.float32))
    ours = warp(src, params, region, size)[0]
    # torchvision.transforms.v2.functional.resized_crop, bilinear without antialiasing: the same
    # sampling (pixel centres, align_corners=False), so equal to float rounding.
    reference = TF.resized_crop(image, top, left, height, width, [size, size], antialias=False)
    assert (ours - reference).abs().max() < 1e-4
    # Against its default (antialiased) resize, our plain bilinear differs only by aliasing:
    # bounded here (at most a 3x downscale) by 0.03 of the range on average, 0.5 at worst.
    antialiased = TF.resized_crop(image, top, left, height, width, [size, size], antialias=True)
    assert (ours - antialiased).abs().mean() < 0.03 and (ours - antialiased).abs().max() < 0.5
    flipped = warp(src, identity_params(params.boxes, flip=torch.tensor([True])), region, size)[0]
    assert (flipped - TF.horizontal_flip(reference)).abs().max() < 1e-4


def test_the_written_out_grid_is_affine_grids_and_rotation_matches_torchvision_rotate():
    from nearsight.indexer.learning.batch_views import _affine_coefficients, _output_coords

    # torch.nn.functional.affine_grid of the same theta: the same sample points.
    params = identity_params(torch.tensor([[10.0, 20.0, 100.0, 80.0]]), angle=torch.tensor([7.0]),
                             flip=torch.tensor([True]), inner=torch.tensor([[0.8, 0.9]]))
    a = _affine_coefficients(params, SIDE)
    theta = torch.stack([torch.stack(a[:3], 1), torch.stack(a[3:], 1)], 1)
    reference = torch.nn.functional.affine_grid(theta, [1, 3, 64, 64], align_corners=False)
    o = _output_coords(64)
    ax, bx, cx, ay, by, cy = (c[:, None, None] for c in a)
    ox, oy = o[None, None, :], o[None, :, None]
    ours = torch.stack([ax * ox + bx * oy + cx, ay * ox + by * oy + cy], dim=-1)
    assert (ours - reference).abs().max() < 1e-6
    # The whole (square) picture rotated by +5 degrees is torchvision's rotate by +5 (counter-clockwise,
    # bilinear, black corners): equal away from the edges, where the two treat the corner boundary apart.
    image = _as_float(photo("astronaut"))
    whole = torch.tensor([[0.0, 0.0, SIDE, SIDE]])
    for angle in (5.0, -5.0):
        view = warp(image[None], identity_params(whole, angle=torch.tensor([angle])), whole, SIDE)[0]
        expected = TF.rotate(image, angle, interpolation=TF.InterpolationMode.BILINEAR)
        assert (view - expected)[:, 10:-10, 10:-10].abs().max() < 1e-4
        assert (view - expected).abs().mean() < 0.005


def test_a_box_inside_the_picture_reads_real_neighbours_not_the_box_edge():
    image = _as_float(photo("astronaut"))  # 192 x 192
    src = image[None]
    box = (40, 50, 40, 30)  # upscaled 40 x 30 -> 64: the outermost samples fall between box and neighbours
    ours = warp(src, identity_params(torch.tensor([box], dtype=torch.float32)),
                torch.tensor([[0.0, 0.0, 192.0, 192.0]]), 64)[0]
    reference = TF.resized_crop(image, box[1], box[0], box[3], box[2], [64, 64], antialias=False)
    # torchvision clamps at the crop's edge; inside a one-pixel ring the two agree exactly.
    assert (ours - reference)[:, 1:-1, 1:-1].abs().max() < 1e-4


def test_border_keeps_the_picture_inside_and_colours_the_rest():
    image = _as_float(photo("coffee"))
    src = torch.zeros(1, 3, SIDE, SIDE)
    src[0, :, : image.shape[1], : image.shape[2]] = image
    colour = torch.tensor([[0.2, 0.4, 0.6]])
    keep = 0.75  # border of 12.5 % on each side: 8 of 64 pixels
    whole = torch.tensor([[0.0, 0.0, image.shape[2], image.shape[1]]])
    params = identity_params(whole, inner=torch.tensor([[keep, keep]]), border_colour=colour)
    out = warp(src, params, whole, 64)[0]
    assert torch.allclose(out[:, :8, :], colour[0, :, None, None].expand(3, 8, 64))
    assert torch.allclose(out[:, :, -8:], colour[0, :, None, None].expand(3, 64, 8))
    # The inside is the whole picture at 48 x 48 (torchvision's resize of the same, no antialiasing).
    inside = TF.resize(image, [48, 48], antialias=False)
    assert (out[:, 8:56, 8:56] - inside).abs().max() < 1e-4


# --- (c) hard-negative regions -------------------------------------------------------------------


def test_split_regions_do_not_overlap_and_stay_in_the_picture():
    gen = torch.Generator().manual_seed(3)
    extents = torch.stack([20 + 170 * torch.rand(400, generator=gen), 20 + 170 * torch.rand(400, generator=gen)], 1)
    a, b = split_regions(extents, gen)
    for r in (a, b):
        assert (r[:, :2] >= 0).all() and (r[:, 2] <= extents[:, 0]).all() and (r[:, 3] <= extents[:, 1]).all()
        assert ((r[:, 2] - r[:, 0]) > 0).all() and ((r[:, 3] - r[:, 1]) > 0).all()
    # Rectangles are disjoint iff they are separated along x or along y; here by at least the gap.
    gap_x = torch.maximum(b[:, 0] - a[:, 2], a[:, 0] - b[:, 2])
    gap_y = torch.maximum(b[:, 1] - a[:, 3], a[:, 1] - b[:, 3])
    assert (torch.maximum(gap_x, gap_y) >= 2 * REGION_GAP - 1e-5).all()
    # Both kinds of split occur: halves (full height or width) and quadrants.
    full = (a[:, 3] - a[:, 1] == extents[:, 1]) | (a[:, 2] - a[:, 0] == extents[:, 0])
    assert full.any() and (~full).any()


def test_views_of_a_region_read_only_pixels_of_that_region():
    # A picture whose red channel is the column index and green the row index: every view
    # pixel then says which source coordinates were read (bilinear mixes stay in between).
    side = 160
    ys, xs = np.mgrid[0:side, 0:side]
    coded = np.stack([xs, ys, np.full_like(xs, 255)], axis=-1).astype(np.uint8)
    bank = build_source_bank([coded] * 4, 4, side)
    gen = torch.Generator().manual_seed(4)
    positions, regions = plan_entries(bank.extents, n_split=4, gen=gen)
    assert positions.tolist() == [0, 1, 2, 3, 0, 1, 2, 3]
    n = len(positions)
    recipe = no_edits(flip_p=0.5, rotate_p=1.0, rotate_degrees=8.0)
    scale = torch.tensor([recipe.hard_crop_scale] * n)
    params = sample_view_params(regions, scale, recipe, gen)
    views = render_views(bank, positions, regions, params, recipe, 48, gen) * 255
    read = views[:, 2] > 250  # not filled black by a rotation
    x_read = [views[i, 0][read[i]] for i in range(n)]
    y_read = [views[i, 1][read[i]] for i in range(n)]
    for i in range(n):
        x0, y0, x1, y1 = regions[i].tolist()
        # A sample point u (pixel k spans [k, k + 1]) reads the value u - 0.5 of this linear code;
        # points stay inside the region, so values stay within half a pixel of its edges.
        assert x_read[i].min() >= x0 - 0.5 - 1e-3 and x_read[i].max() <= x1 - 0.5 + 1e-3, i
        assert y_read[i].min() >= y0 - 0.5 - 1e-3 and y_read[i].max() <= y1 - 0.5 + 1e-3, i
    # The two entries of one picture read disjoint pixels: all of one lie before all of the other
    # along x or along y (bilinear reads the two pixels around a value, so "before" means by >= 1).
    for i in range(4):
        a, b = i, i + 4
        apart_x = x_read[b].min() - x_read[a].max() >= 1 or x_read[a].min() - x_read[b].max() >= 1
        apart_y = y_read[b].min() - y_read[a].max() >= 1 or y_read[a].min() - y_read[b].max() >= 1
        assert apart_x or apart_y, i


def test_pictures_too_small_to_split_stay_whole():
    extents = torch.tensor([[10.0, 100.0], [100.0, 100.0]])
    positions, regions = plan_entries(extents, n_split=2, gen=torch.Generator().manual_seed(0))
    assert positions.tolist() == [0, 1, 1]
    assert regions[0].tolist() == [0.0, 0.0, 10.0, 100.0]


# --- pixel edits against torchvision and Pillow ---------------------------------------------------


@pytest.fixture(scope="module")
def photos():
    return torch.stack([_as_float(photo(n, 96)[:48, :48]) for n in ("astronaut", "coffee", "rocket", "colorwheel")])


def test_colour_edits_match_torchvision_one_at_a_time(photos):
    n = len(photos)
    ones, zeros, no = torch.ones(n), torch.zeros(n), torch.zeros(n, dtype=torch.bool)
    f = torch.tensor([0.6, 1.3, 1.0, 1.4])
    pairs = [
        (adjust_colour(photos, f, ones, ones, zeros, no), TF.adjust_brightness),
        (adjust_colour(photos, ones, f, ones, zeros, no), TF.adjust_contrast),
        (adjust_colour(photos, ones, ones, f, zeros, no), TF.adjust_saturation),
        (adjust_gamma(photos.clone(), f), TF.adjust_gamma),
    ]
    for ours, reference in pairs:
        expected = torch.stack([reference(photos[i], float(f[i])) for i in range(n)])
        # torchvision's grey weights are 0.2989 / 0.587 / 0.114 against BT.601's 0.299: 1e-4 of the range.
        assert (ours - expected).abs().max() < 2e-3, reference.__name__
    grey = adjust_colour(photos, ones, ones, ones, zeros, torch.ones(n, dtype=torch.bool))
    assert (grey - TF.rgb_to_grayscale(photos, num_output_channels=3)).abs().max() < 2e-3


def test_recolouring_draws_hues_round_the_whole_circle_and_channel_orders_and_solarising_per_view(bank):
    recipe = ViewRecipe(jitter_p=1.0, recolour_p=0.5, channel_swap_p=0.5, solarize_p=0.5)
    n = 256
    regions = whole_regions(bank.extents[torch.arange(n) % len(bank)])
    p = sample_view_params(regions, torch.tensor([recipe.hard_crop_scale] * n), recipe,
                           torch.Generator().manual_seed(1))
    wide = p.hue.abs() > recipe.hue
    assert 0 < int(wide.sum()) < n and p.hue.abs().max() <= 0.5 and p.hue.abs().max() > 0.4
    assert set(p.channels.tolist()) == set(range(len(CHANNEL_ORDERS)))  # every order, none for about half
    chosen = p.solarize <= 1
    assert 0 < int(chosen.sum()) < n and torch.unique(p.solarize[chosen]).numel() == int(chosen.sum())
    low, high = recipe.solarize_threshold
    assert (p.solarize[chosen] >= low).all() and (p.solarize[chosen] <= high).all()
    assert (p.solarize[~chosen] == 2.0).all()


def test_channel_orders_and_solarising_match_pillow(photos):
    # Pillow's Image.merge of the split bands in another order, and ImageOps.solarize (tones at or above the
    # threshold inverted), on the same 8-bit pixels.
    from PIL import Image, ImageOps

    n = len(photos)
    ones, zeros, no = torch.ones(n), torch.zeros(n), torch.zeros(n, dtype=torch.bool)
    order = torch.tensor([5, 3, 0, 1])
    ours = adjust_colour(photos, ones, ones, ones, zeros, no, order)
    threshold = torch.tensor([0.5, 2.0, 0.3, 0.8])
    sunned = solarize(photos.clone(), threshold)
    for i in range(n):
        im = Image.fromarray((photos[i].permute(1, 2, 0).numpy() * 255).round().astype("uint8"))
        bands = im.split()
        expected = Image.merge("RGB", [bands[c] for c in CHANNEL_ORDERS[int(order[i])]])
        got = (ours[i].permute(1, 2, 0).numpy() * 255).round()
        assert abs(got - np.asarray(expected, np.float64)).max() <= 1, i
        expected = ImageOps.solarize(im, threshold=round(float(threshold[i]) * 255)) if threshold[i] <= 1 else im
        got = (sunned[i].permute(1, 2, 0).numpy() * 255).round()
        assert abs(got - np.asarray(expected, np.float64)).max() <= 1, i


def test_hue_shift_is_a_rotation_about_the_grey_axis():
    # Rodrigues' rotation by a third of a turn about (1, 1, 1) permutes R -> G -> B (cyclically).
    primaries = torch.eye(3)[:, :, None, None]  # red, green, blue pixels
    n = 3
    ones, no = torch.ones(n), torch.zeros(n, dtype=torch.bool)
    turned = adjust_colour(primaries, ones, ones, ones, torch.full((n,), 1 / 3), no)
    assert torch.allclose(turned[:, :, 0, 0], torch.eye(3).roll(1, dims=1), atol=1e-5)
    grey = torch.full((1, 3, 2, 2), 0.4)
    shifted = adjust_colour(grey, ones[:1], ones[:1], ones[:1], torch.tensor([0.3]), no[:1])
    assert torch.allclose(shifted, grey, atol=1e-6)


def test_blur_matches_torchvision_per_sample(photos):
    sigma = torch.tensor([0.0, 0.5, 1.0, 1.5])
    radius = 5
    ours = gaussian_blur(photos.clone(), sigma, radius)
    assert torch.equal(ours[0], photos[0])
    for i in range(1, len(photos)):
        s = float(sigma[i])
        expected = TF.gaussian_blur(photos[i], [2 * radius + 1] * 2, [s, s])
        assert (ours[i] - expected).abs().max() < 1e-5


def test_pixelate_matches_pillow_box_then_nearest(photos):
    factor = torch.tensor([1, 2, 4, 3])
    u8 = (photos * 255).round().to(torch.uint8)
    ours = pixelate(u8.float() / 255, factor)  # edits in place: a fresh tensor
    assert torch.equal(ours[0], u8[0].float() / 255)
    for i in (1, 2, 3):
        f = int(factor[i])
        im = Image.fromarray(u8[i].permute(1, 2, 0).numpy())
        reference = im.resize((48 // f, 48 // f), Image.BOX).resize((48, 48), Image.NEAREST)
        expected = torch.from_numpy(np.asarray(reference).copy()).permute(2, 0, 1).float()
        assert (ours[i] * 255 - expected).abs().max() < 1.01  # Pillow rounds its box means to uint8


def test_overlay_matches_pillow_alpha_composite(photos):
    bank = overlay_bank(48, (0.3, 0.6))
    which, place = torch.tensor([-1, 3, 10, 20]), torch.tensor([[0, 0], [0.0, 1.0], [0.5, 0.5], [1.0, 0.0]])
    ours = composite_overlays(photos.clone(), bank, which, place)
    assert torch.equal(ours[0], photos[0])
    for i in (1, 2, 3):
        rgba = bank[int(which[i])]
        oh, ow = rgba.shape[-2:]
        left, top = round(float(place[i, 0]) * (48 - ow)), round(float(place[i, 1]) * (48 - oh))
        base = Image.fromarray((photos[i] * 255).round().byte().permute(1, 2, 0).numpy()).convert("RGBA")
        layer = Image.new("RGBA", base.size, (0, 0, 0, 0))
        layer.paste(Image.fromarray((rgba * 255).round().byte().permute(1, 2, 0).numpy(), "RGBA"), (left, top))
        expected = np.asarray(Image.alpha_composite(base, layer).convert("RGB")).astype(np.float32)
        assert np.abs(ours[i].permute(1, 2, 0).numpy() * 255 - expected).max() <= 2.0  # uint8 rounding in Pillow
        assert not torch.equal(ours[i], photos[i])


def test_noise_strengths_are_as_asked():
    gen = torch.Generator().manual_seed(5)
    flat = torch.full((3, 3, 64, 64), 0.5)
    sigma, impulse = torch.tensor([0.0, 0.05, 0.0]), torch.tensor([0.0, 0.0, 0.1])
    out = add_noise(flat.clone(), sigma, torch.zeros(3), impulse, gen)
    assert torch.equal(out[0], flat[0])
    assert abs(float((out[1] - 0.5).std()) - 0.05) < 0.05 * 0.05  # 12 288 draws: the std is within 1 %
    changed = (out[2] != 0.5).all(dim=0).float().mean()
    assert abs(float(changed) - 0.1) < 0.015  # binomial, 4 096 pixels: 3 standard errors is 0.014


def test_haze_takes_contrast_away_as_asked_and_adds_a_smooth_veil(photos):
    gen = torch.Generator().manual_seed(3)
    strength = torch.tensor([0.0, 0.5, 1.5, 2.5])
    out = add_haze(photos.clone(), strength, torch.full((4,), 2.0), gen)
    assert torch.equal(out[0], photos[0])
    for i in (1, 2, 3):
        s = float(strength[i])
        # ImageNet-C's fog (from memory): (x + s * veil) / (1 + s) with the veil in [0, 1]; so the veil is recovered
        # exactly, spans [0, 1], and is the same on every channel.
        veil = (out[i] * (1 + s) - photos[i]) / s
        assert float(veil.min()) == pytest.approx(0.0, abs=1e-5) and float(veil.max()) == pytest.approx(1.0, abs=1e-5)
        assert torch.allclose(veil[0], veil[1], atol=1e-5) and torch.allclose(veil[0], veil[2], atol=1e-5)
        # Smooth: most of its variance below a quarter of the frequencies a side (numpy's FFT as the reference).
        power = np.abs(np.fft.fft2(veil[0].numpy() - veil[0].numpy().mean())) ** 2
        f = np.abs(np.fft.fftfreq(veil.shape[-1]))
        low = (f[:, None] < 0.125) & (f[None, :] < 0.125)
        assert power[low].sum() > 0.9 * power.sum()


def test_snow_whitens_and_adds_flakes_only_where_asked(photos):
    bank = snow_bank(48)
    assert bank.shape == (SNOW_BANK_SIZE, 1, 48, 48) and 0 <= float(bank.min()) and float(bank.max()) <= 1
    assert 0.02 < float((bank > 0.05).float().mean()) < 0.6  # flakes, not a white sheet
    which, keep = torch.tensor([-1, 0, 1, 2]), torch.tensor([1.0, 1.0, 0.7, 0.55])
    out = add_snow(photos.clone(), which, keep, bank, torch.tensor([False, False, True, False]))
    assert torch.equal(out[0], photos[0])
    # keep 1: only the layer is added (ImageNet-C's snow, from memory: x + flakes, clipped to [0, 1]).
    assert torch.allclose(out[1], (photos[1] + bank[0]).clamp(0, 1))
    # Otherwise the picture is first blended towards max(x, 1.5 luma + 0.5): never darker anywhere.
    assert (out[2:] >= photos[2:] - 1e-6).all() and float((out[2:] - photos[2:]).mean()) > 0.05
    luma = torch.einsum("chw,c->hw", photos[3], torch.tensor([0.299, 0.587, 0.114]))
    whitened = 0.55 * photos[3] + 0.45 * torch.maximum(photos[3], luma * 1.5 + 0.5)
    assert torch.allclose(out[3], (whitened + bank[2]).clamp(0, 1), atol=1e-6)


def test_jpeg_reencodes_only_the_chosen_samples(photos):
    out = jpeg_round_trip(photos.clone(), torch.tensor([0, 30, 0, 90]))
    assert torch.equal(out[0], photos[0]) and torch.equal(out[2], photos[2])
    # The chosen ones are what Pillow decodes from its own JPEG of the 8-bit picture (reference library).
    for i, quality in ((1, 30), (3, 90)):
        import io

        buf = io.BytesIO()
        Image.fromarray((photos[i] * 255).round().byte().permute(1, 2, 0).numpy()).save(buf, "JPEG", quality=quality)
        buf.seek(0)
        expected = torch.from_numpy(np.asarray(Image.open(buf).convert("RGB")).copy()).permute(2, 0, 1)
        assert torch.equal((out[i] * 255).round().byte(), expected)
        assert not torch.equal(out[i], photos[i])


def test_bad_recipes_are_refused():
    with pytest.raises(UsageError, match="flip_p"):
        ViewRecipe(flip_p=1.5).validate()
    with pytest.raises(UsageError, match="hard_crop_scale"):
        ViewRecipe(hard_crop_scale=(0.0, 1.0)).validate()
    with pytest.raises(UsageError, match="bad view recipe"):
        ViewRecipe(noise_sigma="loud").validate()
    # An old card's recipe (before the batched fields) still loads, with today's defaults for the rest.
    old = {"crop_scale": [0.2, 1.0], "flip_p": 0.5, "jpeg_quality": [30, 90]}
    assert ViewRecipe.from_dict(old).hard_crop_scale == ViewRecipe().hard_crop_scale


@pytest.mark.parametrize("k", [0.25, -0.25])
def test_a_keystone_narrows_one_edge_by_its_share_and_reads_only_the_box(k):
    """A horizontal ramp (each pixel's value is its column) warped with a keystone k across x: the
    row at the narrow edge spans 1 - |k| of the columns the opposite row spans, centred on the same
    column (the trapezoid the recipe states), and no sample falls outside the crop box. Reference:
    the ramp itself, computed with NumPy."""
    side, size = 64, 64
    ramp = torch.arange(side, dtype=torch.float32).repeat(side, 1) / (side - 1)
    src = ramp.expand(1, 3, side, side).contiguous()
    box = torch.tensor([[8.0, 8.0, 48.0, 48.0]])
    params = identity_params(box, keystone=torch.tensor([[k, 0.0]]))
    out = warp(src, params, torch.tensor([[0.0, 0.0, side, side]]), size)[0, 0].numpy()
    plain = warp(src, identity_params(box), torch.tensor([[0.0, 0.0, side, side]]), size)[0, 0].numpy()
    narrow, wide = (out[-1], out[0]) if k > 0 else (out[0], out[-1])
    span = lambda row: float(row.max() - row.min())  # noqa: E731
    assert span(wide) == pytest.approx(span(plain[0]), rel=0.05)
    # The edge row sits half a pixel in from the edge, so its narrowing is 1 - |k| (1 - 1/size) exactly.
    assert span(narrow) == pytest.approx((1 - abs(k) * (1 - 1 / size)) * span(plain[0]), rel=0.05)
    assert float(narrow.mean()) == pytest.approx(float(wide.mean()), abs=0.02)
    lo, hi = (8 - 0.5) / (side - 1), (48 + 8 + 0.5) / (side - 1)
    assert out.min() >= lo - 1e-4 and out.max() <= hi + 1e-4


def test_views_made_a_step_ahead_are_the_batches_made_in_step(bank):
    # With two threads the next step's views are made while the model trains on this step's
    # (train_batches._batched): the batches must be exactly those made one after the other.
    from nearsight.indexer.learning.train_batches import plan_batches, view_batches

    plan = plan_batches(len(bank), 4, 0.5, "batched")
    sequences = []
    for threads in (1, 2):
        batches, _ = view_batches(bank, plan, ViewRecipe(), 48, seed=3, start_step=2, workers=0, threads=threads)
        sequences.append([next(batches) for _ in range(4)])
        batches.close()
    for (a1, a2), (b1, b2) in zip(*sequences):
        assert torch.equal(a1, b1) and torch.equal(a2, b2)
    assert not torch.equal(sequences[0][0][0], sequences[0][1][0])
