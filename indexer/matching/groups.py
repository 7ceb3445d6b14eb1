"""Duplicate groups that do not chain.

Input: the pairs above the loosest threshold (from `index.range_pairs`) and
per-image metadata. Output: groups in which *every* pair of members is at or
above the threshold, each with a keeper and a tier per member.

Why this method. Connected components of the pair graph alone chain: A~B and
B~C put A and C together however unlike they are, so one long series of edits or
burst shots becomes a giant "group". We still start from connected components
(cheap, and most components are already cliques), but any component holding a
pair below the threshold is split by complete-linkage agglomerative clustering
cut at ``1 - threshold``: complete linkage merges two clusters at the *largest*
distance between their members, so each resulting group's diameter is at most
the cut, i.e. every pair inside is >= threshold. Single members then move between
the parts, and parts merge, while that puts more pairs inside groups, only where
every pair still passes (`_improve_split`). A component of at most `EXACT_SPLIT`
nodes (an original and a few copies, the usual case) is split exactly instead: of
all its partitions whose every pair passes, the one with the most pairs inside
groups (`_best_split`). Missing pairs count as distance
1 (they were below the loosest threshold) unless vectors are given, in which case
the exact cosines are used. Complete linkage needs the dense m x m matrix, so
components above `MAX_LINKAGE` members fall back to a greedy centre split with
the same guarantee: the highest-degree member becomes a centre and takes, most
similar first, the unassigned neighbours that are above the threshold with every
member taken so far.

Files with the same content hash or the same pixel hash are identical images:
they are merged into one node first (similarity 1.0), so they always share a
group and never cost clustering work.

Pairs given as `apart` (a person said "different") lose their edge and count as
opposite (cosine -1) in the split, so the same complete linkage puts them in
different groups and nothing chains them back together.
"""

from __future__ import annotations

import csv
import hashlib
import json
from dataclasses import asdict, dataclass, field
from typing import IO, Callable, Iterable, Mapping

import numpy as np
from scipy.cluster.hierarchy import fcluster, linkage
from scipy.sparse import coo_matrix, csr_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial.distance import squareform

from ..core.errors import UsageError

# Strongest first. "person-same" is never made here: it marks a member a person's verdict
# joined to a group (indexer/building/verdict_groups.py).
TIERS = ("same-bytes", "same-pixels", "person-same", "near-duplicate", "similar")
_RANK = {tier: rank for rank, tier in enumerate(TIERS)}
# Complete linkage holds an m x m float64 matrix: 4000 members is 128 MB.
MAX_LINKAGE = 4000


# Pillow format names of formats that store pixels without loss (a re-encode into one keeps what it was given).
LOSSLESS_FORMATS = frozenset({"PNG", "TIFF", "BMP", "PPM", "TGA", "QOI"})


@dataclass(frozen=True)
class ImageMeta:
    """What grouping and the keeper policy need to know about one image file."""

    path: str
    content_hash: str
    width: int
    height: int
    file_size: int
    format: str
    mtime: float
    pixel_hash: str | None = None
    captured: str | None = None  # EXIF capture time, ISO 8601 (images.ImageInfo)
    camera: str | None = None  # EXIF Make and Model
    icc: bool = False  # embeds an ICC colour profile

    @property
    def pixels(self) -> int:
        return self.width * self.height

    @property
    def lossless(self) -> bool:
        return self.format.upper() in LOSSLESS_FORMATS


@dataclass
class Member:
    id: int
    tier: str
    similarity: float  # cosine to the group's keeper; 1.0 for the keeper
    meta: ImageMeta

    def to_dict(self) -> dict:
        return {"id": self.id, "tier": self.tier, "similarity": self.similarity, **asdict(self.meta)}


