"""Tests for indexer.reading.images: decoding, orientation, modes, limits and failures.

Every input is built in tmp_path at test time. Pixel references come from
outside nearsight: Pillow's own decoders and ImageOps, numpy formulas from the
standards named beside each check, and the photos shipped with scikit-image.
"""

from __future__ import annotations

import errno
import hashlib
import io
import os
import struct
import warnings
import zlib
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageOps, JpegImagePlugin
from skimage import data as skdata
from skimage import transform as sktransform

from nearsight.indexer.reading import images
from nearsight.indexer.core.errors import ImageReadError
from nearsight.indexer.reading.images import ImageInfo, fit_size, probe, read_image, save_thumbnail, to_rgb

# Open data shipped inside the scikit-image package (skimage.data): public photos
# bundled with the library, so no network is needed. "camera" is greyscale.
PHOTOS = ("astronaut", "coffee", "chelsea", "rocket", "camera")


# --- helpers -----------------------------------------------------------------


def _photo(name: str) -> np.ndarray:
    return getattr(skdata, name)()


def _pixels(im: Image.Image) -> np.ndarray:
    return np.asarray(im, dtype=np.int16)


def _mad(a, b) -> float:
    """Mean absolute difference in grey levels (out of 255)."""
    return float(np.abs(np.asarray(a, float) - np.asarray(b, float)).mean())


def _psnr(a, b) -> float:
    # PSNR = 10 log10(MAX^2 / MSE) with MAX = 255 for 8-bit data (the usual
    # definition, e.g. skimage.metrics.peak_signal_noise_ratio).
    mse = float(((np.asarray(a, float) - np.asarray(b, float)) ** 2).mean())
    return float("inf") if mse == 0 else 10 * np.log10(255.0**2 / mse)


def _as_rgb(array: np.ndarray) -> np.ndarray:
    return np.repeat(array[..., None], 3, axis=2) if array.ndim == 2 else array


def _save(path: Path, im: Image.Image, fmt: str, **params) -> Path:
    im.save(path, fmt, **params)
    return path


def _chunk(kind: bytes, payload: bytes) -> bytes:
    # PNG chunk layout: 4-byte big-endian length, type, data, CRC-32 of type+data
    # (PNG specification, W3C / ISO/IEC 15948, section 5.3).
    crc = zlib.crc32(kind + payload) & 0xFFFFFFFF
    return struct.pack(">I", len(payload)) + kind + payload + struct.pack(">I", crc)


def _png_with_header(width: int, height: int) -> bytes:
    """A tiny PNG whose IHDR (with a correct CRC) claims width x height RGB pixels."""
    ihdr = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)
    return (
        b"\x89PNG\r\n\x1a\n"
        + _chunk(b"IHDR", ihdr)
        + _chunk(b"IDAT", zlib.compress(b"\x00" * 16))
        + _chunk(b"IEND", b"")
    )


def _asymmetric(width: int = 60, height: int = 40) -> np.ndarray:
    """An image whose every flip and rotation differs: a gradient plus a corner mark."""
    yy, xx = np.mgrid[0:height, 0:width]
    array = np.stack([xx * 4 % 256, yy * 6 % 256, (xx + 2 * yy) % 256], axis=2).astype(np.uint8)
    array[:5, :10] = (255, 0, 0)
    return array


# Display transform for each EXIF orientation value as a numpy operation, from
# the EXIF standard's table (CIPA DC-008, tag 0x0112 "Orientation"): the row
# and column of the stored image that are shown at the top and left.
EXIF_DISPLAY = {
    1: lambda a: a,
    2: lambda a: a[:, ::-1],  # mirrored left-right
    3: lambda a: a[::-1, ::-1],  # rotated 180
    4: lambda a: a[::-1, :],  # mirrored top-bottom
    5: lambda a: a.transpose(1, 0, 2),  # mirrored about the main diagonal
    6: lambda a: np.rot90(a, -1),  # rotate 90 clockwise to display
    7: lambda a: a[::-1, ::-1].transpose(1, 0, 2),  # mirrored about the anti-diagonal
    8: lambda a: np.rot90(a, 1),  # rotate 90 counter-clockwise to display
}


# --- EXIF orientation --------------------------------------------------------


