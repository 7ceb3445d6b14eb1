"""The nightly run against a full build of the same collection, as ratios measured in one run.

In one temporary folder this makes a synthetic collection of small photo-like JPEGs
in two source folders (about 8 % of them planted copies: re-encodes, resized and
brightened versions), trains the default encoder for a few steps (training is not
what is measured) and then times, all in this process and run:

* the nightly run with no change at all;
* the nightly run after 1 % of the files changed (a quarter each: added, modified in
  place, moved or renamed, deleted);
* a full build of the same changed collection into a fresh store with the same model
  (scan, decode, embed everything, whitening, index, calibration, every pair, groups);
* a forced full rebuild on the existing store (setting rebuild_fraction 0): whitening,
  index, calibration and groups again, but no file read or embedded anew;
* the no-change night again as a `nearsight index` process, to show what starting the
  interpreter and importing the libraries adds to a run measured in-process.

Every run uses the default settings and `--retrain auto`. Reported: seconds per stage,
the ratios to the full build, and what each run did. Nothing is asserted.

    .venv/bin/python benchmarks/bench_nightly.py --files 3000 --out benchmarks/results/nightly.md
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import numpy as np  # noqa: E402
from PIL import Image, ImageEnhance  # noqa: E402

from benchmarks.common import machine  # noqa: E402
from nearsight.indexer.core.settings import load_settings  # noqa: E402
from nearsight.indexer.storage.store import Store  # noqa: E402

# run_index and TrainConfig (torch, FAISS) are imported where they are used: the scan's worker
# processes start by importing this file, and the command line's workers do not import them either.

SIZE = (192, 144)


def _scene(rng) -> Image.Image:
    """A smooth random picture: a 6 x 8 grid of random colours, upscaled (photo-like for JPEG)."""
    return Image.fromarray(rng.integers(0, 256, (6, 8, 3), dtype=np.uint8)).resize(SIZE, Image.Resampling.BICUBIC)


def make_collection(root: Path, n: int, seed: int = 0) -> list[Path]:
    """`n` files in two folders, about 8 % of them edited copies of others."""
    rng = np.random.default_rng(seed)
    folders = [root / "archive", root / "scans"]
    originals = []
    for i in range(n):
        folder = folders[i % 2] / f"box{i % 17:02d}"
        folder.mkdir(parents=True, exist_ok=True)
        path = folder / f"img{i:05d}.jpg"
        if originals and rng.random() < 0.08:
            src = Image.open(originals[rng.integers(len(originals))])
            kind = rng.integers(3)
            if kind == 0:
                src.save(path, quality=60)
            elif kind == 1:
                src.resize((SIZE[0] * 3 // 4, SIZE[1] * 3 // 4), Image.Resampling.LANCZOS).save(path, quality=85)
            else:
                ImageEnhance.Brightness(src).enhance(1.15).save(path, quality=85)
        else:
            _scene(rng).save(path, quality=90)
            originals.append(path)
    return folders


def change_one_percent(folders: list[Path], seed: int = 1) -> dict:
    """1 % of the files: a quarter each added, modified in place, moved or renamed, deleted."""
    rng = np.random.default_rng(seed)
    files = sorted(p for f in folders for p in f.rglob("*.jpg"))
    k = max(4, len(files) // 100) // 4
    picked = [files[i] for i in rng.choice(len(files), 3 * k, replace=False)]
    for i in range(k):
        folder = folders[i % 2] / "new"
        folder.mkdir(exist_ok=True)
        _scene(rng).save(folder / f"n{i:04d}.jpg", quality=90)
    for path in picked[:k]:
        _scene(rng).save(path, quality=90)
    for j, path in enumerate(picked[k:2 * k]):
        dest = folders[(j + 1) % 2] / "moved" / path.name
        dest.parent.mkdir(exist_ok=True)
        os.rename(path, dest)
    for path in picked[2 * k:]:
        path.unlink()
    return {"added": k, "modified": k, "moved": k, "deleted": k}


def timed(store_dir: Path, folders, *, train_config=None, **overrides) -> tuple[float, dict]:
    from nearsight.indexer.building.pipeline import run_index

    settings = load_settings(store_dir=store_dir, environ={}, overrides=overrides or None)
    with Store.open(store_dir, create=True, settings=settings) as store:
        started = time.perf_counter()
        summary = run_index(store, folders, progress=False, train_config=train_config)
        return time.perf_counter() - started, summary


def as_process(store_dir: Path, folders) -> tuple[float, dict]:
    """`python -m nearsight index ... --json` in a child process, timed from outside (start-up included)."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("NEARSIGHT_")}
    env["PYTHONPATH"] = str(Path(__file__).resolve().parent.parent)
    started = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "nearsight", "index", *map(str, folders), "--store", str(store_dir),
                           "--json", "--no-progress", "-q"], capture_output=True, text=True, env=env, check=True)
    return time.perf_counter() - started, json.loads(proc.stdout)


