"""Beyond one machine: batch embedding through worker pools, and a simulated 10-million-vector index.

In one run:

* embedding throughput of the batch path (`indexer.matching.cluster`, the code `--cluster` runs) with
  1, 2 and 4 local worker processes, and over a Dask `distributed.LocalCluster` with 2
  workers, against the in-process path (`embed_files` with a decoding pool, what `index`
  runs without `--cluster`), as ratios on the same files;
* a quantised index for N synthetic clustered vectors (default 10,000,000, 128-d):
  trained on a 200,000-vector sample, added in blocks of 500,000 generated on the fly
  (the raw vectors never all sit in memory), then memory per vector, build time,
  single-query latency at k=10 and recall@10 against exact search (brute force over the
  whole set for 200 queries, merged block by block as the blocks are generated).

    .venv/bin/python benchmarks/bench_cluster.py --out benchmarks/results/cluster.md
    .venv/bin/python benchmarks/bench_cluster.py --vectors 1000000   # a quicker index part
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

from benchmarks.bench_read import make_small_jpegs  # noqa: E402
from benchmarks.common import DEFAULT_LIBRARIES, machine  # noqa: E402
from nearsight.indexer.matching import index as ix  # noqa: E402
from nearsight.indexer.matching.cluster import iter_local, iter_on_client  # noqa: E402
from nearsight.indexer.learning.embed import embed_files  # noqa: E402
from nearsight.indexer.learning.encoder import DEFAULT_ARCH, create_encoder  # noqa: E402
from nearsight.indexer.learning.model import save_model  # noqa: E402

SIZE = 128
DIM = 128
BLOCK = 500_000
TRAIN = 160_000  # 39 points per list, FAISS's own minimum for 4096 lists
# 4096 lists (about 2,400 vectors each at 10M); HNSW over the centroids makes assigning 10M
# vectors affordable on 2 cores. SQ8: 128 bytes a vector; PQ32: 32 bytes, lower recall.
SPECS = ("IVF4096_HNSW32,SQ8", "IVF4096_HNSW32,PQ32")


def _timed(fn):
    started = time.perf_counter()
    out = fn()
    return time.perf_counter() - started, out


def embedding(files: list[Path], model_dir: Path) -> list[tuple[str, int, float]]:
    rows = []
    cores = os.cpu_count() or 1
    seconds, _ = _timed(lambda: embed_files(files, model_dir, workers=cores))
    rows.append(("in-process (decoding pool + torch threads)", cores, seconds))
    for workers in (1, 2, 4):
        seconds, _ = _timed(lambda: list(iter_local(files, model_dir, workers=workers, batch_files=64)))
        rows.append(("batch path, local process pool", workers, seconds))
    try:
        import distributed
    except ImportError:
        return rows
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None,
                                  silence_logs=logging.ERROR) as cluster, distributed.Client(cluster) as client:
        client.run(lambda: __import__("torch").set_num_threads(1))
        seconds, _ = _timed(lambda: list(iter_on_client(client, files, model_dir, batch_files=64)))
        rows.append(("batch path, Dask LocalCluster", 2, seconds))
    return rows


def _centres(rng) -> np.ndarray:
    c = rng.standard_normal((2000, DIM)).astype(np.float32)
    return c / np.linalg.norm(c, axis=1, keepdims=True)


# Decaying per-dimension spread, as benchmarks/bench_index.py: embeddings have a low intrinsic dimension.
SPREAD = (0.12 / (1 + np.arange(DIM)) ** 0.5).astype(np.float32)
SPREAD *= 0.12 / np.sqrt((SPREAD**2).mean())


def _block(rng, centres, n) -> np.ndarray:
    x = centres[rng.integers(0, len(centres), n)] + SPREAD * rng.standard_normal((n, DIM)).astype(np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def big_index(n: int, nq: int = 200) -> list[dict]:
    """Every spec built from the same stream of blocks, each block also merged into an exact top-10."""
    rng = np.random.default_rng(0)
    centres = _centres(rng)
    train = _block(np.random.default_rng(1), centres, TRAIN)
    indexes, out = {}, {}
    for spec in SPECS:
        indexes[spec] = ix._new_index(spec, DIM)
        seconds, _ = _timed(lambda: indexes[spec].train(train))
        out[spec] = {"n": n, "spec": spec, "train_s": seconds, "add_s": 0.0}
    del train
    xq = _block(np.random.default_rng(2), centres, nq)
    best_d = np.full((nq, 10), -np.inf, np.float32)
    best_i = np.full((nq, 10), -1, np.int64)
    for start in range(0, n, BLOCK):
        xb = _block(np.random.default_rng(100 + start // BLOCK), centres, min(BLOCK, n - start))
        ids = np.arange(start, start + len(xb), dtype=np.int64) * 7 + 3  # catalog-like, not 0..n-1
        for spec, index in indexes.items():
            seconds, _ = _timed(lambda: index.add_with_ids(xb, ids))
            out[spec]["add_s"] += seconds
        sims = xq @ xb.T  # exact reference, merged block by block
        top = np.argpartition(-sims, 10, axis=1)[:, :10]
        d = np.concatenate([best_d, np.take_along_axis(sims, top, 1)], axis=1)
        i = np.concatenate([best_i, ids[top]], axis=1)
        keep = np.argsort(-d, axis=1)[:, :10]
        best_d, best_i = np.take_along_axis(d, keep, 1), np.take_along_axis(i, keep, 1)
    for spec, index in indexes.items():
        with tempfile.TemporaryDirectory() as tmp:
            ix.save_index(index, Path(tmp) / "big.faiss")
            out[spec]["bytes_per_vector"] = (Path(tmp) / "big.faiss").stat().st_size / n
        rows = []
        for nprobe in (16, 64, 256, 1024):
            ix.apply_search_params(index, {"nprobe": nprobe})
            index.search(xq[:5], 10)
            started = time.perf_counter()
            for q in xq:
                index.search(q[None], 10)
            latency = (time.perf_counter() - started) / nq * 1000
            _, I = index.search(xq, 10)
            rows.append({"nprobe": nprobe, "ms": latency, "recall": ix.knn_recall(I, best_i)})
        out[spec]["search"] = rows
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return [dict(r, peak_mib=peak) for r in out.values()]


def report(emb: list, big: dict, files: int, command: str) -> str:
    base = emb[0][2]
    lines = ["# Beyond one machine: worker pools and a 10-million-vector index", "",
             f"Machine: {machine(DEFAULT_LIBRARIES + ('distributed',))}", "", f"Command: `{command}`", "",
             f"## Embedding {files} small JPEGs (1024x768), default encoder at {SIZE} px", "",
             "| path | workers | seconds | images/s | throughput vs in-process |", "|---|---|---|---|---|"]
    for name, workers, seconds in emb:
        lines.append(f"| {name} | {workers} | {seconds:.1f} | {files / seconds:.1f} | {base / seconds:.2f} |")
    lines += ["", "The local pool rows include starting the worker processes (spawn, importing torch, loading "
              "the model: seconds each), as `iter_local` does per run; the Dask workers were started, and had "
              "imported torch, before the clock started, as a running cluster's are. On 2 cores, 4 workers "
              "oversubscribe the machine; the rows show the cost of scheduling batches, not a speed-up this "
              "machine could give.", "",
              f"## Quantised indexes of {big[0]['n']:,} synthetic 128-d vectors", "",
             f"Each trained on {TRAIN:,} vectors, then filled in blocks of {BLOCK:,} generated on the fly; "
             f"peak memory of the whole process (both indexes, the exact reference) {big[0]['peak_mib']:,.0f} MiB.",
             "", "| index | train s | add s | bytes per vector | nprobe | query latency, k=10 (ms) | "
             "recall@10 vs exact |", "|---|---|---|---|---|---|---|"]
    for b in big:
        for r in b["search"]:
            lines.append(f"| {b['spec']} | {b['train_s']:.0f} | {b['add_s']:.0f} | {b['bytes_per_vector']:.1f} | "
                         f"{r['nprobe']} | {r['ms']:.2f} | {r['recall']:.3f} |")
    lines += ["", "Recall@10 is against exhaustive search over all vectors for 200 queries drawn from the same "
              "distribution (2,000 clusters, decaying spread as in benchmarks/bench_index.py); "
              "benchmarks/results/index.md has the index types at 10k-1M."]
    return "\n".join(lines) + "\n"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--files", type=int, default=256, help="small JPEGs to embed")
    parser.add_argument("--vectors", type=int, default=10_000_000, help="vectors in the simulated index")
    parser.add_argument("--out", type=Path, default=Path(__file__).parent / "results" / "cluster.md")
    args = parser.parse_args()
    logging.basicConfig(level=logging.WARNING)
    faiss.omp_set_num_threads(os.cpu_count() or 1)
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        (tmp / "jpg").mkdir()
        files = make_small_jpegs(tmp / "jpg", args.files, seed=0)
        model_dir = tmp / "model"
        save_model(model_dir, create_encoder(DEFAULT_ARCH), {"arch": DEFAULT_ARCH, "image_size": SIZE})
        emb = embedding(files, model_dir)
    big = big_index(args.vectors)
    text = report(emb, big, args.files, "python benchmarks/bench_cluster.py " + " ".join(sys.argv[1:]))
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(text)
    print(text)


if __name__ == "__main__":
    main()