@dataclass
class Group:
    gid: str
    tier: str
    keeper: int
    members: list[Member] = field(default_factory=list)  # keeper first

    @property
    def size(self) -> int:
        return len(self.members)

    @property
    def best_similarity(self) -> float:
        return max(m.similarity for m in self.members if m.id != self.keeper)

    def to_dict(self) -> dict:
        return {"gid": self.gid, "tier": self.tier, "keeper": self.keeper, "size": self.size,
                "reclaimable_bytes": reclaimable_bytes(self),
                "members": [m.to_dict() for m in self.members]}

    @classmethod
    def from_dict(cls, data: dict) -> "Group":
        members = []
        for item in data["members"]:
            item = dict(item)
            ident, tier, similarity = item.pop("id"), item.pop("tier"), item.pop("similarity")
            members.append(Member(ident, tier, similarity, ImageMeta(**item)))
        return cls(data["gid"], data["tier"], data["keeper"], members)


# ---------------------------------------------------------------- policies

def keeper_key(meta: ImageMeta) -> tuple:
    """Default keeper order (smallest key wins), the first difference deciding:

    1. the camera's own record, which re-saving and sharing strip: an EXIF capture time, then a camera make
       and model (a copy that still has them is the original or closest to it, whatever its size);
    2. most pixels;
    3. an ICC colour profile, then a lossless format (signs of care, but exports add them too, so they
       come after the pixels: a small PNG must not win over the full-size JPEG);
    4. the earlier capture time;
    5. the older modification time (an edit or a copy is saved later: a brightened edit, the larger file,
       is not the original);
    6. the shallower path (`coffee.jpg` stays, `backup/2019/coffee-copy.jpg` goes);
    7. the larger file (less compressed), then the path."""
    depth = meta.path.count("/")
    return (meta.captured is None, meta.camera is None, -meta.pixels, not meta.icc, not meta.lossless,
            meta.captured or "", meta.mtime, depth, -meta.file_size, meta.path)


def group_id(ids: Iterable[int]) -> str:
    """Stable short id from the sorted member ids (BLAKE2b, 64-bit, hex)."""
    data = np.sort(np.fromiter(ids, dtype=np.int64)).astype("<i8").tobytes()
    return hashlib.blake2b(data, digest_size=8).hexdigest()


def reclaimable_bytes(group: Group) -> int:
    """Bytes freed if every member but the keeper were removed."""
    return sum(m.meta.file_size for m in group.members if m.id != group.keeper)


def summarize(groups: list[Group]) -> dict:
    return {"groups": len(groups), "files_in_groups": sum(g.size for g in groups),
            "reclaimable_bytes": sum(reclaimable_bytes(g) for g in groups),
            "groups_by_tier": {t: sum(g.tier == t for g in groups) for t in TIERS}}


# ---------------------------------------------------------------- input checks

def _as_meta(ident, value) -> ImageMeta:
    if isinstance(value, ImageMeta):
        return value
    try:
        return ImageMeta(**value)
    except TypeError as error:
        raise UsageError(f"bad metadata for id {ident}: {error}") from None


def _check_pairs(a_ids, b_ids, sims) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    a, b, s = (np.asarray(v) for v in (a_ids, b_ids, sims))
    if not (a.ndim == b.ndim == s.ndim == 1 and a.shape == b.shape == s.shape):
        raise UsageError(f"a_ids, b_ids and sims must be 1-D arrays of one length, "
                         f"got shapes {a.shape}, {b.shape}, {s.shape}")
    if a.size and not (np.issubdtype(a.dtype, np.integer) and np.issubdtype(b.dtype, np.integer)):
        raise UsageError("a_ids and b_ids must be integer catalog ids")
    if not np.isfinite(s).all():
        raise UsageError("sims must be finite")
    return a.astype(np.int64), b.astype(np.int64), s.astype(np.float32)


def _check_thresholds(t_near: float, t_similar: float) -> None:
    if not -1 <= t_similar <= t_near <= 1:
        raise UsageError(f"need -1 <= t_similar <= t_near <= 1, got t_similar={t_similar}, "
                         f"t_near={t_near}")


