"""indexer.building.verdict_groups on crafted vectors: a person's verdicts act on the groups at once.

Oracles: NumPy brute force for every pair inside a group (no chaining), scipy's complete
linkage (scipy.cluster.hierarchy) for how a group is split again, NumPy dot products for the
similarity of a joined member, and a real SQLite catalog for the verdicts' expansion to files.
"""

import numpy as np
import pytest
from scipy.cluster.hierarchy import fcluster, linkage
from scipy.spatial.distance import squareform

from nearsight.indexer.storage.catalog import Catalog
from nearsight.indexer.core.errors import UsageError
from nearsight.indexer.matching.groups import ImageMeta, build_groups
from nearsight.indexer.building.verdict_groups import PERSON, PairVerdicts, apply_verdicts, person_classes

T_NEAR, T_SIMILAR = 0.9, 0.8


def _unit(x):
    x = np.asarray(x, np.float64)
    return (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32)


@pytest.fixture(scope="module")
def world():
    """Three pictures with 4, 3 and 2 near copies (ids 1-9), and one unrelated image (id 10)."""
    rng = np.random.default_rng(0)
    centres = _unit(rng.standard_normal((3, 16)))
    X = _unit(np.repeat(centres, [4, 3, 2], axis=0) + 0.05 * rng.standard_normal((9, 16)))
    X = np.vstack([X, _unit(rng.standard_normal((1, 16)))])
    ids = np.arange(1, 11)
    meta = {int(i): ImageMeta(f"/photos/{i}.jpg", f"c{i}", 100, 100, 1000 - int(i), "JPEG", 0.0) for i in ids}
    S = X.astype(np.float64) @ X.T.astype(np.float64)
    i, j = np.triu_indices(10, 1)
    groups = build_groups(ids[i], ids[j], S[i, j], meta, t_near=T_NEAR, t_similar=T_SIMILAR,
                          vectors=lambda q: X[np.asarray(q) - 1])
    assert [sorted(m.id for m in g.members) for g in groups] == [[1, 2, 3, 4], [5, 6, 7], [8, 9]]
    return {"X": X, "S": S, "meta": meta, "groups": groups}


def _apply(world, rows):
    return apply_verdicts(world["groups"], PairVerdicts.from_rows(rows),
                          vectors=lambda q: {int(k): world["X"][int(k) - 1] for k in q},
                          metas=lambda q: {int(k): world["meta"][int(k)] for k in q},
                          t_near=T_NEAR, t_similar=T_SIMILAR)


def _members(groups):
    return {frozenset(m.id for m in g.members): g for g in groups}


def test_no_verdict_leaves_the_groups_as_they_are(world):
    assert _apply(world, []) is world["groups"]


def test_different_splits_the_pair_as_complete_linkage_would_without_chaining(world):
    out = _apply(world, [{"verdict": "different", "file_a": 2, "file_b": 1}])
    assert not any({1, 2} <= set(members) for members in _members(out))
    for g in out:  # NumPy brute force: every pair inside every group still >= t_similar (no chaining)
        rows = [m.id - 1 for m in g.members]
        assert world["S"][np.ix_(rows, rows)].min() >= T_SIMILAR - 1e-6
    # scipy's complete linkage on the touched group, with the judged pair at the largest distance (2).
    D = 1.0 - world["S"][:4, :4]
    D[0, 1] = D[1, 0] = 2.0
    np.fill_diagonal(D, 0.0)
    labels = fcluster(linkage(squareform(np.clip(D, 0, 2), checks=False), "complete"), t=1 - T_SIMILAR,
                      criterion="distance")
    want = {frozenset((np.flatnonzero(labels == c) + 1).tolist()) for c in np.unique(labels) if (labels == c).sum() > 1}
    untouched = {frozenset({5, 6, 7}), frozenset({8, 9})}
    assert set(_members(out)) == want | untouched
    assert all(_members(out)[k] is _members(world["groups"])[k] for k in untouched)  # not rebuilt


def test_same_joins_an_ungrouped_file_at_once_as_a_person_same_member(world):
    out = _apply(world, [{"verdict": "same", "file_a": 5, "file_b": 10}])
    group = next(g for g in out if {5, 10} <= {m.id for m in g.members})
    joined = next(m for m in group.members if m.id == 10)
    assert joined.tier == PERSON and group.tier == "near-duplicate"  # the weakest tier is still near
    keeper = group.keeper
    assert joined.similarity == pytest.approx(float(world["S"][9, keeper - 1]), abs=1e-5)  # NumPy dot
    assert {m.id for m in group.members} == {5, 6, 7, 10}


