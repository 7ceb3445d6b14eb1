"""FAISS indexes over L2-normalised float32 vectors, keyed by catalog ids (int64).

Inner product on unit vectors is cosine similarity, so every index is built with
``METRIC_INNER_PRODUCT`` and every ``D`` returned here is a cosine (higher is closer).
Exact ``IDMap2,Flat`` up to `index_spec.EXACT_MAX` vectors, compressed IVF or an HNSW
graph above it (`index_spec.choose_spec`). The database is always walked block by block so memory
stays bounded by the index itself plus one block.
"""

from __future__ import annotations

import logging
import os
import tempfile
import time
import weakref
from pathlib import Path

import faiss
import numpy as np

from ..core.errors import NotFoundError, NotReadyError, StoreError, UsageError
from ..core.fsutil import FILE_MODE, fsync_dir
from .index_spec import MIN_POINTS_PER_CENTROID, choose_spec

log = logging.getLogger(__name__)

# Unit-norm check: tolerance on the squared norm of each vector.
NORM_TOLERANCE = 1e-3
SEARCH_PARAMS = ("nprobe", "efSearch")
# tune_search ignores results at cosine >= 1 - COPY_EPS (the query itself, exact
# copies) and searches COPY_SLACK extra neighbours to make up for them.
COPY_EPS = 1e-5
COPY_SLACK = 4
EF_SEARCH_STEPS = (16, 32, 64, 128, 256, 512, 1024, 2048)
# The self-join that grouping runs on an IVF index is tuned to find this share of the exact pairs above
# its threshold (0.99: room above the 0.98 that tests and benchmarks/results/index.md hold it to), measured
# on PAIR_SAMPLE random rows against brute force; with fewer than MIN_SAMPLE_PAIRS pairs in the sample the
# measurement means too little and the query's nprobe is kept.
PAIR_RECALL = 0.99
PAIR_SAMPLE = 2000
MIN_SAMPLE_PAIRS = 30

# Indexes loaded with mmap share read-only pages with the file: FAISS aborts the
# whole process (not an exception) if one is modified, so we remember them.
_READ_ONLY: weakref.WeakSet = weakref.WeakSet()


# ---------------------------------------------------------------- validation

def _check_vectors(x, name: str, dim: int | None = None, block: int = 65_536) -> None:
    if not isinstance(x, np.ndarray) or x.ndim != 2:
        raise UsageError(f"{name} must be a 2-D NumPy array (n, dim), got {type(x).__name__} "
                         f"with shape {getattr(x, 'shape', None)}")
    if x.dtype != np.float32:
        raise UsageError(f"{name} must be float32, got {x.dtype}")
    if not x.flags.c_contiguous:
        raise UsageError(f"{name} must be C-contiguous (use np.ascontiguousarray)")
    if dim is not None and x.shape[1] != dim:
        raise UsageError(f"{name} has dimension {x.shape[1]}, the index has {dim}")
    if x.shape[1] == 0:
        raise UsageError(f"{name} has dimension 0")
    for start in range(0, x.shape[0], block):
        part = x[start:start + block]
        norms = np.einsum("ij,ij->i", part, part)
        bad = ~np.isfinite(norms) | (np.abs(norms - 1) > NORM_TOLERANCE)
        if bad.any():
            row = start + int(np.argmax(bad))
            raise UsageError(f"{name} row {row} is not a finite unit vector (squared norm "
                             f"{norms[row - start]}); cosine search needs L2-normalised vectors")


def _check_ids(ids, n: int) -> None:
    if not isinstance(ids, np.ndarray) or ids.ndim != 1 or ids.dtype != np.int64:
        raise UsageError(f"ids must be a 1-D int64 array, got {getattr(ids, 'dtype', type(ids))} "
                         f"with shape {getattr(ids, 'shape', None)}")
    if ids.shape[0] != n:
        raise UsageError(f"got {ids.shape[0]} ids for {n} vectors")
    if n and ids.min() < 0:
        raise UsageError("ids must be >= 0 (-1 marks a missing result)")
    if np.unique(ids).shape[0] != n:
        raise UsageError("ids must be unique")


def _check_k(k) -> int:
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k <= 0:
        raise UsageError(f"k must be a positive integer, got {k!r}")
    return int(k)


def _check_writable(index: faiss.Index) -> None:
    if index in _READ_ONLY:
        raise NotReadyError("this index was loaded memory-mapped (read-only); "
                            "load it with mmap=False to update it")