@pytest.mark.parametrize("fmt", ["PNG", "JPEG"])
@pytest.mark.parametrize("orientation", range(1, 9))
def test_exif_orientation_matches_standard_and_pillow(tmp_path, fmt, orientation):
    source = _asymmetric()
    exif = Image.Exif()
    exif[0x0112] = orientation
    path = _save(tmp_path / f"o{orientation}.{fmt.lower()}", Image.fromarray(source), fmt,
                 exif=exif.tobytes(), **({"quality": 95} if fmt == "JPEG" else {}))

    im, info = read_image(path)

    # Reference library: Pillow's ImageOps.exif_transpose on the same file. Both
    # decode the same bytes and transposing is lossless, so equality is exact.
    with Image.open(path) as ref:
        expected = np.asarray(ImageOps.exif_transpose(ref).convert("RGB"))
    assert np.array_equal(np.asarray(im), expected)
    # The standard's table: for PNG the decoded pixels are the source exactly.
    if fmt == "PNG":
        assert np.array_equal(np.asarray(im), EXIF_DISPLAY[orientation](source))
    swapped = orientation >= 5
    assert im.size == ((40, 60) if swapped else (60, 40))
    assert (info.width, info.height) == im.size
    assert info.orientation == orientation
    assert probe(path) == info


@pytest.mark.parametrize("orientation", [2, 3, 6, 7, 8])
def test_orientation_with_downscale(tmp_path, orientation):
    source = np.asarray(Image.fromarray(_photo("coffee")).resize((240, 160)))
    exif = Image.Exif()
    exif[0x0112] = orientation
    path = _save(tmp_path / "o.png", Image.fromarray(source), "PNG", exif=exif.tobytes())

    im, info = read_image(path, max_side=48)

    # Reference: the upright image (EXIF table above), resized by Pillow with the
    # same filter. We resize first and transpose after, which is cheaper; the
    # filter is applied as two 1-D passes, each rounded and clipped to 8 bits,
    # and swapping axes changes which pass clips, so a few edge pixels differ.
    # Measured MAD ~0.16; bounds MAD < 0.5 and PSNR > 40 dB, while a wrong
    # orientation gives MAD in the tens.
    upright = Image.fromarray(EXIF_DISPLAY[orientation](source))
    expected = upright.resize(im.size, images.RESAMPLE, reducing_gap=images.REDUCING_GAP)
    assert im.size == fit_size(upright.size, 48)
    assert _mad(im, expected) < 0.5
    assert _psnr(im, expected) > 40
    assert (info.width, info.height) == upright.size


# --- JPEG draft (DCT-scaled) decoding ----------------------------------------


@pytest.fixture
def large_jpeg(tmp_path) -> Path:
    """A 2400x1800 photo JPEG: scikit-image's 'coffee' scaled up (open data)."""
    big = Image.fromarray(_photo("coffee")).resize((2400, 1800), Image.Resampling.BICUBIC)
    return _save(tmp_path / "large.jpg", big, "JPEG", quality=90)


def _spy_on_draft(monkeypatch) -> list:
    calls = []
    real_draft = JpegImagePlugin.JpegImageFile.draft

    def spy(self, mode, size):
        result = real_draft(self, mode, size)
        calls.append({"requested": size, "result": result, "decoded_size": self.size})
        return result

    monkeypatch.setattr(JpegImagePlugin.JpegImageFile, "draft", spy)
    return calls


def test_draft_decoding_matches_full_decode(large_jpeg, monkeypatch):
    calls = _spy_on_draft(monkeypatch)
    fast, info = read_image(large_jpeg, max_side=256)

    # Draft was really used: 2400/256 -> libjpeg scale 1/8, a 300x225 decode
    # that is still at least the wanted 256x192.
    assert len(calls) == 1
    assert calls[0]["requested"] == (256, 192)
    assert calls[0]["decoded_size"] == (300, 225)
    assert calls[0]["result"] == ("RGB", (0, 0, 300.0, 225.0))
    assert fast.size == (256, 192)
    assert (info.width, info.height) == (2400, 1800)

    # Reference: Pillow full decode (no draft) + the same resize filter.
    with Image.open(large_jpeg) as ref:
        full = ref.convert("RGB").resize((256, 192), images.RESAMPLE,
                                         reducing_gap=images.REDUCING_GAP)
    # Tolerance: DCT-domain 1/8 scaling is a different low-pass filter than
    # LANCZOS, so a few pixels at sharp edges move by tens of levels, but on
    # average the images agree; measured here MAD ~1.1 and PSNR ~42 dB. We
    # allow MAD < 3 grey levels (of 255) and PSNR > 35 dB, which a wrong scale,
    # shift or colour conversion would fail by far.
    assert _mad(fast, full) < 3
    assert _psnr(fast, full) > 35


