"""What one query costs with every step on: decode, embed (the image and its mirror), search, normalise, verify.

Reads the queries of a quality-benchmark work folder (benchmarks/bench_quality.py --work WORK
writes them) and answers them against its trained store exactly as `nearsight similar` does
(`Searcher.neighbours` with the query images), in batches of `--batch` like the command. Reported:
ms per query overall and per stage, four times in one run: with the candidates' keypoints found at
query time (a store indexed with keep_keypoints = false), read from the files kept beside the small
copies (indexer/matching/keypoints.py, what a fresh `nearsight similar` meets), and kept in memory
(rerank.small_features, what a folder of queries or a long-running service meets); and what keeping
them costs at index time and on disk.

Nothing is asserted; the figures are for benchmarks/results/query.md.

    .venv/bin/python benchmarks/bench_query.py --work /tmp/nsq/work --out benchmarks/results/query.md
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.common import machine  # noqa: E402

LIBRARIES = ("numpy", "torch", "faiss-cpu", "pillow", "opencv-python-headless")


def _answer(searcher, paths: list[str], batch: int, forget=None) -> dict[str, list[float]]:
    """Per stage, seconds per query of each batch (decode, embed, search + normalise + verify);
    `forget()`, when given, runs before each batch (untimed)."""
    from nearsight.indexer.matching.query import read_queries

    stages: dict[str, list[float]] = {"decode": [], "embed": [], "search and verify": [], "total": []}
    for start in range(0, len(paths), batch):
        block = paths[start : start + batch]
        if forget is not None:
            forget()
        t0 = time.perf_counter()
        images = read_queries(block, 2 * searcher.size)  # as `similar` reads them: on every core at once
        t1 = time.perf_counter()
        xq = searcher.vectors_for_images(images)
        t2 = time.perf_counter()
        searcher.neighbours(xq, 10, images=images)
        t3 = time.perf_counter()
        n = len(block)
        stages["decode"].append((t1 - t0) / n)
        stages["embed"].append((t2 - t1) / n)
        stages["search and verify"].append((t3 - t2) / n)
        stages["total"].append((t3 - t0) / n)
    return stages


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--work", type=Path, required=True, help="a bench_quality.py work folder")
    parser.add_argument("--store", default="train-10min", help="the store under WORK/stores")
    parser.add_argument("--queries", type=int, default=600)
    parser.add_argument("--batch", type=int, default=32, help="queries per batch (`similar` uses 32)")
    parser.add_argument("--out", type=Path)
    parser.add_argument("--set", action="append", default=[], metavar="NAME=VALUE",
                        help="a setting other than its default (e.g. mirror_view=off); repeatable")
    args = parser.parse_args()

    from nearsight.indexer.matching import keypoints
    from nearsight.indexer.matching import rerank
    from nearsight.indexer.core.cores import each_on_cores
    from nearsight.indexer.matching.query import Searcher
    from nearsight.indexer.core.settings import load_settings
    from nearsight.indexer.storage.store import Store

    overrides = dict(item.split("=", 1) for item in args.set)
    files = sorted(str(p) for p in (args.work / "queries").rglob("*") if p.is_file())
    rng = np.random.default_rng(0)
    paths = [files[i] for i in sorted(rng.choice(len(files), min(args.queries, len(files)), replace=False).tolist())]
    before = machine(LIBRARIES)

    def forget():
        rerank._features_at.cache_clear()
        rerank._fine_features_at.cache_clear()

    with Store.open(args.work / "stores" / args.store, settings=load_settings(environ={}, overrides=overrides)) as store:
        searcher = Searcher(store)
        _answer(searcher, paths[: args.batch], args.batch)  # load the model and index pages once
        # As a store indexed with keep_keypoints = false: every candidate's keypoints found at query time.
        real_load, keypoints.load = keypoints.load, lambda path, which: None
        try:
            found = _answer(searcher, paths, args.batch, forget=forget)
        finally:
            keypoints.load = real_load
        # What keeping them costs at index time: both sets of every small copy, on every core.
        small = [store.thumb_path(r["hash"]) for r in store.catalog.readable_contents() if r["thumb"]]
        t0 = time.perf_counter()
        sizes = each_on_cores(lambda p: len(keypoints.find(p)), small)
        find_s = time.perf_counter() - t0
        keypoints.keep_missing(store)
        forget()
        each_batch_new = _answer(searcher, paths, args.batch, forget=forget)
        forget()
        one_pass = _answer(searcher, paths, args.batch)
        kept = _answer(searcher, paths, args.batch)
    runs = (found, each_batch_new, one_pass, kept)
    rows = []
    for stage in kept:
        rows.append("| " + stage + " | " + " | ".join(f"{1000 * statistics.median(run[stage]):.1f}"
                                                      for run in runs) + " |")
    text = "\n".join([
        "# One query with every step on",
        "",
        f"Machine: {before}",
        "",
        f"Command: `.venv/bin/python benchmarks/bench_query.py --work {args.work}` ({len(paths)} queries of the "
        f"quality benchmark, batches of {args.batch}, against its store `{args.store}`: top 10, score "
        "normalisation, geometric verification of the best 3 on the small copies; for a query whose best did "
        "not verify, its mirror image, itself upside down, a quarter-turn either way and the picture inside a frame searched too, its "
        "mirrored keypoints tried and 12 more candidates verified"
        + (f"; settings changed: {', '.join(args.set)}" if args.set else "") + ").",
        "",
        "| stage | ms per query: candidates' keypoints found at query time, none in memory | kept at index "
        "time, none in memory | ... in memory from the pass's start | ... in memory from an earlier pass |",
        "|---|---:|---:|---:|---:|",
        *rows,
        "",
        "Medians over batches. First column: as a store indexed with `keep_keypoints = false`, every batch "
        "starting with no candidate's keypoints in memory, so each is found from its small copy (as every query "
        "did before keypoints were kept, indexer/matching/keypoints.py). Second: the keypoints kept beside the small "
        "copies are read, every batch starting with none in memory, as a fresh `nearsight similar` of 32 images "
        "does. Third: one pass over all the queries with the memory emptied at its start (candidates recur "
        "between batches, as in a folder of queries). Fourth: the same queries again, every candidate in "
        "memory (a long-running service). All four ran in this one process, one after the other; the answers "
        "are the same in every column. The benchmark's query files are small (longest side 236 / 256 / 360 px "
        "at the 10th / 50th / 90th percentile), so decoding is cheap here; a 12-megapixel JPEG costs about "
        "34 ms more to decode in draft mode (benchmarks/results/embed.md: 29.6 images/s).",
        "",
        f"Keeping the keypoints at index time: {1000 * find_s / max(1, len(small)):.1f} ms an image on "
        f"{len(os.sched_getaffinity(0))} cores ({len(small)} small copies in {find_s:.1f} s), "
        f"{statistics.mean(sizes) / 1024:.0f} KiB an image on disk (mean; the small copies themselves: "
        f"{statistics.mean(p.stat().st_size for p in small) / 1024:.0f} KiB).",
        "",
    ])
    if args.out:
        args.out.write_text(text, encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
