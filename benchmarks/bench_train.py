"""Training benchmark: speed, held-out recall over time, and the comparisons behind TrainConfig's defaults.

Builds a collection of a few thousand images (the invented demo archive's
originals and look-alikes from `demo_data.generate`, plus tiles of the photos
shipped with scikit-image), then trains with one setting changed at a time and
records the held-out check (trained and random init) of each run.

    python benchmarks/bench_train.py [--minutes 1,3,10] [--sweep-minutes 2] [--quick]

Results are appended to WORK/results.jsonl as they come (a crash loses nothing)
and summarised in benchmarks/results/train.md.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import platform
import sys
import time
from dataclasses import replace
from pathlib import Path

import torch
from PIL import Image

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from nearsight.indexer.learning import train as train_module  # noqa: E402
from nearsight.indexer.learning.encoder import ARCHS, ProjectionHead  # noqa: E402
from nearsight.indexer.learning.heldout import heldout_check  # noqa: E402
from nearsight.indexer.learning.model import library_versions, load_model  # noqa: E402
from nearsight.indexer.learning.train import CHECKPOINT_FILE, TrainConfig, split_heldout, train  # noqa: E402

log = logging.getLogger("bench_train")

SKIMAGE_PHOTOS = ("astronaut", "coffee", "chelsea", "rocket", "camera", "coins", "immunohistochemistry",
                  "hubble_deep_field", "brick", "moon", "page", "clock", "colorwheel", "grass", "gravel", "text")


def build_collection(work: Path, originals: int) -> list[Path]:
    """Demo-archive originals + look-alikes, plus scikit-image photos and their 4x4 tiles; cached in `work`."""
    import skimage.data

    listing = work / f"collection-{originals}.txt"
    if listing.is_file():
        return [Path(line) for line in listing.read_text().splitlines()]
    paths = []
    archive = work / f"archive-{originals}"
    if not (archive / "truth.json").is_file():
        from nearsight.demo_data.generate import generate

        generate(archive, seed=7, originals=originals)
    truth = json.loads((archive / "truth.json").read_text())
    paths += [archive / e["path"] for e in truth["images"] if e["kind"] in ("original", "look-alike")]
    tiles = work / "skimage-tiles"
    tiles.mkdir(parents=True, exist_ok=True)
    for name in SKIMAGE_PHOTOS:
        im = Image.fromarray(getattr(skimage.data, name)()).convert("RGB")
        im.save(tiles / f"{name}.png")
        paths.append(tiles / f"{name}.png")
        w, h = im.size
        for i in range(4):
            for j in range(4):
                path = tiles / f"{name}_{i}{j}.jpg"
                im.crop((i * w // 4, j * h // 4, (i + 1) * w // 4, (j + 1) * h // 4)).save(path, quality=92)
                paths.append(path)
    listing.write_text("\n".join(map(str, paths)) + "\n")
    return paths


def head_comparison(paths: list[Path], out_dir: Path, config: TrainConfig) -> dict:
    """Held-out check of the descriptor h (what we index) versus the projection g(h) used by the loss."""
    encoder, _card = load_model(out_dir)
    state = torch.load(out_dir / CHECKPOINT_FILE, weights_only=True)
    head = ProjectionHead(config.dim, 4 * config.proj_dim, config.proj_dim)
    head.load_state_dict(state["head"])

    class AfterHead(torch.nn.Module):
        """g(h): the encoder's raw vector through the projection head (both registered, so eval() reaches them)."""

        dim = config.proj_dim

        def __init__(self):
            super().__init__()
            self.encoder, self.head = encoder, head

        def forward(self, x):
            return self.head(self.encoder.forward_head(self.encoder.forward_features(x), normalize=False))

    after = AfterHead().eval()
    # The same held-out originals as train() used: same seeded split, same decoding.
    _train_paths, held_paths = split_heldout(paths, config)
    held, _skipped = train_module._decode_heldout(held_paths, config)
    return {"before_head": heldout_check(encoder, held, config.seed, config.input_size),
            "after_head": heldout_check(after, held, config.seed, config.input_size)}


def run(name: str, paths: list[Path], config: TrainConfig, work: Path, results: Path, extra=None) -> dict:
    out_dir = work / "runs" / name
    started = time.monotonic()
    result = train(paths, out_dir, config, progress=False)
    row = {
        "name": name, "config": {k: v for k, v in config.to_dict().items() if k != "recipe"},
        "steps": result.steps, "images_per_s": result.images_per_s, "final_loss": result.final_loss,
        "trained": result.heldout, "random_init": result.heldout_random_init,
        "wall_s": time.monotonic() - started,
    }
    if extra:
        row.update(extra(out_dir))
    with open(results, "a") as fh:
        fh.write(json.dumps(row) + "\n")
    log.info("%s: %d steps, %.1f img/s, recall@1 %.3f (random init %.3f), mean rank %.2f (%.2f)", name, result.steps,
             result.images_per_s, result.heldout["recall_at_1"], result.heldout_random_init["recall_at_1"],
             result.heldout["mean_rank"], result.heldout_random_init["mean_rank"])
    return row


def throughput(paths: list[Path], base: TrainConfig, work: Path, results: Path, steps: int) -> None:
    """Images/s for worker-process and thread splits of the two cores (short step budgets)."""
    for workers, threads in ((0, 1), (0, 2), (1, 1), (1, 2), (2, 1)):
        cfg = replace(base, steps=steps, minutes=None, workers=workers, threads=threads)
        run(f"speed-w{workers}-t{threads}", paths, cfg, work, results)