def test_draft_not_used_for_small_reductions(tmp_path, monkeypatch):
    calls = _spy_on_draft(monkeypatch)
    path = _save(tmp_path / "small.jpg", Image.fromarray(_photo("chelsea")), "JPEG")  # 451x300
    im, _ = read_image(path, max_side=256)
    assert calls == []  # under 2x larger than wanted: plain decode + resize
    assert im.size == (256, 170)
    im, _ = read_image(path, max_side=1000)
    assert im.size == (451, 300)  # never upscaled


# --- real photos -------------------------------------------------------------


@pytest.mark.parametrize("name", PHOTOS)
def test_real_photos_png_exact_jpeg_close(tmp_path, name):
    source = _photo(name)
    png = _save(tmp_path / f"{name}.png", Image.fromarray(source), "PNG")
    jpg = _save(tmp_path / f"{name}.jpg", Image.fromarray(source), "JPEG", quality=95)
    height, width = source.shape[:2]

    im, info = read_image(png)
    assert np.array_equal(np.asarray(im), _as_rgb(source))  # PNG is lossless: exact
    assert (info.width, info.height, info.format) == (width, height, "PNG")
    assert info.mode == ("L" if source.ndim == 2 else "RGB")

    im, info = read_image(jpg)
    assert im.size == (width, height) and info.format == "JPEG"
    # Same bytes through Pillow's decoder (reference library): exact.
    with Image.open(jpg) as ref:
        assert np.array_equal(np.asarray(im), np.asarray(ref.convert("RGB")))
    # Against the source: JPEG at quality 95 with 4:2:0 chroma loses a little;
    # measured MAD 1.5-2.3 and PSNR 34-41 dB on these photos. Bounds: MAD < 4,
    # PSNR > 30 dB (30-50 dB is the usual range for lossy JPEG; from memory).
    assert _mad(im, _as_rgb(source)) < 4
    assert _psnr(im, _as_rgb(source)) > 30


@pytest.mark.parametrize("name", ["astronaut", "rocket", "camera"])
def test_downscale_agrees_with_scikit_image(tmp_path, name):
    source = _as_rgb(_photo(name))
    png = _save(tmp_path / f"{name}.png", Image.fromarray(source), "PNG")
    im, _ = read_image(png, max_side=128)
    assert max(im.size) == 128
    # Reference library: scikit-image's anti-aliased cubic resize. A different
    # filter, so edges differ; measured MAD 0.9-2.6, PSNR 35-42 dB. Bounds:
    # MAD < 4, PSNR > 30 dB, enough to catch a misaligned or mis-scaled image.
    expected = sktransform.resize(source, (im.size[1], im.size[0]), order=3,
                                  anti_aliasing=True, preserve_range=True)
    expected = np.clip(np.round(expected), 0, 255)
    assert _mad(im, expected) < 4
    assert _psnr(im, expected) > 30


# --- modes -------------------------------------------------------------------


def test_sixteen_bit_png_keeps_top_byte(tmp_path):
    gradient = (np.arange(64 * 256, dtype=np.uint32).reshape(64, 256) * 4).astype(np.uint16)
    path = _save(tmp_path / "deep.png", Image.fromarray(gradient), "PNG")
    im, info = read_image(path)
    assert info.mode == "I;16"
    # 16 -> 8 bits by keeping the high byte (value >> 8), common practice.
    assert np.array_equal(np.asarray(im), _as_rgb((gradient >> 8).astype(np.uint8)))


@pytest.mark.parametrize(
    "values, expected",
    [
        (np.array([[0, 100, 255]], np.int32), [0, 100, 255]),  # fits 8 bits: as is
        (np.array([[0, 1000, 65535]], np.int32), [0, 1000 >> 8, 255]),  # 16-bit range
        # wider than 16 bits: stretched min..max, (v - min) * 255 / (max - min)
        (np.array([[-100, 49_925, 200_000]], np.int32), [0, 64, 255]),
    ],
)
def test_mode_i_tiff(tmp_path, values, expected):
    path = _save(tmp_path / "i.tif", Image.fromarray(values), "TIFF")
    im, info = read_image(path)
    assert info.mode == "I"
    assert list(np.asarray(im)[0, :, 0]) == expected