def test_same_across_two_groups_moves_the_file_of_the_smaller_one(world):
    out = _apply(world, [{"verdict": "same", "file_a": 8, "file_b": 3}])
    members = _members(out)
    assert frozenset({1, 2, 3, 4, 8}) in members and frozenset({5, 6, 7}) in members
    assert not any(9 in k for k in members)  # 9 has nobody left: no group of one
    assert next(m for m in members[frozenset({1, 2, 3, 4, 8})].members if m.id == 8).tier == PERSON


def test_same_on_two_ungrouped_files_makes_a_group_of_them(world):
    meta = dict(world["meta"])
    X = np.vstack([world["X"], world["X"][9:10]])  # id 11: another unrelated image
    meta[11] = ImageMeta("/photos/11.jpg", "c11", 200, 200, 50, "PNG", 0.0)
    out = apply_verdicts(world["groups"], PairVerdicts.from_rows([{"verdict": "same", "file_a": 10, "file_b": 11}]),
                         vectors=lambda q: {int(k): X[int(k) - 1] for k in q},
                         metas=lambda q: {int(k): meta[int(k)] for k in q}, t_near=T_NEAR, t_similar=T_SIMILAR)
    group = _members(out)[frozenset({10, 11})]
    assert group.keeper == 11 and group.tier == PERSON  # the larger picture is kept (keeper_key)
    assert [m.tier for m in group.members] == ["same-bytes", PERSON]


def test_different_wins_over_a_same_that_would_join_the_pair(world):
    rows = [{"verdict": "different", "file_a": 1, "file_b": 10}, {"verdict": "same", "file_a": 2, "file_b": 10}]
    out = _apply(world, rows)
    assert not any({1, 10} <= set(k) for k in _members(out))
    # A chain of "same" verdicts never crosses a "different" either.
    classes = person_classes(PairVerdicts.from_rows([
        {"verdict": "different", "file_a": 1, "file_b": 3},
        {"verdict": "same", "file_a": 1, "file_b": 2}, {"verdict": "same", "file_a": 2, "file_b": 3}]))
    assert classes == [[1, 2]]


def test_a_different_between_same_pixel_files_splits_them_too(world):
    meta = dict(world["meta"])
    meta[1] = ImageMeta("/photos/1.png", "c1", 100, 100, 999, "PNG", 0.0, pixel_hash="p")
    meta[2] = ImageMeta("/photos/2.bmp", "c2", 100, 100, 998, "BMP", 0.0, pixel_hash="p")
    X, S = world["X"], world["S"]
    i, j = np.triu_indices(10, 1)
    ids = np.arange(1, 11)
    groups = build_groups(ids[i], ids[j], S[i, j], meta, t_near=T_NEAR, t_similar=T_SIMILAR,
                          vectors=lambda q: X[np.asarray(q) - 1])
    assert any(m.tier == "same-pixels" for g in groups for m in g.members)
    out = apply_verdicts(groups, PairVerdicts.from_rows([{"verdict": "different", "file_a": 1, "file_b": 2}]),
                         vectors=lambda q: {int(k): X[int(k) - 1] for k in q},
                         metas=lambda q: {int(k): meta[int(k)] for k in q}, t_near=T_NEAR, t_similar=T_SIMILAR)
    assert not any({1, 2} <= set(k) for k in _members(out))


def test_thresholds_must_be_usable(world):
    with pytest.raises(UsageError, match="thresholds"):
        apply_verdicts(world["groups"], PairVerdicts.from_rows([{"verdict": "same", "file_a": 1, "file_b": 10}]),
                       vectors=dict, metas=dict, t_near=0.9, t_similar=0.0)