# ---------------------------------------------------------------- identical images

def _identical_classes(meta: Mapping[int, ImageMeta]) -> dict[int, int]:
    """id -> representative (smallest id) of its class of identical images
    (same content hash, or same pixel hash, transitively)."""
    parent: dict[int, int] = {}

    def root(x: int) -> int:
        while parent[x] != x:
            parent[x] = parent[parent[x]]
            x = parent[x]
        return x

    first_seen: dict[tuple[str, str], int] = {}
    for ident in sorted(meta):
        parent[ident] = ident
        m = meta[ident]
        keys = [("c", m.content_hash)] + ([("p", m.pixel_hash)] if m.pixel_hash else [])
        for key in keys:
            if key in first_seen:
                r1, r2 = root(first_seen[key]), root(ident)
                parent[max(r1, r2)] = min(r1, r2)
            else:
                first_seen[key] = ident
    return {ident: root(ident) for ident in parent}


def _apart_nodes(apart, rep: Mapping[int, int]) -> set[tuple[int, int]]:
    """The pairs kept apart, as (smaller, larger) representatives of their identical classes."""
    out = set()
    for x, y in apart:
        if x not in rep or y not in rep:
            continue
        rx, ry = rep[x], rep[y]
        if rx == ry:
            raise UsageError(f"images {x} and {y} are kept apart but are the same image (same bytes or pixels)")
        out.add((min(rx, ry), max(rx, ry)))
    return out


# ---------------------------------------------------------------- splitting components

def _set_apart(S: np.ndarray, reps: np.ndarray, apart_reps: set[tuple[int, int]]) -> None:
    """Opposite (cosine -1, the largest distance) for every pair kept apart in one component."""
    if not apart_reps:
        return
    where = {int(r): i for i, r in enumerate(reps.tolist())}
    for x, y in apart_reps:
        if x in where and y in where:
            S[where[x], where[y]] = S[where[y], where[x]] = -1.0


def _dense(nodes, ia, ib, s, vectors) -> np.ndarray:
    """m x m similarities for one component: pair list (missing = 0) or exact from vectors, raised
    to the pair list's score where that is higher."""
    m = nodes.shape[0]
    if vectors is not None:
        V = np.asarray(vectors(nodes), dtype=np.float64)
        if V.ndim != 2 or V.shape[0] != m:
            raise UsageError(f"vectors() returned shape {V.shape} for {m} ids")
        S = V @ V.T
        # A pair may score above its cosine (a verified pair, indexer/matching/pair_verify.py): it keeps that score.
        S[ia, ib] = S[ib, ia] = np.maximum(S[ia, ib], s)
    else:
        S = np.zeros((m, m))
        S[ia, ib] = S[ib, ia] = s
    np.fill_diagonal(S, 1.0)
    return S


def _complete_linkage(S: np.ndarray, threshold: float) -> list[np.ndarray]:
    # Distances are 1 - cosine in float64; for thresholds >= 0.5 the subtraction
    # is exact (Sterbenz), so "distance <= 1 - t" is exactly "cosine >= t".
    D = np.clip(1.0 - S, 0.0, 2.0)
    Z = linkage(squareform(D, checks=False), method="complete")
    labels = fcluster(Z, t=1.0 - threshold, criterion="distance")
    return [np.flatnonzero(labels == label) for label in np.unique(labels)]


# Components of at most this many nodes are split exactly (every partition is tried, 4,140 at most: about 4 ms
# for eight nodes that miss one pair, on one core of this project's machine).
EXACT_SPLIT = 8


