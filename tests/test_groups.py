"""indexer.matching.groups: partitions against scipy's connected components, the no-chaining
guarantee against NumPy brute force, tiers and the keeper policy on crafted data."""

import csv
import io
import json

import numpy as np
import pytest
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from nearsight.indexer.core.errors import UsageError
from nearsight.indexer.matching.groups import (ImageMeta, build_groups, group_id, groups_from_json, groups_to_csv,
                            groups_to_json, keeper_key, reclaimable_bytes, summarize)


def unit(x):
    x = np.asarray(x, dtype=np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def plain_meta(ids, overrides=None):
    """Distinct files: unique hashes, sizes that make the smallest id the keeper."""
    out = {}
    for i in ids:
        fields = dict(path=f"/photos/img_{i:05d}.jpg", content_hash=f"c{i}", width=100, height=100,
                      file_size=10_000 - int(i), format="JPEG", mtime=1_600_000_000.0)
        fields.update((overrides or {}).get(i, {}))
        out[int(i)] = ImageMeta(**fields)
    return out


def brute_pairs(xb, ids, threshold):
    """NumPy brute force: all pairs with cosine >= threshold."""
    S = xb @ xb.T
    i, j = np.triu_indices(len(xb), k=1)
    keep = S[i, j] >= threshold
    return ids[i[keep]], ids[j[keep]], S[i, j][keep], S


def partition(groups):
    return {frozenset(m.id for m in g.members) for g in groups}


def assert_no_pair_below(groups, S, row_of, threshold):
    """Brute force: every pair inside every group is at or above the threshold."""
    for g in groups:
        rows = [row_of[m.id] for m in g.members]
        block = S[np.ix_(rows, rows)]
        assert block.min() >= threshold - 1e-6, (g.gid, block.min())


def best_split_pairs(ok: np.ndarray) -> int:
    """Brute force over every partition of the nodes (small n): the most pairs inside groups when every
    pair inside a group must be allowed by `ok`."""
    n, best = len(ok), 0

    def place(i, blocks, pairs):
        nonlocal best
        if i == n:
            best = max(best, pairs)
            return
        for block in blocks:
            if all(ok[i, j] for j in block):
                block.append(i)
                place(i + 1, blocks, pairs + len(block) - 1)
                block.pop()
        blocks.append([i])
        place(i + 1, blocks, pairs)
        blocks.pop()

    place(0, [], 0)
    return best


# ------------------------------------------------------------------ partitions

def test_cliques_match_scipy_connected_components():
    rng = np.random.default_rng(0)
    centres = unit(rng.standard_normal((40, 64)))
    sizes = rng.integers(1, 6, 40)
    xb = unit(np.repeat(centres, sizes, axis=0) + 0.02 * rng.standard_normal((sizes.sum(), 64)))
    ids = rng.choice(10**9, len(xb), replace=False).astype(np.int64)
    a, b, s, S = brute_pairs(xb, ids, 0.9)

    # Reference: scipy.sparse.csgraph.connected_components on the same pair graph.
    nodes = np.unique(np.r_[a, b])
    ia, ib = np.searchsorted(nodes, a), np.searchsorted(nodes, b)
    _, labels = connected_components(coo_matrix((s, (ia, ib)), shape=(len(nodes),) * 2), directed=False)
    expected = {frozenset(nodes[labels == c].tolist()) for c in np.unique(labels)}
    # Precondition: no chaining conflict, every component is a clique at the threshold.
    row_of = {v: r for r, v in enumerate(ids.tolist())}
    for comp in expected:
        rows = [row_of[v] for v in comp]
        assert S[np.ix_(rows, rows)].min() >= 0.9

    groups = build_groups(a, b, s, plain_meta(ids), t_near=0.95, t_similar=0.9)
    assert partition(groups) == expected


def test_chain_of_three_never_joins_the_ends():
    A, B, C = 1, 2, 3
    meta = plain_meta([A, B, C])
    for with_low_pair in (False, True):
        a, b, s = [A, B], [B, C], [0.95, 0.95]
        if with_low_pair:
            a, b, s = a + [A], b + [C], s + [0.40]
        groups = build_groups(np.array(a), np.array(b), np.array(s), meta, t_near=0.9, t_similar=0.9)
        assert len(groups) == 1  # B joins one side only
        members = {m.id for m in groups[0].members}
        assert members in ({A, B}, {B, C})
    # B joins the end it is closer to.
    groups = build_groups(np.array([A, B]), np.array([B, C]), np.array([0.92, 0.97]), meta, t_near=0.9, t_similar=0.9)
    assert partition(groups) == {frozenset({B, C})}


@pytest.mark.parametrize("use_vectors", [False, True])
def test_long_chain_of_ten(use_vectors):
    # Ten unit vectors on a circle, neighbours at cosine 0.95: cos(2 theta) = 0.805 < 0.9.
    theta = np.arccos(0.95)
    xb = np.stack([np.cos(theta * np.arange(10)), np.sin(theta * np.arange(10))], 1).astype(np.float32)
    ids = np.arange(10, dtype=np.int64) + 100
    a, b, s, S = brute_pairs(xb, ids, 0.9)
    assert len(a) == 9  # only the links of the chain
    vectors = (lambda q: xb[q - 100]) if use_vectors else None
    groups = build_groups(a, b, s, plain_meta(ids), t_near=0.9, t_similar=0.9, vectors=vectors)
    assert groups and all(g.size == 2 for g in groups)
    assert_no_pair_below(groups, S, {v: v - 100 for v in ids.tolist()}, 0.9)
    seen = [m.id for g in groups for m in g.members]
    assert len(seen) == len(set(seen))  # each image in at most one group


def test_an_original_joins_the_most_of_its_copies_it_can():
    """An original (0) and five copies: copy 1 is the original under a large overlay (cosine 1.0 with it,
    merged first by complete linkage) and lacks pairs with copies 4 and 5, which every other pair has.
    scipy's complete linkage cuts the six so that the original misses some of its copies; the best valid
    split (brute force over all 203 partitions) puts it with copies 2-5, leaving copy 1 out."""
    from scipy.cluster.hierarchy import fcluster, linkage
    from scipy.spatial.distance import squareform

    n = 6
    S = np.full((n, n), 0.95)
    S[0, 1] = S[1, 0] = 1.0
    for j in (4, 5):
        S[1, j] = S[j, 1] = 0.2
    np.fill_diagonal(S, 1.0)
    i, j = np.triu_indices(n, 1)
    keep = S[i, j] >= 0.9
    ids = np.arange(n, dtype=np.int64)
    groups = build_groups(ids[i[keep]], ids[j[keep]], S[i, j][keep], plain_meta(ids), t_near=0.9, t_similar=0.9,
                          vectors=None)
    labels = fcluster(linkage(squareform(1.0 - S, checks=False), "complete"), t=0.1, criterion="distance")
    linkage_pairs = sum(int((labels == c).sum()) * (int((labels == c).sum()) - 1) // 2 for c in np.unique(labels))
    assert linkage_pairs < 10  # scipy's cut keeps the original apart from some of its copies
    assert partition(groups) == {frozenset({0, 2, 3, 4, 5})}
    assert sum(g.size * (g.size - 1) // 2 for g in groups) == best_split_pairs(S >= 0.9) == 10
    assert_no_pair_below(groups, S, {v: v for v in ids.tolist()}, 0.9)


@pytest.mark.parametrize("max_linkage", [4000, 3])  # complete linkage; centre split
def test_every_pair_in_every_group_is_above_threshold(max_linkage):
    rng = np.random.default_rng(5)
    # Random walks: each step close to the previous, so components chain badly.
    steps = []
    for _ in range(30):
        x = unit(rng.standard_normal((1, 32)))[0]
        for _ in range(int(rng.integers(2, 15))):
            steps.append(x)
            x = x + 0.08 * rng.standard_normal(32)
            x = x / np.linalg.norm(x)
    xb = unit(np.array(steps))
    ids = np.arange(len(xb), dtype=np.int64)
    a, b, s, S = brute_pairs(xb, ids, 0.9)
    # Precondition (scipy connected_components): some components do chain.
    _, labels = connected_components(coo_matrix((s, (a, b)), shape=(len(ids),) * 2), directed=False)
    assert any(S[np.ix_(labels == c, labels == c)].min() < 0.9 for c in np.unique(labels))
    groups = build_groups(a, b, s, plain_meta(ids), t_near=0.97, t_similar=0.9,
                          max_linkage=max_linkage)
    assert groups
    assert_no_pair_below(groups, S, {v: v for v in ids.tolist()}, 0.9)
    seen = [m.id for g in groups for m in g.members]
    assert len(seen) == len(set(seen))
    # Complete linkage cut at 1 - t: no two groups could merge and stay above t,
    # checked by brute force on the merged member set.
    if max_linkage == 4000:
        for g in groups:
            for h in groups:
                if g.gid < h.gid:
                    rows = [m.id for m in g.members + h.members]
                    if S[np.ix_(rows, rows)].min() >= 0.9:
                        pytest.fail(f"{g.gid} and {h.gid} could be one group")


@pytest.mark.parametrize("max_linkage", [4000, 3])  # complete linkage; centre split
def test_a_pair_kept_apart_never_shares_a_group_and_nothing_chains(max_linkage):
    """Five near copies of one picture with the pair (0, 1) kept apart: scipy's complete linkage on the
    same distances with that pair at the largest distance (2) is the oracle for the split."""
    from scipy.cluster.hierarchy import fcluster, linkage
    from scipy.spatial.distance import squareform

    rng = np.random.default_rng(3)
    xb = unit(rng.standard_normal((1, 16)) + 0.03 * rng.standard_normal((5, 16)))
    ids = np.arange(5, dtype=np.int64)
    a, b, s, S = brute_pairs(xb, ids, 0.9)
    assert len(a) == 10  # one clique before the verdict
    groups = build_groups(a, b, s, plain_meta(ids), t_near=0.9, t_similar=0.9, apart=[(1, 0)],
                          vectors=lambda q: xb[q], max_linkage=max_linkage)
    assert not any({0, 1} <= {m.id for m in g.members} for g in groups)
    assert_no_pair_below(groups, S, {v: v for v in ids.tolist()}, 0.9)
    if max_linkage == 4000:
        D = 1.0 - S.astype(np.float64)
        D[0, 1] = D[1, 0] = 2.0
        np.fill_diagonal(D, 0.0)
        labels = fcluster(linkage(squareform(np.clip(D, 0, 2), checks=False), "complete"), t=0.1, criterion="distance")
        # scipy's split is where ours starts; single members then move while that adds pairs inside groups, so
        # ours holds at least as many, and as many as the best valid split (brute force over all 52 partitions).
        linkage_pairs = sum(int((labels == c).sum()) * (int((labels == c).sum()) - 1) // 2 for c in np.unique(labels))
        ok = S >= 0.9
        ok[0, 1] = ok[1, 0] = False
        got = sum(g.size * (g.size - 1) // 2 for g in groups)
        assert linkage_pairs <= got == best_split_pairs(ok)


def test_a_pair_kept_apart_that_is_one_image_is_a_usage_error():
    meta = plain_meta([1, 2], {2: dict(content_hash="c1")})
    with pytest.raises(UsageError, match="same image"):
        build_groups(np.array([1]), np.array([2]), np.array([1.0]), meta, t_near=0.9, t_similar=0.9, apart=[(1, 2)])


# ------------------------------------------------------------------ tiers and keepers

def test_tiers_relative_to_keeper():
    K, X, Y, Z, W = 10, 11, 12, 13, 14
    meta = plain_meta([K, X, Y, Z, W], {
        X: dict(content_hash="c10"),                       # same bytes as K
        K: dict(pixel_hash="p1", width=200),               # K is the keeper (most pixels)
        Y: dict(pixel_hash="p1"),                          # same pixels, other bytes
    })
    pairs = {(K, Z): 0.97, (K, W): 0.85, (Z, W): 0.86, (K, Y): 0.9999, (Y, Z): 0.97, (Y, W): 0.85}
    a, b = np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])
    groups = build_groups(a, b, np.array(list(pairs.values())), meta, t_near=0.95, t_similar=0.8)
    assert len(groups) == 1
    g = groups[0]
    tiers = {m.id: m.tier for m in g.members}
    assert g.keeper == K
    assert tiers == {K: "same-bytes", X: "same-bytes", Y: "same-pixels", Z: "near-duplicate",
                     W: "similar"}
    sims = {m.id: m.similarity for m in g.members}
    assert sims[K] == sims[X] == sims[Y] == 1.0 and sims[Z] == pytest.approx(0.97)
    assert g.tier == "similar"
    assert g.members[0].id == K


def test_group_tiers():
    meta = plain_meta(range(1, 10), {2: dict(content_hash="c1"), 3: dict(content_hash="c1")})
    a = np.array([4, 4, 5, 7, 7, 8])
    b = np.array([5, 6, 6, 8, 9, 9])
    s = np.array([0.97, 0.96, 0.98, 0.97, 0.97, 0.93])
    groups = build_groups(a, b, s, meta, t_near=0.95, t_similar=0.9)
    by_members = {frozenset(m.id for m in g.members): g.tier for g in groups}
    assert by_members == {
        frozenset({1, 2, 3}): "same-bytes",  # no pairs needed: same content hash
        frozenset({4, 5, 6}): "near-duplicate",
        frozenset({7, 8, 9}): "similar",  # 8-9 at 0.93 < t_near, though both are near to 7
    }


def test_keeper_policy():
    base = dict(content_hash="", width=100, height=100, file_size=1000, format="JPEG",
                mtime=100.0, path="/b.jpg")
    def m(**kw):
        return ImageMeta(**{**base, **kw})
    # Each rule decides only when the ones before it tie.
    assert min([m(width=90), m(width=100)], key=keeper_key).width == 100
    assert min([m(file_size=900), m(file_size=1000)], key=keeper_key).file_size == 1000
    assert min([m(mtime=200.0), m(mtime=100.0)], key=keeper_key).mtime == 100.0
    assert min([m(path="/b.jpg"), m(path="/a.jpg")], key=keeper_key).path == "/a.jpg"

    meta = plain_meta([1, 2, 3], {1: dict(width=50), 2: dict(width=400, path="/keep/x.jpg"),
                                    3: dict(width=800)})
    a, b, s = np.array([1, 1, 2]), np.array([2, 3, 3]), np.array([0.96, 0.96, 0.96])
    assert build_groups(a, b, s, meta, t_near=0.95, t_similar=0.9)[0].keeper == 3
    prefer = lambda meta: 0 if meta.path.startswith("/keep/") else 1  # noqa: E731
    assert build_groups(a, b, s, meta, t_near=0.95, t_similar=0.9, prefer=prefer)[0].keeper == 2


def test_gid_and_order_stable_under_input_permutation():
    rng = np.random.default_rng(9)
    centres = unit(rng.standard_normal((30, 16)))
    xb = unit(np.repeat(centres, 4, axis=0) + 0.05 * rng.standard_normal((120, 16)))
    ids = rng.choice(10**6, 120, replace=False).astype(np.int64)
    a, b, s, _ = brute_pairs(xb, ids, 0.85)
    meta = plain_meta(ids)
    first = build_groups(a, b, s, meta, t_near=0.95, t_similar=0.85)
    perm = rng.permutation(len(a))
    swap = rng.random(len(a)) < 0.5
    a2, b2 = np.where(swap, b, a)[perm], np.where(swap, a, b)[perm]
    meta2 = dict(reversed(list(meta.items())))
    second = build_groups(a2, b2, s[perm], meta2, t_near=0.95, t_similar=0.85)
    assert [g.to_dict() for g in first] == [g.to_dict() for g in second]
    assert first[0].gid == group_id(sorted(m.id for m in first[0].members))


def test_sorted_by_size_then_best_similarity():
    meta = plain_meta(range(1, 8))
    a, b = np.array([1, 1, 2, 4, 6]), np.array([2, 3, 3, 5, 7])
    s = np.array([0.95, 0.95, 0.95, 0.91, 0.99])
    groups = build_groups(a, b, s, meta, t_near=0.9, t_similar=0.9)
    assert [sorted(m.id for m in g.members) for g in groups] == [[1, 2, 3], [6, 7], [4, 5]]


def test_reclaimable_bytes_and_summary():
    meta = plain_meta([1, 2, 3], {1: dict(file_size=5000), 2: dict(file_size=300),
                                    3: dict(file_size=200)})
    g = build_groups(np.array([1, 1, 2]), np.array([2, 3, 3]), np.array([0.99] * 3), meta,
                     t_near=0.95, t_similar=0.9)[0]
    assert g.keeper == 1 and reclaimable_bytes(g) == 500
    assert summarize([g]) == {"groups": 1, "files_in_groups": 3, "reclaimable_bytes": 500,
                              "groups_by_tier": {"same-bytes": 0, "same-pixels": 0, "person-same": 0,
                                                 "near-duplicate": 1, "similar": 0}}


# ------------------------------------------------------------------ export

def test_csv_and_json_round_trip():
    meta = plain_meta([1, 2, 3, 4], {3: dict(path='/odd, "name".jpg')})
    groups = build_groups(np.array([1, 3]), np.array([2, 4]), np.array([0.97, 0.92]), meta,
                          t_near=0.95, t_similar=0.9)
    out = io.StringIO()
    groups_to_csv(groups, out)
    rows = list(csv.DictReader(io.StringIO(out.getvalue())))  # stdlib csv as the reader
    assert len(rows) == 4 and {r["path"] for r in rows} >= {'/odd, "name".jpg'}
    assert sum(r["role"] == "keeper" for r in rows) == 2

    out = io.StringIO()
    groups_to_json(groups, out)
    data = json.loads(out.getvalue())
    assert data["summary"]["groups"] == 2
    back = groups_from_json(io.StringIO(out.getvalue()))
    assert [g.to_dict() for g in back] == [g.to_dict() for g in groups]


# ------------------------------------------------------------------ bad input

def test_bad_input():
    meta = plain_meta([1, 2])
    with pytest.raises(UsageError, match="no metadata"):
        build_groups(np.array([1]), np.array([3]), np.array([0.99]), meta, t_near=0.9, t_similar=0.8)
    with pytest.raises(UsageError):
        build_groups(np.array([1]), np.array([2]), np.array([0.99]), meta, t_near=0.8, t_similar=0.9)
    with pytest.raises(UsageError):
        build_groups(np.array([1, 2]), np.array([2]), np.array([0.99]), meta, t_near=0.9, t_similar=0.8)
    with pytest.raises(UsageError):
        build_groups(np.array([1]), np.array([2]), np.array([np.nan]), meta, t_near=0.9, t_similar=0.8)
    with pytest.raises(UsageError, match="bad metadata"):
        build_groups(np.array([1]), np.array([2]), np.array([0.99]), {1: {"path": "x"}, 2: meta[2]},
                     t_near=0.9, t_similar=0.8)
    with pytest.raises(UsageError):
        groups_from_json(io.StringIO('{"nothing": 1}'))
