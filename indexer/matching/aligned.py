"""The same-frame check: does a candidate show the query's picture in the same frame, changed only in its tones?

Geometric verification (verify.py) needs corners that survive the edit. A re-save at JPEG quality 3-5 turns a
photo into flat 8 x 8 blocks, heavy noise, blur, fog or a strong brightness change leave too few corners in
the same places, and ORB confirms nothing, though the picture is plainly the same: its copy then competes with
neighbouring tiles of the same photograph on the descriptor's score alone. These edits keep the frame (no crop,
no turn), so the pixels can be compared where they stand:

* both images are brought to a GRID x GRID grey grid, each cell the mean of the pixels it covers (an image of
  another shape is not compared: a frame that changed shape is a crop or a border, which ORB checks); a picture
  inside a uniform frame (indexer/matching/frames.py) is taken without it;
* band-passed, a difference of Gaussians (sigmas BAND in cells): the level, a brightness gradient and the veil
  of fog go with the wide one, pixel noise and block edges with the narrow one;
* the score is the Pearson correlation of the two band images (zero shift), in [-1, 1].

Measured on the quality benchmark's store (benchmarks/results/aligned.md: 4,992 queries, each against its first 5
results): of 13,486 pairs of a query and a wrong result with frames of the same shape (mostly neighbouring
tiles of one photograph), none reached 0.68 and 99.9 % stayed under 0.60; MIN_CORRELATION = 0.75 keeps a margin
above them and confirmed about two in five of the right results that ORB had not (JPEG, noise, blur, fog,
brightness). A grid of 96 or sigmas (1, 4) separated no better.

It answers queries only (rerank.py): a group pair still needs keypoints (query_verdict.strongly_verified). Two
different photos given the same edit correlate like copies when that edit is the strongest structure in them:
the same white frame (0.8 and more, before frames were looked inside) or a turn by the same angle with white
corners (0.97, two dark star fields). Grouping the quality benchmark's photos with 832 planted copies with this
check among the strong evidence took the pairs' recall from 0.864 to 0.875 but added such a wrong pair.
"""

from __future__ import annotations

import functools
import math
import os
import struct
from pathlib import Path

import numpy as np
from PIL import Image

GRID = 64  # cells a side
BAND = (0.5, 3.0)  # the difference of Gaussians' sigmas, in cells
MIN_CORRELATION = 0.75  # a same-frame copy from here (see the module's docstring)
MAX_SHAPE_CHANGE = 0.05  # |log(aspect ratio of one / the other)|: about 5 %
# Band images with less contrast than this (grey levels, root mean square) are left unjudged: a flat picture's
# band holds nothing but noise and block edges.
MIN_CONTRAST = 1.0
CACHE = 4096  # candidates' band images kept (16 KB each)
SIDE = 256  # a candidate is read at this longest side, as verification reads it (rerank.VERIFY_SIDE)


@functools.lru_cache(maxsize=None)
def _blur_matrix(sigma: float) -> np.ndarray:
    """The GRID x GRID matrix M with M @ x equal to scipy.ndimage.gaussian_filter1d(x, sigma) for every column
    x (its default boundary, mirrored about the edge): a grid is blurred as M @ grid @ M.T, two small matrix
    products instead of two filter passes (tests/test_aligned.py checks it against gaussian_filter)."""
    from scipy import ndimage

    return ndimage.gaussian_filter1d(np.eye(GRID, dtype=np.float64), sigma, axis=0).astype(np.float32)


def band_image(image: Image.Image) -> np.ndarray | None:
    """The image's GRID x GRID band image, zero mean and unit root mean square (float32), or None when the
    picture is too flat to judge (MIN_CONTRAST)."""
    grey = np.asarray(image.convert("L").resize((GRID, GRID), Image.Resampling.BOX), np.float32)
    narrow, wide = _blur_matrix(BAND[0]), _blur_matrix(BAND[1])
    band = narrow @ grey @ narrow.T - wide @ grey @ wide.T
    band -= band.mean()
    rms = float(np.sqrt(np.mean(band * band)))
    if rms < MIN_CONTRAST:
        return None
    return (band / rms).astype(np.float32)


def same_shape(a: tuple[int, int], b: tuple[int, int]) -> bool:
    """Whether two (width, height) frames have the same aspect ratio within MAX_SHAPE_CHANGE."""
    return abs(math.log((a[0] / a[1]) / (b[0] / b[1]))) <= MAX_SHAPE_CHANGE


class View:
    """One picture's band image (None when flat) and size."""

    __slots__ = ("band", "size")

    def __init__(self, band: np.ndarray | None, size: tuple[int, int]):
        self.band, self.size = band, tuple(size)


class Frame:
    """What the check compares of an image: its band image as a whole and, when it has a uniform frame
    (indexer/matching/frames.py), the band image of the picture inside it (`inside`, else None)."""

    __slots__ = ("whole", "inside")

    def __init__(self, image: Image.Image | None = None):
        if image is None:  # filled in by `decode`
            return
        from .frames import inside_frame

        self.whole = View(band_image(image), image.size)
        picture = inside_frame(image)
        self.inside = None if picture is None else View(band_image(picture), picture.size)