# ---------------------------------------------------------------- index kinds

def _ivf(index: faiss.Index) -> faiss.IndexIVF | None:
    return faiss.try_extract_index_ivf(index)


def _hnsw(index: faiss.Index) -> faiss.IndexHNSW | None:
    inner = faiss.downcast_index(index)
    if isinstance(inner, faiss.IndexIDMap):
        inner = faiss.downcast_index(inner.index)
    return inner if isinstance(inner, faiss.IndexHNSW) else None


def index_kind(index: faiss.Index) -> str:
    """``ivf``, ``hnsw`` or ``flat`` (exact)."""
    if _ivf(index) is not None:
        return "ivf"
    if _hnsw(index) is not None:
        return "hnsw"
    return "flat"


def _is_quantized(index: faiss.Index) -> bool:
    """True when the index scores from compressed codes rather than the float vectors."""
    ivf = _ivf(index)
    return ivf is not None and not isinstance(ivf, faiss.IndexIVFFlat)


def stored_ids(index: faiss.Index) -> np.ndarray:
    """Every catalog id in the index (unordered), read from the id map or the inverted lists."""
    outer = faiss.downcast_index(index)
    if isinstance(outer, faiss.IndexIDMap):
        return faiss.vector_to_array(outer.id_map).astype(np.int64)
    ivf = _ivf(index)
    if ivf is None:
        raise UsageError("this index does not store ids (build it with build_index)")
    invlists, parts = ivf.invlists, []
    for list_no in range(ivf.nlist):
        size = invlists.list_size(list_no)
        if size:
            ptr = invlists.get_ids(list_no)
            parts.append(faiss.rev_swig_ptr(ptr, size).copy())
            invlists.release_ids(list_no, ptr)
    return np.concatenate(parts) if parts else np.empty(0, np.int64)


# ---------------------------------------------------------------- build and update

def _new_index(spec: str, dim: int) -> faiss.Index:
    try:
        index = faiss.index_factory(dim, spec, faiss.METRIC_INNER_PRODUCT)
    except RuntimeError as error:
        raise UsageError(f"invalid index spec {spec!r}: {str(error).splitlines()[-1]}") from None
    if _ivf(index) is None and not isinstance(faiss.downcast_index(index), faiss.IndexIDMap):
        # Flat and HNSW number vectors 0..n-1; IDMap2 keeps our catalog ids beside them.
        index = faiss.index_factory(dim, "IDMap2," + spec, faiss.METRIC_INNER_PRODUCT)
    return index


def _train(index: faiss.Index, xb: np.ndarray, train_sample: int, seed: int) -> None:
    n = xb.shape[0]
    ivf = _ivf(index)
    if ivf is not None and ivf.nlist > n:
        raise UsageError(f"the index has {ivf.nlist} IVF lists but only {n} vectors to train on")
    floor = MIN_POINTS_PER_CENTROID * ivf.nlist if ivf is not None else 0
    size = min(n, max(train_sample, floor))
    rows = np.sort(np.random.default_rng(seed).choice(n, size, replace=False))
    start = time.perf_counter()
    index.train(xb[rows])
    log.debug("trained index on %d of %d vectors in %.1f s", size, n, time.perf_counter() - start)


def _add_blocks(index: faiss.Index, xb: np.ndarray, ids: np.ndarray, block: int) -> None:
    for start in range(0, xb.shape[0], block):
        index.add_with_ids(xb[start:start + block], ids[start:start + block])


def build_index(xb: np.ndarray, ids: np.ndarray, spec: str | None = None, *,
                train_sample: int = 100_000, block: int = 65_536, seed: int = 0) -> faiss.Index:
    """A trained index holding `xb` under catalog `ids`; `spec` defaults to `choose_spec`.

    IVF is trained on a seeded random sample (raised to 39 points per list if
    `train_sample` is smaller), then vectors are added `block` rows at a time.
    """
    _check_vectors(xb, "xb")
    n, dim = xb.shape
    if n == 0:
        raise UsageError("cannot build an index from zero vectors")
    _check_ids(ids, n)
    spec = spec or choose_spec(n, dim)
    index = _new_index(spec, dim)
    if not index.is_trained:
        _train(index, xb, train_sample, seed)
    start = time.perf_counter()
    _add_blocks(index, xb, ids, block)
    log.debug("added %d vectors to %s in %.1f s", n, spec, time.perf_counter() - start)
    return index


