"""Would grouping find the quality benchmark's copies? Pair rules scored on a store a quality run trained.

A development aid beside `rescore.py`. The queries of `bench_quality.py` are not indexed, so its report
says nothing about `groups`. This script treats each query and each of its first three results as a pair
the nightly build could have to judge, and counts, for several pair rules, the copies it would group
(pair recall over the queries that have an original) and the pairs it would group wrongly:

* the rule the build uses: the descriptor cosine at or above the generation's near threshold, or the
  pair verified (geometric verification, as `pair_verify.py` joins pairs);
* query-adaptive normalisation applied to pairs: the cosine less beta times the two files' background
  statistics (their mean, or the larger), at a range of thresholds, or the pair verified.

    .venv/bin/python benchmarks/group_pairs.py --work /tmp/nearsight-bench-quality
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.bench_quality import _store  # noqa: E402

TOP = 3  # results per query taken as candidate pairs (the verified top of a query)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--work", type=Path, default=Path("/tmp/nearsight-bench-quality"))
    parser.add_argument("--store", default="train-10min")
    args = parser.parse_args()
    logging.basicConfig(level=logging.ERROR)
    from nearsight.indexer.building.build import whitened_vectors
    from nearsight.indexer.matching.query import BACKGROUND_SEARCH, Searcher, background_statistic
    from nearsight.indexer.reading.images import read_image

    saved = json.loads((args.work / "queries.json").read_text())
    names, records = saved["names"], saved["records"]
    rows = []  # (has an original, is it, cosine, verified, query background, result background)
    with _store(args.work / "stores" / args.store, create=False) as store:
        s = Searcher(store)
        gen = s.generation
        t_near = float(gen.meta["thresholds"]["near"])
        ids, xb = whitened_vectors(store, gen.meta["model"], gen.load_whitening())
        dist, _ = s.index.search(xb, BACKGROUND_SEARCH + 1)
        background = {int(i): background_statistic(list(d), copy_threshold=s.threshold) for i, d in zip(ids, dist)}
        for start in range(0, len(records), 64):
            block = records[start : start + 64]
            images = [read_image(r["path"], max_side=2 * s.size)[0] for r in block]
            xq = s.vectors_for_images(images)
            dq, _ = s.index.search(xq, BACKGROUND_SEARCH + 1)
            for r, results, d in zip(block, s.neighbours(xq, 10, images=images), dq):
                bq = background_statistic(list(d), copy_threshold=s.threshold)
                for h in results[:TOP]:
                    right = r["gt"] >= 0 and Path(h["path"]).name == names[r["gt"]]
                    verified = bool((h.get("evidence") or {}).get("verified"))
                    rows.append((right, h["descriptor_similarity"], verified, bq, background.get(h["id"], 0.0)))
    with_original = sum(1 for r in records if r["gt"] >= 0)
    print(f"{len(records)} queries, {with_original} with an original; generation near threshold {t_near:.4f}")
    print("| rule | pair recall | wrong pairs (unverified) |\n|---|---:|---:|")

    def report(name, rule):
        right = sum(1 for row in rows if row[0] and rule(row))
        wrong = [row for row in rows if not row[0] and rule(row)]
        print(f"| {name} | {right / with_original:.3f} | {len(wrong)} ({sum(1 for row in wrong if not row[2])}) |")

    report(f"cosine >= {t_near:.3f} or verified (the build's)", lambda row: row[1] >= t_near or row[2])
    report(f"cosine >= {t_near:.3f}", lambda row: row[1] >= t_near)
    for beta in (1.0, 0.7):
        for form, combine in (("mean", lambda a, b: (a + b) / 2), ("max", max)):
            for t in np.arange(0.44, 0.69, 0.04):
                report(f"cosine - {beta} x {form} background >= {t:.2f} or verified",
                       lambda row: row[1] - beta * combine(row[3], row[4]) >= t or row[2])


if __name__ == "__main__":
    main()
