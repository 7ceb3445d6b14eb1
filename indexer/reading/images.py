"""Reading images: the one place where files become RGB pixels.

Scanning, training, embedding and the HTTP service all decode through
`read_image` (pixels) or `probe` (header only), so every stage sees the same
orientation, the same colour handling and the same failure reasons. A file that
cannot be decoded raises `ImageReadError` with a short stable `reason` that the
catalog stores; nothing else escapes for a bad file.

On first use (never at import) this module makes two process-wide changes to
Pillow: it turns off Pillow's own decompression-bomb guard, because our
`max_pixels` check on the header replaces it, and it registers the optional
`pillow_heif` opener for HEIC/HEIF when that package is installed.
"""

from __future__ import annotations

import io
import logging
import os
import secrets
import stat
import threading
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO, Iterator

import numpy as np
from PIL import Image, JpegImagePlugin

from ..core.errors import ImageReadError
from .read_errors import png_crc_problem as _png_crc_problem
from .read_errors import translate as _translate

log = logging.getLogger(__name__)

DEFAULT_MAX_PIXELS = 250_000_000

# Resampling used for every downscale. With reducing_gap=3 Pillow first shrinks
# by an integer factor (box filter) until the remaining scale is under 3x, then
# applies LANCZOS; Pillow's docs describe results from a gap of 3 as nearly
# indistinguishable from a full LANCZOS pass, at a fraction of the cost.
RESAMPLE = Image.Resampling.LANCZOS
REDUCING_GAP = 3.0

THUMBNAIL_QUALITY = 92
WHITE = (255, 255, 255)

# Formats we ask Pillow to identify, in the order tried. An allowlist rather
# than everything Pillow knows: EPS would start Ghostscript, and exotic
# scientific formats only widen the attack surface. TGA has no magic number,
# so it goes last. HEIF appears once pillow_heif is registered.
READ_FORMATS = (
    "JPEG", "MPO", "PNG", "GIF", "WEBP", "TIFF", "BMP", "DIB", "PPM",
    "AVIF", "HEIF", "JPEG2000", "ICO", "PSD", "PCX", "SGI", "QOI", "TGA",
)

# EXIF orientation (tag 0x0112) -> the transpose that displays the image
# upright; the same table as Pillow's ImageOps.exif_transpose.
_TRANSPOSE = {
    2: Image.Transpose.FLIP_LEFT_RIGHT,
    3: Image.Transpose.ROTATE_180,
    4: Image.Transpose.FLIP_TOP_BOTTOM,
    5: Image.Transpose.TRANSPOSE,
    6: Image.Transpose.ROTATE_270,
    7: Image.Transpose.TRANSVERSE,
    8: Image.Transpose.ROTATE_90,
}
_ORIENTATION_TAG = 0x0112

_setup_lock = threading.Lock()
_open_formats: tuple[str, ...] | None = None


@dataclass(frozen=True)
class ImageInfo:
    """What the header says about an image, with orientation already applied."""

    width: int  # pixel size of the full image AFTER EXIF orientation is applied
    height: int
    format: str  # Pillow's format name, e.g. "JPEG", "PNG"
    mode: str  # original Pillow mode, e.g. "CMYK", "P", "I;16"
    frames: int  # frames (or pages) in the file; 1 unless animated
    orientation: int  # EXIF orientation tag value 1..8 (1 if absent)
    # Where the file came from, for the keeper rule (indexer/matching/groups.py's keeper_key), read with Pillow's EXIF
    # support: the capture time (EXIF DateTimeOriginal, else DateTimeDigitized) as "YYYY-MM-DDTHH:MM:SS", the
    # camera (EXIF Make and Model), and whether the file embeds an ICC colour profile.
    captured: str | None = None
    camera: str | None = None
    icc: bool = False


