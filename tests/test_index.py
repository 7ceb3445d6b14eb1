"""indexer.matching.index against exhaustive references.

Oracles: scikit-learn's NearestNeighbors(metric="cosine", algorithm="brute") for
k-NN, NumPy brute force (xb @ xb.T) for all pairs above a threshold.
"""

import faiss
import numpy as np
import pytest
from sklearn.neighbors import NearestNeighbors

from nearsight.indexer.matching import index as ix
from nearsight.indexer.matching import index_spec as spec_of
from nearsight.indexer.core.errors import NotFoundError, NotReadyError, UsageError


def unit(x):
    x = np.asarray(x, dtype=np.float32)
    return np.ascontiguousarray(x / np.linalg.norm(x, axis=1, keepdims=True))


def random_ids(rng, n):
    """Sparse, unsorted catalog ids so a wrong id mapping cannot pass by accident."""
    return rng.choice(10**12, size=n, replace=False).astype(np.int64)


def clustered(rng, n, dim, clusters, spread):
    centres = unit(rng.standard_normal((clusters, dim)))
    members = rng.integers(0, clusters, n)
    return unit(centres[members] + spread * rng.standard_normal((n, dim)))


@pytest.fixture(scope="module")
def clustered_set():
    """20k vectors, dim 64, 200 Gaussian clusters (seeded)."""
    rng = np.random.default_rng(7)
    xb = clustered(rng, 20_000, 64, 200, 0.12)
    return xb, random_ids(rng, xb.shape[0])


@pytest.fixture(scope="module")
def duplicate_set():
    """3000 clustered vectors plus 300 near copies (original + small noise, renormalised)."""
    rng = np.random.default_rng(11)
    base = clustered(rng, 3000, 32, 60, 0.25)
    sources = rng.choice(3000, 300, replace=False)
    copies = unit(base[sources] + 0.03 * rng.standard_normal((300, 32)))
    xb = np.ascontiguousarray(np.vstack([base, copies]))
    return xb, random_ids(rng, xb.shape[0])


def brute_pairs(xb, ids, threshold):
    """NumPy brute force: {(min id, max id): cosine} for every pair >= threshold."""
    S = xb @ xb.T
    i, j = np.triu_indices(len(xb), k=1)
    keep = S[i, j] >= threshold
    a, b = ids[i[keep]], ids[j[keep]]
    return {(min(p, q), max(p, q)): s for p, q, s in zip(a.tolist(), b.tolist(), S[i, j][keep])}, S


def safe_threshold(S, wanted, gap=1e-5):
    """A threshold near `wanted` with no pair within `gap` of it, so float rounding
    (BLAS vs NumPy) cannot decide set membership."""
    values = np.sort(S[np.triu_indices(len(S), k=1)])
    t = wanted
    while np.min(np.abs(values - t)) < gap:
        t += 3 * gap
    return t


def exact_knn(xq, xb, ids, k):
    S = xq @ xb.T
    top = np.argsort(-S, axis=1)[:, :k]
    return ids[top]


# ------------------------------------------------------------------ exact search

def test_flat_search_matches_sklearn_brute_cosine():
    rng = np.random.default_rng(0)
    xb, xq = unit(rng.standard_normal((2000, 32))), unit(rng.standard_normal((100, 32)))
    ids = random_ids(rng, len(xb))
    index = ix.build_index(xb, ids)
    assert ix.index_kind(index) == "flat"
    D, I = ix.search(index, xq, 10)

    # Reference: scikit-learn exhaustive cosine neighbours (distance = 1 - cosine).
    dist, ind = NearestNeighbors(metric="cosine", algorithm="brute").fit(xb).kneighbors(xq, 10)
    np.testing.assert_array_equal(I, ids[ind])
    np.testing.assert_allclose(D, 1 - dist, atol=1e-5)


def test_search_pads_with_minus_one_when_k_exceeds_ntotal():
    rng = np.random.default_rng(1)
    xb = unit(rng.standard_normal((5, 8)))
    ids = np.arange(100, 105, dtype=np.int64)
    D, I = ix.search(ix.build_index(xb, ids), xb[:2], 8)
    assert sorted(I[0, :5].tolist()) == ids.tolist()
    assert (I[:, 5:] == -1).all()