def add(index: faiss.Index, xb: np.ndarray, ids: np.ndarray, *, block: int = 65_536) -> None:
    """Add new vectors; ids already in the index are refused (remove them first)."""
    _check_writable(index)
    _check_vectors(xb, "xb", index.d)
    _check_ids(ids, xb.shape[0])
    if not index.is_trained:
        raise NotReadyError("the index is not trained; build it with build_index")
    clash = np.intersect1d(ids, stored_ids(index))
    if clash.size:
        raise UsageError(f"{clash.size} ids are already in the index (e.g. {clash[:5].tolist()}); "
                         "remove them first")
    _add_blocks(index, xb, ids, block)


def remove_ids(index: faiss.Index, ids: np.ndarray) -> int:
    """Remove catalog ids; returns how many were found. HNSW cannot remove: rebuild instead."""
    _check_writable(index)
    if not isinstance(ids, np.ndarray) or ids.ndim != 1 or ids.dtype != np.int64:
        raise UsageError("ids must be a 1-D int64 array")
    if _hnsw(index) is not None:
        raise NotReadyError("an HNSW index cannot remove vectors; rebuild the index instead")
    if ids.size == 0:
        return 0
    return int(index.remove_ids(faiss.IDSelectorBatch(ids)))


# ---------------------------------------------------------------- search parameters

def apply_search_params(index: faiss.Index, params: dict) -> None:
    """Set stored search parameters (``nprobe`` for IVF, ``efSearch`` for HNSW)."""
    space = faiss.ParameterSpace()
    for name, value in params.items():
        if name not in SEARCH_PARAMS:
            raise UsageError(f"unknown search parameter {name!r} (known: {', '.join(SEARCH_PARAMS)})")
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value <= 0:
            raise UsageError(f"search parameter {name} must be a positive integer, got {value!r}")
        try:
            space.set_index_parameter(index, name, int(value))
        except RuntimeError:
            raise UsageError(f"a {index_kind(index)} index has no parameter {name!r}") from None


def _current_params(index: faiss.Index, params: dict | None) -> dict:
    """The index's present values of the parameters in `params` (to put back after a call)."""
    if not params:
        return {}
    ivf, hnsw = _ivf(index), _hnsw(index)
    out = {}
    if "nprobe" in params and ivf is not None:
        out["nprobe"] = int(ivf.nprobe)
    if "efSearch" in params and hnsw is not None:
        out["efSearch"] = int(hnsw.hnsw.efSearch)
    return out


def _reference_knn(index, xq, k, xb, ids) -> tuple[np.ndarray, np.ndarray]:
    """Exact top-k (D, I): brute force on `xb` when given, else exhaustive over the index's own data."""
    if xb is not None:
        _check_vectors(xb, "xb", index.d)
        _check_ids(ids, xb.shape[0])
        D, I = faiss.knn(xq, xb, k, metric=faiss.METRIC_INNER_PRODUCT)
        return D, np.where(I >= 0, ids[np.maximum(I, 0)], -1)
    hnsw = _hnsw(index)
    if hnsw is not None:  # the graph's storage is an exact Flat index over the same vectors
        D, I = faiss.downcast_index(hnsw.storage).search(xq, k)
        id_map = faiss.vector_to_array(faiss.downcast_index(index).id_map)
        return D, np.where(I >= 0, id_map[np.maximum(I, 0)], -1)
    ivf = _ivf(index)
    saved = ivf.nprobe
    ivf.nprobe = ivf.nlist  # every list: exact over the stored codes
    try:
        return index.search(xq, k)
    finally:
        ivf.nprobe = saved


def knn_recall(I: np.ndarray, I_ref: np.ndarray) -> float:
    """k-recall@k: share of the reference top-k ids that the search also returned (-1 ignored)."""
    hits = (I[:, :, None] == I_ref[:, None, :]) & (I_ref[:, None, :] >= 0)
    return float(hits.any(axis=1).sum() / max(1, (I_ref >= 0).sum()))


def _drop_copies(I: np.ndarray, copies: np.ndarray, k: int) -> np.ndarray:
    """Each row of I without the ids in the same row of `copies`, cut to k (-1 padded)."""
    out = np.full((I.shape[0], k), -1, dtype=np.int64)
    for row, (found, same) in enumerate(zip(I, copies)):
        kept = found[~np.isin(found, same[same >= 0])][:k]
        out[row, :kept.shape[0]] = kept
    return out