def _best_split(S: np.ndarray, threshold: float, weight) -> list[np.ndarray]:
    """The partition of a small component with the most pairs of files inside groups, every pair inside a
    group at or above `threshold` (a search over all partitions, a node joining only blocks it fits); of
    partitions with as many pairs, the one whose pairs inside groups are the most similar in sum (the middle
    of a chain of three joins the end it is closer to)."""
    ok = S >= threshold
    weight = [int(w) for w in weight]
    n = len(S)
    best: list = [(-1, 0.0), None]

    def place(i: int, blocks: list[list[int]], sizes: list[int], score: tuple[int, float]) -> None:
        if i == n:
            if score > best[0]:
                best[0], best[1] = score, [list(b) for b in blocks]
            return
        for k, block in enumerate(blocks):
            if all(ok[i, j] for j in block):
                gain = (weight[i] * sizes[k], weight[i] * sum(float(S[i, j]) * weight[j] for j in block))
                block.append(i)
                sizes[k] += weight[i]
                place(i + 1, blocks, sizes, (score[0] + gain[0], score[1] + gain[1]))
                sizes[k] -= weight[i]
                block.pop()
        blocks.append([i])
        sizes.append(weight[i])
        place(i + 1, blocks, sizes, score)
        sizes.pop()
        blocks.pop()

    place(0, [], [], (0, 0.0))
    return [np.array(b) for b in best[1]]


def _improve_split(parts: list[np.ndarray], S: np.ndarray, threshold: float, weight) -> list[np.ndarray]:
    """Move single members between `parts`, and merge parts, while that puts more pairs of files inside groups.

    Complete linkage merges the closest pair first, and that pair can keep a member away from a group it
    fits: an original merged first with the one copy of it under a large overlay (cosine 1.0 between
    them) stays out of the group of its four other copies, because the overlaid copy lacks pairs with two
    of them. A member moves only into a part whose every member it reaches at `threshold` (a pair kept
    apart is -1), and two parts merge only when every pair between them reaches it, so every pair inside
    every group still passes, and no two groups could still be one. `weight[i]` is how many files node i
    stands for (identical files). Each step adds pairs, so the loop ends."""
    label = np.empty(len(S), np.int64)
    for k, part in enumerate(parts):
        label[part] = k
    ok = S >= threshold
    weight = np.asarray(weight, np.float64)
    changed = True
    while changed:
        changed = False
        for v in range(len(S)):
            full = np.bincount(label, weights=weight, minlength=len(parts))
            reach = np.bincount(label, weights=ok[v] * weight, minlength=len(parts))
            k = label[v]
            fits = reach >= full - 1e-9
            fits[k] = False
            if fits.any():
                j = int(np.argmax(np.where(fits, full, -1.0)))
                if full[j] > full[k] - weight[v]:  # pairs v gains there against those it has here
                    label[v] = j
                    changed = True
        members = [np.flatnonzero(label == k) for k in range(len(parts))]
        for k in range(len(parts)):
            for j in range(k + 1, len(parts)):
                if len(members[k]) and len(members[j]) and ok[np.ix_(members[k], members[j])].all():
                    label[members[j]] = k
                    members[k], members[j] = np.r_[members[k], members[j]], members[j][:0]
                    changed = True
    return [np.sort(m) for m in (np.flatnonzero(label == k) for k in range(len(parts))) if len(m)]


def _centre_split(m, ia, ib, s, threshold) -> list[np.ndarray]:
    keep = s >= threshold
    rows, cols = np.r_[ia[keep], ib[keep]], np.r_[ib[keep], ia[keep]]
    adj = csr_matrix((np.r_[s[keep], s[keep]], (rows, cols)), shape=(m, m))
    adj.sort_indices()
    degree = np.diff(adj.indptr)
    assigned = np.zeros(m, bool)
    out = []
    for centre in np.lexsort((np.arange(m), -degree)):
        if assigned[centre]:
            continue
        assigned[centre] = True
        lo, hi = adj.indptr[centre], adj.indptr[centre + 1]
        nbrs, sims = adj.indices[lo:hi], adj.data[lo:hi]
        free = ~assigned[nbrs]
        members = [centre]
        for v in nbrs[free][np.lexsort((nbrs[free], -sims[free]))]:
            if np.isin(members, adj.indices[adj.indptr[v]:adj.indptr[v + 1]]).all():
                members.append(v)
                assigned[v] = True
        if len(members) > 1:
            out.append(np.array(members))
    return out


