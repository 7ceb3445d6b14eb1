"""Index and grouping speed, memory and recall on synthetic embeddings.

Makes seeded 128-d unit vectors: Gaussian clusters (unrelated images of one
kind) where 3% of items get 1-3 near copies (the original plus small Gaussian
noise, renormalised). Then, in the same run:

* groups: choose_spec, build_index, tune_search, range_pairs and build_groups over
  the whole set; wall time per stage, peak memory (ru_maxrss), planted copy pairs
  found, pair recall against brute force on a query sample;
* queries: for 10k, 100k and 1M vectors and each index type (Flat, IVF-SQ8, IVF-PQ,
  HNSW32): build time, single-query latency for k=10, recall@10 against exact
  search, bytes per vector on disk.

Writes a Markdown report (default benchmarks/results/index.md). Nothing is
asserted; numbers depend on the machine. ``--quick`` caps sizes at 100k.

    .venv/bin/python benchmarks/bench_index.py --quick
"""

from __future__ import annotations

import argparse
import logging
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

import faiss
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from nearsight.indexer.matching import index as ix  # noqa: E402
from nearsight.indexer.matching import index_spec as spec_of  # noqa: E402
from nearsight.indexer.matching.groups import ImageMeta, build_groups  # noqa: E402

BLOCK = 100_000


def unit_rows(x: np.ndarray) -> np.ndarray:
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    return x


def synthetic(n: int, dim: int, seed: int, copy_share: float = 0.03):
    """(xb, ids, planted pairs): clusters plus near copies; built block by block."""
    rng = np.random.default_rng(seed)
    centres = unit_rows(rng.standard_normal((1000, dim)).astype(np.float32))
    # Decaying per-dimension spread: embeddings have a low intrinsic dimension.
    spread = (0.12 / (1 + np.arange(dim)) ** 0.5).astype(np.float32)
    spread *= 0.12 / np.sqrt((spread ** 2).mean())
    # `copy_share` of the originals get 1-3 copies (2 on average).
    need = int(round(n * 2 * copy_share / (1 + 2 * copy_share)))
    copies = rng.integers(1, 4, need)
    count = int(np.searchsorted(np.cumsum(copies), need)) + 1
    copies = copies[:count]
    copies[-1] -= copies.sum() - need
    n_base = n - need
    sources = rng.choice(n_base, count, replace=False)
    xb = np.empty((n, dim), np.float32)
    for start in range(0, n_base, BLOCK):
        stop = min(n_base, start + BLOCK)
        members = rng.integers(0, len(centres), stop - start)
        xb[start:stop] = unit_rows(centres[members] + spread * rng.standard_normal((stop - start, dim),
                                                                                    dtype=np.float32))
    origin = np.repeat(sources, copies)
    for start in range(0, origin.shape[0], BLOCK):
        part = origin[start:start + BLOCK]
        noise = 0.02 * rng.standard_normal((part.shape[0], dim), dtype=np.float32)
        xb[n_base + start:n_base + start + part.shape[0]] = unit_rows(xb[part] + noise)
    ids = rng.permutation(n).astype(np.int64) + 1  # catalog ids, unrelated to row order
    planted = np.stack([ids[origin], ids[n_base:]], 1)
    return xb, ids, planted


def near_queries(rng, xb, count):
    rows = rng.choice(xb.shape[0], count, replace=False)
    return unit_rows(xb[rows] + 0.05 * rng.standard_normal((count, xb.shape[1]), dtype=np.float32))


def peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux reports KiB


def disk_bytes(index) -> int:
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "i.faiss"
        ix.save_index(index, path)
        return path.stat().st_size