# ------------------------------------------------------------------ approximate search

def near_queries(rng, xb, count, spread=0.12):
    """Queries from the database's distribution that are not in it: members plus noise."""
    return unit(xb[rng.choice(len(xb), count)] + spread * rng.standard_normal((count, xb.shape[1])))


@pytest.mark.parametrize("spec", ["IVF512,SQ8", "IDMap2,HNSW32"])
def test_tuned_approximate_index_reaches_recall(clustered_set, spec):
    xb, ids = clustered_set
    index = ix.build_index(xb, ids, spec)
    rng = np.random.default_rng(3)
    tuned = ix.tune_search(index, near_queries(rng, xb, 500), 0.95, 10, xb=xb, ids=ids)
    assert tuned["reached"] and tuned["recall"] >= 0.95

    # Held-out queries (not the tuning sample) against NumPy brute force.
    xq = near_queries(rng, xb, 300)
    _, I = ix.search(index, xq, 10)
    recall = ix.knn_recall(I, exact_knn(xq, xb, ids, 10))
    assert recall >= 0.95, (spec, tuned, recall)


def test_tune_search_reports_pq_recall_honestly(clustered_set):
    """4-bit PQ16 on 64-d keeps 8 bytes a vector: whatever recall it reaches, the
    figure tune_search reports must be the one a brute-force check measures.
    (4-bit codes: 8-bit PQ k-means takes half a minute on 2 cores; same code path.)"""
    xb, ids = clustered_set
    xb, ids = np.ascontiguousarray(xb[:5000]), ids[:5000]
    index = ix.build_index(xb, ids, "IVF64,PQ16x4")
    xq = near_queries(np.random.default_rng(4), xb, 300)
    tuned = ix.tune_search(index, xq, 0.95, 10, xb=xb, ids=ids)
    _, I = ix.search(index, xq, 10)
    assert tuned["recall"] == pytest.approx(ix.knn_recall(I, exact_knn(xq, xb, ids, 10)), abs=0.01)
    assert tuned["reached"] == (tuned["recall"] >= 0.95)
    if not tuned["reached"]:
        assert tuned["params"] == {"nprobe": 64}  # the most accurate setting is kept


def test_tune_search_ignores_the_query_itself(clustered_set):
    xb, ids = clustered_set
    index = ix.build_index(xb, ids, "IVF512,SQ8")
    tuned = ix.tune_search(index, xb[:300], 0.95, 10, xb=xb, ids=ids)
    ix.apply_search_params(index, tuned["params"])
    _, I = ix.search(index, xb[:300], 11)
    truth = exact_knn(xb[:300], xb, ids, 11)[:, 1:]  # column 0 is the query itself
    without_self = np.array([[i for i in row if i != q][:10] for row, q in zip(I, ids[:300])])
    assert ix.knn_recall(without_self, truth) == pytest.approx(tuned["recall"], abs=0.01)


def test_knn_recall_counts_reference_hits():
    # 10-recall@10 as in the FAISS benchmarks: |returned ∩ true top-k| / k (common practice).
    I_ref = np.array([[1, 2, 3, 4], [5, 6, 7, 8]])
    I = np.array([[4, 3, 9, 9], [5, 6, 7, 8]])
    assert ix.knn_recall(I, I_ref) == pytest.approx(6 / 8)


def test_tune_search_without_vectors_uses_exhaustive_reference(clustered_set):
    xb, ids = clustered_set
    index = ix.build_index(xb[:5000], ids[:5000], "IVF64,SQ8")
    tuned = ix.tune_search(index, xb[:200], 0.9, 10)
    assert tuned["reference"] == "exhaustive" and tuned["recall"] >= 0.9
    assert ix.faiss.extract_index_ivf(index).nprobe == tuned["params"]["nprobe"]


# ------------------------------------------------------------------ pairs above a threshold

