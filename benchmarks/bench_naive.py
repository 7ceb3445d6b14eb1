"""A full `nearsight index` against a naive pipeline that decodes every file at full size, as a ratio.

Same files, same encoder (random weights: speed does not depend on them; training is left
out of both sides, its budget is a fixed number of minutes either way), same run:

* nearsight: `run_index` on a fresh store (scan: hash, draft-mode decode, small copies,
  worker processes; embed the small copies; FAISS index; pairs; groups; publish), once
  without calibration and once with it (calibration edits and embeds held-out originals:
  a cost a naive tool does not pay, because it states no precision);
* naive: one process, for each file Pillow decodes every pixel (EXIF orientation applied),
  the same preprocessing and encoder embed it in batches of 64, a flat inner-product FAISS
  index takes the vectors and a range search lists every pair at the same threshold.

The files are a camera archive in miniature: 12-megapixel JPEGs, 1024x768 JPEGs and
640x480 PNGs (synthetic, photo-like). Nothing is asserted.

    .venv/bin/python benchmarks/bench_naive.py --out benchmarks/results/naive.md
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.bench_read import make_files, make_small_jpegs  # noqa: E402
from benchmarks.common import machine  # noqa: E402

# PyTorch, FAISS and the indexer are imported inside the functions: the scan's worker processes are
# spawned and re-import this script, and heavy imports here would cost each of them seconds that
# `nearsight index` (whose entry module imports neither) does not pay.

SIZE = 128
THRESHOLD = 0.5  # the default near_threshold (indexer/core/settings.py); pairs at or above it


def naive(paths: list[Path], model_dir: Path) -> dict:
    """Decode at full size, embed, flat index, range search: seconds per step."""
    import faiss

    from nearsight.indexer.learning.embed import embed_images
    from nearsight.indexer.learning.model import load_model

    encoder, card = load_model(model_dir)
    stages = {"decode (full size) + shrink": 0.0, "embed": 0.0}
    blocks = []
    batch: list[Image.Image] = []

    def flush():
        started = time.perf_counter()
        blocks.append(embed_images(encoder, batch, int(card["image_size"])))
        stages["embed"] += time.perf_counter() - started
        batch.clear()

    for path in paths:
        started = time.perf_counter()
        with Image.open(path) as im:
            im = ImageOps.exif_transpose(im).convert("RGB")  # every pixel decoded
        scale = SIZE / min(im.size)  # shrink at once, so a batch holds small images only
        batch.append(im.resize((max(SIZE, round(im.width * scale)), max(SIZE, round(im.height * scale))),
                               Image.Resampling.BILINEAR))
        stages["decode (full size) + shrink"] += time.perf_counter() - started
        if len(batch) == 64:
            flush()
    if batch:
        flush()
    started = time.perf_counter()
    xb = np.concatenate(blocks)
    index = faiss.IndexFlatIP(xb.shape[1])
    index.add(xb)
    lims, _d, _i = index.range_search(xb, THRESHOLD)
    stages["index + pairs"] = time.perf_counter() - started
    stages["total"] = sum(stages.values())
    stages["pairs"] = int((lims[-1] - len(paths)) // 2)
    return stages


def nearsight(folder: Path, model_dir: Path, store_dir: Path, calibrate: bool) -> dict:
    from nearsight.indexer.building.pipeline import run_index
    from nearsight.indexer.core.settings import load_settings
    from nearsight.indexer.storage.store import Store

    with Store.open(store_dir, create=True, settings=load_settings(environ={})) as store:
        target = store.models_dir / model_dir.name
        target.parent.mkdir(parents=True, exist_ok=True)
        os.symlink(model_dir, target)
        store.write_pointer("models/CURRENT", model_dir.name)
        started = time.perf_counter()
        summary = run_index(store, [folder], progress=False, retrain="never", calibrate=calibrate)
        total = time.perf_counter() - started
    return {"total": total, "stages": summary["stages"], "indexed": summary.get("indexed")}


def report(files: dict, quick: dict, full: dict, plain: dict, command: str, arch: str) -> str:
    lines = [
        "## A full `nearsight index` against a naive full-decode pipeline",
        "",
        f"Machine: {machine()}",
        f"Command: `{command}`",
        "",
        "Files: " + ", ".join(f"{n} {label}" for label, n in files.items()) +
        f"; encoder {arch} at {SIZE} px (random weights), training left out of both sides.",
        "",
        "| run | wall time (s) | naive / this |",
        "|---|---:|---:|",
        f"| naive: full decode, embed, flat index, range search (1 process) | {plain['total']:.1f} | 1.00 |",
        f"| nearsight index, no calibration | {quick['total']:.1f} | {plain['total'] / quick['total']:.2f} |",
        f"| nearsight index, with calibration | {full['total']:.1f} | {plain['total'] / full['total']:.2f} |",
        "",
        "Stages (s):",
        "",
        "| run | stages |",
        "|---|---|",
        "| naive | " + ", ".join(f"{k} {v:.1f}" for k, v in plain.items() if k not in ("total", "pairs")) +
        f" ({plain['pairs']} pairs) |",
        "| nearsight, no calibration | " + ", ".join(f"{k} {v:.1f}" for k, v in quick["stages"].items()) + " |",
        "| nearsight, with calibration | " + ", ".join(f"{k} {v:.1f}" for k, v in full["stages"].items()) + " |",
        "",
        "The naive side does less: no content hashes (so no change detection next time), no cached small "
        "copies, no groups, no calibration, nothing published atomically.",
        "",
    ]
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--large", type=int, default=40, help="12-megapixel JPEGs")
    parser.add_argument("--jpegs", type=int, default=200, help="1024x768 JPEGs")
    parser.add_argument("--small", type=int, default=100, help="640x480 PNGs")
    parser.add_argument("--out", type=Path, help="write the Markdown report to this file")
    args = parser.parse_args()
    from nearsight.indexer.learning.encoder import DEFAULT_ARCH, create_encoder
    from nearsight.indexer.learning.model import save_model

    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        folder = work / "archive"
        folder.mkdir()
        large, small = make_files(folder, args.large, args.small, seed=0)
        jpegs = make_small_jpegs(folder, args.jpegs, seed=1)
        version = save_model(work / "model", create_encoder(DEFAULT_ARCH), {"arch": DEFAULT_ARCH, "image_size": SIZE})
        model_dir = work / version
        os.rename(work / "model", model_dir)
        paths = sorted(folder.iterdir())
        for path in paths:  # the page cache warm for both sides
            path.read_bytes()
        plain = naive(paths, model_dir)
        quick = nearsight(folder, model_dir, work / "store-a", calibrate=False)
        full = nearsight(folder, model_dir, work / "store-b", calibrate=True)
    files = {"12 MP JPEGs": len(large), "1024x768 JPEGs": len(jpegs), "640x480 PNGs": len(small)}
    command = " ".join([".venv/bin/python benchmarks/bench_naive.py", *sys.argv[1:]])
    text = report(files, quick, full, plain, command, DEFAULT_ARCH)
    print(text)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(text, encoding="utf-8")


if __name__ == "__main__":
    main()
