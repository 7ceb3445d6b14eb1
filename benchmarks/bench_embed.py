"""Embedding throughput against the decode-only ceiling on the same files, as ratios in one run.

For 12-megapixel JPEGs, small (1024x768) JPEGs and small (640x480) PNGs (synthetic,
photo-like, made in a temporary folder) this measures, in the same process and run:

* decode ceiling: `read_image(path, max_side=256)` alone, the decoding nearsight's scan
  pays once per content (draft-mode JPEG decoding), on every core (a process pool of
  `cpu_count` workers, as the scan uses) and, for reference, in one process. Decoding
  is the part no embedding pipeline can skip, so its all-core rate is the ceiling;
* the main job's path: scan (hash, decode once, cache the small copy) then embed the
  cached copies with the default encoder (random weights: speed does not depend on them);
* embedding straight from the original files (`embed_files`, all cores), for comparison.

Reported as images/s and as the ratio of the main job's rate to the all-core ceiling.
Nothing is asserted.

    .venv/bin/python benchmarks/bench_embed.py --out benchmarks/results/embed.md
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.bench_read import make_files, make_small_jpegs  # noqa: E402
from benchmarks.common import machine  # noqa: E402

# PyTorch and FAISS are imported inside the functions, not here: the scan's worker processes are
# spawned, and a spawned worker re-imports this script; with heavy imports at the top each worker
# would pay seconds that `nearsight index` (whose entry module imports neither) never pays.
SIZE = 128


def _rate(n: int, seconds: float) -> float:
    return n / seconds if seconds > 0 else float("inf")


def _timed(fn) -> float:
    started = time.perf_counter()
    fn()
    return time.perf_counter() - started


def measure(files: list[Path], work: Path, model_dir: Path, label: str) -> dict:
    from nearsight.indexer.learning.embed import decode_files, embed_files
    from nearsight.indexer.reading.images import read_image
    from nearsight.indexer.reading.scan import scan_source
    from nearsight.indexer.core.settings import load_settings
    from nearsight.indexer.storage.store import Store
    from nearsight.indexer.matching.vectors import embed_missing

    cores = os.cpu_count() or 1
    for path in files[:2]:  # page cache and Pillow's plugin registry warm for every route alike
        read_image(path, max_side=2 * SIZE)
    decode_1 = _timed(lambda: [read_image(p, max_side=2 * SIZE) for p in files])
    decode_all = _timed(lambda: list(decode_files(files, 2 * SIZE, workers=cores)))

    folder = work / f"{label}-files"
    folder.mkdir()
    for path in files:
        os.link(path, folder / path.name)
    with Store.open(work / f"{label}-store", create=True, settings=load_settings(environ={})) as store:
        scan = _timed(lambda: scan_source(store, folder, progress=False))
        store.write_pointer("models/CURRENT", model_dir.name)
        embed = _timed(lambda: embed_missing(store, model_dir, progress=False))
    direct = _timed(lambda: embed_files(files, model_dir, workers=cores))
    n = len(files)
    # the ceiling is the faster of the two decode-only routes (a pool costs its start-up on few files)
    return {"label": label, "n": n, "decode_1": _rate(n, decode_1), "decode_all": _rate(n, decode_all),
            "decode": max(_rate(n, decode_1), _rate(n, decode_all)),
            "scan": _rate(n, scan), "embed": _rate(n, embed), "pipeline": _rate(n, scan + embed),
            "direct": _rate(n, direct)}


def report(rows: list[dict], command: str, arch: str) -> str:
    lines = [
        "## Embedding throughput against the decode ceiling",
        "",
        f"Machine: {machine()}",
        f"Encoder {arch} at {SIZE} px. Command: `{command}`",
        "",
        "| files | n | decode, all cores (img/s) | decode, 1 process (img/s) | scan (img/s) | "
        "embed cached copies (img/s) | scan + embed (img/s) | ratio to ceiling (the faster decode) | embed from originals (img/s) |",
        "|---|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for r in rows:
        lines.append(f"| {r['label']} | {r['n']} | {r['decode_all']:.1f} | {r['decode_1']:.1f} | {r['scan']:.1f} | "
                     f"{r['embed']:.1f} | {r['pipeline']:.1f} | {r['pipeline'] / r['decode']:.2f} | {r['direct']:.1f} |")
    lines += ["", "scan + embed is the main job's path (`nearsight index` without training, grouping and "
              "calibration); its ratio to the decode-only ceiling (the faster of one process and all cores) says how close the pipeline comes to "
              "the cost of reading the pixels at all.", ""]
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--large", type=int, default=24, help="12-megapixel JPEGs")
    parser.add_argument("--jpegs", type=int, default=200, help="1024x768 JPEGs")
    parser.add_argument("--small", type=int, default=200, help="640x480 PNGs")
    parser.add_argument("--out", type=Path, help="write the Markdown report to this file")
    args = parser.parse_args()
    from nearsight.indexer.learning.encoder import DEFAULT_ARCH, create_encoder
    from nearsight.indexer.learning.model import save_model

    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        large, small = make_files(work, args.large, args.small, seed=0)
        jpegs = make_small_jpegs(work, args.jpegs, seed=1)
        model_dir = work / "models" / "bench-model"
        save_model(model_dir, create_encoder(DEFAULT_ARCH), {"arch": DEFAULT_ARCH, "image_size": SIZE})
        rows = [measure(large, work, model_dir, "12MP JPEG"), measure(jpegs, work, model_dir, "1024x768 JPEG"),
                measure(small, work, model_dir, "640x480 PNG")]
    text = report(rows, " ".join([".venv/bin/python benchmarks/bench_embed.py", *sys.argv[1:]]), DEFAULT_ARCH)
    print(text)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(text + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