def read_image(
    src, max_side: int | None = None, *, max_pixels: int | None = DEFAULT_MAX_PIXELS
) -> tuple[Image.Image, ImageInfo]:
    """Decode `src` fully and return it as an upright RGB image plus its header info.

    `src` is a path, bytes or a binary file object (read from its start, never
    closed here). With `max_side` the longest side is shrunk to at most that many
    pixels (never enlarged); JPEGs are then decoded at a reduced DCT scale first.
    `max_pixels` (0 or None: no limit) is checked on the header before decoding.
    """
    _check_limits(max_side, max_pixels)
    with _opened(src, max_pixels) as (im, fp):
        header = _Header(im.size, im.mode, _frame_count(im))
        rgb, orientation = _decode(im, fp, max_side)
        return rgb, _info(im, header, orientation, loaded=True)


def read_images(paths, max_side: int | None = None) -> list[Image.Image | ImageReadError | OSError]:
    """`read_image` of each path on every core (decoders release the GIL), in order; a file that cannot be read
    (changed or gone since the scan) gives its error in its place instead of stopping the others."""
    from ..core.cores import each_on_cores

    def read(path):
        try:
            return read_image(path, max_side)[0]
        except (ImageReadError, OSError) as exc:
            return exc

    return each_on_cores(read, list(paths))


def readable_images(keyed, max_side: int | None, skip) -> list[tuple[object, Image.Image]]:
    """(key, image) of each (key, path) in `keyed` that `read_images` can read, in order; `skip(key, path,
    error)` is told of each one it cannot (changed or gone since the scan), which is left out."""
    keyed = list(keyed)
    out = []
    for (key, path), image in zip(keyed, read_images([path for _, path in keyed], max_side)):
        if isinstance(image, Exception):
            skip(key, path, image)
        else:
            out.append((key, image))
    return out


def probe(src, *, max_pixels: int | None = DEFAULT_MAX_PIXELS) -> ImageInfo:
    """Read only the header: size, format, mode, frames and orientation.

    Raises the same errors as `read_image` for missing files, non-images and
    images over `max_pixels`; damage further into the file is only found by
    `read_image`.
    """
    _check_limits(None, max_pixels)
    with _opened(src, max_pixels) as (im, _fp):
        header = _Header(im.size, im.mode, _frame_count(im))
        return _info(im, header, _orientation(im, loaded=False), loaded=False)


def fit_size(size: tuple[int, int], max_side: int | None) -> tuple[int, int]:
    """The size with the longest side at most `max_side`, aspect kept, never enlarged."""
    width, height = size
    if max_side is None or max(width, height) <= max_side:
        return width, height
    scale = max_side / max(width, height)
    return (
        max(1, min(max_side, round(width * scale))),
        max(1, min(max_side, round(height * scale))),
    )


def to_rgb(im: Image.Image) -> Image.Image:
    """Convert any Pillow mode to 8-bit RGB; transparency is composited on white.

    16-bit modes keep their top byte (value >> 8). Mode I is read as 8-bit data
    when its maximum is <= 255, as 16-bit when <= 65535, else stretched from its
    minimum to maximum. Mode F is read as 0..1 or 0..255 when it fits, else
    stretched; NaN and infinities become 0. An RGB image is returned unchanged.
    """
    mode = im.mode
    if mode == "RGB" and "transparency" not in im.info:
        return im
    if mode in ("RGBA", "LA", "PA", "RGBa") or (
        mode in ("1", "L", "P", "RGB") and "transparency" in im.info
    ):
        return _on_white(im.convert("RGBA"))
    if mode == "La":
        return _on_white(im.convert("LA").convert("RGBA"))
    if mode.startswith("I;16") or mode in ("I", "F"):
        grey = _deep_to_8bit(np.asarray(im), mode)
        return Image.fromarray(grey).convert("RGB")
    try:
        return im.convert("RGB")
    except ValueError as exc:
        raise ImageReadError("unsupported", f"cannot convert mode {mode} to RGB: {exc}") from None


