"""Training views benchmark: per-image views in a worker process against batched views in the training process.

Views alone: view pairs/s of each path without the model, one core.

Speed: images/s (batch entries, i.e. view pairs through the model, per second
of the training loop) of each setting, measured in rounds within one run
(A B C D A B C D ...) so that load from other jobs on the machine hits every
setting alike; reported as ratios to the per-image path, median over rounds.

Quality: the held-out check after an equal wall-time budget per setting, on
scikit-image's photos and their 4 x 4 tiles (as tests/test_train.py builds, a
finer grid). Reported for the learned descriptor alone (the encoder's
`forward_head`), so a classical part stored beside it cannot hide a difference
between trainings; the card's own figure (whatever the encoder stores) is listed too.

    python benchmarks/bench_train_views.py --only views,speed [--speed-steps 20] [--rounds 3]
    python benchmarks/bench_train_views.py --only quality --settings per_image-128,batched-128 [--minutes 2]
    python benchmarks/bench_train_views.py --report-only

Rows are appended to WORK/views.jsonl as they come; the report is rewritten from all rows.
"""

from __future__ import annotations

import argparse
import json
import logging
import statistics
import sys
import time
from dataclasses import replace
from pathlib import Path

import torch
from PIL import Image

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.common import machine  # noqa: E402
from nearsight.indexer.learning import train as train_module  # noqa: E402
from nearsight.indexer.learning.heldout import heldout_check  # noqa: E402
from nearsight.indexer.learning.model import load_model  # noqa: E402
from nearsight.indexer.learning.train import TrainConfig, split_heldout, train  # noqa: E402

log = logging.getLogger("bench_train_views")

PHOTOS = ("astronaut", "coffee", "chelsea", "rocket", "camera", "coins", "immunohistochemistry",
          "hubble_deep_field", "brick", "moon", "page", "clock", "colorwheel", "grass", "gravel", "text")
GRID = 4
HELDOUT_FRACTION = 0.4  # 109 of the 272 images held out: a finer recall@1 than the default 20 %

BASE = TrainConfig(seed=0, heldout_fraction=HELDOUT_FRACTION)
# The settings compared; "per_image-128" is the training path before batched views (its defaults then:
# one view worker process, torch threads = the cores left over, no channels_last).
SETTINGS = {
    "per_image-128": replace(BASE, views="per_image", workers=1, channels_last=False),
    "batched-128": replace(BASE, views="batched", channels_last=True, parallel="split_batch"),
    "batched-128-intra-op": replace(BASE, views="batched", channels_last=True, parallel="intra_op"),
    "batched-128-contiguous": replace(BASE, views="batched", channels_last=False, parallel="split_batch"),
    "batched-112": replace(BASE, views="batched", size=112, channels_last=True, parallel="split_batch"),
    "batched-96": replace(BASE, views="batched", size=96, channels_last=True, parallel="split_batch"),
    "batched-80": replace(BASE, views="batched", size=80, channels_last=True, parallel="split_batch"),
    "batched-128-no-hard-negatives": replace(BASE, views="batched", channels_last=True, parallel="split_batch",
                                             hard_negative_share=0.0),
}


