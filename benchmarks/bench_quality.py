"""Copy-detection quality: nearsight (trained 10 minutes; untrained) against pHash and a thumbnail.

One run builds the collection (benchmarks/collection.py: real photographs that packages ship,
cut into tiles, plus invented distractors; benchmarks/install-benchmark-data.sh installs the
Debian packages it reads), makes the queries (benchmarks/protocol.py: Copydays-style JPEG
ladder, crops and strong attacks, ImageNet-C corruptions at severities 1-3, overlays, borders,
flips, rotations, each with a mild / moderate / strong severity), indexes the collection with
`nearsight index` once per training budget, and scores every system's top-k predictions with
benchmarks/metrics.py (DISC21 micro AP, recall@1, recall at precision 0.90 / 0.99, the
calibrated "duplicate" verdict's realised precision and recall).

Every transform is applied to its own seeded sample of tiles (QUERIES_PER_TRANSFORM: half from
everyday photographs, half from astrophotographs, a quarter of each half from tiles kept out of
the index), not to every tile: 67 transforms x ~1,400 tiles would be ~100,000 queries.

    .venv/bin/python benchmarks/bench_quality.py --quick            # a few minutes, to try it
    nohup .venv/bin/python benchmarks/bench_quality.py > quality.log 2>&1 &   # the full run (~25 min)

Writes benchmarks/results/quality.md (or --out) and the raw figures to WORK/results.json.
Nothing is asserted: the report states the figures, whatever they are.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
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


# Tiles each transform is applied to: 67 x 48 = 3,216 queries in a full run. Multiples of 8, so each
# kind of photograph gets half of them, a whole quarter of which comes from held-out tiles.
QUERIES_PER_TRANSFORM = 48
QUICK_QUERIES_PER_TRANSFORM = 8


def _query_seed(seed: int, ref: int, transform: int) -> int:
    return seed * 1_000_003 + ref * 1_000 + transform


def query_plan(refs: list, n_transforms: int, per_transform: int, seed: int) -> list[tuple[int, int]]:
    """(reference, transform) index pairs: for each transform its own seeded sample of `per_transform`
    tiles, half from each kind of photograph, HELD_OUT_SHARE of each half from tiles kept out of the
    index (fewer when a pool is smaller than that)."""
    pools = {(kind, indexed): [i for i, ref in enumerate(refs) if ref.kind == kind and ref.indexed == indexed]
             for kind in collection.KINDS for indexed in (True, False)}
    per_kind = per_transform // len(collection.KINDS)
    held = round(per_kind * collection.HELD_OUT_SHARE)
    plan = []
    for j in range(n_transforms):
        rng = np.random.default_rng([seed, j])
        for kind in collection.KINDS:
            for indexed, n in ((True, per_kind - held), (False, held)):
                pool = pools[(kind, indexed)]
                plan += [(int(i), j) for i in rng.choice(pool, size=min(n, len(pool)), replace=False)]
    return sorted(plan)


def make_queries(work: Path, refs: list, transforms: list, plan: list[tuple[int, int]], names: list[str],
                 seed: int) -> list[dict]:
    """Write the planned (reference, transform) queries under work/queries; return one record per query."""
    col = {name: i for i, name in enumerate(names)}
    folder = work / "queries"
    records = []
    for i, j in plan:
        ref, t = refs[i], transforms[j]
        stem = Path(ref.name).stem
        (folder / stem).mkdir(parents=True, exist_ok=True)
        data, ext = protocol.make_query(ref.image, t, _query_seed(seed, i, j))
        path = folder / stem / f"{t.name}{ext}"
        path.write_bytes(data)
        records.append({"path": str(path), "ref": ref.name, "source": ref.source, "kind": ref.kind,
                        "family": t.family, "transform": t.name, "severity": t.severity,
                        "gt": col[ref.name] if ref.indexed else -1})
    return records


def _budget_config(minutes: float, quick: bool):
    from nearsight.indexer.learning.train import TrainConfig

    if quick:  # small heldout set and few steps, so a debugging run takes minutes
        return TrainConfig(minutes=minutes, heldout=32)
    return TrainConfig(minutes=minutes)


SETTINGS_OVERRIDES: dict[str, str] = {}  # benchmarks/rescore.py --set: nothing else changes the defaults


def _store(path: Path, create: bool = True):
    from nearsight.indexer.core.settings import load_settings
    from nearsight.indexer.storage.store import Store

    return Store.open(path, create=create, settings=load_settings(environ={}, overrides=SETTINGS_OVERRIDES))


def index_trained(store_dir: Path, folder: Path, minutes: float, quick: bool) -> dict:
    """`nearsight index` on the collection with a training budget; what the run did."""
    from nearsight.indexer.building.pipeline import run_index

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

    from nearsight.indexer.learning.encoder import DEFAULT_ARCH, create_encoder
    from nearsight.indexer.learning.model import save_model
    from nearsight.indexer.building.pipeline import run_index
    from nearsight.indexer.learning.train import TrainConfig

    config = TrainConfig()
    started = time.monotonic()
    with _store(store_dir) as store:
        run_index(store, [folder], progress=False, build=False)
        n = len(store.catalog.readable_contents())
        torch.manual_seed(config.seed)
        encoder = create_encoder(DEFAULT_ARCH, config.dim, config.pooling)
        store.models_dir.mkdir(parents=True, exist_ok=True)
        work = store.models_dir / ".untrained"
        version = save_model(work, encoder, {"arch": DEFAULT_ARCH, "image_size": config.input_size,
                                              "train_config": config.to_dict(), "steps": 0,
                                              "data": {"images_given": n}})
        os.rename(work, store.models_dir / version)
        store.write_pointer("models/CURRENT", version)
        summary = run_index(store, [folder], progress=False, retrain="never")
    return {"budget_minutes": 0, "steps": 0, "model": summary.get("model"), "stages": summary.get("stages"),
            "wall_s": time.monotonic() - started}


def _nearsight_predictions(store_dir: Path, records: list[dict], col: dict[str, int], k: int) -> tuple:
    """(Predictions, calibrated threshold, calibration summary) of one nearsight store."""
    from nearsight.indexer.calibration.calibration_report import groups_line
    from nearsight.indexer.reading.images import read_image
    from nearsight.indexer.matching.query import Searcher

    with _store(store_dir, create=False) as store:
        searcher = Searcher(store)
        cal = searcher.generation.load_calibration()
        parts = []
        for start in range(0, len(records), 64):
            block = records[start : start + 64]
            images = [read_image(r["path"], max_side=2 * searcher.size)[0] for r in block]
            answers = searcher.neighbours(searcher.vectors_for_images(images), k, images=images)
            q, r, s = [], [], []
            for offset, results in enumerate(answers):
                if len({hit["id"] for hit in results}) != len(results):  # pooled precision would count it twice
                    raise AssertionError(f"{block[offset]['path']}: a result list names a file twice: {results}")
                for hit in results:
                    q.append(start + offset)
                    r.append(col[Path(hit["path"]).name])
                    s.append(hit["similarity"])
            parts.append(metrics.Predictions(np.array(q, np.int64), np.array(r, np.int64), np.array(s)))
        near = (cal or {}).get("tiers", {}).get("near")
        query = (cal or {}).get("query")
        if query is not None:  # the query verdict: what `duplicate` follows by default
            calibration = {"question": "query", "target_false_flag_rate": query["target_false_flag_rate"],
                           "estimated_false_flag_rate": query["false_flag_rate"],
                           "estimated_recall": query["recall"], "target_met": query["target_confirmed"],
                           "groups": groups_line(cal) if cal.get("groups") else None}
        else:
            calibration = None if near is None else {
                "question": "pairs", "target": near.get("target_precision"),
                "estimated_precision": near["at_threshold"]["precision"],
                "estimated_recall": near["at_threshold"]["recall"], "target_met": near.get("target_met")}
        return metrics.concat(parts), searcher.verdict_threshold, calibration


def baseline_predictions(folder: Path, names: list[str], records: list[dict], k: int) -> dict[str, metrics.Predictions]:
    """pHash's and the thumbnail's top k for every query, over the collection files `names` in `folder`."""
    xb = baselines.describe_files([folder / n for n in names])
    xq = baselines.describe_files([Path(r["path"]) for r in records])
    return {name: baselines.search(name, xq[name], xb[name], k) for name in ("phash", "thumbnail")}


def query_groups(records: list[dict]) -> dict[str, np.ndarray]:
    """Per query, the label of each grouping the report breaks results down by."""
    def column(key):
        return np.array([r[key] for r in records])

    return {"family": column("family"), "transform": column("transform"), "severity": column("severity"),
            "family_severity": np.array([f"{r['family']} / {r['severity']}" for r in records]),
            "kind": column("kind"), "source": column("source"),
            # The families the protocol had before the rest of ImageNet-C's corruptions were added (2026-12-04):
            # their overall figures stay comparable with earlier reports.
            "scope": np.array([protocol.ADDED if r["family"] in protocol.ADDED_FAMILIES else protocol.EARLIER
                               for r in records])}


def evaluate(pred: metrics.Predictions, gt: np.ndarray, groups: dict[str, np.ndarray]) -> dict:
    """Every metric overall and for each label of each grouping (family, transform, severity, ...)."""
    def figures(queries: np.ndarray) -> dict:
        sub = pred.subset(np.isin(pred.q, queries))
        return {"uap": metrics.micro_ap(sub, gt, queries), "r1": metrics.recall_at_1(sub, gt, queries),
                "r_p90": metrics.recall_at_precision(sub, gt, 0.90, queries),
                "r_p99": metrics.recall_at_precision(sub, gt, 0.99, queries),
                "positives": int((gt[queries] >= 0).sum()), "queries": int(len(queries))}

    out = {"overall": figures(np.arange(len(gt)))}
    for key, labels in groups.items():
        out[key] = {g: figures(np.flatnonzero(labels == g)) for g in dict.fromkeys(labels.tolist())}
    return out


def verdicts(pred: metrics.Predictions, gt: np.ndarray, families: np.ndarray, threshold: float) -> dict:
    out = {"overall": metrics.verdict(pred, gt, threshold)}
    out["overall"]["no_match_flagged"] = metrics.flagged_queries(pred, gt, threshold)
    out["overall"]["best_recall_at_p99"] = metrics.recall_at_precision(pred, gt, 0.99)
    for f in dict.fromkeys(families.tolist()):
        queries = np.flatnonzero(families == f)
        out[f] = metrics.verdict(pred.subset(np.isin(pred.q, queries)), gt, threshold, queries)
    return out


def wrong_calls(pred: metrics.Predictions, gt: np.ndarray, threshold: float, names: list[str],
                query_refs: list[str], photo_of: dict[str, str]) -> dict:
    """Wrong duplicate verdicts by what was called: a tile of the query's own photo, another photo, a distractor;
    and by whether the query's original was indexed. `photo_of` maps a tile's file name to its photo."""
    wrong = (pred.score >= threshold) & ~pred.correct(gt)
    out = {"tile of the same photo": 0, "another photo": 0, "distractor": 0, "for queries without a match": 0}
    for q, r in zip(pred.q[wrong].tolist(), pred.r[wrong].tolist()):
        called, source = photo_of.get(names[r]), photo_of[query_refs[q]]
        out["distractor" if called is None else "tile of the same photo" if called == source else "another photo"] += 1
        out["for queries without a match"] += int(gt[q] < 0)
    return out


def collection_counts(refs: list) -> dict:
    """Photos, tiles, indexed and held-out tiles per source and per kind of photograph."""
    def counts(selected):
        return {"photos": len({r.photo for r in selected}), "tiles": len(selected),
                "indexed": sum(r.indexed for r in selected), "held_out": sum(not r.indexed for r in selected)}

    sources = [{"key": s.key, "package": s.package,
                "kinds": sorted({r.kind for r in refs if r.source == s.key}),
                **counts([r for r in refs if r.source == s.key])} for s in collection.SOURCES]
    return {"sources": sources, "kinds": {k: counts([r for r in refs if r.kind == k]) for k in collection.KINDS}}


def prepare(args) -> tuple[list, list[Path], list[str], list, list[dict]]:
    """Write the collection folder and the query files under args.work.

    Returns (photo tiles, distractor paths, collection file names, transforms, query records)."""
    work = args.work
    work.mkdir(parents=True, exist_ok=True)
    refs = collection.references(args.seed, limit=40 if args.quick else None)
    extra = collection.distractors(work / "demo", originals=args.originals, seed=7)
    folder = work / "collection"
    if folder.exists():
        shutil.rmtree(folder)
    names = collection.write_collection(folder, refs, extra)
    transforms = protocol.build_transforms()
    if args.quick:
        transforms = transforms[::4]
    if (work / "queries").exists():
        shutil.rmtree(work / "queries")
    plan = query_plan(refs, len(transforms), args.queries_per_transform, args.seed)
    records = make_queries(work, refs, transforms, plan, names, args.seed)
    return refs, extra, names, transforms, records


def counts(refs: list, extra: list[Path], names: list[str], transforms: list, records: list[dict],
           per_transform: int) -> tuple[dict, dict]:
    """The report's description of the collection and of the queries."""
    gt = np.array([r["gt"] for r in records], np.int64)
    kinds = np.array([r["kind"] for r in records])
    described = {"files": len(names), "photo_tiles": len(refs), "indexed_tiles": sum(r.indexed for r in refs),
                 "distractors": len(extra), **collection_counts(refs)}
    queries = {"total": len(records), "with_match": int((gt >= 0).sum()), "per_transform": per_transform,
               "by_kind": {k: {"total": int((kinds == k).sum()), "with_match": int(((kinds == k) & (gt >= 0)).sum())}
                           for k in collection.KINDS},
               "transforms": [(t.name, t.family, t.severity) for t in transforms]}
    return described, queries