def bench_groups(xb, ids, planted, threshold, seed, compare: bool = True):
    rng = np.random.default_rng(seed)
    n, dim = xb.shape
    spec = spec_of.choose_spec(n, dim)
    t0 = time.perf_counter()
    index = ix.build_index(xb, ids, spec)
    t_build = time.perf_counter() - t0
    t0 = time.perf_counter()
    sample = xb[rng.choice(n, 1000, replace=False)]
    tuned = ix.tune_search(index, sample, 0.95, 10, xb=xb, ids=ids)
    t_tune = time.perf_counter() - t0
    t0 = time.perf_counter()
    pair_tuning = ix.tune_pair_search(index, xb, ids, threshold)
    t_pair_tune = time.perf_counter() - t0
    t0 = time.perf_counter()
    a, b, s = ix.range_pairs(index, xb, ids, threshold, params=pair_tuning["params"])
    t_pairs = time.perf_counter() - t0
    mem_pairs = peak_mib()
    untuned = None
    if compare:  # the self-join at the query's nprobe, as grouping ran it before the pair tuning
        t0 = time.perf_counter()
        ua, ub, _ = ix.range_pairs(index, xb, ids, threshold)
        untuned = {"t_pairs": time.perf_counter() - t0, "pairs": len(ua)}
    involved = np.unique(np.r_[a, b])
    meta = {int(i): ImageMeta(path=f"/photos/{i:07d}.jpg", content_hash=f"{i:x}", width=4000,
                              height=3000, file_size=3_000_000 + int(i) % 997, format="JPEG",
                              mtime=1.6e9 + int(i)) for i in involved}
    t0 = time.perf_counter()
    groups = build_groups(a, b, s, meta, t_near=0.95, t_similar=threshold)
    t_groups = time.perf_counter() - t0
    got = set(zip(a.tolist(), b.tolist()))
    planted_found = sum((min(p, q), max(p, q)) in got for p, q in planted.tolist())
    rows = rng.choice(n, 500, replace=False)
    truth = ix.exact_pairs_of(xb, ids, rows, threshold)  # brute force (checked against NumPy in tests)
    sample_ids = set(ids[rows].tolist())
    mine = {p for p in got if p[0] in sample_ids or p[1] in sample_ids}
    pair_recall = len(mine & truth) / max(1, len(truth))
    return {
        "n": n, "spec": spec, "params": tuned["params"], "tuned_recall": tuned["recall"],
        "t_build": t_build, "t_tune": t_tune, "t_pair_tune": t_pair_tune, "pair_tuning": pair_tuning,
        "untuned": untuned, "t_pairs": t_pairs, "t_groups": t_groups,
        "pairs": len(a), "groups": len(groups), "files": sum(g.size for g in groups),
        "planted": len(planted), "planted_found": planted_found, "pair_recall": pair_recall,
        "truth_pairs": len(truth), "mem_pairs": mem_pairs, "mem_total": peak_mib(),
    }


def query_specs(n: int, dim: int) -> dict[str, str]:
    nlist = spec_of.ivf_nlist(n)
    return {"Flat": "IDMap2,Flat", "IVF-SQ8": f"IVF{nlist},SQ8", "IVF-PQ": f"IVF{nlist},PQ{dim // 4}",
            "HNSW32": "IDMap2,HNSW32"}


def single_queries(index, xq: np.ndarray, k: int = 10) -> tuple[np.ndarray, np.ndarray]:
    """(ids found, ms per query) of one search call per query row on one FAISS thread, after a warm-up.
    One thread per query, as a server answers one request per thread: with shared cores, OpenMP's
    waiting threads can cost 100x on a single query."""
    threads = faiss.omp_get_max_threads()
    faiss.omp_set_num_threads(1)
    try:
        ix.search(index, xq[:10], k)  # warm up
        found, times = [], []
        for i in range(xq.shape[0]):
            start = time.perf_counter()
            found.append(ix.search(index, xq[i:i + 1], k)[1])
            times.append(time.perf_counter() - start)
    finally:
        faiss.omp_set_num_threads(threads)
    return np.vstack(found), np.array(times) * 1000


def bench_queries(xb, ids, seed, nq=300):
    rng = np.random.default_rng(seed)
    tune_q, xq = near_queries(rng, xb, 500), near_queries(rng, xb, nq)
    _, I_ref = faiss.knn(xq, xb, 10, metric=faiss.METRIC_INNER_PRODUCT)
    I_ref = ids[I_ref]
    rows = []
    for name, spec in query_specs(*xb.shape).items():
        t0 = time.perf_counter()
        index = ix.build_index(xb, ids, spec)
        t_build = time.perf_counter() - t0
        tuned = ix.tune_search(index, tune_q, 0.95, 10, xb=xb, ids=ids)
        I, times = single_queries(index, xq)
        rows.append({"n": xb.shape[0], "index": name, "spec": spec, "params": tuned["params"],
                     "t_build": t_build, "latency_ms": float(times.mean()), "recall": ix.knn_recall(I, I_ref),
                     "bytes": disk_bytes(index) / xb.shape[0]})
        logging.info("%s", rows[-1])
        del index
    return rows


