"""Embedding throughput against the decode-only ceiling on the same files, as ratios in one run.

For 12-megapixel JPEGs and small PNGs (synthetic, photo-like, made in a temporary
folder) this measures, in the same process and run:

* decode ceiling: `read_image(path, max_side=256)` alone, i.e. the cost nearsight's
  scan pays once per content (draft-mode JPEG decoding);
* the main job's path: scan (hash, decode once, cache the small copy) then embed the
  cached copies with the default encoder (random weights: speed does not depend on them);
* embedding straight from the original files (`embed_files`), for comparison.

Reported as images/s and as the ratio to the decode ceiling. Nothing is asserted.

    .venv/bin/python benchmarks/bench_embed.py --large 16 --small 200 --out benchmarks/results/embed.md
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import numpy as np  # noqa: E402
import torch  # noqa: E402

from benchmarks.bench_read import make_files  # noqa: E402
from indexer.embed import embed_files  # noqa: E402
from indexer.encoder import DEFAULT_ARCH, create_encoder  # noqa: E402
from indexer.images import read_image  # noqa: E402
from indexer.model import save_model  # noqa: E402
from indexer.scan import scan_source  # noqa: E402
from indexer.settings import load_settings  # noqa: E402
from indexer.store import Store  # noqa: E402
from indexer.vectors import embed_missing  # noqa: E402

SIZE = 128


def _rate(n: int, seconds: float) -> float:
    return n / seconds if seconds > 0 else float("inf")


def measure(files: list[Path], work: Path, model_dir: Path, label: str) -> dict:
    started = time.perf_counter()
    for path in files:
        read_image(path, max_side=2 * SIZE)
    decode = time.perf_counter() - started

    folder = work / f"{label}-files"
    folder.mkdir()
    for path in files:
        os.link(path, folder / path.name)
    with Store.open(work / f"{label}-store", create=True, settings=load_settings(environ={})) as store:
        started = time.perf_counter()
        scan_source(store, folder, progress=False)
        scan = time.perf_counter() - started
        store.write_pointer("models/CURRENT", model_dir.name)
        started = time.perf_counter()
        embed_missing(store, model_dir, progress=False)
        embed = time.perf_counter() - started

    started = time.perf_counter()
    embed_files(files, model_dir, workers=os.cpu_count() or 1)
    direct = time.perf_counter() - started
    n = len(files)
    return {"label": label, "n": n, "decode": _rate(n, decode), "scan": _rate(n, scan),
            "embed": _rate(n, embed), "pipeline": _rate(n, scan + embed), "direct": _rate(n, direct)}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--large", type=int, default=16, help="12-megapixel JPEGs")
    parser.add_argument("--small", type=int, default=200, help="640x480 PNGs")
    parser.add_argument("--out", type=Path, help="append the Markdown report to this file")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        large, small = make_files(work, args.large, args.small, seed=0)
        model_dir = work / "models" / "bench-model"
        save_model(model_dir, create_encoder(DEFAULT_ARCH), {"arch": DEFAULT_ARCH, "image_size": SIZE})
        rows = [measure(large, work, model_dir, "12MP JPEG"), measure(small, work, model_dir, "640x480 PNG")]
    lines = [
        "## Embedding throughput against the decode ceiling",
        "",
        f"Machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cores; "
        f"torch {torch.__version__}, numpy {np.__version__}; encoder {DEFAULT_ARCH} at {SIZE} px.",
        "",
        "| files | n | decode ceiling (img/s) | scan (img/s) | embed cached copies (img/s) | scan + embed (img/s) | ratio to ceiling | embed from originals (img/s) |",
        "|---|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for r in rows:
        lines.append(f"| {r['label']} | {r['n']} | {r['decode']:.1f} | {r['scan']:.1f} | {r['embed']:.1f} | "
                     f"{r['pipeline']:.1f} | {r['pipeline'] / r['decode']:.2f} | {r['direct']:.1f} |")
    report = "\n".join(lines) + "\n"
    print(report)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        with open(args.out, "a", encoding="utf-8") as fh:
            fh.write(report + "\n")


if __name__ == "__main__":
    main()
