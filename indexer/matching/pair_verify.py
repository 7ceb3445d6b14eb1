"""Verified pairs for groups: each image's closest neighbours, checked by geometric verification.

A descriptor score alone cannot carry a heavily edited copy (a tight crop, a strong
colour change) into a group without also admitting look-alikes at the same score. The
keypoint check of `verify.py` can: on the demo archive every planted copy among the
images' closest neighbours verified, and 4 of 9,446 other close pairs did.

So, when groups are built, each indexed image's `top` nearest neighbours that score at
least `floor` but below the near-duplicate threshold are verified on the store's small
copies, and a verified pair joins the candidate pairs at the score a verified query
result gets (`rerank.boosted`), at least the near-duplicate threshold. Grouping then
treats it as any other near-duplicate pair: a group still needs every pair of its
members to pass, so verified pairs do not chain.

Cost: at most `top` verifications per image (about 5 ms each at 256 px on one core).
"""

from __future__ import annotations

import logging
import time
from collections import OrderedDict

import numpy as np

from ..core.errors import ImageReadError
from ..reading.images import read_image
from . import index as faiss_index
from .query_verdict import STRONG_INLIER_FACTOR
from .rerank import VERIFY_SIDE, boosted, small_features

log = logging.getLogger(__name__)

CACHE_IMAGES = 512  # small copies kept decoded while walking the queries (~200 KB each)
# A pair confirmed through a third file needs both files to match it on this many times the inliers
# verification needs: look-alikes that verified matched on 12-18 inliers, real copies on 22 or more in 95 %
# of cases (the measurement behind query_verdict.STRONG_INLIER_FACTOR).
SHARED_INLIER_FACTOR = STRONG_INLIER_FACTOR


def verified_score(d: float, t_near: float) -> np.float32:
    """A verified pair's score: `rerank.boosted`, at least `t_near` once stored as float32 (pairs are
    float32; 0.815 becomes 0.81499999 there and would fall just below the threshold)."""
    v = np.float32(max(boosted(d), t_near))
    return v if float(v) >= t_near else np.nextafter(v, np.float32(2))


class _SmallCopies:
    """The store's small copies of indexed files, decoded on demand and kept in a bounded cache."""

    def __init__(self, store, ids):
        self.store = store
        self.sources = store.catalog.pixel_sources([int(i) for i in ids])
        self.cache: OrderedDict[int, object] = OrderedDict()

    def get(self, file_id: int):
        if file_id in self.cache:
            self.cache.move_to_end(file_id)
            return self.cache[file_id]
        row = self.sources.get(file_id)
        image = None
        if row is not None:
            try:
                image = read_image(self.store.pixels_path(row), max_side=VERIFY_SIDE)[0]
            except (ImageReadError, OSError) as exc:  # changed or gone since it was indexed
                log.debug("cannot verify %s: %s", file_id, exc)
        self.cache[file_id] = image
        if len(self.cache) > CACHE_IMAGES:
            self.cache.popitem(last=False)
        return image

    def features(self, file_id: int):
        """The file's keypoints as a verification candidate (kept across calls: rerank.small_features)."""
        row = self.sources.get(file_id)
        if row is None:
            return None
        return small_features({file_id: str(self.store.pixels_path(row))}).get(file_id)


def candidate_neighbours(index, q_ids: np.ndarray, xq: np.ndarray, *, top: int, floor: float,
                         below: float) -> list[tuple[int, list[tuple[int, float]]]]:
    """Per query id, its `top` nearest other files with floor <= cosine < below, each pair once."""
    if len(q_ids) == 0 or top <= 0:
        return []
    D, I = faiss_index.search(index, np.ascontiguousarray(xq, dtype=np.float32), min(top + 1, index.ntotal))
    seen: set[tuple[int, int]] = set()
    out = []
    for q, d_row, i_row in zip(q_ids.tolist(), D, I):
        picked = []
        others = [(d, j) for d, j in zip(d_row.tolist(), i_row.tolist()) if j >= 0 and j != q][:top]
        for d, j in others:
            key = (min(q, j), max(q, j))
            if floor <= d < below and key not in seen:
                seen.add(key)
                picked.append((j, d))
        if picked:
            out.append((q, picked))
    return out