def test_float_tiff_in_unit_range(tmp_path):
    values = np.array([[0.0, 0.5, 1.0]], np.float32)
    path = _save(tmp_path / "f.tif", Image.fromarray(values), "TIFF")
    im, info = read_image(path)
    assert info.mode == "F"
    assert list(np.asarray(im)[0, :, 0]) == [0, 128, 255]  # round(v * 255)


def test_big_endian_sixteen_bit():
    im = Image.new("I;16B", (2, 1))
    im.putpixel((0, 0), 0xABCD)
    assert to_rgb(im).getpixel((0, 0)) == (0xAB,) * 3
    assert to_rgb(im).getpixel((1, 0)) == (0, 0, 0)


@pytest.mark.parametrize(
    "mode, value, expected, tolerance",
    [
        # HSV hue 0, full saturation and value is pure red (hexcone model, Smith 1978).
        ("HSV", (0, 255, 255), (255, 0, 0), 0),
        # JFIF / ITU-R BT.601 full-range YCbCr -> RGB:
        # R = Y + 1.402 (Cr-128), G = Y - 0.344136 (Cb-128) - 0.714136 (Cr-128),
        # B = Y + 1.772 (Cb-128); for (100, 90, 200) that is (200.9, 61.7, 32.7).
        ("YCbCr", (100, 90, 200), (201, 62, 33), 1),
        # CMYK -> RGB, R = 255 (1 - C/255)(1 - K/255) etc., common practice.
        ("CMYK", (200, 50, 0, 60), (42, 157, 195), 1),
        # CIE L*a*b* with L* = 100, a* = b* = 0 is the white point (CIE 15);
        # Pillow stores L* scaled to 0..255 and a*, b* offset by 128.
        ("LAB", (255, 128, 128), (255, 255, 255), 2),
        ("L", 77, (77, 77, 77), 0),
        ("1", 1, (255, 255, 255), 0),
    ],
)
def test_colour_modes(mode, value, expected, tolerance):
    out = to_rgb(Image.new(mode, (2, 2), value))
    assert out.mode == "RGB"
    assert np.abs(np.subtract(out.getpixel((1, 1)), expected)).max() <= tolerance


def test_cmyk_jpeg(tmp_path):
    source = _photo("astronaut")
    path = _save(tmp_path / "cmyk.jpg", Image.fromarray(source).convert("CMYK"), "JPEG", quality=95)
    im, info = read_image(path)
    assert info.mode == "CMYK"
    with Image.open(path) as ref:  # reference library: Pillow (handles Adobe inverted CMYK)
        assert np.array_equal(np.asarray(im), np.asarray(ref.convert("RGB")))
    # Through CMYK and back the photo survives: no chroma subsampling for CMYK,
    # so the loss is smaller than for RGB JPEG; same bounds as above.
    assert _mad(im, source) < 4 and _psnr(im, source) > 30


def test_palette_transparency_on_white(tmp_path):
    pal = Image.new("P", (4, 2))
    pal.putpalette([0, 0, 0, 200, 30, 40] + [0] * 762)
    pal.putpixel((1, 0), 1)
    path = _save(tmp_path / "pal.png", pal, "PNG", transparency=0)  # index 0 transparent
    im, info = read_image(path)
    assert info.mode == "P"
    assert im.getpixel((0, 0)) == (255, 255, 255)  # transparent -> white
    assert im.getpixel((1, 0)) == (200, 30, 40)  # opaque palette colour unchanged