def counts_text(described: dict, queries: dict) -> str:
    """A few lines for the log: photos and tiles per source, queries with and without a match."""
    lines = [f"{s['package']}: {s['photos']} photos, {s['tiles']} tiles ({s['indexed']} indexed, "
             f"{s['held_out']} held out)" for s in described["sources"]]
    lines.append(f"all: {described['indexed_tiles']} photo tiles indexed, "
                 f"{described['photo_tiles'] - described['indexed_tiles']} held out, {described['distractors']} "
                 f"distractors; {queries['total']} queries ({queries['with_match']} with a match, "
                 f"{queries['total'] - queries['with_match']} without)")
    return "\n".join(lines)


def run(args) -> dict:
    started = time.monotonic()
    work = args.work
    refs, extra, names, transforms, records = prepare(args)
    folder = work / "collection"
    # What benchmarks/rescore.py needs to score a changed query path on these stores without retraining.
    (work / "queries.json").write_text(json.dumps({"names": names, "records": records}, default=str))
    col = {name: i for i, name in enumerate(names)}
    gt = np.array([r["gt"] for r in records], np.int64)
    groups = query_groups(records)
    families = groups["family"]
    described, queries = counts(refs, extra, names, transforms, records, args.queries_per_transform)
    log.info("collection and queries:\n%s", counts_text(described, queries))

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
    for name, pred in baseline_predictions(folder, names, records, args.k).items():
        systems[name] = {"pred": pred}
    systems["phash"]["threshold"] = 1 - PHASH_COMMON_CUT / baselines.PHASH_BITS
    log.info("baselines described and searched in %.1f s", time.monotonic() - t0)

    results = {"machine": machine(LIBRARIES), "args": {k: str(v) for k, v in vars(args).items()},
               "collection": described, "queries": queries, "runs": runs, "systems": {}}
    photo_of = {r.name: r.photo for r in refs}
    for name, system in systems.items():
        entry = {"metrics": evaluate(system["pred"], gt, groups)}
        if system.get("threshold") is not None:
            entry["verdict"] = verdicts(system["pred"], gt, families, system["threshold"])
            entry["calibration"] = system.get("calibration")
            entry["wrong_calls"] = wrong_calls(system["pred"], gt, system["threshold"], names,
                                               [r["ref"] for r in records], photo_of)
        results["systems"][name] = entry
    if args.ablate:
        results["ablation"] = ablate(work, runs, folder, names, records, gt, families)
    results["wall_s"] = time.monotonic() - started
    results["machine_end"] = machine(LIBRARIES)
    return results


