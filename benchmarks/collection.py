"""The quality benchmark's collection: real photos that packages ship, cut into tiles, plus distractors.

* Photos: scikit-image's bundled photographs (`skimage.data`; synthetic graphics such as
  the colour wheel, checkerboard and phantoms left out, and `cat`, the same picture as
  `chelsea`, taken once), scikit-learn's two sample images (`load_sample_images`: china,
  flower) and the one portrait photograph in matplotlib's sample data (labelled `mpl_portrait` here).
* Photos larger than about two tiles a side are cut into a grid (at most 3 x 3) of
  non-overlapping tiles: tiles of one photo share colours and texture, so they are realistic
  hard negatives for one another. Near-uniform tiles (the black corners of `retina`) are
  dropped, since two of them would be the same picture in all but name.
* Distractors: originals and look-alikes of nearsight's invented demo archive
  (`demo_data`, seeded); no near-duplicates of anything in the benchmark.

A seeded quarter of the photo tiles is kept out of the index: their queries have no true
match, so false "duplicate" verdicts are measured.
"""

from __future__ import annotations

import logging
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image

log = logging.getLogger(__name__)

SKIMAGE_PHOTOS = ("astronaut", "brick", "camera", "cell", "chelsea", "clock", "coffee", "coins", "grass", "gravel",
                  "hubble_deep_field", "immunohistochemistry", "moon", "page", "retina", "rocket",
                  "stereo_motorcycle", "text")
TILE = 224  # a photo is cut into floor(side / TILE) tiles per axis, at most MAX_GRID
MAX_GRID = 3
MIN_TILE_STD = 12.0  # grey levels; below this a tile is near-uniform and dropped
HELD_OUT_SHARE = 0.25


@dataclass
class Reference:
    name: str  # file name in the collection, unique
    image: Image.Image
    source: str  # which package and photo it comes from
    indexed: bool


def _skimage(name: str) -> np.ndarray:
    import skimage.data

    data = getattr(skimage.data, name)()
    return data[0] if name == "stereo_motorcycle" else data  # (left, right, disparity): the left view


def open_photos() -> list[tuple[str, str, Image.Image]]:
    """(name, source, RGB image) for every photo the installed packages carry."""
    out = [(name, "scikit-image", Image.fromarray(_skimage(name)).convert("RGB")) for name in SKIMAGE_PHOTOS]
    from sklearn.datasets import load_sample_images

    bunch = load_sample_images()
    for filename, pixels in zip(bunch.filenames, bunch.images):
        out.append((Path(filename).stem, "scikit-learn", Image.fromarray(pixels).convert("RGB")))
    try:
        import matplotlib.cbook

        with Image.open(matplotlib.cbook.get_sample_data("grace_hopper.jpg", asfileobj=False)) as im:
            out.append(("mpl_portrait", "matplotlib", im.convert("RGB")))
    except (ImportError, OSError, ValueError) as exc:
        log.warning("matplotlib's sample photo is not available: %s", exc)
    return out


def tiles(image: Image.Image) -> list[tuple[str, Image.Image]]:
    """Non-overlapping grid tiles (suffix, image); the whole photo when it is too small to cut."""
    w, h = image.size
    nx, ny = (min(MAX_GRID, max(1, side // TILE)) for side in (w, h))
    if nx == ny == 1:
        return [("", image)]
    tw, th = w // nx, h // ny
    out = []
    for row in range(ny):
        for col in range(nx):
            tile = image.crop((col * tw, row * th, (col + 1) * tw, (row + 1) * th))
            if np.asarray(tile.convert("L"), dtype=np.float64).std() >= MIN_TILE_STD:
                out.append((f"-r{row}c{col}", tile))
    return out


def references(seed: int, limit: int | None = None) -> list[Reference]:
    """Every tile of every photo, a seeded HELD_OUT_SHARE of them marked not indexed."""
    refs = []
    for name, source, image in open_photos():
        for suffix, tile in tiles(image):
            refs.append(Reference(f"photo-{name}{suffix}.png", tile, f"{source}: {name}", True))
    if limit is not None:
        refs = [refs[i] for i in sorted(np.random.default_rng(seed + 1).permutation(len(refs))[:limit])]
    held = np.random.default_rng(seed).permutation(len(refs))[: round(HELD_OUT_SHARE * len(refs))]
    for i in held:
        refs[int(i)].indexed = False
    return refs


def distractors(demo_dir: Path, *, originals: int, seed: int) -> list[Path]:
    """Originals and look-alikes of the invented demo archive (generated into demo_dir if missing)."""
    from indexer.demo import ensure_archive

    truth = ensure_archive(demo_dir, seed=seed, originals=originals)
    return [demo_dir / img["path"] for img in truth["images"] if img["kind"] in ("original", "look-alike")]


def write_collection(folder: Path, refs: list[Reference], extra: list[Path]) -> list[str]:
    """The folder nearsight indexes: indexed references as PNG plus the distractors (hard links
    when possible). Returns the file names in the folder, references first."""
    folder.mkdir(parents=True, exist_ok=True)
    names = []
    for ref in refs:
        if ref.indexed:
            ref.image.save(folder / ref.name, "PNG")
            names.append(ref.name)
    for path in extra:
        name = "distractor-" + "-".join(path.parts[-2:])
        try:
            os.link(path, folder / name)
        except OSError:
            shutil.copyfile(path, folder / name)
        names.append(name)
    return names