@pytest.mark.parametrize("mode", ["LA", "RGBA"])
def test_alpha_composited_on_white(tmp_path, mode):
    rng = np.random.default_rng(7)
    colour = rng.integers(0, 256, (16, 16, 3), dtype=np.uint8)
    alpha = rng.integers(0, 256, (16, 16), dtype=np.uint8)
    alpha[0, 0], alpha[0, 1] = 0, 255
    if mode == "LA":
        colour[..., 1] = colour[..., 2] = colour[..., 0]
        source = Image.fromarray(np.dstack([colour[..., 0], alpha]), "LA")
    else:
        source = Image.fromarray(np.dstack([colour, alpha]), "RGBA")
    path = _save(tmp_path / f"{mode}.png", source, "PNG")
    im, info = read_image(path)
    assert info.mode == mode
    # Porter-Duff "over" on an opaque white background:
    # out = c * a + 255 * (1 - a), with a = alpha / 255. Integer rounding: +-1.
    a = alpha[..., None] / 255.0
    expected = colour * a + 255 * (1 - a)
    assert np.abs(np.asarray(im, float) - expected).max() <= 1
    assert im.getpixel((0, 0)) == (255, 255, 255)
    assert im.getpixel((1, 0)) == tuple(int(v) for v in colour[0, 1])


@pytest.mark.parametrize("fmt, params", [
    ("GIF", {"duration": 100}),
    ("PNG", {"duration": 100}),  # APNG
    ("WEBP", {"duration": 100, "lossless": True}),
])
def test_animated_first_frame(tmp_path, fmt, params):
    colours = [(255, 0, 0), (0, 255, 0), (0, 0, 255)]
    frames = [Image.new("RGB", (16, 12), c) for c in colours]
    path = tmp_path / f"anim.{fmt.lower()}"
    frames[0].save(path, fmt, save_all=True, append_images=frames[1:], **params)
    im, info = read_image(path)
    assert info.frames == 3 and info.format == fmt
    assert im.size == (16, 12)
    assert np.all(np.asarray(im) == colours[0])
    assert probe(path).frames == 3


def test_one_pixel_and_long_strip(tmp_path):
    one = _save(tmp_path / "one.png", Image.new("RGB", (1, 1), (9, 8, 7)), "PNG")
    im, info = read_image(one, max_side=256)
    assert im.size == (1, 1) and im.getpixel((0, 0)) == (9, 8, 7)

    strip = np.random.default_rng(3).integers(0, 256, (10, 30000, 3), dtype=np.uint8)
    path = _save(tmp_path / "strip.png", Image.fromarray(strip), "PNG")
    im, info = read_image(path)
    assert np.array_equal(np.asarray(im), strip)
    im, _ = read_image(path, max_side=256)
    assert im.size == (256, 1)  # the short side never drops to 0


# --- limits ------------------------------------------------------------------


def test_header_bomb_is_refused_before_decoding(tmp_path):
    path = tmp_path / "bomb.png"
    path.write_bytes(_png_with_header(100_000, 100_000))
    for call in (read_image, probe):
        with pytest.raises(ImageReadError) as caught:
            call(path)
        assert caught.value.reason == "too-large"


def test_our_limit_replaces_pillows(tmp_path):
    # 15000 x 15000 = 225 Mpx: over Pillow's default guard (it refuses above
    # ~179 Mpx) but under our default 250 Mpx, so the header is accepted and no
    # Pillow warning or error escapes. Only probed: decoding would need 675 MB.
    path = tmp_path / "wide.png"
    path.write_bytes(_png_with_header(15_000, 15_000))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        info = probe(path)
    assert (info.width, info.height) == (15_000, 15_000)
    # And a small limit of our own is the one that counts.
    small = _save(tmp_path / "small.png", Image.new("RGB", (20, 10)), "PNG")
    with pytest.raises(ImageReadError) as caught:
        read_image(small, max_pixels=199)
    assert caught.value.reason == "too-large"
    assert read_image(small, max_pixels=200)[0].size == (20, 10)


# --- malformed corpus --------------------------------------------------------


def _good_jpeg() -> bytes:
    buf = io.BytesIO()
    Image.fromarray(_photo("chelsea")).save(buf, "JPEG")
    return buf.getvalue()


def _good_png() -> bytes:
    buf = io.BytesIO()
    Image.fromarray(_photo("chelsea")).save(buf, "PNG")
    return buf.getvalue()


def _good_webp() -> bytes:
    buf = io.BytesIO()
    Image.fromarray(_photo("chelsea")).save(buf, "WEBP")
    return buf.getvalue()