def build_collection(work: Path) -> list[Path]:
    """The 16 photos at full size plus a 4 x 4 grid of non-overlapping tiles of each (272 files)."""
    import skimage.data

    folder = work / "photos"
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for name in PHOTOS:
        im = Image.fromarray(getattr(skimage.data, name)()).convert("RGB")
        paths.append(folder / f"{name}.png")
        if not paths[-1].is_file():
            im.save(paths[-1])
        w, h = im.size
        for i in range(GRID):
            for j in range(GRID):
                path = folder / f"{name}_{i}{j}.jpg"
                box = (i * w // GRID, j * h // GRID, (i + 1) * w // GRID, (j + 1) * h // GRID)
                if not path.is_file():
                    im.crop(box).save(path, quality=92)
                paths.append(path)
    return paths


class _Learned(torch.nn.Module):
    """The encoder's learned vector alone (normalised), whatever else its descriptor holds."""

    def __init__(self, encoder):
        super().__init__()
        self.encoder, self.dim = encoder, encoder.dim

    def forward(self, x):
        return self.encoder.forward_head(self.encoder.forward_features(x))


def _learned_heldout(paths: list[Path], out_dir: Path, config: TrainConfig) -> tuple[dict, dict]:
    """Held-out check of the learned vector: trained, and the same architecture at random init."""
    encoder, _card = load_model(out_dir)
    _train_paths, held_paths = split_heldout(paths, config)
    held, _skipped = train_module._decode_heldout(held_paths, config)
    random_init, _ = train_module._init_modules(config)
    return (heldout_check(_Learned(encoder), held, config.seed, config.input_size),
            heldout_check(_Learned(random_init), held, config.seed, config.input_size))


def _append(results: Path, row: dict) -> None:
    with open(results, "a") as fh:
        fh.write(json.dumps(row) + "\n")


def speed(paths: list[Path], work: Path, results: Path, names: list[str], steps: int, rounds: int) -> None:
    """Images/s per setting, `rounds` times in turn; no held-out images, so every run is training alone."""
    run = time.strftime("%Y-%m-%d %H:%M")
    for r in range(rounds):
        for name in names:
            config = replace(SETTINGS[name], steps=steps, minutes=None, heldout_fraction=0.0)
            result = train(paths, work / "runs" / f"speed-{name}", config, progress=False)
            _append(results, {"kind": "speed", "run": run, "name": name, "round": r, "steps": result.steps,
                              "images_per_s": result.images_per_s, "time": time.time()})
            log.info("round %d %s: %.1f images/s", r, name, result.images_per_s)


def view_speed(paths: list[Path], results: Path, rounds: int, batches: int = 6) -> None:
    """View pairs/s of each view path alone (no model), on one torch thread / one process, in rounds."""
    from nearsight.indexer.learning.train_batches import decode_pictures, plan_batches, view_batches

    torch.set_num_threads(1)
    side = round(BASE.cache_side * BASE.size)
    caches = {views: decode_pictures(paths, views, side, 1)[0] for views in ("per_image", "batched")}
    for r in range(rounds):
        for views, cache in caches.items():
            plan = plan_batches(len(cache), BASE.batch_size, BASE.hard_negative_share, views)
            stream, _ = view_batches(cache, plan, BASE.recipe, BASE.size, BASE.seed, 1000 * r, workers=0)
            next(stream)  # warm-up: first calls build caches (overlay bank, kernels)
            started, pairs = time.perf_counter(), 0
            for _ in range(batches):
                pairs += len(next(stream)[0])
            stream.close()
            rate = pairs / (time.perf_counter() - started)
            _append(results, {"kind": "views", "name": views, "round": r, "pairs_per_s": rate, "time": time.time()})
            log.info("round %d %s views alone: %.1f pairs/s", r, views, rate)


def quality(paths: list[Path], work: Path, results: Path, names: list[str], minutes: float) -> None:
    """Held-out check after `minutes` of training per setting."""
    import os

    for name in names:
        config = replace(SETTINGS[name], minutes=minutes)
        out_dir = work / "runs" / f"quality-{name}"
        load = os.getloadavg()[0]
        result = train(paths, out_dir, config, progress=False)
        trained, untrained = _learned_heldout(paths, out_dir, config)
        _append(results, {"kind": "quality", "name": name, "minutes": minutes, "steps": result.steps,
                          "images_per_s": result.images_per_s, "final_loss": result.final_loss,
                          "learned": trained, "learned_random_init": untrained, "card": result.heldout,
                          "load_before": load, "load_after": os.getloadavg()[0], "time": time.time()})
        log.info("%s: %d steps, %.1f images/s, learned recall@1 %.3f (random init %.3f)", name, result.steps,
                 result.images_per_s, trained["recall_at_1"], untrained["recall_at_1"])


def _speed_table(rows: list[dict]) -> list[str]:
    """One block per run: ratios are only taken between settings measured in the same run."""
    lines = ["| run | setting | images/s per round | median | ratio to the run's first setting |",
             "|---|---|---|---|---|"]
    runs: dict[str, dict[str, list[float]]] = {}
    for r in rows:
        runs.setdefault(r.get("run", "?"), {}).setdefault(r["name"], []).append(r["images_per_s"])
    for run, by_name in runs.items():
        base = statistics.median(next(iter(by_name.values())))
        for name, values in by_name.items():
            med = statistics.median(values)
            lines.append(f"| {run} | {name} | {', '.join(f'{v:.1f}' for v in values)} | {med:.1f} | {med / base:.2f} |")
    return lines


def _views_table(rows: list[dict]) -> list[str]:
    by_name: dict[str, list[float]] = {}
    for r in rows:
        by_name.setdefault(r["name"], []).append(r["pairs_per_s"])
    lines = ["| view path (no model, 1 thread) | pairs/s per round | median |", "|---|---|---|"]
    for name, values in by_name.items():
        lines.append(f"| {name} | {', '.join(f'{v:.1f}' for v in values)} | {statistics.median(values):.1f} |")
    return lines


def _quality_table(rows: list[dict]) -> list[str]:
    lines = ["| setting | budget | steps | images/s | final loss | learned recall@1 / mean rank "
             "| random init | card's check | load before / after |", "|---|---|---|---|---|---|---|---|---|"]
    for r in rows:
        def cell(d):
            return f"{d['recall_at_1']:.3f} / {d['mean_rank']:.2f}" if d else "-"

        lines.append(f"| {r['name']} | {r['minutes']:g} min | {r['steps']} | {r['images_per_s']:.1f} "
                     f"| {r['final_loss']:.3f} | {cell(r['learned'])} | {cell(r['learned_random_init'])} "
                     f"| {cell(r['card'])} | {r['load_before']:.1f} / {r['load_after']:.1f} |")
    return lines


def write_report(results: Path, report: Path, n_images: int, notes: Path | None) -> None:
    rows = [json.loads(line) for line in results.read_text().splitlines() if line.strip()] if results.is_file() else []
    lines = ["# Training views: per-image (worker process) vs batched (in the training process)", "",
             "Written by `benchmarks/bench_train_views.py`.", "",
             f"Machine: {machine()} (when the report was written; the load during each quality run is in its row).",
             f"Collection: {n_images} images (16 scikit-image photos + 4 x 4 tiles of each); "
             f"{HELDOUT_FRACTION:.0%} held out for the check.", "",
             "## Speed (rounds within one run)", ""]
    lines += _speed_table([r for r in rows if r["kind"] == "speed"])
    lines += ["", "## Making views alone, one core", ""]
    lines += _views_table([r for r in rows if r["kind"] == "views"])
    lines += ["", "## Held-out check after an equal wall-time budget", ""]
    lines += _quality_table([r for r in rows if r["kind"] == "quality"])
    if notes is not None and notes.is_file():
        lines += ["", notes.read_text().rstrip()]
    report.parent.mkdir(parents=True, exist_ok=True)
    report.write_text("\n".join(lines) + "\n")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--work", type=Path, default=Path("/tmp/nearsight-bench-train-views"), help="scratch folder")
    parser.add_argument("--only", default="views,speed,quality", help="parts to run (comma-separated)")
    parser.add_argument("--settings", default="per_image-128,batched-128,batched-128-intra-op,batched-112",
                        help=f"settings to run, of: {', '.join(SETTINGS)}")
    parser.add_argument("--speed-steps", type=int, default=20, help="steps per speed run")
    parser.add_argument("--rounds", type=int, default=3, help="speed rounds")
    parser.add_argument("--minutes", type=float, default=2.0, help="wall-time budget of each quality run")
    parser.add_argument("--report", type=Path, default=ROOT / "benchmarks" / "results" / "train-views.md")
    parser.add_argument("--notes", type=Path, default=None, help="a markdown file appended to the report")
    parser.add_argument("--report-only", action="store_true", help="rewrite the report from WORK/views.jsonl")
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(message)s")
    args.work.mkdir(parents=True, exist_ok=True)
    results = args.work / "views.jsonl"
    paths = build_collection(args.work)
    names = args.settings.split(",")
    unknown = set(names) - set(SETTINGS)
    if unknown:
        parser.error(f"unknown settings: {', '.join(sorted(unknown))}")
    only = set(args.only.split(","))
    if not args.report_only:
        if "views" in only:
            view_speed(paths, results, args.rounds)
        if "speed" in only:
            speed(paths, args.work, results, names, args.speed_steps, args.rounds)
        if "quality" in only:
            quality(paths, args.work, results, names, args.minutes)
    write_report(results, args.report, len(paths), args.notes)
    return 0


if __name__ == "__main__":
    sys.exit(main())