def tune_search(index: faiss.Index, xb_sample: np.ndarray, target_recall: float = 0.95,
                k: int = 10, *, xb: np.ndarray | None = None, ids: np.ndarray | None = None) -> dict:
    """Set the smallest nprobe / efSearch whose recall@k on `xb_sample` reaches `target_recall`.

    The reference is exact search: brute force over `xb`/`ids` when given (so
    quantization loss counts), else the index's own exhaustive mode (all IVF lists;
    HNSW's flat storage). Returns ``{"params", "recall", "target_recall", "k",
    "reached", "reference"}``; store ``params`` and re-apply them with
    `apply_search_params` after loading. If no value reaches the target, the most
    accurate one tried is kept and ``reached`` is False. Results identical to the
    query (itself, exact copies) are left out of the count: any setting finds them.
    """
    k = _check_k(k)
    _check_vectors(xb_sample, "xb_sample", index.d)
    if not 0 < target_recall <= 1:
        raise UsageError(f"target_recall must be in (0, 1], got {target_recall}")
    if (xb is None) != (ids is None):
        raise UsageError("pass both xb and ids for an exact reference, or neither")
    if index.ntotal == 0:
        raise NotReadyError("the index is empty")
    result = {"params": {}, "recall": 1.0, "target_recall": target_recall, "k": k,
              "reached": True, "reference": "exact" if xb is not None else "exhaustive"}
    kind = index_kind(index)
    if kind == "flat":
        return result
    if kind == "ivf":
        nlist = _ivf(index).nlist
        name, steps = "nprobe", sorted({min(2 ** i, nlist) for i in range(nlist.bit_length() + 1)})
    else:
        name, steps = "efSearch", [ef for ef in EF_SEARCH_STEPS if ef >= k]
    # Queries taken from the database find themselves (and exact copies) at any
    # setting; counting those free hits would tune too low for outside queries.
    wide = k + COPY_SLACK
    D_ref, I_ref = _reference_knn(index, xb_sample, wide, xb, ids)
    copies = np.where(D_ref >= 1 - COPY_EPS, I_ref, -1)
    I_ref = _drop_copies(I_ref, copies, k)
    for value in steps:
        apply_search_params(index, {name: value})
        recall = knn_recall(_drop_copies(index.search(xb_sample, wide)[1], copies, k), I_ref)
        if recall >= target_recall:
            break
    else:
        log.warning("recall@%d %.3f is below the target %.3f even at %s=%d",
                    k, recall, target_recall, name, value)
    result.update(params={name: value}, recall=recall, reached=recall >= target_recall)
    log.debug("tuned %s=%d: recall@%d %.3f", name, value, k, recall)
    return result


def exact_pairs_of(xb: np.ndarray, ids: np.ndarray, rows: np.ndarray, threshold: float,
                   block: int = 16_384) -> set[tuple[int, int]]:
    """Brute force (the oracle of `tune_pair_search`): every unordered id pair (a < b) with cosine
    >= `threshold` that has one end among `rows` of `xb`, the database walked `block` rows at a time
    (len(rows) x block similarities in memory: 128 MiB for 2,000 rows)."""
    xq = np.ascontiguousarray(xb[rows])
    found: set[tuple[int, int]] = set()
    for start in range(0, xb.shape[0], block):
        sims = xq @ xb[start:start + block].T
        r, c = np.nonzero(sims >= threshold)
        a, b = ids[rows[r]], ids[start + c]
        found.update((int(min(x, y)), int(max(x, y))) for x, y in zip(a.tolist(), b.tolist()) if x != y)
    return found