def test_range_pairs_flat_equals_brute_force(duplicate_set):
    xb, ids = duplicate_set
    truth, S = brute_pairs(xb, ids, -1.0)
    t = safe_threshold(S, 0.9)
    truth = {pair: s for pair, s in truth.items() if s >= t}
    assert len(truth) >= 300  # the planted copies at least
    a, b, sims = ix.range_pairs(ix.build_index(xb, ids), xb, ids, t, block=1000)
    assert (a < b).all()
    found = dict(zip(zip(a.tolist(), b.tolist()), sims.tolist()))
    assert found.keys() == truth.keys()
    np.testing.assert_allclose([found[p] for p in truth], list(truth.values()), atol=1e-5)


@pytest.mark.parametrize("spec,method", [("IVF32,SQ8", "range"), ("IVF32,PQ16x4", "range"),
                                         ("IDMap2,HNSW32", "auto"), ("IDMap2,Flat", "knn")])
def test_range_pairs_approximate_recall(duplicate_set, spec, method):
    xb, ids = duplicate_set
    truth, S = brute_pairs(xb, ids, -1.0)
    t = safe_threshold(S, 0.85)
    truth = {pair for pair, s in truth.items() if s >= t}
    index = ix.build_index(xb, ids, spec)
    ix.tune_search(index, xb[:300], 0.95, 10, xb=xb, ids=ids)
    a, b, sims = ix.range_pairs(index, xb, ids, t, method=method, block=700)
    found = set(zip(a.tolist(), b.tolist()))
    assert len(found & truth) / len(truth) >= 0.95
    assert found <= truth  # refined similarities are exact, so nothing below t slips in
    assert (sims >= t).all()


@pytest.fixture(scope="module")
def copies_set():
    """8k clustered vectors (dim 48, 100 clusters) plus 400 near copies, the pairs above 0.9."""
    rng = np.random.default_rng(23)
    base = clustered(rng, 8_000, 48, 100, 0.2)
    sources = rng.choice(8_000, 400, replace=False)
    copies = unit(base[sources] + 0.025 * rng.standard_normal((400, 48)))
    xb = np.ascontiguousarray(np.vstack([base, copies]))
    return xb, random_ids(rng, xb.shape[0])


def test_the_tuned_self_join_finds_the_exact_pairs_with_a_smaller_nprobe(copies_set):
    """`tune_pair_search` + `range_pairs`, as grouping runs them on an IVF index, against NumPy brute force
    over every pair: at least 0.98 of the pairs >= 0.9 found, none below it, at a smaller nprobe than the
    query's."""
    xb, ids = copies_set
    t, pairs = 0.9, {}
    for start in range(0, len(xb), 1000):  # NumPy brute force over every pair, a block of rows at a time
        S = xb[start:start + 1000] @ xb.T
        i, j = np.nonzero(S >= t - 1e-5)
        keep = start + i < j
        a, b = ids[start + i[keep]], ids[j[keep]]
        pairs.update(zip(zip(np.minimum(a, b).tolist(), np.maximum(a, b).tolist()), S[i[keep], j[keep]].tolist()))
    # Pairs within 1e-5 of t may fall either way (BLAS and einsum round differently): counted on neither side.
    truth = {p for p, sim in pairs.items() if sim >= t + 1e-5}
    index = ix.build_index(xb, ids, "IVF128,SQ8")
    ix.tune_search(index, xb[:500], 0.95, 10, xb=xb, ids=ids)
    query_nprobe = faiss.extract_index_ivf(index).nprobe
    tuned = ix.tune_pair_search(index, xb, ids, t, sample=2000)
    assert tuned["reached"] and tuned["sample_pairs"] >= ix.MIN_SAMPLE_PAIRS
    assert tuned["params"]["nprobe"] < query_nprobe
    assert faiss.extract_index_ivf(index).nprobe == query_nprobe  # the index's own setting is left alone
    a, b, sims = ix.range_pairs(index, xb, ids, t, params=tuned["params"])
    found = set(zip(a.tolist(), b.tolist()))
    assert len(truth) >= 400 and len(found & truth) / len(truth) >= 0.98  # the planted copies at least
    assert found <= pairs.keys() and (sims >= t).all()
    # The tuner's own oracle on a sample of rows agrees with this one.
    rows = np.arange(0, len(xb), 97)
    assert ix.exact_pairs_of(xb, ids, rows, t) <= pairs.keys()


