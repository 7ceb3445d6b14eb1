"""Copy-detection quality: nearsight (trained 1, 5, 15 minutes; untrained) against pHash and a thumbnail.

One run builds the collection (benchmarks/collection.py: real photos that packages ship,
cut into tiles, plus invented distractors), makes the queries (benchmarks/protocol.py:
Copydays-style JPEG ladder, crops and strong attacks, ImageNet-C corruptions at severities
1-3, overlays, borders, flips, rotations; a quarter of the originals not indexed), indexes
the collection with `nearsight index` once per training budget, and scores every system's
top-k predictions with benchmarks/metrics.py (DISC21 micro AP, recall@1, recall at
precision 0.90 / 0.99, the calibrated "duplicate" verdict's realised precision and recall).

    .venv/bin/python benchmarks/bench_quality.py --quick            # a few minutes, to try it
    nohup .venv/bin/python benchmarks/bench_quality.py > quality.log 2>&1 &   # the full run (~30 min)

Writes benchmarks/results/quality.md (or --out) and the raw figures to WORK/results.json.
Nothing is asserted: the report states the figures, whatever they are.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import re
import shutil
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks import baselines, collection, metrics, protocol  # noqa: E402
from benchmarks.common import machine  # noqa: E402
from benchmarks.quality_report import render  # noqa: E402

log = logging.getLogger("bench_quality")

LIBRARIES = ("numpy", "scipy", "torch", "torchvision", "faiss-cpu", "pillow", "scikit-learn", "scikit-image",
             "imagehash")
PHASH_COMMON_CUT = 10  # Hamming distance <= 10 of 64 bits: a cut-off often used with pHash (common practice, from memory)


def _query_seed(seed: int, ref: int, transform: int) -> int:
    return seed * 1_000_003 + ref * 1_000 + transform


def make_queries(work: Path, refs: list, transforms: list, names: list[str], seed: int) -> list[dict]:
    """Write every (reference, transform) query under work/queries; return one record per query."""
    col = {name: i for i, name in enumerate(names)}
    folder = work / "queries"
    records = []
    for i, ref in enumerate(refs):
        stem = Path(ref.name).stem
        (folder / stem).mkdir(parents=True, exist_ok=True)
        for j, t in enumerate(transforms):
            data, ext = protocol.make_query(ref.image, t, _query_seed(seed, i, j))
            path = folder / stem / f"{t.name}{ext}"
            path.write_bytes(data)
            records.append({"path": str(path), "ref": ref.name, "family": t.family, "transform": t.name,
                            "gt": col[ref.name] if ref.indexed else -1})
    return records


def _budget_config(minutes: float, quick: bool):
    from indexer.train import TrainConfig

    if quick:  # small heldout set and few steps, so a debugging run takes minutes
        return TrainConfig(minutes=minutes, heldout=32)
    return TrainConfig(minutes=minutes)


def _store(path: Path, create: bool = True):
    from indexer.settings import load_settings
    from indexer.store import Store

    return Store.open(path, create=create, settings=load_settings(environ={}))


def index_trained(store_dir: Path, folder: Path, minutes: float, quick: bool) -> dict:
    """`nearsight index` on the collection with a training budget; what the run did."""
    from indexer.pipeline import run_index

    load_before = os.getloadavg()[0]
    started = time.monotonic()
    with _store(store_dir) as store:
        summary = run_index(store, [folder], progress=False, train_config=_budget_config(minutes, quick))
    trained = summary.get("trained") or {}
    return {"budget_minutes": minutes, "steps": trained.get("steps"), "model": summary.get("model"),
            "heldout": trained.get("heldout"), "heldout_random_init": trained.get("heldout_random_init"),
            "stages": summary.get("stages"), "wall_s": time.monotonic() - started,
            "load_before": load_before, "load_after": os.getloadavg()[0]}


def index_untrained(store_dir: Path, folder: Path) -> dict:
    """The same pipeline with the same architecture at random initialisation (seed 0, as training starts)."""
    import torch

    from indexer.encoder import DEFAULT_ARCH, create_encoder
    from indexer.model import save_model
    from indexer.pipeline import run_index
    from indexer.train import TrainConfig

    config = TrainConfig()
    started = time.monotonic()
    with _store(store_dir) as store:
        run_index(store, [folder], progress=False, build=False)
        n = len(store.catalog.readable_contents())
        torch.manual_seed(config.seed)
        encoder = create_encoder(DEFAULT_ARCH, config.dim, config.pooling)
        store.models_dir.mkdir(parents=True, exist_ok=True)
        work = store.models_dir / ".untrained"
        version = save_model(work, encoder, {"arch": DEFAULT_ARCH, "image_size": config.size,
                                              "train_config": config.to_dict(), "steps": 0,
                                              "data": {"images_given": n}})
        os.rename(work, store.models_dir / version)
        store.write_pointer("models/CURRENT", version)
        summary = run_index(store, [folder], progress=False, retrain="never")
    return {"budget_minutes": 0, "steps": 0, "model": summary.get("model"), "stages": summary.get("stages"),
            "wall_s": time.monotonic() - started}


def _nearsight_predictions(store_dir: Path, records: list[dict], col: dict[str, int], k: int) -> tuple:
    """(Predictions, calibrated threshold, calibration summary) of one nearsight store."""
    from indexer.images import read_image
    from indexer.query import Searcher

    with _store(store_dir, create=False) as store:
        searcher = Searcher(store)
        cal = searcher.generation.load_calibration()
        parts = []
        for start in range(0, len(records), 64):
            block = records[start : start + 64]
            images = [read_image(r["path"], max_side=2 * searcher.size)[0] for r in block]
            answers = searcher.neighbours(searcher.vectors_for_images(images), k)
            q, r, s = [], [], []
            for offset, results in enumerate(answers):
                for hit in results:
                    q.append(start + offset)
                    r.append(col[Path(hit["path"]).name])
                    s.append(hit["similarity"])
            parts.append(metrics.Predictions(np.array(q, np.int64), np.array(r, np.int64), np.array(s)))
        near = (cal or {}).get("tiers", {}).get("near")
        calibration = None if near is None else {
            "target": near.get("target_precision"), "estimated_precision": near["at_threshold"]["precision"],
            "estimated_recall": near["at_threshold"]["recall"], "target_met": near.get("target_met")}
        return metrics.concat(parts), searcher.threshold, calibration


def evaluate(pred: metrics.Predictions, gt: np.ndarray, families: np.ndarray, transforms: np.ndarray) -> dict:
    """Every metric overall, per family and per transform."""
    def figures(queries: np.ndarray) -> dict:
        sub = pred.subset(np.isin(pred.q, queries))
        return {"uap": metrics.micro_ap(sub, gt, queries), "r1": metrics.recall_at_1(sub, gt, queries),
                "r_p90": metrics.recall_at_precision(sub, gt, 0.90, queries),
                "r_p99": metrics.recall_at_precision(sub, gt, 0.99, queries),
                "positives": int((gt[queries] >= 0).sum()), "queries": int(len(queries))}

    everything = np.arange(len(gt))
    return {"overall": figures(everything),
            "family": {f: figures(np.flatnonzero(families == f)) for f in dict.fromkeys(families.tolist())},
            "transform": {t: figures(np.flatnonzero(transforms == t)) for t in dict.fromkeys(transforms.tolist())}}


def verdicts(pred: metrics.Predictions, gt: np.ndarray, families: np.ndarray, threshold: float) -> dict:
    out = {"overall": metrics.verdict(pred, gt, threshold)}
    for f in dict.fromkeys(families.tolist()):
        queries = np.flatnonzero(families == f)
        out[f] = metrics.verdict(pred.subset(np.isin(pred.q, queries)), gt, threshold, queries)
    return out


def _photo(name: str) -> str | None:
    """The photo a collection file was cut from (None for a distractor)."""
    if not name.startswith("photo-"):
        return None
    return re.sub(r"-r\dc\d$", "", Path(name).stem[len("photo-"):])


def wrong_calls(pred: metrics.Predictions, gt: np.ndarray, threshold: float, names: list[str],
                query_refs: list[str]) -> dict:
    """Wrong duplicate verdicts by what was called: a tile of the query's own photo, another photo, a distractor;
    and by whether the query's original was indexed."""
    wrong = (pred.score >= threshold) & ~pred.correct(gt)
    out = {"tile of the same photo": 0, "another photo": 0, "distractor": 0, "for queries without a match": 0}
    for q, r in zip(pred.q[wrong].tolist(), pred.r[wrong].tolist()):
        called, source = _photo(names[r]), _photo(query_refs[q])
        out["distractor" if called is None else "tile of the same photo" if called == source else "another photo"] += 1
        out["for queries without a match"] += int(gt[q] < 0)
    return out