def _stages(summary: dict) -> str:
    return ", ".join(f"{k} {v:.2f}" for k, v in summary["stages"].items())


def _did(summary: dict) -> str:
    build = summary.get("build") or {}
    counts = ", ".join(f"{k} {summary[k]}" for k in ("new", "changed", "moved", "removed", "embedded") if summary[k])
    if "calibrate" in summary["stages"]:
        calibration = "calibrated"
    elif build.get("kind") == "unchanged":
        calibration = "every file shared with the previous generation"
    elif "reused_from" in (summary.get("calibration") or {}):
        calibration = "calibration reused"
    else:
        calibration = "no calibration"
    return (f"{build.get('kind')} build; {counts or 'no change'}; {calibration}; "
            f"retrain: {summary['retrain']['reason']}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=3000)
    parser.add_argument("--train-steps", type=int, default=40)
    parser.add_argument("--out", type=Path, help="write the Markdown report to this file")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        started = time.perf_counter()
        folders = make_collection(work, args.files)
        made = time.perf_counter() - started
        store = work / "store"
        from nearsight.indexer.learning.train import TrainConfig

        config = TrainConfig(steps=args.train_steps, minutes=None, seed=0)
        first_s, first = timed(store, folders, train_config=config)
        print(f"first run (trains): {first_s:.1f} s; {_stages(first)}", flush=True)
        unchanged_s, unchanged = timed(store, folders)
        print(f"nightly, no change: {unchanged_s:.2f} s; {_stages(unchanged)}", flush=True)
        changes = change_one_percent(folders)
        rebuild_copy = work / "store-rebuild"
        nightly_s, nightly = timed(store, folders)
        print(f"nightly, 1 % changed: {nightly_s:.2f} s; {_stages(nightly)}", flush=True)
        fresh = work / "store-fresh"
        shutil.copytree(store / "models", fresh / "models")
        full_s, full = timed(fresh, folders)
        print(f"full build: {full_s:.2f} s; {_stages(full)}", flush=True)
        shutil.copytree(store, rebuild_copy)
        rebuild_s, rebuild = timed(rebuild_copy, folders, rebuild_fraction=0.0)
        print(f"forced rebuild: {rebuild_s:.2f} s; {_stages(rebuild)}", flush=True)
        process_s, process = as_process(store, folders)
        print(f"nightly, no change, as a process: {process_s:.2f} s", flush=True)

    rows = [("nightly, no change", unchanged_s, unchanged), ("nightly, 1 % changed", nightly_s, nightly),
            ("full build, fresh store", full_s, full), ("full rebuild, existing store", rebuild_s, rebuild),
            ("nightly, no change, as a `nearsight index` process", process_s, process)]
    lines = [
        "# The nightly run against a full build",
        "",
        f"Machine: {machine()}",
        "",
        f"Command: `.venv/bin/python benchmarks/bench_nightly.py --files {args.files} --train-steps "
        f"{args.train_steps}`",
        "",
        f"Collection: {first['seen']} synthetic JPEGs ({SIZE[0]}x{SIZE[1]}) in two source folders, made in "
        f"{made:.0f} s; default encoder trained for {first['trained']['steps']} steps; first run "
        f"{first_s:.0f} s. Change: {changes['added']} added, {changes['modified']} modified, {changes['moved']} "
        f"moved or renamed, {changes['deleted']} deleted ({sum(changes.values())} files, "
        f"{sum(changes.values()) / first['seen']:.1%}).",
        "",
        "| run | seconds | ratio to the full build | stages (s) | what it did |",
        "|---|---:|---:|---|---|",
    ]
    for label, seconds, summary in rows:
        lines.append(f"| {label} | {seconds:.2f} | {seconds / full_s:.3f} | {_stages(summary)} | {_did(summary)} |")
    lines += [
        "",
        f"Groups after the 1 % nightly run: {nightly['groups']['groups']} "
        f"({', '.join(f'{k} {v}' for k, v in nightly['group_changes'].items() if v)}); "
        f"{nightly['build']['regrouped']['files_regrouped']} of {nightly['indexed']} files regrouped. "
        f"The full build of the same files found {full['groups']['groups']} groups.",
        "",
        "Seconds are wall time of `run_index` in this process, except the last row: the same no-change night "
        "run as a command, timed from outside, so the difference to the first row is starting Python and "
        "importing PyTorch and FAISS. Stages not listed took no time (e.g. no training: the model exists).",
    ]
    report = "\n".join(lines) + "\n"
    print(report)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(report, encoding="utf-8")


if __name__ == "__main__":
    main()