def machine() -> str:
    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    load = os.getloadavg() if hasattr(os, "getloadavg") else ("?",)
    libs = ", ".join(f"{k} {v}" for k, v in library_versions().items())
    return f"{cpu}, {os.cpu_count()} cores, {platform.system()} {platform.release()}; {libs}; load average at end {load[0]:.2f}"


def _cell(r: dict, key: str) -> str:
    return f"{r[key]['recall_at_1']:.3f} / {r[key]['mean_rank']:.2f}" if r.get(key) else "-"


def write_report(results: Path, report: Path, n_images: int) -> None:
    rows = [json.loads(line) for line in results.read_text().splitlines() if line.strip()]
    lines = [
        "# Training benchmark (benchmarks/bench_train.py)",
        "",
        f"Machine: {machine()}.",
        f"Collection: {n_images} images (demo archive originals + look-alikes, scikit-image photos + 4x4 tiles).",
        "Held-out check: one synthetic edit (indexer/learning/edits.py) per held-out original; recall@1 / mean rank of the",
        "original among all held-out originals. Random init = same architecture and seed, untrained.",
        "",
        "| run | arch | batch | temperature | pooling | queue | workers / threads | budget | steps | images/s "
        "| final loss | trained recall@1 / mean rank | random init |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        c = r["config"]
        budget = f"{c['minutes']:g} min" if c.get("minutes") else f"{c['steps']} steps"
        lines.append(f"| {r['name']} | {c['arch']} | {c['batch_size']} | {c['temperature']} | {c['pooling']} "
                     f"| {c['queue_len']} | {c['workers']} / {c['threads'] or 'auto'} | {budget} | {r['steps']} "
                     f"| {r['images_per_s']:.1f} | {r['final_loss']:.3f} | {_cell(r, 'trained')} "
                     f"| {_cell(r, 'random_init')} |")
    heads = [r for r in rows if "before_head" in r]
    if heads:
        lines += ["", "Descriptor before vs after the projection head (same run, same held-out set):", "",
                  "| run | before head (h) | after head (g(h)) |", "|---|---|---|"]
        for r in heads:
            lines.append(f"| {r['name']} | {_cell(r, 'before_head')} | {_cell(r, 'after_head')} |")
    report.parent.mkdir(parents=True, exist_ok=True)
    report.write_text("\n".join(lines) + "\n")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--work", type=Path, default=Path("/tmp/nearsight-bench-train"), help="scratch folder")
    parser.add_argument("--minutes", default="1,3,10", help="budgets for the default-settings curve (comma-separated)")
    parser.add_argument("--sweep-minutes", type=float, default=2.0,
                        help="time budget of each architecture run (speed matters there)")
    parser.add_argument("--sweep-steps", type=int, default=80,
                        help="step budget of each hyper-parameter run: equal work, so other load on the machine "
                             "cannot favour one setting")
    parser.add_argument("--originals", type=int, default=1500, help="demo-archive originals to generate")
    parser.add_argument("--only", default="speed,curve,arch,temperature,pooling,batch,queue,head",
                        help="experiments to run (comma-separated)")
    parser.add_argument("--quick", action="store_true", help="small collection, 1-minute runs, curve at 1 minute only")
    parser.add_argument("--report", type=Path, default=ROOT / "benchmarks" / "results" / "train.md")
    parser.add_argument("--report-only", action="store_true", help="rewrite the report from WORK/results.jsonl")
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(message)s")
    if args.quick:
        args.originals, args.sweep_minutes, args.sweep_steps, args.minutes = min(args.originals, 300), 1.0, 30, "1"
    args.work.mkdir(parents=True, exist_ok=True)
    results = args.work / "results.jsonl"
    paths = build_collection(args.work, args.originals)
    if args.report_only:
        write_report(results, args.report, len(paths))
        return 0
    only = set(args.only.split(","))
    timed = TrainConfig(seed=0, minutes=args.sweep_minutes)
    base = TrainConfig(seed=0, minutes=None, steps=args.sweep_steps)
    n = args.sweep_steps

    def head_extra(out_dir):
        return head_comparison(paths, out_dir, base)

    if "speed" in only:
        throughput(paths, base, args.work, results, steps=40)
    if "head" in only:
        run(f"default-{n}steps", paths, base, args.work, results, extra=head_extra)
    if "temperature" in only:
        for t in (t for t in (0.05, 0.1, 0.2) if t != base.temperature):
            run(f"temperature-{t}-{n}steps", paths, replace(base, temperature=t), args.work, results)
    if "pooling" in only:
        run(f"pooling-avg-{n}steps", paths, replace(base, pooling="avg"), args.work, results)
    if "batch" in only:  # the same number of images seen
        for b in (b for b in (32, 64, 128) if b != base.batch_size):
            steps = max(1, n * base.batch_size // b)
            run(f"batch-{b}-{steps}steps", paths, replace(base, batch_size=b, steps=steps), args.work, results)
    if "queue" in only:
        run(f"queue-1024-{n}steps", paths, replace(base, queue_len=1024), args.work, results)
    if "arch" in only:
        for arch in ARCHS:
            run(f"arch-{arch}-{args.sweep_minutes:g}min", paths, replace(timed, arch=arch), args.work, results)
    if "curve" in only:
        for minutes in [float(m) for m in args.minutes.split(",")]:
            run(f"default-{minutes:g}min", paths, replace(timed, minutes=minutes), args.work, results)
    write_report(results, args.report, len(paths))
    return 0


if __name__ == "__main__":
    sys.exit(main())