def ablate(work: Path, runs: dict, folder: Path, names: list[str], records: list[dict], gt: np.ndarray,
           families: np.ndarray) -> dict:
    """Every scoring lever alone and together on the first trained model (benchmarks/ablation.py)."""
    from benchmarks import ablation

    trained = next(info for info in runs.values() if info["budget_minutes"])
    store_dir = work / "stores" / f"train-{trained['budget_minutes']:g}min"
    model_dir = store_dir / "models" / trained["model"]
    t0 = time.monotonic()
    figures = ablation.run(model_dir, [folder / n for n in names], [Path(r["path"]) for r in records], gt, families,
                           classics=("dct8", "thumb16"), levers=ablation.report_levers(), cache=work / "ablation-cache")
    log.info("ablation scored in %.1f s", time.monotonic() - t0)
    return {"model": trained["model"], "budget_minutes": trained["budget_minutes"], "figures": figures}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--work", type=Path, default=Path("/tmp/nearsight-bench-quality"),
                        help="work folder (collection, queries, stores); reused demo archive")
    parser.add_argument("--minutes", type=float, nargs="+", default=[10],
                        help="training budgets, one index run each (default: 10; the untrained baseline always runs)")
    parser.add_argument("--originals", type=int, default=400, help="demo-archive originals used as distractors")
    parser.add_argument("--k", type=int, default=10, help="predictions per query")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--queries-per-transform", type=int,
                        help=f"tiles each transform is applied to (default {QUERIES_PER_TRANSFORM}, "
                             f"with --quick {QUICK_QUERIES_PER_TRANSFORM})")
    parser.add_argument("--quick", action="store_true",
                        help="40 photo tiles, every 4th transform, 8 queries per transform, 60 distractor originals, "
                             "0.3 min of training")
    parser.add_argument("--ablate", action="store_true",
                        help="also score every scoring lever alone and together on the trained model "
                             "(benchmarks/ablation.py; the table goes into the report)")
    parser.add_argument("--prepare-only", action="store_true",
                        help="write the collection and the queries, print their counts and stop (no indexing)")
    parser.add_argument("--out", type=Path, help="Markdown report (default benchmarks/results/quality.md; "
                                                 "with --quick, quality-quick.md in the work folder)")
    args = parser.parse_args()
    if args.queries_per_transform is None:
        args.queries_per_transform = QUICK_QUERIES_PER_TRANSFORM if args.quick else QUERIES_PER_TRANSFORM
    if args.quick:
        if args.minutes == [10]:
            args.minutes = [0.3]
        if args.originals == 400:
            args.originals = 60
        args.work = args.work.with_name(args.work.name + "-quick")
    results_dir = Path(__file__).resolve().parent / "results"
    out = args.out or (args.work / "quality-quick.md" if args.quick else results_dir / "quality.md")
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(message)s")
    if args.prepare_only:
        described, queries = counts(*prepare(args), args.queries_per_transform)
        print(counts_text(described, queries))
        return
    for runs in os.listdir(args.work / "stores") if (args.work / "stores").exists() else []:
        shutil.rmtree(args.work / "stores" / runs)  # every run indexes afresh
    shutil.rmtree(args.work / "ablation-cache", ignore_errors=True)
    results = run(args)
    (args.work / "results.json").write_text(json.dumps(results, indent=1, default=float))
    command = " ".join([".venv/bin/python benchmarks/bench_quality.py", *sys.argv[1:]])
    report = render(results, command)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(report)
    print(report)


if __name__ == "__main__":
    main()
