"""Generate the invented demo archive of the Quillon Ford Historical Society, with its truth file.

The archive holds procedural "old photos" (originals), planted duplicates of
them (exact copies, lossless re-saves, near-duplicate edits, burst frames),
look-alikes (hard negatives: the same kind of scene with different content)
and a few damaged files. Everything derives from one seed:
`numpy.random.default_rng([seed, index, stream])`, so files are byte-identical
for the same seed on the same Pillow and numpy versions, whatever the number of
worker processes.

    python -m nearsight.demo_data.generate OUT [--seed N] [--originals N]
"""

from __future__ import annotations

import argparse
import ctypes
import io
import json
import logging
import os
import shutil
import sys
import time
from collections import Counter
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import PIL
from PIL import Image, ImageOps
from PIL.PngImagePlugin import PngInfo

from ._layout import ROOT, Photo, plan_archive
from ._render import render
from ._scenes import burst_of, make_recipe, plan_scene
from ._variants import apply, draw_params

log = logging.getLogger(__name__)

SCENARIO = "Quillon Ford Historical Society photo archive (invented demo data)"
TRUTH_FILE = "truth.json"
MAX_ORIGINALS = 5000

# Random streams of one original: numpy.random.default_rng([seed, accession number, stream]).
RECIPE, CONTENT, FRAME, EDITS, BURST_FRAME, LOOKALIKE_CONTENT, LOOKALIKE_FRAME = range(1, 8)
# EXIF orientation value -> transpose that stores upright pixels so that ImageOps.exif_transpose restores them.
STORE_TRANSPOSE = {3: Image.Transpose.ROTATE_180, 6: Image.Transpose.ROTATE_90, 8: Image.Transpose.ROTATE_270}


def _save(img: Image.Image, path: Path, quality: int | None = None, exif: bytes | None = None) -> None:
    """Save by extension: JPEG at `quality`, PNG/TIFF/BMP lossless; parent folders created."""
    path.parent.mkdir(parents=True, exist_ok=True)
    ext = path.suffix.lower()
    if ext in (".jpg", ".jpeg"):
        img.save(path, "JPEG", quality=quality or 90, **({"exif": exif} if exif else {}))
    elif ext == ".png":
        img.save(path, "PNG", compress_level=1)  # grainy scans barely compress; level 1 is ~4x faster than 6
    elif ext == ".tif":
        img.save(path, "TIFF")
    elif ext == ".bmp":
        img.save(path, "BMP")
    else:
        raise ValueError(f"no writer for {path.name}")


def _lossless_copy(original: Path, target: Path) -> dict:
    """Re-save the decoded pixels of `original` losslessly; a PNG re-save gets a note chunk so its bytes differ."""
    with Image.open(original) as im:
        pixels = im.convert("RGB")
    target.parent.mkdir(parents=True, exist_ok=True)
    if target.suffix == ".png":
        info = PngInfo()
        info.add_text("Comment", "Quillon Ford archive, re-saved copy")
        pixels.save(target, "PNG", compress_level=3, pnginfo=info)
    else:
        _save(pixels, target)
    return {"format": target.suffix.lstrip(".").lower()}


def _rng(seed: int, photo: Photo, stream: int) -> np.random.Generator:
    return np.random.default_rng([seed, photo.index + 1, stream])


def _write_original(out: Path, seed: int, photo: Photo) -> tuple[dict, dict]:
    """Render and save one original (turned and tagged if it has an EXIF orientation); returns (plan, truth entry)."""
    recipe = make_recipe(_rng(seed, photo, RECIPE), photo.composition, photo.tone, photo.season)
    plan = plan_scene(_rng(seed, photo, CONTENT), recipe)
    upright = Image.fromarray(render(plan, _rng(seed, photo, FRAME)))
    if photo.orientation:
        exif = Image.Exif()
        exif[0x0112] = photo.orientation  # Orientation tag, TIFF 6.0 / Exif 2.3
        _save(upright.transpose(STORE_TRANSPOSE[photo.orientation]), out / photo.path, photo.quality, exif.tobytes())
    else:
        _save(upright, out / photo.path, photo.quality)
    params = {key: recipe[key] for key in ("composition", "tone", "season", "time", "size")}
    params.update(format=photo.format, quality=photo.quality, exif_orientation=photo.orientation, title=photo.title)
    return plan, {"path": photo.path, "original": None, "kind": "original", "params": params}