def verified_pairs(store, index, q_ids: np.ndarray, xq: np.ndarray, *, top: int, floor: float,
                   t_near: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(a, b, sims) of the verified pairs among each query's closest neighbours (see the module
    docstring); sims are the verified scores, never below `t_near`."""
    from .verify import VerifyConfig, verify_candidates

    started = time.monotonic()
    work = candidate_neighbours(index, q_ids, xq, top=top, floor=floor, below=t_near)
    images = _SmallCopies(store, np.unique([q for q, _ in work] + [j for _, c in work for j, _ in c]))
    config = VerifyConfig(max_side=VERIFY_SIDE)
    a, b, sims, checked = [], [], [], 0
    for q, candidates in work:
        query = images.get(q)
        if query is None:
            continue
        pairs = [(j, d, f) for j, d in candidates if (f := images.features(j)) is not None]
        checked += len(pairs)
        for (j, d, _im), v in zip(pairs, verify_candidates(query, [im for _, _, im in pairs], config=config)):
            if v.verified:
                a.append(q)
                b.append(j)
                sims.append(verified_score(d, t_near))
    log.info("verified %d of %d close pairs below the near-duplicate threshold in %.1f s",
             len(a), checked, time.monotonic() - started)
    return (np.asarray(a, np.int64), np.asarray(b, np.int64), np.asarray(sims, np.float32))


def complete_components(store, ids: np.ndarray, xb: np.ndarray, pairs, *, t_near: float,
                        max_size: int = 16, shared_part: float = 0.0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """`pairs` joined by the verified ones among the other pairs of each small component, and (with
    `shared_part` > 0) by the pairs that a third file confirms (`shared_footprint_pairs`).

    A group needs every pair of its members to pass (groups.py), so three copies of one photo,
    each verified against one other, would still split. Inside each connected component of
    `pairs` with at most `max_size` files, every pair below `t_near` is verified, whatever its
    cosine; the verified ones join at their verified score.

    Whatever its cosine: every file of such a component is already tied to the others by pairs, so a
    low descriptor score between two of them says little. A copy under a large shape scored 0.16-0.32
    against its original's other copies, which ORB confirmed on 229-333 inliers; a cosine floor (the
    calibration's, 0.31 there) left those pairs unasked and split the photo's group in two. Without it,
    on the quality benchmark's photos with 832 planted copies, the groups' pair recall went from 0.763
    to 0.794 at precision 1.000, and on the demo archive from 0.973 to 0.994 with the same 5 wrong pairs
    (benchmarks/bench_groups.py; at most max_size * (max_size - 1) / 2 checks a component).

    Two edits of one original (a fogged copy and a tight crop) often match the original but not each
    other. With `shared_part`, the pairs a component already has are verified too (in components of
    three or more with a pair missing), for their footprints, and a missing pair that still does not
    verify is confirmed when both files match one third file strongly in a common part of it."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    from .verify import VerifyConfig, verify_candidates

    a, b, sims = pairs
    nodes = np.unique(np.r_[a, b]).astype(np.int64)
    if len(nodes) == 0:
        return pairs
    near = sims >= t_near
    ia, ib = np.searchsorted(nodes, a), np.searchsorted(nodes, b)
    count, labels = connected_components(coo_matrix((np.ones(len(ia)), (ia, ib)), shape=(len(nodes),) * 2),
                                         directed=False)
    row = {int(i): r for r, i in enumerate(ids)}
    have = {(int(x), int(y)) for x, y in zip(a[near], b[near])}
    sizes = np.bincount(labels, minlength=count)
    work: dict[int, list[tuple[int, float]]] = {}
    components: list[list[int]] = []  # those whose pairs are all asked, for shared footprints
    for comp in np.flatnonzero((sizes > 1) & (sizes <= max_size)):
        members = sorted(int(i) for i in nodes[labels == comp] if int(i) in row)
        every = [(x, y) for n, x in enumerate(members) for y in members[n + 1:]]
        whole = shared_part > 0 and len(members) >= 3 and any(p not in have for p in every)
        if whole:
            components.append(members)
        for x, y in every:
            if whole or (x, y) not in have:
                work.setdefault(x, []).append((y, float(xb[row[x]] @ xb[row[y]])))
    if not work:
        return pairs
    images = _SmallCopies(store, np.unique(list(work) + [y for c in work.values() for y, _ in c]))
    config = VerifyConfig(max_side=VERIFY_SIDE)
    va, vb, vs = [], [], []
    legs: dict[tuple[int, int], object] = {}  # (query, candidate) -> its Verification, verified
    cosine: dict[tuple[int, int], float] = {}
    for x, candidates in work.items():
        query = images.get(x)
        todo = [(y, d, f) for y, d in candidates if (f := images.features(y)) is not None]
        if query is None or not todo:
            continue
        for (y, d, _im), v in zip(todo, verify_candidates(query, [im for _, _, im in todo], config=config)):
            cosine[(x, y)] = d
            if v.verified:
                legs[(x, y)] = v
                if (x, y) not in have:
                    va.append(x)
                    vb.append(y)
                    vs.append(verified_score(d, t_near))
    verified = len(va)
    if components:
        for x, y in shared_footprint_pairs(components, legs, have, share=shared_part,
                                           strong=SHARED_INLIER_FACTOR * config.min_inliers):
            va.append(x)
            vb.append(y)
            vs.append(verified_score(cosine.get((x, y), -1.0), t_near))
    log.info("verified %d of %d pairs inside %d small components; %d more pairs confirmed by a third file", verified,
             sum(len(c) for c in work.values()), int(((sizes > 1) & (sizes <= max_size)).sum()), len(va) - verified)
    return faiss_index.canonical_pairs(np.r_[a, np.asarray(va, np.int64)], np.r_[b, np.asarray(vb, np.int64)],
                                       np.r_[sims, np.asarray(vs, np.float32)].astype(np.float32))