def save_thumbnail(im: Image.Image, path) -> None:
    """Write `im` as a JPEG (quality 92, 4:4:4 chroma) to `path`, atomically.

    The file appears complete or not at all: it is written beside the target
    and moved into place with os.replace. Missing parent folders are created.
    It is a cache, so no fsync; a torn file would be read as truncated and redone.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp")
    try:
        with open(tmp, "xb") as fp:
            to_rgb(im).save(fp, format="JPEG", quality=THUMBNAIL_QUALITY, subsampling=0)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


# --- opening -----------------------------------------------------------------


def _check_limits(max_side, max_pixels) -> None:
    if max_side is not None and (not isinstance(max_side, int) or max_side < 1):
        raise ValueError(f"max_side must be a whole number >= 1 or None, got {max_side!r}")
    if max_pixels is not None and (not isinstance(max_pixels, int) or max_pixels < 0):
        raise ValueError(f"max_pixels must be a whole number >= 0 or None, got {max_pixels!r}")


def _ensure_setup() -> tuple[str, ...]:
    """First-use setup of Pillow; returns the formats Image.open may try."""
    global _open_formats
    if _open_formats is not None:
        return _open_formats
    with _setup_lock:
        if _open_formats is None:
            # Our header check against max_pixels is the limit that counts; Pillow's
            # own guard would warn above ~89 Mpx and refuse above ~179 Mpx whatever
            # the user set. Every image read in nearsight goes through this module.
            Image.MAX_IMAGE_PIXELS = None
            _register_heif()
            Image.init()
            _open_formats = tuple(f for f in READ_FORMATS if f in Image.OPEN)
    return _open_formats


def _register_heif() -> None:
    try:
        import pillow_heif
    except ImportError:
        log.debug("pillow_heif not installed: HEIC/HEIF files will be recorded as unsupported")
        return
    try:
        pillow_heif.register_heif_opener()
    except Exception:  # a broken optional plugin must not stop other formats
        log.warning("pillow_heif is installed but could not be registered", exc_info=True)


@contextmanager
def _opened(src, max_pixels) -> Iterator[tuple[Image.Image, BinaryIO]]:
    """Open `src`, identify it and check its size; every failure becomes ImageReadError."""
    formats = _ensure_setup()
    head = b""
    with _source(src) as (fp, size):
        try:
            head = fp.read(32)
            fp.seek(0)
            if size == 0 or not head:
                raise ImageReadError("empty", "the file is empty (0 bytes)")
            with Image.open(fp, formats=formats) as im:
                width, height = im.size
                if width <= 0 or height <= 0:
                    raise ImageReadError("corrupt", f"header gives an empty size {width}x{height}")
                if max_pixels and width * height > max_pixels:
                    raise ImageReadError(
                        "too-large",
                        f"{width}x{height} = {width * height} pixels is over the "
                        f"max_pixels limit of {max_pixels}",
                    )
                yield im, fp
        except ImageReadError:
            raise
        except Exception as exc:
            log.debug("cannot read image", exc_info=True)
            raise _translate(exc, head, fp, size) from None


@contextmanager
def _source(src) -> Iterator[tuple[BinaryIO, int | None]]:
    """Yield a seekable binary file for `src` and its size in bytes."""
    if isinstance(src, (bytes, bytearray, memoryview)):
        yield io.BytesIO(src), len(src)
        return
    if isinstance(src, (str, os.PathLike)):
        fd = _open_fd(src)
        with os.fdopen(fd, "rb") as fp:
            yield fp, os.fstat(fd).st_size
        return
    if not hasattr(src, "read"):
        raise TypeError(f"expected a path, bytes or a binary file object, got {type(src).__name__}")
    try:
        if getattr(src, "seekable", lambda: False)():
            size = src.seek(0, io.SEEK_END)
            src.seek(0)
            fp = src
        else:
            data = src.read()
            fp, size = io.BytesIO(data), len(data)
    except OSError as exc:
        raise _translate(exc) from None
    yield fp, size


def _open_fd(path) -> int:
    # O_NONBLOCK so that a FIFO named like an image cannot block the open;
    # it has no effect on regular files.
    flags = os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_BINARY", 0) | os.O_CLOEXEC
    try:
        fd = os.open(path, flags)
    except OSError as exc:
        raise _translate(exc) from None
    kind = os.fstat(fd).st_mode
    if stat.S_ISREG(kind):
        return fd
    os.close(fd)
    if stat.S_ISDIR(kind):
        raise ImageReadError("is-directory", f"{os.fsdecode(path)} is a directory")
    raise ImageReadError("not-image", f"{os.fsdecode(path)} is not a regular file")


# --- header facts ------------------------------------------------------------


def _frame_count(im: Image.Image) -> int:
    frames = getattr(im, "n_frames", 1)
    if im.tell() != 0:
        im.seek(0)
    return frames if isinstance(frames, int) and frames > 0 else 1


def _orientation(im: Image.Image, loaded: bool = True) -> int:
    """EXIF orientation 1..8, or 1 when absent, invalid or unreadable.

    Before decoding, a PNG's eXIf chunk is only known if it precedes the image
    data; Pillow would otherwise decode the whole file to find it.
    """
    if not loaded and im.format == "PNG" and "exif" not in im.info:
        return 1
    try:
        value = im.getexif().get(_ORIENTATION_TAG, 1)
    except Exception:  # damaged EXIF must not cost us the pixels
        log.debug("unreadable EXIF block", exc_info=True)
        return 1
    return value if isinstance(value, int) and 1 <= value <= 8 else 1


@dataclass(frozen=True)
class _Header:
    """Facts taken before decoding; a JPEG draft changes im.size and im.mode."""

    size: tuple[int, int]
    mode: str
    frames: int


def _info(im: Image.Image, header: _Header, orientation: int, *, loaded: bool) -> ImageInfo:
    width, height = header.size
    if orientation >= 5:
        width, height = height, width
    # As for the orientation: before decoding, a PNG's eXIf chunk is known only if it precedes the pixels.
    skip = not loaded and im.format == "PNG" and "exif" not in im.info
    captured, camera = (None, None) if skip else _exif_origin(im)
    return ImageInfo(
        width=width,
        height=height,
        format=im.format or "",
        mode=header.mode,
        frames=header.frames,
        orientation=orientation,
        captured=captured,
        camera=camera,
        icc=bool(im.info.get("icc_profile")),
    )


def origin(src) -> tuple[str | None, str | None, bool]:
    """(captured, camera, icc) of an image file, as `read_image` reports them, without decoding it (except a
    PNG, whose eXIf chunk may follow its pixels, where Pillow finds it only by reading them). Raises
    ImageReadError like `probe`."""
    with _opened(src, None) as (im, _fp):
        if im.format == "PNG" and "exif" not in im.info:
            im.load()  # a failure here becomes ImageReadError in _opened
        captured, camera = _exif_origin(im)
        return captured, camera, bool(im.info.get("icc_profile"))


def _exif_text(value) -> str | None:
    if isinstance(value, bytes):
        value = value.decode("ascii", "replace")
    if not isinstance(value, str):
        return None
    text = " ".join(value.replace("\x00", " ").split())
    return text or None


def capture_time(value) -> str | None:
    """An EXIF date and time ("YYYY:MM:DD HH:MM:SS", Exif 2.3 section 4.6.5) as "YYYY-MM-DDTHH:MM:SS"
    (ISO 8601, so that text order is time order); None when absent, blank or not a real moment (cameras
    without a set clock write zeros)."""
    import datetime

    text = _exif_text(value)
    if text is None:
        return None
    try:
        moment = datetime.datetime.strptime(text[:19], "%Y:%m:%d %H:%M:%S")
    except ValueError:
        return None
    return moment.isoformat()


def _exif_origin(im: Image.Image) -> tuple[str | None, str | None]:
    """(capture time, camera) from the image's EXIF through Pillow's reader; (None, None) when absent or
    unreadable (damaged EXIF must not cost us the pixels)."""
    from PIL import ExifTags

    try:
        exif = im.getexif()
        details = exif.get_ifd(ExifTags.IFD.Exif)
        captured = capture_time(details.get(ExifTags.Base.DateTimeOriginal)) or \
            capture_time(details.get(ExifTags.Base.DateTimeDigitized))
        parts = [_exif_text(exif.get(ExifTags.Base.Make)), _exif_text(exif.get(ExifTags.Base.Model))]
    except Exception:
        log.debug("unreadable EXIF block", exc_info=True)
        return None, None
    camera = " ".join(p for p in parts if p) or None
    return captured, camera


# --- pixels ------------------------------------------------------------------


def from_pil(im: Image.Image, max_side: int | None = None) -> Image.Image:
    """An image already in memory (a caller's PIL image) as `read_image` brings a file: upright by its EXIF
    orientation, RGB, the longest side at most `max_side`."""
    from PIL import ImageOps

    rgb = to_rgb(ImageOps.exif_transpose(im))
    target = fit_size(rgb.size, max_side)
    return rgb if target == rgb.size else rgb.resize(target, RESAMPLE, reducing_gap=REDUCING_GAP)


def _decode(im: Image.Image, fp, max_side: int | None) -> tuple[Image.Image, int]:
    """Decode the opened image to upright RGB at most `max_side`; also return its orientation."""
    target = fit_size(im.size, max_side)
    box = None
    if target != im.size and isinstance(im, JpegImagePlugin.JpegImageFile) and (
        max(im.size) >= 2 * max_side
    ):
        # DCT-domain scaling by 1/2, 1/4 or 1/8: Pillow picks the largest factor
        # that keeps the decoded image at least `target`; `box` is the original
        # frame in the reduced image's coordinates.
        drafted = im.draft("RGB", target)
        if drafted is not None:
            box = drafted[1]
    im.load()
    if im.format == "PNG":
        problem = _png_crc_problem(fp)
        if problem:
            raise ImageReadError("corrupt", problem)
    orientation = _orientation(im)
    rgb = to_rgb(im)
    if rgb.size != target or box is not None:
        rgb = rgb.resize(target, RESAMPLE, box=box, reducing_gap=REDUCING_GAP)
    method = _TRANSPOSE.get(orientation)
    if method is not None:
        rgb = rgb.transpose(method)
    if rgb is im:
        rgb = im.copy()  # detach from the file handle about to be closed
    return rgb, orientation


def _on_white(rgba: Image.Image) -> Image.Image:
    white = Image.new("RGBA", rgba.size, WHITE + (255,))
    return Image.alpha_composite(white, rgba).convert("RGB")


def _deep_to_8bit(values: np.ndarray, mode: str) -> np.ndarray:
    if mode.startswith("I;16"):
        return (values >> 8).astype(np.uint8)
    if mode == "I":
        top = int(values.max())
        if top <= 255:
            return np.clip(values, 0, 255).astype(np.uint8)
        if top <= 65535:
            return (np.clip(values, 0, 65535) >> 8).astype(np.uint8)
        return _stretch(values.astype(np.float64))
    values = np.where(np.isfinite(values), values, 0).astype(np.float64)
    low, high = float(values.min()), float(values.max())
    if low >= 0 and high <= 1:
        return np.round(values * 255).astype(np.uint8)
    if low >= 0 and high <= 255:
        return np.round(values).astype(np.uint8)
    return _stretch(values)


def _stretch(values: np.ndarray) -> np.ndarray:
    low, high = float(values.min()), float(values.max())
    if high <= low:
        return np.zeros(values.shape, np.uint8)
    return np.round((values - low) * (255 / (high - low))).astype(np.uint8)
