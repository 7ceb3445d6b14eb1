"""Which FAISS index a collection gets, and what it costs: the index_factory string for n vectors (and a
memory budget), and the size model behind the choice (bytes per vector, fixed bytes).

Pure arithmetic on strings and sizes: building, searching and saving indexes is `index.py`'s.
"""

from __future__ import annotations

import math
import re

from ..core.errors import UsageError

# Up to this many vectors an exact index is the default. At 300k x 128-d a Flat
# index is 150 MB, one k=10 query scans 38M multiply-adds (a few ms on one core),
# and the all-pairs self join that `groups` needs is ~5e12 multiply-adds: minutes
# on 2 cores. Past it the self join grows as n^2 and becomes the bottleneck, so we
# switch to an index that scans a small share of the collection per query.
EXACT_MAX = 300_000
HNSW_M = 32
# FAISS k-means warns below 39 training points per centroid (its own check).
MIN_POINTS_PER_CENTROID = 39


def ivf_nlist(n: int) -> int:
    """Number of IVF lists for `n` vectors.

    4 * sqrt(n) is the low end of the FAISS wiki's guideline ("IVFK with K between
    4*sqrt(N) and 16*sqrt(N)"; quoted from memory); capped so k-means gets at least
    `MIN_POINTS_PER_CENTROID` points per list.
    """
    return max(1, min(int(round(4 * math.sqrt(n))), n // MIN_POINTS_PER_CENTROID))


def bytes_per_vector(spec: str, dim: int) -> float:
    """Estimated resident bytes per stored vector for the specs `choose_spec` emits.

    * ``IDMap2,Flat``: 4*dim floats + 8 (id array) + ~32 (IDMap2's reverse hash map entry, an estimate)
    * ``IVF{nlist},SQ8``: dim one-byte codes + 8 (id in the inverted list)
    * ``IVF{nlist},PQ{m}x{nbits}``: m*nbits/8 bytes of codes (nbits defaults to 8) + 8
    * ``IDMap2,HNSW{M}``: 4*dim floats + 2*M*4 level-0 links + ~M*4/(M-1) upper links
      + 12 (offsets, level) + 40 (IDMap2 as above)
    Fixed costs (IVF centroids, PQ codebooks) are in `fixed_bytes`.
    """
    if spec.endswith("Flat") and "HNSW" not in spec:
        return 4 * dim + 40
    if m := re.search(r"HNSW(\d+)", spec):
        links = int(m.group(1))
        return 4 * dim + 2 * links * 4 + links * 4 / (links - 1) + 12 + 40
    if spec.endswith("SQ8"):
        return dim + 8
    if m := re.search(r"PQ(\d+)(?:x(\d+))?$", spec):
        return int(m.group(1)) * int(m.group(2) or 8) / 8 + 8
    raise UsageError(f"no size model for index spec {spec!r}")


def fixed_bytes(spec: str, dim: int) -> int:
    """Bytes that do not grow with n: IVF centroids and PQ codebooks (256 centroids per sub-space)."""
    total = 0
    if m := re.match(r"IVF(\d+)", spec):
        total += int(m.group(1)) * dim * 4
    if m := re.search(r"PQ\d+(?:x(\d+))?$", spec):
        total += 2 ** int(m.group(1) or 8) * dim * 4
    return total


def _pq_sizes(dim: int) -> list[int]:
    """PQ sub-quantizer counts that divide dim, from dim/2 (2 dims per byte) down to dim/16."""
    return [m for m in range(dim // 2, 0, -1) if dim % m == 0 and dim // m <= 16]


def choose_spec(n: int, dim: int, memory_budget_bytes: int | None = None) -> str:
    """An index_factory string for `n` vectors of `dim` dimensions.

    Without a budget: exact Flat up to `EXACT_MAX`, else IVF-SQ8 (4x smaller than
    floats, supports range search and removal). With a budget, the most accurate
    spec that fits, in this order: Flat (only up to `EXACT_MAX`), HNSW32 (full
    vectors plus graph: fastest queries, but no removal, so updates mean a rebuild),
    IVF-SQ8, then IVF-PQ with fewer and fewer bytes per vector.
    """
    if n <= 0 or dim <= 0:
        raise UsageError(f"need n > 0 and dim > 0, got n={n}, dim={dim}")
    nlist = ivf_nlist(n)
    candidates = []
    if n <= EXACT_MAX:
        candidates.append("IDMap2,Flat")
    elif memory_budget_bytes is not None:
        candidates.append(f"IDMap2,HNSW{HNSW_M}")
    candidates.append(f"IVF{nlist},SQ8")
    if memory_budget_bytes is None:
        return candidates[0]
    candidates += [f"IVF{nlist},PQ{m}" for m in _pq_sizes(dim)]
    for spec in candidates:
        need = n * bytes_per_vector(spec, dim) + fixed_bytes(spec, dim)
        if need <= memory_budget_bytes:
            return spec
    smallest = candidates[-1]
    need = n * bytes_per_vector(smallest, dim) + fixed_bytes(smallest, dim)
    raise UsageError(
        f"memory budget {memory_budget_bytes} bytes is too small for {n} vectors of dim {dim}: "
        f"the smallest index ({smallest}) needs about {int(need)} bytes"
    )