def tune_pair_search(index: faiss.Index, xb: np.ndarray, ids: np.ndarray, threshold: float, *,
                     target: float = PAIR_RECALL, sample: int = PAIR_SAMPLE, seed: int = 0) -> dict:
    """The smallest nprobe at which the self-join (`range_pairs` of the collection against its own IVF
    index) finds `target` of the exact pairs at or above `threshold`, measured on `sample` random rows
    against brute force (`exact_pairs_of`).

    Why: a query's nprobe is tuned for recall@10 of arbitrary neighbours (`tune_search`); the pairs that
    grouping needs are near copies, which sit in the same or an adjacent list, so a much smaller nprobe
    finds them, and the self-join's time is proportional to it. Returns ``{"params", "pair_recall",
    "sample_pairs", "reached"}``; with fewer than `MIN_SAMPLE_PAIRS` pairs in the sample there is nothing
    to measure, and the query's own nprobe is kept (``reached`` None). Other index kinds need no tuning.
    """
    ivf = _ivf(index)
    if ivf is None:
        return {"params": {}, "pair_recall": 1.0, "sample_pairs": 0, "reached": True}
    current = int(ivf.nprobe)
    rng = np.random.default_rng(seed)
    # Rows the index holds, paired with rows it holds: a file scanned since the index was built can have
    # pairs no nprobe finds, and counting them would tune towards the slowest setting for nothing.
    stored = stored_ids(index)
    held = np.flatnonzero(np.isin(ids, stored))
    rows = np.sort(rng.choice(held, min(sample, len(held)), replace=False))
    truth = exact_pairs_of(xb, ids, rows, threshold)
    if len(held) < len(ids) and truth:
        ends = np.array(sorted(truth), np.int64)
        kept = np.isin(ends[:, 0], stored) & np.isin(ends[:, 1], stored)
        truth = {(int(a), int(b)) for a, b in ends[kept]}
    if len(truth) < MIN_SAMPLE_PAIRS:
        return {"params": {"nprobe": current}, "pair_recall": None, "sample_pairs": len(truth), "reached": None}
    recall, value = 0.0, current
    for value in sorted({min(2 ** i, current) for i in range(current.bit_length() + 1)}):
        a, b, _ = range_pairs(index, xb, ids, threshold, rows=rows, params={"nprobe": value})
        recall = len(truth & set(zip(a.tolist(), b.tolist()))) / len(truth)
        if recall >= target:
            break
    (log.info if recall >= target else log.warning)(
        "pair search: nprobe %d finds %.3f of %d exact pairs on a sample of %d rows (query nprobe %d)",
        value, recall, len(truth), len(rows), current)
    return {"params": {"nprobe": value}, "pair_recall": round(recall, 4), "sample_pairs": len(truth),
            "reached": recall >= target}


# ---------------------------------------------------------------- queries

