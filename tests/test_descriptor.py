"""What a stored descriptor is made of: the classical part (indexer/learning/classic.py) against SciPy's
DCT, the encoder's input standardisation against Pillow's own brightness and contrast edits,
and model files that remember both."""

import numpy as np
import pytest
import scipy.fft
import torch
from PIL import Image, ImageEnhance

from nearsight.indexer.learning.classic import THUMB_SIDE, check_classic, classic_descriptor, classic_dim, dct_matrix
from nearsight.indexer.learning.encoder import create_encoder, pixels, preprocess, standardise
from nearsight.indexer.core.errors import UsageError


def _photo(name="astronaut") -> Image.Image:
    import skimage.data

    return Image.fromarray(getattr(skimage.data, name)()).convert("RGB")


def test_dct_matrix_matches_scipy_orthonormal_dct():
    # Reference: scipy.fft.dctn(type 2, norm="ortho"), the transform pHash is built on.
    y = np.random.default_rng(0).random((THUMB_SIDE, THUMB_SIDE))
    c = dct_matrix(THUMB_SIDE, torch.float64).numpy()
    np.testing.assert_allclose(c @ y @ c.T, scipy.fft.dctn(y, type=2, norm="ortho"), atol=1e-12)


def test_dct8_is_the_low_frequency_block_of_a_32px_luma_thumbnail():
    """Computed independently: Pillow's luma thumbnail (BOX filter, an area average) of the same
    128 px input, SciPy's DCT, the 8 x 8 block without its constant term, L2-normalised."""
    x = preprocess([_photo()], 128)
    ours = classic_descriptor(pixels(x), "dct8")[0].numpy()
    p = (pixels(x)[0].permute(1, 2, 0).numpy() * 255.0)
    grey = p @ np.array([0.299, 0.587, 0.114])  # ITU-R BT.601 luma, as Pillow's convert("L")
    thumb = np.asarray(Image.fromarray(grey.astype(np.float32), mode="F").resize((32, 32), Image.Resampling.BOX))
    block = scipy.fft.dctn(thumb.astype(np.float64), norm="ortho")[:8, :8].ravel()[1:]
    np.testing.assert_allclose(ours, block / np.linalg.norm(block), atol=2e-3)
    assert classic_dim("dct8") == 63 == ours.shape[0]


@pytest.mark.parametrize("name", ["dct8", "dct12", "thumb16"])
def test_brightness_and_contrast_barely_move_the_descriptor(name):
    im = _photo("coffee")
    edited = ImageEnhance.Contrast(ImageEnhance.Brightness(im).enhance(0.7)).enhance(0.6)  # Pillow's own edits
    other = _photo("chelsea")
    x = preprocess([im, edited, other], 128)
    d = classic_descriptor(pixels(x), name).numpy()
    same, different = float(d[0] @ d[1]), float(d[0] @ d[2])
    assert same > 0.99, same  # an affine change of luma is removed exactly; rounding to 8 bits is not
    assert different < 0.9, different


def test_unknown_names_are_refused():
    for bad in ("dct1", "dct99", "fourier", ""):
        with pytest.raises(UsageError):
            check_classic(bad)
    check_classic(None)
    assert classic_dim(None) == 0


def test_luma_standardisation_removes_an_affine_brightness_and_contrast_change():
    """Pillow's ImageEnhance.Contrast blends with the mean grey and Brightness scales: both are affine in
    the pixel values, so the standardised inputs agree up to 8-bit rounding (and any clipping)."""
    im = _photo("astronaut")
    edited = ImageEnhance.Contrast(ImageEnhance.Brightness(im).enhance(0.8)).enhance(0.7)
    x = preprocess([im, edited], 128)
    raw_gap = float((x[0] - x[1]).abs().mean())
    s = standardise(x, "luma")
    gap = float((s[0] - s[1]).abs().mean())
    assert gap < 0.1 * raw_gap, (gap, raw_gap)
    y = 0.299 * s[:, 0] + 0.587 * s[:, 1] + 0.114 * s[:, 2]  # BT.601 luma of the result
    np.testing.assert_allclose(y.mean(dim=(1, 2)).numpy(), 0.0, atol=1e-5)
    np.testing.assert_allclose(y.std(dim=(1, 2)).numpy(), 1.0, atol=1e-3)


def test_centred_standardisation_removes_imagenet_c_contrast_where_luma_does_not():
    """ImageNet-C's contrast corruption (Hendrycks and Dietterich 2019; its code, from memory:
    `means = x.mean(axis=(0, 1)); (x - means) * c + means`, clipped, c = 0.05 at severity 5) pulls
    each channel towards its own mean. "centred" standardisation undoes it up to 8-bit rounding;
    "luma" leaves a colour offset of (1 - c)(m_c - M) / (c s) per channel, far larger than the
    picture itself. scikit-image's astronaut: a colourful photograph (red suit, blue flag)."""
    im = _photo("astronaut")
    x = np.asarray(im.convert("RGB"), np.float64) / 255.0
    means = x.mean(axis=(0, 1), keepdims=True)
    low = np.clip((x - means) * 0.05 + means, 0, 1)
    edited = Image.fromarray(np.round(low * 255).astype(np.uint8))
    batch = preprocess([im, edited], 128)
    centred = standardise(batch, "centred")
    luma_only = standardise(batch, "luma")
    centred_gap = float((centred[0] - centred[1]).abs().mean())
    luma_gap = float((luma_only[0] - luma_only[1]).abs().mean())
    # 8-bit rounding of a 5 % contrast picture: levels 1/255 apart in a spread of about 0.05 x 0.25,
    # so about a third of a unit; the luma-only offsets are several units.
    assert centred_gap < 0.5 < 2.0 < luma_gap, (centred_gap, luma_gap)
    per_channel_mean = centred.mean(dim=(2, 3))
    np.testing.assert_allclose(per_channel_mean.numpy(), 0.0, atol=1e-4)