def _flip_chunk_crc(png: bytes, kind: bytes) -> bytes:
    start = png.index(kind) - 4
    length = struct.unpack(">I", png[start:start + 4])[0]
    crc_at = start + 8 + length
    return png[:crc_at] + bytes(b ^ 0xFF for b in png[crc_at:crc_at + 4]) + png[crc_at + 4:]


def _write(name: str, content):
    """A builder writing `content` (bytes, or a function making them) to tmp_path/name."""

    def build(tmp_path: Path) -> Path:
        path = tmp_path / name
        path.write_bytes(content() if callable(content) else content)
        return path

    return build


def _dangling_symlink(tmp_path: Path) -> Path:
    os.symlink(tmp_path / "gone.jpg", tmp_path / "link.jpg")
    return tmp_path / "link.jpg"


def _directory(tmp_path: Path) -> Path:
    path = tmp_path / "folder.jpg"
    path.mkdir()
    return path


def _symlink_loop(tmp_path: Path) -> Path:
    os.symlink(tmp_path / "b.jpg", tmp_path / "a.jpg")
    os.symlink(tmp_path / "a.jpg", tmp_path / "b.jpg")
    return tmp_path / "a.jpg"


def _fifo(tmp_path: Path) -> Path:
    path = tmp_path / "pipe.jpg"
    os.mkfifo(path)
    return path


EPS_HEADER = b"%!PS-Adobe-3.0 EPSF-3.0\n%%BoundingBox: 0 0 10 10\n"

MALFORMED = [
    ("truncated-jpeg", _write("cut.jpg", lambda: _good_jpeg()[:4000]), "truncated"),
    ("jpeg-without-end", _write("noeoi.jpg", lambda: _good_jpeg()[:-2]), "truncated"),
    ("truncated-png", _write("cut.png", lambda: _good_png()[:40_000]), "truncated"),
    ("truncated-webp", _write("cut.webp", lambda: _good_webp()[:3000]), "truncated"),
    ("zero-bytes", _write("empty.jpg", b""), "empty"),
    ("random-bytes", _write("noise.jpg", np.random.default_rng(0).bytes(4096)), "not-image"),
    ("text", _write("notes.png", b"shopping list: lentils, rice\n" * 20), "not-image"),
    # EPS would start Ghostscript if Pillow were allowed to try it.
    ("eps", _write("vector.jpg", EPS_HEADER), "not-image"),
    ("png-bad-idat-crc", _write("idat.png", lambda: _flip_chunk_crc(_good_png(), b"IDAT")),
     "corrupt"),
    ("png-bad-ihdr-crc", _write("ihdr.png", lambda: _flip_chunk_crc(_good_png(), b"IHDR")),
     "corrupt"),
    # Entropy-coded data replaced by end markers: either reason is right.
    ("jpeg-scrambled", _write("junk.jpg", lambda: _good_jpeg()[:600] + b"\xff\xd9" * 50), None),
    ("bomb-header", _write("bomb.png", _png_with_header(100_000, 100_000)), "too-large"),
    ("directory", _directory, "is-directory"),
    ("symlink-loop", _symlink_loop, "symlink-loop"),
    ("missing", lambda tmp_path: tmp_path / "nowhere.jpg", "missing"),
    ("dangling-symlink", _dangling_symlink, "missing"),
    ("fifo", _fifo, "not-image"),
]


@pytest.mark.parametrize("name, build, reason", MALFORMED, ids=[c[0] for c in MALFORMED])
def test_malformed_inputs_give_a_reason(tmp_path, name, build, reason):
    path = build(tmp_path)
    with pytest.raises(ImageReadError) as caught:
        read_image(path, max_side=128)
    error = caught.value
    if reason is None:
        assert error.reason in {"corrupt", "truncated"}
    else:
        assert error.reason == reason, error.detail
    assert error.detail
    if name.startswith("png-bad"):
        assert "CRC" in error.detail


def test_heif_without_plugin_is_unsupported(tmp_path):
    # An ISO-BMFF 'ftyp' box with brand 'heic' (ISO/IEC 23008-12).
    head = struct.pack(">I", 24) + b"ftypheic" + b"\x00\x00\x00\x00" + b"mif1heic"
    path = tmp_path / "phone.heic"
    path.write_bytes(head + bytes(64))
    with pytest.raises(ImageReadError) as caught:
        read_image(path)
    has_plugin = "HEIF" in Image.OPEN
    assert caught.value.reason == ("corrupt" if has_plugin else "unsupported")