def bench_large(n: int, dim: int, seed: int, nq: int = 300, refine: bool = False) -> list[dict]:
    """k=10 queries at `n` vectors with the index `choose_spec` gives the product there (and, with
    `refine`, the same index re-ranking its candidates with the full vectors, FAISS's RFlat)."""
    xb, ids, _ = synthetic(n, dim, seed)
    rng = np.random.default_rng(seed)
    tune_q, xq = near_queries(rng, xb, 500), near_queries(rng, xb, nq)
    t0 = time.perf_counter()
    _, I_ref = faiss.knn(xq, xb, 10, metric=faiss.METRIC_INNER_PRODUCT)
    logging.info("exact reference for %d queries in %.1f s", nq, time.perf_counter() - t0)
    I_ref = ids[I_ref]
    spec = spec_of.choose_spec(n, dim)
    specs = {"product default": spec,
             **({"with full-vector re-ranking of 4k candidates": "IDMap2," + spec + ",RFlat"} if refine and "IVF" in spec else {})}
    rows = []
    for name, sp in specs.items():
        t0 = time.perf_counter()
        index = ix.build_index(xb, ids, sp)
        t_build = time.perf_counter() - t0
        logging.info("built %s in %.1f s", sp, t_build)
        if sp.endswith("RFlat"):
            faiss.downcast_index(faiss.downcast_index(index).index).k_factor = 4
        tuned = ix.tune_search(index, tune_q, 0.95, 10, xb=xb, ids=ids)
        I, times = single_queries(index, xq)
        rows.append({"n": n, "index": name, "spec": sp, "params": tuned["params"], "t_build": t_build,
                     "latency_ms": float(times.mean()), "p50": float(np.median(times)),
                     "p99": float(np.percentile(times, 99)), "recall": ix.knn_recall(I, I_ref),
                     "bytes": disk_bytes(index) / n, "rss": peak_mib()})
        logging.info("%s", rows[-1])
        del index
    return rows


def large_report(rows: list[dict], args, load: tuple[float, float]) -> str:
    lines = [f"# k=10 queries at {rows[0]['n']:,} vectors", "",
             f"Machine: {machine()}.", "",
             f"Written by `.venv/bin/python benchmarks/bench_index.py --large {args.large}`. Synthetic {args.dim}-d "
             f"unit vectors, seed {args.seed}, as in index.md (1000 Gaussian clusters, 3 % near copies). The "
             "index is the one `choose_spec` gives the product at this size, built with `build_index` (IVF trained "
             "on a seeded sample of 39 points per list), tuned by `tune_search` to recall@10 >= 0.95 on 500 "
             "separate near queries against exact search; then 300 more near queries, one per search call on one "
             "FAISS thread (as the service answers), recall@10 against `faiss.knn` over every vector.", "",
             "| index | spec | params | build (s) | ms/query mean | p50 | p99 | recall@10 | bytes/vector | peak RSS (MiB) |",
             "|---|---|---|---:|---:|---:|---:|---:|---:|---:|"]
    for r in rows:
        lines.append(f"| {r['index']} | `{r['spec']}` | {r['params']} | {r['t_build']:.0f} | {r['latency_ms']:.2f} "
                     f"| {r['p50']:.2f} | {r['p99']:.2f} | {r['recall']:.3f} | {r['bytes']:.0f} | {r['rss']:.0f} |")
    lines += ["", f"1-minute load average: {load[0]:.1f} at the start, {load[1]:.1f} at the end."]
    return "\n".join(lines) + "\n"


def machine() -> str:
    from benchmarks.common import machine as machine_line

    return f"{machine_line()}; FAISS threads {faiss.omp_get_max_threads()}"