def _write_copy(out: Path, seed: int, photo: Photo, plan: dict, kind: str, target: Path, edits, decoded) -> dict:
    """Write one planted duplicate of `photo`; returns its params for the truth file."""
    target.parent.mkdir(parents=True, exist_ok=True)
    if kind == "exact-copy":
        shutil.copyfile(out / photo.path, target)
        return {}
    if kind == "same-pixels":
        return _lossless_copy(out / photo.path, target)
    if kind == "burst":
        moved, camera, params = burst_of(plan, edits)
        _save(Image.fromarray(render(moved, _rng(seed, photo, BURST_FRAME), camera)), target, photo.quality)
        return {**params, "quality": photo.quality}
    params = draw_params(kind, edits, decoded.size, photo.title)
    _save(apply(kind, decoded, params), target, params.get("quality"))
    return params


def make_photo(out_dir: str, seed: int, photo: Photo) -> list[dict]:
    """Render one original and write it with all its planted files; returns their truth entries."""
    out = Path(out_dir)
    plan, entry = _write_original(out, seed, photo)
    entries = [entry]
    decoded = None
    if any(copy["kind"] not in ("exact-copy", "same-pixels", "burst") for copy in photo.copies):
        with Image.open(out / photo.path) as im:
            decoded = ImageOps.exif_transpose(im).convert("RGB")  # edits start from what a viewer shows
    edits = _rng(seed, photo, EDITS)
    for copy in photo.copies:
        params = _write_copy(out, seed, photo, plan, copy["kind"], out / copy["path"], edits, decoded)
        entries.append({"path": copy["path"], "original": photo.path, "kind": copy["kind"], "params": params})
    if photo.lookalike:
        other = plan_scene(_rng(seed, photo, LOOKALIKE_CONTENT), plan["recipe"])
        _save(Image.fromarray(render(other, _rng(seed, photo, LOOKALIKE_FRAME))), out / photo.lookalike, photo.quality)
        entries.append({"path": photo.lookalike, "original": photo.path, "kind": "look-alike",
                        "params": {"recipe_shared": True, "format": photo.format, "quality": photo.quality}})
    return entries


def make_damaged(out: Path, seed: int) -> list[dict]:
    """Three files that look like photos by name but cannot be decoded."""
    folder = out / ROOT / "damaged"
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng([seed, 0, 9])
    recipe = make_recipe(rng, "village", "sepia", "summer")
    buf = io.BytesIO()
    Image.fromarray(render(plan_scene(rng, recipe), rng)).save(buf, "JPEG", quality=90)
    full = buf.getvalue()
    kept = len(full) * 2 // 5
    files = {"qf_scan_interrupted.jpg": (full[:kept], {"defect": "truncated JPEG", "bytes_kept": kept,
                                                       "bytes_full": len(full)}),
             "empty_upload.jpg": (b"", {"defect": "zero bytes"}),
             "volunteer_note.jpg": ("Scanning log, batch 14: tray jammed on the third print, "
                                    "rescan next Thursday. This file is a note, not a picture.\n".encode(),
                                    {"defect": "text file with a .jpg name"})}
    entries = []
    for name, (data, params) in sorted(files.items()):
        (folder / name).write_bytes(data)
        entries.append({"path": f"{ROOT}/damaged/{name}", "original": None, "kind": "damaged", "params": params})
    return entries


