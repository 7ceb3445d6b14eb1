"""What one query costs with every step on: decode, embed (the image and its mirror), search, normalise, verify.

Reads the queries of a quality-benchmark work folder (benchmarks/bench_quality.py --work WORK
writes them) and answers them against its trained store exactly as `nearsight similar` does
(`Searcher.neighbours` with the query images), in batches of `--batch` like the command. Reported:
ms per query overall and per stage, with the verification step timed twice in one run: with the
candidates' keypoints not yet known (the first time a candidate is met), and again with them kept
in memory (rerank.small_features, what a long-running service or a folder of queries meets).

Nothing is asserted; the figures are for benchmarks/results/query.md.

    .venv/bin/python benchmarks/bench_query.py --work /tmp/nsq/work --out benchmarks/results/query.md
"""

from __future__ import annotations

import argparse
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
    from nearsight.indexer.query import read_queries

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

    from nearsight.indexer import rerank
    from nearsight.indexer.query import Searcher
    from nearsight.indexer.settings import load_settings
    from nearsight.indexer.store import Store

    overrides = dict(item.split("=", 1) for item in args.set)
    files = sorted(str(p) for p in (args.work / "queries").rglob("*") if p.is_file())
    rng = np.random.default_rng(0)
    paths = [files[i] for i in sorted(rng.choice(len(files), min(args.queries, len(files)), replace=False).tolist())]
    before = machine(LIBRARIES)
    with Store.open(args.work / "stores" / args.store, settings=load_settings(environ={}, overrides=overrides)) as store:
        searcher = Searcher(store)
        _answer(searcher, paths[: args.batch], args.batch)  # load the model and index pages once
        forget = rerank._features_at.cache_clear
        each_batch_new = _answer(searcher, paths, args.batch, forget=forget)
        forget()
        one_pass = _answer(searcher, paths, args.batch)
        kept = _answer(searcher, paths, args.batch)
    rows = []
    for stage in kept:
        rows.append("| " + stage + " | " + " | ".join(f"{1000 * statistics.median(run[stage]):.1f}"
                                                      for run in (each_batch_new, one_pass, kept)) + " |")
    text = "\n".join([
        "# One query with every step on",
        "",
        f"Machine: {before}",
        "",
        f"Command: `.venv/bin/python benchmarks/bench_query.py --work {args.work}` ({len(paths)} queries of the "
        f"quality benchmark, batches of {args.batch}, against its store `{args.store}`: top 10, score "
        "normalisation, geometric verification of the best 3 on the small copies; for a query whose best did "
        "not verify, its mirror image, itself upside down and the picture inside a frame searched too, its "
        "mirrored keypoints tried and 12 more candidates verified"
        + (f"; settings changed: {', '.join(args.set)}" if args.set else "") + ").",
        "",
        "| stage | ms per query: keypoints forgotten before every batch | ... kept from the pass's start | "
        "... kept from an earlier pass |",
        "|---|---:|---:|---:|",
        *rows,
        "",
        "Medians over batches. First column: every batch starts with no candidate's keypoints known, as a "
        "fresh `nearsight similar` of 32 images does. Second: one pass over all the queries with the cache "
        "emptied at its start (candidates recur between batches, as in a folder of queries). Third: the same "
        "queries again, every candidate known (a long-running service). All three ran in this one process, "
        "one after the other. The benchmark's query files are small (longest side 236 / 256 / 360 px at the "
        "10th / 50th / 90th percentile), so decoding is cheap here; a 12-megapixel JPEG costs about 34 ms more "
        "to decode in draft mode (benchmarks/results/embed.md: 29.6 images/s).",
        "",
    ])
    if args.out:
        args.out.write_text(text, encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