def test_pair_search_measures_only_files_the_index_holds(copies_set):
    """Files scanned since the index was built (in xb, not in the index) have pairs no nprobe can find;
    the tuning leaves them out instead of climbing to the query's nprobe for nothing."""
    xb, ids = copies_set
    held = np.r_[0:6000, 8000:8400]  # the 2,000 rows 6000-7999 came after the build; the copies are held
    index = ix.build_index(np.ascontiguousarray(xb[held]), ids[held], "IVF128,SQ8")
    ix.apply_search_params(index, {"nprobe": 64})
    tuned = ix.tune_pair_search(index, xb, ids, 0.9)
    assert tuned["reached"] and tuned["params"]["nprobe"] < 64


def test_pair_search_keeps_the_query_nprobe_when_the_sample_has_too_few_pairs(clustered_set):
    xb, ids = clustered_set
    index = ix.build_index(xb, ids, "IVF64,SQ8")
    ix.apply_search_params(index, {"nprobe": 16})
    tuned = ix.tune_pair_search(index, xb, ids, 0.999, sample=200)
    assert tuned["reached"] is None and tuned["params"] == {"nprobe": 16}


# ------------------------------------------------------------------ updates

def test_remove_and_add_equal_a_rebuild_flat(duplicate_set):
    xb, ids = duplicate_set
    index = ix.build_index(xb[:3000], ids[:3000])
    removed = ids[100:400]
    assert ix.remove_ids(index, removed) == 300
    ix.add(index, xb[3000:], ids[3000:])
    keep = np.r_[0:100, 400:len(xb)]
    rebuilt = ix.build_index(np.ascontiguousarray(xb[keep]), ids[keep])
    D1, I1 = ix.search(index, xb[:50], 10)
    D2, I2 = ix.search(rebuilt, xb[:50], 10)
    np.testing.assert_array_equal(I1, I2)
    np.testing.assert_allclose(D1, D2, atol=1e-6)
    assert not np.isin(I1, removed).any()


def test_remove_and_add_equal_a_rebuild_ivf(duplicate_set):
    xb, ids = duplicate_set
    index = ix.build_index(xb[:3000], ids[:3000], "IVF32,SQ8")
    rebuilt = faiss.clone_index(index)  # same training, filled from scratch
    rebuilt.reset()
    ix.remove_ids(index, ids[100:400])
    ix.add(index, xb[3000:], ids[3000:])
    keep = np.r_[0:100, 400:len(xb)]
    ix.add(rebuilt, np.ascontiguousarray(xb[keep]), ids[keep])
    for idx in (index, rebuilt):
        ix.apply_search_params(idx, {"nprobe": 8})
    D1, I1 = ix.search(index, xb[:200], 10)
    D2, I2 = ix.search(rebuilt, xb[:200], 10)
    np.testing.assert_allclose(D1, D2, atol=1e-6)
    assert [set(r) for r in I1] == [set(r) for r in I2]
    assert sorted(ix.stored_ids(index).tolist()) == sorted(ids[keep].tolist())


def test_hnsw_cannot_remove_and_says_rebuild(duplicate_set):
    xb, ids = duplicate_set
    index = ix.build_index(xb, ids, "IDMap2,HNSW32")
    with pytest.raises(NotReadyError, match="rebuild"):
        ix.remove_ids(index, ids[:3])
    assert index.ntotal == len(xb)


def test_add_refuses_ids_already_present(duplicate_set):
    xb, ids = duplicate_set
    index = ix.build_index(xb[:100], ids[:100])
    with pytest.raises(UsageError, match="already in the index"):
        ix.add(index, xb[99:120], ids[99:120])
    assert index.ntotal == 100  # nothing half-added


# ------------------------------------------------------------------ persistence

@pytest.mark.parametrize("spec", ["IDMap2,Flat", "IVF32,SQ8", "IDMap2,HNSW32"])
@pytest.mark.parametrize("mmap", [False, True])
def test_save_load_round_trip(tmp_path, duplicate_set, spec, mmap):
    xb, ids = duplicate_set
    index = ix.build_index(xb, ids, spec)
    params = ix.tune_search(index, xb[:200], 0.95, 10, xb=xb, ids=ids)["params"]
    D1, I1 = ix.search(index, xb[:100], 10)
    path = tmp_path / "gen1" / "vectors.faiss"
    ix.save_index(index, path)
    assert [p.name for p in path.parent.iterdir()] == ["vectors.faiss"]  # no temp file left
    loaded = ix.load_index(path, mmap=mmap, params=params)
    D2, I2 = ix.search(loaded, xb[:100], 10)
    np.testing.assert_array_equal(I1, I2)
    np.testing.assert_array_equal(D1, D2)
    if mmap:
        with pytest.raises(NotReadyError, match="read-only"):
            ix.add(loaded, xb[:1], np.array([-5 + 10**13], dtype=np.int64))


