"""How much JPEG draft decoding saves when reading small copies.

Makes synthetic photo-like images in a temporary folder (smooth colour fields
plus sensor-like noise: large JPEGs and small PNGs), then reads every file two
ways in the same run:

* ``read_image(path, max_side)``: nearsight's reader, which decodes large JPEGs
  at 1/2, 1/4 or 1/8 scale in the DCT domain before the final resize;
* full decode + resize: Pillow decodes every pixel, then the same filter shrinks it.

Prints a Markdown table (images per second each way and the speedup); ``--out``
appends it to a file. Numbers depend on the machine; nothing is asserted.

    .venv/bin/python benchmarks/bench_read.py --count 20 --out benchmarks/results/read.md
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import PIL
from PIL import Image

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from nearsight.indexer.reading.images import REDUCING_GAP, RESAMPLE, fit_size, read_image, to_rgb  # noqa: E402


def photo_like(rng: np.random.Generator, width: int, height: int) -> Image.Image:
    """Smooth colour gradients (an upscaled coarse random field) plus fine noise."""
    coarse = rng.integers(0, 256, (6, 8, 3), dtype=np.uint8)
    field = np.asarray(Image.fromarray(coarse).resize((width, height), Image.Resampling.BICUBIC))
    noise = rng.normal(0, 6, (height, width, 3)).astype(np.float32)
    return Image.fromarray(np.clip(field + noise, 0, 255).astype(np.uint8))


def make_files(folder: Path, count: int, small: int, seed: int) -> tuple[list[Path], list[Path]]:
    rng = np.random.default_rng(seed)
    large = []
    for index in range(count):
        path = folder / f"camera_{index:03d}.jpg"
        photo_like(rng, 4000, 3000).save(path, "JPEG", quality=90)  # 12 megapixels
        large.append(path)
    small_files = []
    for index in range(small):
        path = folder / f"screenshot_{index:03d}.png"
        photo_like(rng, 640, 480).save(path, "PNG")
        small_files.append(path)
    return large, small_files


def make_small_jpegs(folder: Path, count: int, seed: int, size: tuple[int, int] = (1024, 768)) -> list[Path]:
    """Web-sized camera exports: `count` photo-like 1024x768 JPEGs at quality 85."""
    rng = np.random.default_rng(seed)
    paths = []
    for index in range(count):
        path = folder / f"export_{index:03d}.jpg"
        photo_like(rng, *size).save(path, "JPEG", quality=85)
        paths.append(path)
    return paths


def full_decode_then_resize(path: Path, side: int) -> Image.Image:
    """The reference route: every pixel decoded, then the same resize as read_image."""
    with Image.open(path) as im:
        im.load()
        rgb = to_rgb(im)
        return rgb.resize(fit_size(rgb.size, side), RESAMPLE, reducing_gap=REDUCING_GAP)


def rate(read, paths: list[Path], repeat: int) -> float:
    """Images per second, best of `repeat` passes (files already in the page cache)."""
    best = float("inf")
    for _ in range(repeat):
        start = time.perf_counter()
        for path in paths:
            read(path)
        best = min(best, time.perf_counter() - start)
    return len(paths) / best


def measure(paths: list[Path], side: int, repeat: int) -> tuple[float, float]:
    for path in paths[:2]:  # warm the page cache and Pillow's plugin registry
        read_image(path, side)
        full_decode_then_resize(path, side)
    fast = rate(lambda p: read_image(p, side), paths, repeat)
    full = rate(lambda p: full_decode_then_resize(p, side), paths, repeat)
    return fast, full


def table(rows: list[tuple[str, int, float, float]], side: int) -> str:
    lines = [
        f"### read_image(max_side={side}) vs full decode + resize",
        "",
        f"Python {platform.python_version()}, Pillow {PIL.__version__}, "
        f"{os.cpu_count()} CPUs, {platform.machine()}, single process.",
        "",
        "| files | count | read_image (images/s) | full decode + resize (images/s) | speedup |",
        "|---|---:|---:|---:|---:|",
    ]
    for label, count, fast, full in rows:
        lines.append(f"| {label} | {count} | {fast:.1f} | {full:.1f} | {fast / full:.2f}x |")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    add = parser.add_argument
    add("--count", type=int, default=20, help="12-megapixel JPEGs to make (default 20)")
    add("--small", type=int, default=200, help="640x480 PNGs to make (default 200)")
    add("--side", type=int, default=256, help="max_side to read at (default 256)")
    add("--repeat", type=int, default=3, help="timed passes; the best counts (default 3)")
    add("--seed", type=int, default=0, help="seed for the synthetic images")
    add("--out", type=Path, help="append the Markdown table to this file")
    args = parser.parse_args(argv)

    with tempfile.TemporaryDirectory(prefix="nearsight-bench-") as tmp:
        large, small = make_files(Path(tmp), args.count, args.small, args.seed)
        rows = []
        if large:
            fast, full = measure(large, args.side, args.repeat)
            rows.append(("4000x3000 JPEG, q90", len(large), fast, full))
        if small:
            fast, full = measure(small, args.side, args.repeat)
            rows.append(("640x480 PNG", len(small), fast, full))

    report = table(rows, args.side)
    print(report)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        with open(args.out, "a", encoding="utf-8") as out:
            out.write(report + "\n")


if __name__ == "__main__":
    main()