def run(args) -> dict:
    work = args.work
    work.mkdir(parents=True, exist_ok=True)
    started = time.monotonic()
    refs = collection.references(args.seed, limit=12 if args.quick else None)
    extra = collection.distractors(work / "demo", originals=args.originals, seed=7)
    folder = work / "collection"
    if folder.exists():
        shutil.rmtree(folder)
    names = collection.write_collection(folder, refs, extra)
    col = {name: i for i, name in enumerate(names)}
    transforms = protocol.build_transforms()
    if args.quick:
        transforms = transforms[::4]
    if (work / "queries").exists():
        shutil.rmtree(work / "queries")
    records = make_queries(work, refs, transforms, names, args.seed)
    gt = np.array([r["gt"] for r in records], np.int64)
    families = np.array([r["family"] for r in records])
    kinds = np.array([r["transform"] for r in records])
    log.info("collection: %d files (%d photo tiles indexed, %d distractors); %d queries (%d with a match)",
             len(names), sum(r.indexed for r in refs), len(extra), len(records), int((gt >= 0).sum()))

    systems, runs = {}, {}
    for minutes in args.minutes:
        name = f"nearsight {minutes:g} min"
        log.info("indexing with %g minutes of training", minutes)
        runs[name] = index_trained(work / "stores" / f"train-{minutes:g}min", folder, minutes, args.quick)
    runs["nearsight untrained"] = index_untrained(work / "stores" / "untrained", folder)
    for name, info in runs.items():
        store_dir = work / "stores" / ("untrained" if info["budget_minutes"] == 0 else f"train-{info['budget_minutes']:g}min")
        pred, threshold, calibration = _nearsight_predictions(store_dir, records, col, args.k)
        systems[name] = {"pred": pred, "threshold": threshold, "calibration": calibration}

    t0 = time.monotonic()
    xb = baselines.describe_files([folder / n for n in names])
    xq = baselines.describe_files([Path(r["path"]) for r in records])
    for name in ("phash", "thumbnail"):
        systems[name] = {"pred": baselines.search(name, xq[name], xb[name], args.k)}
    systems["phash"]["threshold"] = 1 - PHASH_COMMON_CUT / baselines.PHASH_BITS
    log.info("baselines described and searched in %.1f s", time.monotonic() - t0)

    results = {"machine": machine(LIBRARIES), "args": {k: str(v) for k, v in vars(args).items()},
               "collection": {"files": len(names), "photo_tiles": len(refs),
                              "indexed_tiles": sum(r.indexed for r in refs), "distractors": len(extra),
                              "sources": sorted({r.source for r in refs})},
               "queries": {"total": len(records), "with_match": int((gt >= 0).sum()),
                           "transforms": [(t.name, t.family) for t in transforms]},
               "runs": runs, "systems": {}}
    for name, system in systems.items():
        entry = {"metrics": evaluate(system["pred"], gt, families, kinds)}
        if system.get("threshold") is not None:
            entry["verdict"] = verdicts(system["pred"], gt, families, system["threshold"])
            entry["calibration"] = system.get("calibration")
            entry["wrong_calls"] = wrong_calls(system["pred"], gt, system["threshold"], names,
                                               [r["ref"] for r in records])
        results["systems"][name] = entry
    results["wall_s"] = time.monotonic() - started
    results["machine_end"] = machine(LIBRARIES)
    return results


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--work", type=Path, default=Path("/tmp/nearsight-bench-quality"),
                        help="work folder (collection, queries, stores); reused demo archive")
    parser.add_argument("--minutes", type=float, nargs="+", default=[1, 5, 15], help="training budgets")
    parser.add_argument("--originals", type=int, default=400, help="demo-archive originals used as distractors")
    parser.add_argument("--k", type=int, default=10, help="predictions per query")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--quick", action="store_true",
                        help="12 photo tiles, every 4th transform, 60 distractor originals, 0.2 and 0.5 min of training")
    parser.add_argument("--out", type=Path, help="Markdown report (default benchmarks/results/quality.md; "
                                                 "with --quick, quality-quick.md in the work folder)")
    args = parser.parse_args()
    if args.quick:
        if args.minutes == [1, 5, 15]:
            args.minutes = [0.2, 0.5]
        if args.originals == 400:
            args.originals = 60
        args.work = args.work.with_name(args.work.name + "-quick")
    results_dir = Path(__file__).resolve().parent / "results"
    out = args.out or (args.work / "quality-quick.md" if args.quick else results_dir / "quality.md")
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(message)s")
    for runs in os.listdir(args.work / "stores") if (args.work / "stores").exists() else []:
        shutil.rmtree(args.work / "stores" / runs)  # every run indexes afresh
    results = run(args)
    (args.work / "results.json").write_text(json.dumps(results, indent=1, default=float))
    command = " ".join([".venv/bin/python benchmarks/bench_quality.py", *sys.argv[1:]])
    report = render(results, command)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(report)
    print(report)


if __name__ == "__main__":
    main()