def report(g: dict, queries: list[dict], args) -> str:
    lines = [
        "# Index and grouping benchmark", "",
        f"Machine: {machine()}.", "",
        f"Synthetic {args.dim}-d unit vectors, seed {args.seed}: 1000 Gaussian clusters "
        "(decaying per-dimension spread), 3% of items with 1-3 near copies (original + "
        "N(0, 0.02^2) per dimension, renormalised).", "",
        f"## groups over {g['n']:,} vectors (threshold {args.threshold})", "",
        "| stage | value |", "|---|---:|",
        f"| index (choose_spec) | `{g['spec']}` {g['params']} |",
        f"| build_index | {g['t_build']:.1f} s |",
        f"| tune_search (1000 queries, exact reference) | {g['t_tune']:.1f} s, recall@10 {g['tuned_recall']:.3f} |",
        f"| tune_pair_search ({g['pair_tuning']['sample_pairs']} exact pairs on a 2000-row sample) | "
        f"{g['t_pair_tune']:.1f} s: nprobe {g['pair_tuning']['params'].get('nprobe', '-')}, "
        f"sample pair recall {g['pair_tuning']['pair_recall']} |",
        f"| range_pairs at that nprobe | {g['t_pairs']:.1f} s, {g['pairs']:,} pairs |",
        *([f"| range_pairs at the query's nprobe (before the pair tuning, same run) | "
           f"{g['untuned']['t_pairs']:.1f} s, {g['untuned']['pairs']:,} pairs |"] if g.get("untuned") else []),
        f"| `groups` on the generation's index: pair tuning + range_pairs + build_groups | "
        f"{g['t_pair_tune'] + g['t_pairs'] + g['t_groups']:.1f} s |",
        f"| build_groups | {g['t_groups']:.1f} s, {g['groups']:,} groups, {g['files']:,} files |",
        f"| planted copy pairs found | {g['planted_found']:,} / {g['planted']:,} |",
        f"| pair recall vs brute force (500 query sample, {g['truth_pairs']} true pairs) | {g['pair_recall']:.3f} |",
        f"| peak RSS after range_pairs / after groups | {g['mem_pairs']:.0f} / {g['mem_total']:.0f} MiB |",
        "", "Peak RSS is the whole process (ru_maxrss), including the vectors "
        f"({g['n'] * args.dim * 4 / 2**20:.0f} MiB) and the query benchmark if it ran first.", "",
        "## k=10 queries", "",
        "Single-query calls (one vector per search call, one FAISS thread), near queries (database items "
        "plus noise, not in the database), after tune_search to recall@10 >= 0.95 on a "
        "separate query sample; recall@10 against faiss.knn exact search; bytes per vector "
        "= saved index file size / n (includes IVF centroids and codebooks).", "",
        "| n | index | spec | params | build (s) | latency (ms/query) | recall@10 | bytes/vector |",
        "|---:|---|---|---|---:|---:|---:|---:|",
    ]
    for r in queries:
        lines.append(f"| {r['n']:,} | {r['index']} | `{r['spec']}` | {r['params']} | {r['t_build']:.1f} "
                     f"| {r['latency_ms']:.3f} | {r['recall']:.3f} | {r['bytes']:.0f} |")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    add = parser.add_argument
    add("--quick", action="store_true", help="sizes up to 100k (a few minutes)")
    add("--dim", type=int, default=128)
    add("--threshold", type=float, default=0.9, help="group threshold (cosine)")
    add("--seed", type=int, default=0)
    add("--skip-queries", action="store_true", help="only the groups benchmark")
    add("--large", type=int, default=0, metavar="N",
        help="only k=10 queries at N vectors with the product's index (e.g. 10000000; ~6 GB of memory per 10M)")
    add("--refine", action="store_true",
        help="with --large: also the index re-ranking 4x the candidates with the full vectors (twice the memory)")
    add("--out", type=Path, default=None, help="default benchmarks/results/index.md (index-large.md with --large)")
    args = parser.parse_args(argv)
    args.out = args.out or Path(__file__).resolve().parent / "results" / ("index-large.md" if args.large else "index.md")
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(message)s")

    load_start = os.getloadavg()[0]
    if args.large:
        rows = bench_large(args.large, args.dim, args.seed, refine=args.refine)
        text = large_report(rows, args, (load_start, os.getloadavg()[0]))
        print(text)
        args.out.write_text(text, encoding="utf-8")
        return
    top = 100_000 if args.quick else 1_000_000
    sizes = [s for s in (10_000, 100_000, 1_000_000) if s <= top]
    xb, ids, planted = synthetic(top, args.dim, args.seed)
    g = bench_groups(xb, ids, planted, args.threshold, args.seed)
    queries = []
    if not args.skip_queries:
        for n in sizes:
            queries += bench_queries(np.ascontiguousarray(xb[:n]), ids[:n], args.seed)
    text = report(g, queries, args) + (
        f"\n1-minute load average: {load_start:.1f} at the start, {os.getloadavg()[0]:.1f} at the end "
        "(other work may share the machine).\n")
    print(text)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(text, encoding="utf-8")


if __name__ == "__main__":
    main()