def test_unreadable_file(tmp_path):
    path = _save(tmp_path / "private.png", Image.new("RGB", (3, 2), (1, 2, 3)), "PNG")
    path.chmod(0)
    try:
        if os.access(path, os.R_OK):
            # Running as root: permission bits do not bind root (POSIX), so the
            # file really is readable and must decode. The permission reason is
            # covered by test_permission_error_is_reported.
            assert read_image(path)[0].getpixel((0, 0)) == (1, 2, 3)
        else:
            with pytest.raises(ImageReadError) as caught:
                read_image(path)
            assert caught.value.reason == "permission"
    finally:
        path.chmod(0o644)


def test_permission_error_is_reported(tmp_path, monkeypatch):
    path = _save(tmp_path / "locked.png", Image.new("RGB", (3, 2)), "PNG")
    real_open = os.open

    def refusing_open(target, *args, **kwargs):
        if os.fspath(target) == os.fspath(path):
            raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), os.fspath(target))
        return real_open(target, *args, **kwargs)

    monkeypatch.setattr(os, "open", refusing_open)
    with pytest.raises(ImageReadError) as caught:
        read_image(path)
    assert caught.value.reason == "permission"


def test_io_error_while_decoding():
    class FailingDisk(io.BytesIO):
        def read(self, size=-1):
            if self.tell() > 1000:
                raise OSError(errno.EIO, "Input/output error")
            return super().read(size)

    with pytest.raises(ImageReadError) as caught:
        read_image(FailingDisk(_good_png()))
    assert caught.value.reason == "io-error"


def test_png_without_iend_still_decodes(tmp_path):
    png = _good_png()
    path = tmp_path / "noiend.png"
    path.write_bytes(png[:-12])  # the 12-byte IEND chunk is gone, pixels are intact
    im, _ = read_image(path)
    assert np.array_equal(np.asarray(im), _photo("chelsea"))


def test_a_run_over_the_corpus_never_aborts_or_leaks(tmp_path):
    builders = [build for _name, build, _reason in MALFORMED if _name != "fifo"]
    paths = []
    for index, build in enumerate(builders):
        folder = tmp_path / str(index)
        folder.mkdir()
        paths.append(build(folder))
    paths.append(_save(tmp_path / "fine.jpg", Image.new("RGB", (8, 8)), "JPEG"))
    fd_dir = Path("/proc/self/fd")
    before = len(os.listdir(fd_dir)) if fd_dir.exists() else None
    outcomes = []
    for _ in range(3):
        for path in paths:
            try:
                read_image(path, max_side=64)
                outcomes.append("ok")
            except ImageReadError as error:
                outcomes.append(error.reason)
    assert outcomes.count("ok") == 3
    if before is not None:
        assert len(os.listdir(fd_dir)) == before  # every handle closed


# --- sources -----------------------------------------------------------------


class _Stream:
    """A non-seekable binary stream, like a socket or a pipe."""

    def __init__(self, content: bytes):
        self._buffer = io.BytesIO(content)

    def read(self, size=-1):
        return self._buffer.read(size)

    def seekable(self):
        return False


def _oriented_jpeg(tmp_path):
    exif = Image.Exif()
    exif[0x0112] = 6
    source = Image.fromarray(_photo("rocket"))
    return _save(tmp_path / "o6.jpg", source, "JPEG", exif=exif.tobytes())


@pytest.mark.parametrize("make", [
    _oriented_jpeg,
    lambda t: _save(t / "a.png", Image.fromarray(_photo("astronaut")).convert("RGBA"), "PNG"),
    lambda t: _save(t / "c.jpg", Image.fromarray(_photo("coffee")).convert("CMYK"), "JPEG"),
    lambda t: _save(t / "g.gif", Image.fromarray(_photo("chelsea")), "GIF"),
])
def test_bytes_and_streams_read_like_paths(tmp_path, make):
    path = make(tmp_path)
    content = path.read_bytes()
    digest = hashlib.sha256(content).hexdigest()
    expected, info = read_image(path, max_side=200)
    for source in (content, bytearray(content), io.BytesIO(content), _Stream(content)):
        im, other = read_image(source, max_side=200)
        assert other == info
        assert np.array_equal(np.asarray(im), np.asarray(expected))
    with open(path, "rb") as handle:
        read_image(handle)
        assert not handle.closed  # the caller's handle is the caller's to close
    assert hashlib.sha256(path.read_bytes()).hexdigest() == digest  # input untouched