def search(index: faiss.Index, xq: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Top-k cosine neighbours: ``D`` similarities, ``I`` catalog ids (-1 where fewer than k)."""
    k = _check_k(k)
    _check_vectors(xq, "xq", index.d)
    if index.ntotal == 0:
        raise NotReadyError("the index is empty")
    return index.search(xq, k)


def canonical_pairs(a: np.ndarray, b: np.ndarray, sims: np.ndarray):
    """Unordered pairs (a < b), each once with its highest similarity, sorted by (a, b)."""
    keep = a != b
    a, b, sims = a[keep], b[keep], sims[keep]
    lo, hi = np.minimum(a, b), np.maximum(a, b)
    order = np.lexsort((-sims, hi, lo))
    lo, hi, sims = lo[order], hi[order], sims[order]
    first = np.ones(lo.shape[0], bool)
    first[1:] = (lo[1:] != lo[:-1]) | (hi[1:] != hi[:-1])
    return lo[first], hi[first], sims[first]


def _exact_sims(xb, rows_a, ids_b, sorted_ids, order, sims) -> np.ndarray:
    """Replace index similarities by exact cosines wherever the partner's vector is in `xb`."""
    pos = np.minimum(np.searchsorted(sorted_ids, ids_b), sorted_ids.shape[0] - 1)
    known = sorted_ids[pos] == ids_b
    rows_b = order[pos[known]]
    sims = sims.copy()
    sims[known] = np.einsum("ij,ij->i", xb[rows_a[known]], xb[rows_b])
    return sims


def range_pairs(index: faiss.Index, xb: np.ndarray, ids: np.ndarray, threshold: float, *,
                k_fallback: int = 50, block: int = 16_384, method: str = "auto",
                refine: bool = True, margin: float | None = None, rows: np.ndarray | None = None,
                params: dict | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every unordered pair (a < b) of catalog ids with cosine >= `threshold`.

    `xb`/`ids` are the queries (usually the whole database), walked `block` rows at
    a time. ``method="range"`` uses ``index.range_search``; ``"knn"`` searches
    `k_fallback` neighbours and filters, so each item contributes at most that many
    pairs; ``"auto"`` picks knn for HNSW, whose range search only explores efSearch
    candidates anyway. With `refine`, similarities are recomputed exactly from `xb`
    and candidates from compressed codes are gathered `margin` below the threshold
    (default 0.02, a guess checked by tests/benchmarks) so code error loses fewer pairs.
    `rows`: only these rows of `xb` are queries (their partners' similarities still come from `xb`).
    `params`: search parameters for this call only (`tune_pair_search`'s).
    Returns ``(a_ids, b_ids, sims)`` sorted by (a, b).
    """
    _check_vectors(xb, "xb", index.d)
    _check_ids(ids, xb.shape[0])
    if not -1 <= threshold <= 1:
        raise UsageError(f"threshold is a cosine similarity in [-1, 1], got {threshold}")
    if method not in ("auto", "range", "knn"):
        raise UsageError(f"method must be auto, range or knn, got {method!r}")
    k_fallback = _check_k(k_fallback)
    if index.ntotal == 0:
        raise NotReadyError("the index is empty")
    if method == "auto":
        method = "knn" if index_kind(index) == "hnsw" else "range"
    if margin is None:
        margin = 0.02 if refine and _is_quantized(index) else 0.0
    # FAISS range search keeps inner products strictly above the radius; step one
    # float32 below so that `>= threshold` holds at the boundary.
    radius = float(np.nextafter(np.float32(threshold - margin), np.float32(-2)))
    order = np.argsort(ids, kind="stable")
    sorted_ids = ids[order]
    queries = np.arange(xb.shape[0]) if rows is None else np.asarray(rows, np.int64)
    saved = _current_params(index, params)
    parts_a, parts_b, parts_s = [np.zeros(0, np.int64)], [np.zeros(0, np.int64)], [np.zeros(0, np.float32)]
    start_time = time.perf_counter()
    try:
        if params:
            apply_search_params(index, params)
        for start in range(0, queries.shape[0], block):
            q = queries[start:start + block]
            xq = xb[start:start + block] if rows is None else np.ascontiguousarray(xb[q])
            if method == "range":
                lims, D, I = index.range_search(xq, radius)
                hits = np.repeat(np.arange(xq.shape[0]), np.diff(lims.astype(np.int64)))
            else:
                D, I = index.search(xq, min(k_fallback, index.ntotal))
                hit = (I >= 0) & (D > radius)
                hits, D, I = np.nonzero(hit)[0], D[hit], I[hit]
            rows_a = q[hits]
            sims = _exact_sims(xb, rows_a, I, sorted_ids, order, D) if refine else D
            keep = sims >= threshold
            parts_a.append(ids[rows_a[keep]])
            parts_b.append(I[keep])
            parts_s.append(sims[keep].astype(np.float32))
    finally:
        if saved:
            apply_search_params(index, saved)
    a, b, sims = canonical_pairs(np.concatenate(parts_a), np.concatenate(parts_b).astype(np.int64),
                                  np.concatenate(parts_s))
    log.debug("range_pairs(%s, t=%.3f): %d pairs from %d queries in %.1f s", method, threshold,
             a.shape[0], queries.shape[0], time.perf_counter() - start_time)
    return a, b, sims


# ---------------------------------------------------------------- persistence

def save_index(index: faiss.Index, path: Path) -> None:
    """Write the index so that readers see the old file or the new one, never a mix.

    FAISS writes straight to a temp file beside the target (no in-memory copy of a
    large index), which is then fsynced and renamed over it.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.fchmod(fd, FILE_MODE)  # readable by a service running as another user
    os.close(fd)
    try:
        faiss.write_index(index, tmp)
        fd = os.open(tmp, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    fsync_dir(path.parent)


def load_index(path: Path, *, mmap: bool = False, params: dict | None = None) -> faiss.Index:
    """Read an index; with `mmap`, its vectors/codes stay in the page cache (read-only).

    IO_FLAG_MMAP_IFC maps flat codes (Flat, HNSW storage, IVF lists);
    IO_FLAG_MMAP maps IVF lists on older layouts. If neither applies we fall back
    to a normal read. Stored search `params` are re-applied.
    """
    path = Path(path)
    if not path.is_file():
        raise NotFoundError(f"no index file at {path}")
    index = None
    if mmap:
        for flag in (faiss.IO_FLAG_MMAP_IFC, faiss.IO_FLAG_MMAP):
            try:
                index = faiss.read_index(str(path), flag)
                _READ_ONLY.add(index)
                break
            except RuntimeError as error:
                log.debug("mmap flag %d refused for %s: %s", flag, path, error)
        else:
            log.info("index %s cannot be memory-mapped; reading it into memory", path)
    if index is None:
        try:
            index = faiss.read_index(str(path))
        except RuntimeError as error:
            raise StoreError(f"cannot read index {path}: {str(error).splitlines()[-1]}") from None
    if params:
        apply_search_params(index, params)
    return index