def _check_arguments(out: Path, seed, originals, workers) -> None:
    for label, value in (("seed", seed), ("originals", originals)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
            raise ValueError(f"{label} must be an integer, got {value!r}")
    if seed < 0:
        raise ValueError(f"seed must be 0 or more, got {seed}")
    if not 1 <= originals <= MAX_ORIGINALS:
        raise ValueError(f"originals must be between 1 and {MAX_ORIGINALS}, got {originals}")
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise ValueError(f"workers must be a positive integer, got {workers!r}")
    if out.exists() and not out.is_dir():
        raise ValueError(f"{out} exists and is not a folder; choose a new or empty folder")
    if out.is_dir() and any(out.iterdir()):
        raise ValueError(f"{out} is not empty; choose a new or empty folder (nothing was written)")


def _keep_freed_memory() -> None:
    """In a worker process: let glibc keep freed multi-megabyte image buffers for reuse instead of unmapping
    them after each render; this removes most page-fault (system) time. Output does not change."""
    try:
        libc = ctypes.CDLL("libc.so.6")
    except OSError:
        return
    libc.mallopt(-3, 256 << 20)  # M_MMAP_THRESHOLD
    libc.mallopt(-1, 512 << 20)  # M_TRIM_THRESHOLD


def generate(out_dir: str | Path, *, seed: int = 7, originals: int = 160, workers: int | None = None) -> dict:
    """Write the archive into out_dir (created; must be empty or missing) and return the truth dict,
    also written as out_dir/truth.json. `workers` processes render in parallel (default: one per core, at most 8);
    the output does not depend on it."""
    out = Path(out_dir)
    _check_arguments(out, seed, originals, workers)
    started = time.perf_counter()
    photos = plan_archive(int(seed), int(originals))
    out.mkdir(parents=True, exist_ok=True)
    workers = workers or min(os.cpu_count() or 1, 8)
    if workers > 1 and len(photos) > 8:
        with ProcessPoolExecutor(max_workers=workers, initializer=_keep_freed_memory) as pool:
            n = len(photos)
            batches = list(pool.map(make_photo, [str(out)] * n, [int(seed)] * n, photos, chunksize=4))
    else:
        batches = [make_photo(str(out), int(seed), p) for p in photos]
    images = sorted([e for batch in batches for e in batch] + make_damaged(out, int(seed)), key=lambda e: e["path"])
    truth = _truth(images, int(seed))
    (out / TRUTH_FILE).write_text(json.dumps(truth, indent=1, sort_keys=True) + "\n", encoding="utf-8")
    log.info("wrote %d files to %s in %.1fs", len(images), out / ROOT, time.perf_counter() - started)
    return truth


def _truth(images: list[dict], seed: int) -> dict:
    groups: dict[str, list[str]] = {}
    for e in images:
        if e["kind"] not in ("original", "look-alike", "damaged"):
            groups.setdefault(e["original"], [e["original"]]).append(e["path"])
    return {"scenario": SCENARIO, "seed": seed, "root": ROOT,
            "versions": {"pillow": PIL.__version__, "numpy": np.__version__},
            "images": images,
            "duplicate_groups": sorted(sorted(g) for g in groups.values()),
            "lookalike_pairs": sorted([e["original"], e["path"]] for e in images if e["kind"] == "look-alike"),
            "damaged": sorted(e["path"] for e in images if e["kind"] == "damaged")}


def summary(truth: dict) -> str:
    counts = Counter(e["kind"] for e in truth["images"])
    kinds = ", ".join(f"{counts[k]} {k}" for k in sorted(counts))
    return (f"{len(truth['images'])} files ({kinds}); {len(truth['duplicate_groups'])} duplicate groups, "
            f"{len(truth['lookalike_pairs'])} look-alike pairs")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m nearsight.demo_data.generate",
                                     description="Generate the invented Quillon Ford demo archive and its truth.json.")
    parser.add_argument("out", help="folder to create (must be missing or empty)")
    parser.add_argument("--seed", type=int, default=7, help="random seed (default: 7)")
    parser.add_argument("--originals", type=int, default=160, help="number of original photos (default: 160)")
    args = parser.parse_args(argv)
    started = time.perf_counter()
    try:
        truth = generate(args.out, seed=args.seed, originals=args.originals)
    except (ValueError, OSError) as exc:  # bad arguments, or a folder that cannot be written
        print(f"error: {exc}", file=sys.stderr)
        return 2
    print(f"wrote {summary(truth)} to {Path(args.out) / ROOT} in {time.perf_counter() - started:.1f}s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
