"""Score the query path of the code as it is now on stores a quality run already trained.

A development aid: `bench_quality.py` trains and indexes (about 15 minutes); a change that
acts only after training (how a query is described, searched, normalised, verified) can be
measured again on the same stores in a minute or two, with the same metrics.

    .venv/bin/python benchmarks/rescore.py --work /tmp/nearsight-bench-quality [--store train-10min]

Prints the overall figures, recall@1 and µAP per family, and the realised verdict.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks import bench_quality, protocol  # noqa: E402
from benchmarks.bench_quality import _nearsight_predictions, _store, evaluate, query_groups, verdicts  # noqa: E402


def _recalibrated_copy(store_dir: Path) -> Path:
    """A copy of the store (beside it, named *-rescored), recalibrated by the current code."""
    import shutil

    from nearsight.indexer.building.refresh import make_generation
    from nearsight.indexer.calibration.calibrate import CalibrationConfig

    copy = store_dir.with_name(store_dir.name + "-rescored")
    shutil.rmtree(copy, ignore_errors=True)
    shutil.copytree(store_dir, copy, symlinks=True)
    t0 = time.monotonic()
    with _store(copy, create=False) as store:
        make_generation(store, build="recalibrate", calibration=CalibrationConfig.from_settings(store.settings))
    print(f"recalibrated a copy of {store_dir.name} in {time.monotonic() - t0:.0f} s")
    return copy


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--work", type=Path, default=Path("/tmp/nearsight-bench-quality"))
    parser.add_argument("--store", default="train-10min", help="store under WORK/stores (default train-10min)")
    parser.add_argument("--k", type=int, default=10)
    parser.add_argument("--set", action="append", default=[], metavar="NAME=VALUE",
                        help="a setting for this scoring (e.g. mirror_view=off); repeatable")
    parser.add_argument("--add-queries", action="store_true",
                        help="first make the queries of transforms the protocol has gained since the quality run "
                             "(each keeps the seeded sample of tiles a full run would give it) and add them to "
                             "WORK/queries.json")
    parser.add_argument("--baselines", action="store_true",
                        help="also score pHash and the 16x16 thumbnail on the same queries (about a minute more)")
    parser.add_argument("--recalibrate", action="store_true",
                        help="calibrate a copy of the store with the current code (and --set) first, "
                             "as `nearsight calibrate` would; the trained store is left as it is")
    args = parser.parse_args()
    logging.basicConfig(level=logging.WARNING)
    bench_quality.SETTINGS_OVERRIDES.update(dict(item.split("=", 1) for item in args.set))
    store_dir = args.work / "stores" / args.store
    if args.recalibrate:
        store_dir = _recalibrated_copy(store_dir)
    if args.add_queries:
        add_queries(args.work)
    saved = json.loads((args.work / "queries.json").read_text())
    names, records = saved["names"], saved["records"]
    col = {name: i for i, name in enumerate(names)}
    gt = np.array([r["gt"] for r in records], np.int64)
    groups = query_groups(records)
    t0 = time.monotonic()
    pred, threshold, _ = _nearsight_predictions(store_dir, records, col, args.k)
    wall = time.monotonic() - t0
    figures = evaluate(pred, gt, groups)
    verdict = verdicts(pred, gt, groups["family"], threshold)["overall"]
    o = figures["overall"]
    print(f"{args.store}: µAP {o['uap']:.3f}  R@1 {o['r1']:.3f}  R@P90 {o['r_p90']:.3f}  R@P99 {o['r_p99']:.3f}"
          f"  ({len(records)} queries in {wall:.0f} s)")
    earlier = figures["scope"].get(protocol.EARLIER)
    if earlier is not None and len(figures["scope"]) > 1:
        print(f"  without {', '.join(protocol.ADDED_FAMILIES)}: µAP {earlier['uap']:.3f}  R@1 {earlier['r1']:.3f}"
              f"  R@P90 {earlier['r_p90']:.3f}  R@P99 {earlier['r_p99']:.3f}")
    print(f"verdict at {threshold:.3f}: precision {verdict['precision']:.3f}  recall {verdict['recall']:.3f}"
          f"  no-match flagged {verdict['no_match_flagged']['flagged']}"
          f" of {verdict['no_match_flagged']['queries']}")
    others = baseline_figures(args.work, names, records, gt, groups, args.k) if args.baselines else {}
    head = "".join(f"  {name[:9]:>9s} µAP / R@1" for name in others)
    print(f"family      µAP    R@1{head}")
    for family, f in figures["family"].items():
        more = "".join(f"  {o['family'][family]['uap']:.3f} / {o['family'][family]['r1']:.3f}  "
                       for o in others.values())
        print(f"{family:10s} {f['uap']:.3f}  {f['r1']:.3f}{more}")
    print(f"transform            µAP    R@1{head}")
    for name, f in figures["transform"].items():
        if f["r1"] < 0.95 or others:
            more = "".join(f"  {o['transform'][name]['uap']:.3f} / {o['transform'][name]['r1']:.3f}  "
                           for o in others.values())
            print(f"{name:20s} {f['uap']:.3f}  {f['r1']:.3f}{more}")


def add_queries(work: Path) -> None:
    """Make the queries of the protocol's transforms that WORK/queries.json lacks (new ones are appended to the
    protocol, so `query_plan` gives each the tiles a full run would) and add them to it."""
    from benchmarks import collection

    saved = json.loads((work / "queries.json").read_text())
    have = {r["transform"] for r in saved["records"]}
    transforms = protocol.build_transforms()
    if all(t.name in have for t in transforms):
        return
    # The run's seed and tiles per transform, as its results.json recorded them (the defaults otherwise).
    ran = json.loads((work / "results.json").read_text())["args"] if (work / "results.json").exists() else {}
    seed = int(ran.get("seed", 0))
    per_transform = int(ran.get("queries_per_transform", bench_quality.QUERIES_PER_TRANSFORM))
    refs = collection.references(seed)
    plan = bench_quality.query_plan(refs, len(transforms), per_transform, seed)
    plan = [(i, j) for i, j in plan if transforms[j].name not in have]
    records = bench_quality.make_queries(work, refs, transforms, plan, saved["names"], seed)
    saved["records"] += records
    (work / "queries.json").write_text(json.dumps(saved, default=str))
    print(f"added {len(records)} queries of {len({r['transform'] for r in records})} transforms")


def baseline_figures(work: Path, names: list[str], records: list[dict], gt: np.ndarray, groups: dict,
                     k: int) -> dict[str, dict]:
    """pHash's and the thumbnail's figures on the same queries (`evaluate`)."""
    return {name: evaluate(pred, gt, groups)
            for name, pred in bench_quality.baseline_predictions(work / "collection", names, records, k).items()}


if __name__ == "__main__":
    main()