def common_share(box_a, box_b) -> float:
    """The area two boxes (x0, y0, x1, y1) have in common, as a share of the smaller one (0 when either is empty)."""
    w = min(box_a[2], box_b[2]) - max(box_a[0], box_b[0])
    h = min(box_a[3], box_b[3]) - max(box_a[1], box_b[1])
    smaller = min((box_a[2] - box_a[0]) * (box_a[3] - box_a[1]), (box_b[2] - box_b[0]) * (box_b[3] - box_b[1]))
    return float(w * h / smaller) if w > 0 and h > 0 and smaller > 0 else 0.0


def shared_footprint_pairs(components: list[list[int]], legs: dict, have: set, *, share: float,
                           strong: int) -> list[tuple[int, int]]:
    """The pairs (x, y), x < y, of each component's members, neither already in `have` nor verified in
    `legs`, that a third member c confirms: x and y each match c on at least `strong` inliers and their
    footprints in c (the boxes verification found) share at least `share` of the smaller one.

    `legs` maps (query, candidate) to a verified Verification: its `box` is the query's footprint in
    the candidate, its `query_box` the candidate's footprint in the query. Only verified pairs serve as
    legs, never a pair confirmed here, so nothing chains: x and y must show the same part of c."""
    footprint: dict[tuple[int, int], tuple] = {}  # (file, third) -> the file's footprint in the third
    for (q, c), v in legs.items():
        if v.inliers >= strong and v.box is not None and v.query_box is not None:
            footprint[(q, c)] = v.box
            footprint[(c, q)] = v.query_box
    out = []
    for members in components:
        for n, x in enumerate(members):
            for y in members[n + 1:]:
                if (x, y) in have or (x, y) in legs or (y, x) in legs:
                    continue
                for c in members:
                    fx, fy = footprint.get((x, c)), footprint.get((y, c))
                    if c not in (x, y) and fx is not None and fy is not None and common_share(fx, fy) >= share:
                        out.append((x, y))
                        break
    return out