def _compare(a: View, b: View) -> float | None:
    if a.band is None or b.band is None or not same_shape(a.size, b.size):
        return None
    return float(np.mean(a.band * b.band))


def correlation(a: Frame, b: Frame) -> float | None:
    """The two frames' band correlation, or None when they cannot be compared (another shape, a flat picture).

    A uniform frame's sharp inner edge would carry the band: two different dark photos given the same white
    border correlated at 0.8 and more (the quality benchmark's planted copies; tests/test_aligned.py). So two
    framed images are compared inside their frames only; one framed image is compared by the picture inside it
    with the other as a whole (a copy that gained a border), or, when those shapes differ, as a whole (a dark
    photo whose black edge looked like a frame)."""
    if a.inside is not None and b.inside is not None:
        return _compare(a.inside, b.inside)
    if a.inside is not None or b.inside is not None:
        framed, bare = (a, b) if a.inside is not None else (b, a)
        inner = _compare(framed.inside, bare.whole)
        if inner is not None:
            return inner
    return _compare(a.whole, b.whole)


# -- kept beside the small copies ---------------------------------------------------------------------------
# A candidate's Frame is made at index time and kept beside its small copy (`thumbs/ab/<hash>.af`, 8 KB, 16 KB
# when framed), as its keypoints are (indexer/matching/keypoints.py): a query reads it instead of decoding. The
# first line names the settings that made it; a file made by others, torn or missing counts as missing, the
# Frame is made from the small copy as before, and the next index run keeps it again.
SUFFIX = ".af"
_MAGIC = b"NSAF3 "  # 3: with the picture inside a uniform frame
_HEAD = struct.Struct("<QB")  # the small copy's size in bytes, whether the picture inside a frame follows
_VIEW = struct.Struct("<HHB")  # a view's width and height, whether its band follows


def header() -> bytes:
    """A usable kept Frame's first line: the format and the settings its band depends on."""
    return _MAGIC + f"{GRID},{BAND[0]},{BAND[1]},{MIN_CONTRAST}".encode() + b"\n"


def sidecar(small_copy) -> Path:
    return Path(small_copy).with_suffix(SUFFIX)


def encode(frame: Frame, small_copy_size: int) -> bytes:
    """The bytes that keep `frame` of a small copy of `small_copy_size` bytes (its band images as float16)."""
    chunks = [header(), _HEAD.pack(small_copy_size, frame.inside is not None)]
    for view in (frame.whole, frame.inside):
        if view is not None:
            chunks.append(_VIEW.pack(*view.size, view.band is not None))
            if view.band is not None:
                chunks.append(np.ascontiguousarray(view.band, np.float16).tobytes())
    return b"".join(chunks)


def decode(data: bytes, small_copy_size: int | None = None) -> Frame | None:
    """The Frame kept in `data`, or None when it is not usable (other settings, another small copy, torn)."""
    if not data.startswith(header()):
        return None
    at = len(header())
    try:
        size, framed = _HEAD.unpack_from(data, at)
        if small_copy_size is not None and size != small_copy_size:
            return None
        at += _HEAD.size
        views = []
        for _ in range(2 if framed else 1):
            width, height, has_band = _VIEW.unpack_from(data, at)
            at += _VIEW.size
            band = None
            if has_band:
                band = np.frombuffer(data, np.float16, GRID * GRID, at).astype(np.float32).reshape(GRID, GRID)
                at += 2 * GRID * GRID
            views.append(View(band, (width, height)))
    except (struct.error, ValueError):
        return None
    if at != len(data):
        return None
    frame = Frame()
    frame.whole, frame.inside = views[0], (views[1] if framed else None)
    return frame


def load(small_copy) -> Frame | None:
    """The Frame kept beside a small copy, or None."""
    from .keypoints import read_beside

    read = read_beside(small_copy, sidecar(small_copy))
    return None if read is None else decode(read[1], read[0])


def current(small_copy) -> bool:
    """Whether a small copy's Frame is kept, by these settings (its first line only)."""
    from .keypoints import begins_with

    return begins_with(sidecar(small_copy), header())


def candidate_frames(paths) -> dict[int, Frame]:
    """Each id's Frame from its file (a small copy: its kept Frame when there is one), kept in memory while the
    file keeps its size and modification time; ids whose file cannot be read are left out."""
    from ..core.errors import ImageReadError

    out = {}
    for ident, path in paths.items():
        try:
            st = os.stat(path)
            out[ident] = _frame_at(str(path), st.st_mtime_ns, st.st_size)
        except (ImageReadError, OSError):
            continue
    return out


@functools.lru_cache(maxsize=CACHE)
def _frame_at(path: str, _mtime_ns: int, _size: int) -> Frame:
    from ..reading.images import read_image

    kept = load(path)
    if kept is not None:
        return kept
    return Frame(read_image(path, max_side=SIDE)[0])