def test_bad_bytes_give_the_same_reasons():
    assert _reason(b"") == "empty"
    assert _reason(_good_jpeg()[:4000]) == "truncated"
    assert _reason(b"not an image at all") == "not-image"


def _reason(source) -> str:
    with pytest.raises(ImageReadError) as caught:
        read_image(source)
    return caught.value.reason


def test_invalid_arguments_are_rejected():
    with pytest.raises(ValueError):
        read_image(b"x", max_side=0)
    with pytest.raises(TypeError):
        read_image(12345)


# --- thumbnails --------------------------------------------------------------


def test_save_thumbnail(tmp_path):
    im, _ = read_image(_save(tmp_path / "src.png", Image.fromarray(_photo("astronaut")), "PNG"),
                       max_side=256)
    target = tmp_path / "cache" / "ab" / "thumb.jpg"
    save_thumbnail(im, target)
    assert sorted(p.name for p in target.parent.iterdir()) == ["thumb.jpg"]  # no temp left
    with Image.open(target) as saved:
        assert saved.format == "JPEG"
        # Pillow's get_sampling: 0 means 4:4:4 (no chroma subsampling).
        assert JpegImagePlugin.get_sampling(saved) == 0
        # Quality 92 at 4:4:4: measured MAD ~1; bound 3 grey levels.
        assert _mad(saved.convert("RGB"), im) < 3


def test_save_thumbnail_is_atomic(tmp_path, monkeypatch):
    target = tmp_path / "thumb.jpg"
    save_thumbnail(Image.new("RGB", (8, 8), (10, 20, 30)), target)
    before = target.read_bytes()

    def failing_save(self, fp, *args, **kwargs):
        fp.write(b"partial")
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(Image.Image, "save", failing_save)
    with pytest.raises(OSError):
        save_thumbnail(Image.new("RGB", (8, 8)), target)
    assert target.read_bytes() == before  # the old thumbnail survives whole
    assert [p.name for p in tmp_path.iterdir()] == ["thumb.jpg"]



def test_reading_many_files_on_the_cores_keeps_their_order_and_puts_an_error_in_a_broken_file_s_place(tmp_path):
    # `read_images` (calibration, the fusion fit): each file as `read_image` alone reads it; a truncated JPEG (its
    # bytes cut in half) gives the error `read_image` raises for it, in its place. Reference: Pillow's own
    # decoding of the good files at full size (no max_side), scikit-image's photos.
    from PIL import Image as PILImage
    from skimage import data

    from nearsight.indexer.core.errors import ImageReadError
    from nearsight.indexer.reading.images import read_image, read_images, readable_images

    paths = []
    for k, name in enumerate(("astronaut", "coffee", "chelsea", "rocket")):
        path = tmp_path / f"{k}-{name}.png"
        PILImage.fromarray(getattr(data, name)()).save(path)
        paths.append(path)
    good = tmp_path / "whole.jpg"
    PILImage.fromarray(data.camera()).convert("RGB").save(good, quality=90)
    broken = tmp_path / "broken.jpg"
    broken.write_bytes(good.read_bytes()[: good.stat().st_size // 2])
    paths.insert(2, broken)
    out = read_images(paths)
    assert len(out) == len(paths)
    with pytest.raises(ImageReadError) as raised:
        read_image(broken)
    assert isinstance(out[2], ImageReadError) and str(out[2]) == str(raised.value)
    for path, image in zip(paths, out):
        if path != broken:
            assert np.array_equal(np.asarray(image), np.asarray(PILImage.open(path).convert("RGB")))
    # `readable_images` (the three readers of calibration): the same pictures keyed, the broken one left out
    # and reported once with its key, path and error.
    skipped = []
    kept = readable_images([(k, p) for k, p in enumerate(paths)], None, lambda *told: skipped.append(told))
    assert [k for k, _ in kept] == [0, 1, 3, 4]
    assert [(k, p, str(e)) for k, p, e in skipped] == [(2, broken, str(raised.value))]
    for k, image in kept:
        assert np.array_equal(np.asarray(image), np.asarray(out[k]))