def test_load_missing_or_corrupt(tmp_path):
    with pytest.raises(NotFoundError):
        ix.load_index(tmp_path / "nope.faiss")
    bad = tmp_path / "bad.faiss"
    bad.write_bytes(b"not an index")
    with pytest.raises(ix.StoreError):
        ix.load_index(bad)


# ------------------------------------------------------------------ choosing a spec

def test_choose_spec():
    assert spec_of.choose_spec(1000, 128) == "IDMap2,Flat"
    assert spec_of.choose_spec(spec_of.EXACT_MAX, 128) == "IDMap2,Flat"
    n = 1_000_000
    assert spec_of.choose_spec(n, 128) == "IVF4000,SQ8"  # 4 * sqrt(1e6)
    assert spec_of.choose_spec(n, 128, 10**10) == "IDMap2,HNSW32"
    assert spec_of.choose_spec(n, 128, 200 * 10**6) == "IVF4000,SQ8"  # 136 bytes/vector fits
    pq = spec_of.choose_spec(n, 128, 60 * 10**6)
    assert pq.startswith("IVF4000,PQ") and n * spec_of.bytes_per_vector(pq, 128) <= 60 * 10**6
    with pytest.raises(UsageError, match="too small"):
        spec_of.choose_spec(n, 128, 10**6)


def test_bytes_per_vector_matches_serialized_codes(duplicate_set):
    """The size model against FAISS's own serialized size (codes + ids, no hash map)."""
    xb, ids = duplicate_set
    xb, ids = np.ascontiguousarray(xb[:1000]), ids[:1000]
    for spec in ("IVF8,SQ8", "IVF8,PQ4", "IVF8,PQ8x4"):
        index = ix.build_index(xb, ids, spec)
        size = len(faiss.serialize_index(index)) - spec_of.fixed_bytes(spec, 32)
        assert size / len(xb) == pytest.approx(spec_of.bytes_per_vector(spec, 32), rel=0.25), spec


# ------------------------------------------------------------------ bad input

def test_bad_inputs_raise_usage_error():
    rng = np.random.default_rng(2)
    xb = unit(rng.standard_normal((50, 16)))
    ids = np.arange(50, dtype=np.int64)
    index = ix.build_index(xb, ids)
    cases = [
        lambda: ix.build_index(xb.astype(np.float64), ids),
        lambda: ix.build_index(xb, ids.astype(np.int32)),
        lambda: ix.build_index(xb, np.zeros(50, dtype=np.int64)),  # duplicate ids
        lambda: ix.build_index(xb, ids[:10]),
        lambda: ix.build_index(xb * 2, ids),  # not unit length
        lambda: ix.build_index(np.asfortranarray(xb), ids),
        lambda: ix.build_index(xb[0], ids),
        lambda: ix.build_index(xb, ids, "NotASpec"),
        lambda: ix.build_index(xb, ids, "IVF64,SQ8"),  # more lists than vectors
        lambda: ix.search(index, unit(rng.standard_normal((3, 8))), 5),  # dim mismatch
        lambda: ix.search(index, xb[:3], 0),
        lambda: ix.search(index, xb[:3], -1),
        lambda: ix.range_pairs(index, xb, ids, 1.5),
        lambda: ix.range_pairs(index, xb, ids, 0.5, method="magic"),
        lambda: ix.apply_search_params(index, {"nprobe": 4}),  # flat has no nprobe
        lambda: ix.apply_search_params(index, {"ef": 4}),
        lambda: ix.tune_search(index, xb[:5], 1.5),
    ]
    for case in cases:
        with pytest.raises(UsageError):
            case()
    assert index.ntotal == 50