# ---------------------------------------------------------------- building groups

def _make_group(reps, classes, sim, meta, t_near, prefer) -> Group:
    """One group from representative nodes; `sim(i, j)` is the cosine of reps i, j."""
    rep_of = {ident: i for i, rep in enumerate(reps) for ident in classes[rep]}
    ids = sorted(rep_of)

    def order(ident):
        head = (prefer(meta[ident]),) if prefer is not None else ()
        return (*head, *keeper_key(meta[ident]), ident)

    keeper = min(ids, key=order)
    kmeta, krep = meta[keeper], rep_of[keeper]
    members = []
    for ident in ids:
        m, rep = meta[ident], rep_of[ident]
        similarity = 1.0 if rep == krep else float(sim(krep, rep))
        if ident == keeper or m.content_hash == kmeta.content_hash:
            tier = "same-bytes"
        elif rep == krep:
            tier = "same-pixels"
        else:
            tier = "near-duplicate" if similarity >= t_near else "similar"
        members.append(Member(ident, tier, similarity, m))
    members.sort(key=lambda x: (x.id != keeper, _RANK[x.tier], -x.similarity, x.id))
    weakest = max(_RANK[x.tier] for x in members)
    if TIERS[weakest] == "near-duplicate":  # near to the keeper is not enough: every pair
        n = len(reps)
        if any(sim(i, j) < t_near for i in range(n) for j in range(i + 1, n)):
            weakest = _RANK["similar"]
    return Group(group_id(ids), TIERS[weakest], keeper, members)