def test_the_catalog_expands_the_latest_verdict_to_every_file_of_each_content(tmp_path):
    """Real SQLite: two files share content A; the later verdict on (A, B) replaces the earlier one."""
    with Catalog(tmp_path / "catalog.sqlite", create=True) as catalog:
        now = 1.0
        with catalog.transaction() as conn:
            source = conn.execute("INSERT INTO sources(root, added_at) VALUES ('/photos', 0)").lastrowid
            for digest in ("a", "b"):
                conn.execute("INSERT INTO contents(hash, size, state, first_seen) VALUES (?, 1, 'ok', 0)", (digest,))
            for rel, content in (("a1.jpg", 1), ("a2.jpg", 1), ("b.jpg", 2)):
                conn.execute("INSERT INTO files(source_id, relpath, size, mtime_ns, content_id, state, first_seen, "
                             "last_seen) VALUES (?, ?, 1, 0, ?, 'ok', ?, ?)", (source, rel, content, now, now))
        assert catalog.verdicts_version() == 0
        catalog.add_verdicts([{"file_a": 1, "file_b": 3, "verdict": "same"}], origin="api")
        catalog.add_verdicts([{"file_a": 3, "file_b": 2, "verdict": "different"}], origin="api")
        rows = catalog.latest_verdict_files()
        assert [(r["verdict"], r["file_a"], r["file_b"]) for r in rows] == [("different", 1, 3), ("different", 2, 3)]
        assert catalog.verdicts_version() == 2
        verdicts = PairVerdicts.from_rows(rows)
        assert verdicts.apart_from(3) == {1, 2} and not verdicts.said_same(1, 3)
        # Taking the later verdict back (a person's undo) brings the earlier one back, and the version moves on
        # even when SQLite gives the removed id to the next verdict (so no cache can mistake the two).
        seen = {catalog.verdicts_version()}
        assert catalog.remove_verdicts([2]) == 1
        assert [(r["verdict"], r["file_a"], r["file_b"]) for r in catalog.latest_verdict_files()] == [
            ("same", 1, 3), ("same", 2, 3)]
        assert catalog.verdicts_version() not in seen
        seen.add(catalog.verdicts_version())
        (again,) = catalog.add_verdicts([{"file_a": 3, "file_b": 2, "verdict": "different"}], origin="api")
        assert again == 2 and catalog.verdicts_version() not in seen


def test_a_different_keeps_the_verified_copies_of_the_group_it_splits():
    """A tight crop (3) joined its original (1) and a blurred copy (2) on verified pairs, far above its cosines
    (0.5); a look-alike (4) came in on a wrongly verified pair with the crop. A person calls 4 different from 1:
    4 leaves, and the crop stays, because every pair of a published group was confirmed when it was built.
    Checked by brute force with NumPy: each group left has every pair confirmed by the build's pair list or
    its cosine, and none holds the pair called different."""
    e = np.eye(16)
    X = _unit([e[0], e[0] + 0.05 * e[3], 0.5 * e[0] + 0.866 * e[1], 0.92 * e[0] + 0.39 * e[2]])
    ids = np.arange(1, 5)
    meta = {int(i): ImageMeta(f"/photos/{i}.jpg", f"c{i}", 100, 100, 1000 - int(i), "JPEG", 0.0) for i in ids}
    S = X.astype(np.float64) @ X.T.astype(np.float64)
    verified = {(1, 3): 0.95, (2, 3): 0.95, (3, 4): 0.93}
    i, j = np.triu_indices(4, 1)
    a, b = ids[i], ids[j]
    sims = np.array([max(S[x - 1, y - 1], verified.get((x, y), -1.0)) for x, y in zip(a.tolist(), b.tolist())])
    groups = build_groups(a, b, sims, meta, t_near=T_NEAR, t_similar=T_SIMILAR, vectors=lambda q: X[np.asarray(q) - 1])
    assert [sorted(m.id for m in g.members) for g in groups] == [[1, 2, 3, 4]]
    out = apply_verdicts(groups, PairVerdicts.from_rows([{"verdict": "different", "file_a": 1, "file_b": 4}]),
                         vectors=lambda q: {int(k): X[int(k) - 1] for k in q}, metas=lambda q: {int(k): meta[int(k)] for k in q},
                         t_near=T_NEAR, t_similar=T_SIMILAR)
    assert any({1, 2, 3} <= {m.id for m in g.members} for g in out)
    confirmed = {(x, y) for x, y, s in zip(a.tolist(), b.tolist(), sims.tolist()) if s >= T_SIMILAR}
    for g in out:
        members = sorted(m.id for m in g.members)
        assert not {1, 4} <= set(members)
        assert all((x, y) in confirmed for n, x in enumerate(members) for y in members[n + 1:])
