"""Frames added around a picture: found, so that a query can also be described without them.

A copy that gained a border (a passe-partout, letterbox bars, a scanner's margin) is the
same picture in a larger canvas, and the descriptor sees the frame as part of the
picture. `frame_box` finds the uniform bands along each edge; the query path describes
the picture inside them as a second view of the query (indexer/matching/query.py).

A band counts as frame when its rows (or columns) have the colour of its outermost line,
allowing for a caption written across it. Photographs
rarely have flat edges, but dark sky and studio backdrops do, so the picture inside is
only ever an *extra* view of a query, whose candidates count only once geometric
verification confirms them (indexer/matching/query.py).
"""

from __future__ import annotations

import numpy as np
from PIL import Image

COLOUR_TOLERANCE = 16.0  # how far (0-255, largest channel difference) a pixel may be from the band's colour
FLAT_SHARE = 0.9  # a line is flat when at least this share of its pixels has the band's colour
STEP_SHARE = 0.5  # ... and the line inside it has the band's colour in less than this share of its pixels
BAND_SHARE = 0.5  # a band may hold lines that are not flat (a caption on it) while this share of it is flat
MIN_FRAME = 0.02  # a band narrower than this share of its side is not a frame (JPEG edge ringing, a hairline)
MIN_INSIDE = 0.4  # the picture inside must keep at least this share of each side
ANALYSIS_SIDE = 192  # frames are found on a copy of at most this longest side


def _band(lines: np.ndarray) -> tuple[int, bool, np.ndarray]:
    """(depth, whether it ends in a step, colour) of the band of one colour that `lines` (n, length, 3),
    outermost first, begin with.

    The band's colour is the outermost line's median; a line is flat when FLAT_SHARE of its pixels
    have it. The band ends at the deepest flat line up to which at least BAND_SHARE of the lines are
    flat, so a caption written across a band (flat, lettered, flat again) stays inside it. It ends in
    a step when the next line is mostly other colours, as where a frame meets a picture; dark sky or
    a studio backdrop fades into its subject instead."""
    colour = np.median(lines[0], axis=0).astype(np.int16)
    if not _flat(lines[:1], colour)[0]:
        return 0, False, colour  # most photographs: their outermost line is not one colour
    share = _share(lines, colour)
    flat = share >= FLAT_SHARE
    depth = np.arange(1, len(flat) + 1)
    ends = np.flatnonzero(flat & (np.cumsum(flat) >= BAND_SHARE * depth))
    band = int(ends[-1]) + 1
    return band, band == len(lines) or share[band] < STEP_SHARE, colour


def _share(lines: np.ndarray, colour: np.ndarray) -> np.ndarray:
    """Per line, the share of its pixels within COLOUR_TOLERANCE of `colour`."""
    return (np.abs(lines - colour).max(axis=2) <= COLOUR_TOLERANCE).mean(axis=1)


def _flat(lines: np.ndarray, colour: np.ndarray) -> np.ndarray:
    return _share(lines, colour) >= FLAT_SHARE


def frame_box(image: Image.Image) -> tuple[int, int, int, int] | None:
    """The box (left, top, right, bottom, in `image`'s pixels) inside the frame, or None when the
    image has no frame: no edge band of at least MIN_FRAME of its side, or too little left inside."""
    w, h = image.size
    scale = min(1.0, ANALYSIS_SIDE / max(w, h))
    small = image.convert("RGB")
    if scale < 1.0:
        small = small.resize((max(1, round(w * scale)), max(1, round(h * scale))), Image.Resampling.BOX)
    a = np.asarray(small, dtype=np.int16)
    sh, sw = a.shape[:2]
    if sh < 8 or sw < 8:
        return None
    # A band deeper than this would leave less than MIN_INSIDE of the side, however deep the other one.
    dh, dw = int(sh * (1 - MIN_INSIDE)) + 1, int(sw * (1 - MIN_INSIDE)) + 1
    found = [_band(a[:dh]), _band(a[::-1][:dh]), _band(a.transpose(1, 0, 2)[:dw]),
             _band(a.transpose(1, 0, 2)[::-1][:dw])]
    sides = (sh, sh, sw, sw)
    bands = []
    for (depth, stepped, colour), side in zip(found, sides):
        if depth and not stepped:
            # A side whose picture edge has the band's colour (a dark photo in a black frame) takes the
            # depth of a stepped side of the same colour, where frame and picture can be told apart.
            same = [d for d, st, c in found if st and d and np.abs(c - colour).max() <= COLOUR_TOLERANCE]
            depth = min(depth, max(same)) if same else 0
        # One line more than the band: downscaling blends the frame's edge into the picture's first line.
        bands.append(depth + 1 if depth >= MIN_FRAME * side else 0)
    top, bottom, left, right = bands
    if not any(bands) or sh - top - bottom < MIN_INSIDE * sh or sw - left - right < MIN_INSIDE * sw:
        return None
    return (round(left / scale), round(top / scale), w - round(right / scale), h - round(bottom / scale))


def inside_frame(image: Image.Image) -> Image.Image | None:
    """The picture inside `image`'s frame, or None when it has none."""
    box = frame_box(image)
    return None if box is None else image.crop(box)