def build_groups(a_ids, b_ids, sims, meta: Mapping[int, ImageMeta | dict], *,
                 t_near: float, t_similar: float,
                 vectors: Callable[[np.ndarray], np.ndarray] | None = None,
                 prefer: Callable[[ImageMeta], object] | None = None,
                 max_linkage: int = MAX_LINKAGE,
                 apart: Iterable[tuple[int, int]] = ()) -> list[Group]:
    """Groups of 2+ images in which every pair has cosine >= `t_similar`.

    `meta` maps every id in the pairs (and may map more: identical files are
    grouped by hash even without pairs) to an `ImageMeta` or a dict of its fields.
    `vectors(ids)` may return the unit vectors of those ids for exact in-component
    similarities. `prefer(meta)` returns a sort key placed before `keeper_key`
    (smaller wins), for keeper rules such as folder priorities. No group holds both
    ids of a pair in `apart`. A group's tier is its weakest member tier;
    "near-duplicate" needs every pair >= `t_near`.
    Sorted by size, then best similarity to the keeper (both descending).
    """
    from .index import canonical_pairs  # here, not at import: listing groups needs no FAISS (start-up)

    _check_thresholds(t_near, t_similar)
    a, b, s = _check_pairs(a_ids, b_ids, sims)
    meta = {int(k): _as_meta(k, v) for k, v in meta.items()}
    missing = np.setdiff1d(np.r_[a, b], np.fromiter(meta, np.int64, len(meta)))
    if missing.size:
        raise UsageError(f"no metadata for {missing.size} ids in the pairs "
                         f"(e.g. {missing[:5].tolist()})")
    rep = _identical_classes(meta)
    classes: dict[int, list[int]] = {}
    for ident, r in rep.items():
        classes.setdefault(r, []).append(ident)

    apart_reps = _apart_nodes(apart, rep)
    keep = s >= t_similar
    to_rep = np.vectorize(rep.__getitem__, otypes=[np.int64])
    ra, rb = (to_rep(a[keep]), to_rep(b[keep])) if keep.any() else (a[:0], b[:0])
    ra, rb, s = canonical_pairs(ra, rb, s[keep])
    if apart_reps:
        joined = np.array([(x, y) not in apart_reps for x, y in zip(ra.tolist(), rb.tolist())], bool)
        ra, rb, s = ra[joined], rb[joined], s[joined]
    nodes = np.unique(np.r_[ra, rb, [r for r, c in classes.items() if len(c) > 1]]).astype(np.int64)
    ia, ib = np.searchsorted(nodes, ra), np.searchsorted(nodes, rb)
    graph = coo_matrix((np.ones(ia.shape[0]), (ia, ib)), shape=(nodes.shape[0],) * 2)
    count, labels = connected_components(graph, directed=False)

    edge_order = np.argsort(labels[ia], kind="stable")
    edge_starts = np.searchsorted(labels[ia][edge_order], np.arange(count + 1))
    node_order = np.argsort(labels, kind="stable")
    node_starts = np.searchsorted(labels[node_order], np.arange(count + 1))
    groups = []
    for comp in range(count):
        local = node_order[node_starts[comp]:node_starts[comp + 1]]  # sorted node indices
        edges = edge_order[edge_starts[comp]:edge_starts[comp + 1]]
        cia, cib = np.searchsorted(local, ia[edges]), np.searchsorted(local, ib[edges])
        reps = nodes[local]
        if local.shape[0] <= max_linkage:
            S = _dense(reps, cia, cib, s[edges], vectors)
            _set_apart(S, reps, apart_reps)
            clique = S[np.triu_indices(len(reps), 1)].min(initial=1.0) >= t_similar
            weight = [len(classes[r]) for r in reps]
            if clique:
                parts = [np.arange(len(reps))]
            elif len(reps) <= EXACT_SPLIT:
                parts = _best_split(S, t_similar, weight)
            else:
                parts = _improve_split(_complete_linkage(S, t_similar), S, t_similar, weight)
            lookup = S
        else:
            parts = _centre_split(len(reps), cia, cib, s[edges], t_similar)
            lookup = {}
            for i, j, v in zip(cia.tolist(), cib.tolist(), s[edges].tolist()):
                lookup[i, j] = lookup[j, i] = v
        for part in parts:
            if sum(len(classes[r]) for r in reps[part]) < 2:
                continue
            if isinstance(lookup, dict):
                sim = lambda i, j, p=part, d=lookup: 1.0 if i == j else d.get((p[i], p[j]), 0.0)
            else:
                sim = lambda i, j, p=part, M=lookup: M[p[i], p[j]]
            groups.append(_make_group(reps[part].tolist(), classes, sim, meta, t_near, prefer))
    groups.sort(key=lambda g: (-g.size, -g.best_similarity, g.gid))
    return groups


# ---------------------------------------------------------------- export

CSV_FIELDS = ("gid", "group_tier", "id", "role", "tier", "similarity", "width", "height",
              "file_size", "format", "mtime", "path", "content_hash", "pixel_hash")


def groups_to_csv(groups: list[Group], fh: IO[str]) -> None:
    """One row per member, keeper first in each group."""
    writer = csv.writer(fh)
    writer.writerow(CSV_FIELDS)
    for g in groups:
        for m in g.members:
            writer.writerow([g.gid, g.tier, m.id, "keeper" if m.id == g.keeper else "member",
                             m.tier, f"{m.similarity:.6f}", m.meta.width, m.meta.height,
                             m.meta.file_size, m.meta.format, m.meta.mtime, m.meta.path,
                             m.meta.content_hash, m.meta.pixel_hash or ""])


def groups_to_json(groups: list[Group], fh: IO[str], *, summary: dict | None = None) -> None:
    json.dump({"summary": summary if summary is not None else summarize(groups),
               "groups": [g.to_dict() for g in groups]}, fh, indent=1)


def groups_from_json(fh: IO[str]) -> list[Group]:
    try:
        return [Group.from_dict(item) for item in json.load(fh)["groups"]]
    except (KeyError, TypeError, ValueError) as error:
        raise UsageError(f"not a groups JSON file: {error}") from None