def test_grey_input_leaves_a_greyed_or_toned_copy_as_its_original():
    """Pillow's convert("L") is the ITU-R 601-2 luma (Pillow's documentation), the weights the encoder's
    luma uses: a grey copy and a sepia-toned one (each pixel's luma kept, its colour replaced) give the
    "grey" input the original's, up to 8-bit rounding, where "luma" keeps the colour and moves."""
    im = _photo("astronaut")
    grey = im.convert("L")
    # A toned copy that keeps luma: the grey level plus a colour offset whose BT.601 luma is zero.
    g = np.asarray(grey, np.float64)
    offset = np.array([20.0, -10.0, 0.0])
    offset[2] = -(0.299 * offset[0] + 0.587 * offset[1]) / 0.114
    inside = (g >= 60) & (g <= 195)  # where the offset does not clip
    sepia = np.where(inside[..., None], g[..., None] + offset, g[..., None])
    sepia = Image.fromarray(np.clip(np.round(sepia), 0, 255).astype(np.uint8))
    batch = preprocess([im, grey.convert("RGB"), sepia], 128)
    for how, small in (("grey", True), ("luma", False)):
        s = standardise(batch, how)
        gaps = [float((s[0] - s[i]).abs().mean()) for i in (1, 2)]
        if small:
            assert max(gaps) < 0.03, gaps  # 1/255 rounding in a spread of about 0.25: under 0.02
            np.testing.assert_allclose(s[0, 0].numpy(), s[0, 2].numpy())  # one luma in every channel
            np.testing.assert_allclose(float(s[0, 0].mean()), 0.0, atol=1e-5)
        else:
            assert min(gaps) > 0.1, gaps


def test_grey_view_sums_the_picture_and_its_pillow_grey_copy(tmp_path):
    """A model with `grey_view` stores normalise(h(picture) + h(its grey copy)): checked against the same
    weights without it, fed the picture and Pillow's convert("L") of it (ITU-R 601-2 luma, the encoder's
    weights), up to 8-bit rounding of the grey copy. The card remembers the choice."""
    from nearsight.indexer.learning.model import load_model, save_model

    torch.manual_seed(0)
    encoder = create_encoder("tiny", 16, input_norm="luma", classic="dct8", grey_view=True).eval()
    plain = create_encoder("tiny", 16, input_norm="luma", classic="dct8").eval()
    plain.load_state_dict(encoder.state_dict())
    photos = [_photo(name) for name in ("astronaut", "coffee", "chelsea")]
    greys = [p.convert("L").convert("RGB") for p in photos]
    with torch.no_grad():
        got = encoder.descriptor(preprocess(photos, 64))
        a, b = plain.descriptor(preprocess(photos, 64)), plain.descriptor(preprocess(greys, 64))
    expected = torch.nn.functional.normalize(a[:, :16] + b[:, :16], dim=1)
    np.testing.assert_allclose(got[:, :16].numpy(), expected.numpy(), atol=2e-3)
    np.testing.assert_allclose(got[:, 16:].numpy(), a[:, 16:].numpy(), atol=1e-6)  # the classical part as before
    save_model(tmp_path, encoder, {"arch": "tiny", "image_size": 64})
    loaded, card = load_model(tmp_path)
    assert card["grey_view"] is True and loaded.grey_view


def test_model_files_remember_input_standardisation_and_classical_part(tmp_path):
    from nearsight.indexer.learning.embed import embed_images
    from nearsight.indexer.learning.model import load_model, save_model

    torch.manual_seed(0)
    encoder = create_encoder("tiny", 16, input_norm="centred", classic="dct8")
    save_model(tmp_path, encoder, {"arch": "tiny", "image_size": 64})
    loaded, card = load_model(tmp_path)
    assert (card["input_norm"], card["classic"], loaded.out_dim) == ("centred", "dct8", 16 + 63)
    images = [_photo("coffee"), _photo("rocket")]
    np.testing.assert_allclose(embed_images(loaded, images, 64), embed_images(encoder, images, 64), atol=1e-6)
    with pytest.raises(UsageError):
        create_encoder("tiny", 16, input_norm="per-channel")


@pytest.mark.parametrize("c_in, width, stride", [(32, 32, 1), (32, 64, 2)])
def test_residual_block_equals_torchvision_basic_block_with_the_same_weights(c_in, width, stride):
    """Reference: torchvision.models.resnet.BasicBlock. Ours keeps its attribute names, so the same
    state dict loads into both, and both give the same output in training and in eval mode."""
    from torch import nn
    from torchvision.models.resnet import BasicBlock as Reference

    from nearsight.indexer.learning.encoder import BasicBlock

    def downsample():
        if stride == 1 and c_in == width:
            return None
        return nn.Sequential(nn.Conv2d(c_in, width, 1, stride=stride, bias=False), nn.BatchNorm2d(width))

    torch.manual_seed(0)
    ours, ref = BasicBlock(c_in, width, stride, downsample()), Reference(c_in, width, stride, downsample())
    with torch.no_grad():  # non-trivial batch-norm statistics, so eval mode is a real check
        for m in ref.modules():
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.uniform_(-0.5, 0.5)
                m.running_var.uniform_(0.5, 2.0)
                m.weight.uniform_(0.5, 1.5)
    ours.load_state_dict(ref.state_dict())  # strict: the same names and shapes
    x = torch.randn(4, c_in, 16, 16)
    for mode in (True, False):
        ours.train(mode)
        ref.train(mode)
        torch.testing.assert_close(ours(x.clone()), ref(x.clone()))
