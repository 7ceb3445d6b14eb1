"""The catalog is a real SQLite file in WAL mode with a recorded, migratable schema."""

import sqlite3

import pytest

from nearsight.indexer.storage.catalog import SCHEMA_VERSION, Catalog
from nearsight.indexer.core.errors import StoreError


def test_new_catalog_is_wal_with_schema_version(tmp_path):
    path = tmp_path / "catalog.sqlite"
    Catalog(path, create=True).close()
    # Checked with an independent connection from Python's sqlite3 module.
    conn = sqlite3.connect(path)
    assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
    assert conn.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()[0] == str(SCHEMA_VERSION)
    tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert {"sources", "contents", "files", "runs", "meta"} <= tables


def test_missing_catalog_is_not_created_unless_asked(tmp_path):
    with pytest.raises(StoreError, match="no catalog"):
        Catalog(tmp_path / "nothing.sqlite")
    assert not (tmp_path / "nothing.sqlite").exists()


def test_newer_schema_is_refused(tmp_path):
    path = tmp_path / "catalog.sqlite"
    Catalog(path, create=True).close()
    conn = sqlite3.connect(path)
    conn.execute(f"PRAGMA user_version={SCHEMA_VERSION + 1}")
    conn.commit()
    conn.close()
    with pytest.raises(StoreError, match="newer than this nearsight understands"):
        Catalog(path)


def test_not_a_database_is_a_store_error(tmp_path):
    path = tmp_path / "catalog.sqlite"
    path.write_bytes(b"this is not sqlite" * 100)
    with pytest.raises(StoreError, match="cannot open catalog"):
        Catalog(path)


def test_transaction_rolls_back_on_error(tmp_path):
    catalog = Catalog(tmp_path / "c.sqlite", create=True)
    source_id = catalog.add_source(tmp_path)
    with pytest.raises(RuntimeError):
        with catalog.transaction() as conn:
            catalog.upsert_file(conn, source_id, "a.jpg", size=1, mtime_ns=1, content_id=None,
                                state="unreadable", reason="empty: zero bytes", now=1.0)
            raise RuntimeError("boom")
    assert catalog.files_of_source(source_id) == {}


def test_upsert_keeps_the_file_id(tmp_path):
    catalog = Catalog(tmp_path / "c.sqlite", create=True)
    source_id = catalog.add_source(tmp_path)
    with catalog.transaction() as conn:
        first = catalog.upsert_file(conn, source_id, "a.jpg", size=1, mtime_ns=1, content_id=None,
                                    state="unreadable", reason="empty: zero bytes", now=1.0)
    with catalog.transaction() as conn:
        second = catalog.upsert_file(conn, source_id, "a.jpg", size=2, mtime_ns=2, content_id=None,
                                     state="unreadable", reason="truncated: x", now=2.0)
    assert first == second
    row = catalog.files_of_source(source_id)["a.jpg"]
    assert (row.size, row.reason) == (2, "truncated: x")


def test_a_version_1_catalog_is_migrated_keeping_its_rows(tmp_path):
    """Build a v1 catalog by hand from schema.sql, then open it with the current code."""
    from importlib import resources

    path = tmp_path / "old.sqlite"
    conn = sqlite3.connect(path)
    conn.executescript(resources.files("nearsight.indexer.storage").joinpath("schema.sql").read_text())
    conn.execute("PRAGMA user_version=1")
    conn.execute("INSERT INTO sources(root, added_at) VALUES ('/photos', 0)")
    conn.commit()
    conn.close()
    catalog = Catalog(path)
    assert catalog.schema_version() == SCHEMA_VERSION
    assert [s["root"] for s in catalog.sources()] == ["/photos"]
    columns = {r[1] for r in catalog.conn.execute("PRAGMA table_info(contents)")}
    assert "pixel_hash" in columns


def test_vectors_round_trip_by_content(tmp_path):
    import numpy as np

    catalog = Catalog(tmp_path / "c.sqlite", create=True)
    source_id = catalog.add_source(tmp_path)
    with catalog.transaction() as conn:
        cid = catalog.add_content(conn, "ab" * 32, 10, {"state": "ok", "width": 4, "height": 3}, 0.0)
        a = catalog.upsert_file(conn, source_id, "a.jpg", size=10, mtime_ns=1, content_id=cid, state="ok", reason=None, now=0.0)
        b = catalog.upsert_file(conn, source_id, "b.jpg", size=10, mtime_ns=1, content_id=cid, state="ok", reason=None, now=0.0)
    assert [r["content_id"] for r in catalog.contents_missing_vectors("m1")] == [cid]
    vec = np.random.default_rng(0).standard_normal((1, 8)).astype(np.float32)
    catalog.put_vectors("m1", [cid], vec)
    assert catalog.contents_missing_vectors("m1") == []
    assert [r["content_id"] for r in catalog.contents_missing_vectors("m2")] == [cid]
    (ids, xb), = list(catalog.iter_file_vectors("m1"))
    assert ids.tolist() == [a, b]  # both files share the content's one vector
    np.testing.assert_array_equal(xb, np.vstack([vec, vec]))


def _three_files(tmp_path):
    """Files a.jpg and c.jpg share bytes; b.jpg is different."""
    catalog = Catalog(tmp_path / "c.sqlite", create=True)
    source_id = catalog.add_source(tmp_path)
    with catalog.transaction() as conn:
        c1 = catalog.add_content(conn, "11" * 32, 10, {"state": "ok"}, 0.0)
        c2 = catalog.add_content(conn, "22" * 32, 10, {"state": "ok"}, 0.0)
        ids = [catalog.upsert_file(conn, source_id, name, size=10, mtime_ns=1, content_id=cid,
                                   state="ok", reason=None, now=1.0)
               for name, cid in (("a.jpg", c1), ("b.jpg", c2), ("c.jpg", c1))]
    return catalog, ids


def test_verdicts_are_kept_by_content_and_the_latest_counts(tmp_path):
    from nearsight.indexer.core.errors import NotFoundError, UsageError

    catalog, (a, b, c) = _three_files(tmp_path)
    catalog.add_verdicts([{"file_a": b, "file_b": a, "verdict": "same"}], origin="csv")
    catalog.add_verdicts([{"file_a": c, "file_b": b, "verdict": "Different"}], origin="review", author="ines")
    latest = catalog.latest_verdicts()
    # a and c share content, so the second verdict replaces the first for the same content pair.
    assert len(latest) == 1
    assert latest[0]["verdict"] == "different" and latest[0]["origin"] == "review"
    assert latest[0]["content_a"] < latest[0]["content_b"]
    assert catalog.conn.execute("SELECT COUNT(*) FROM verdicts").fetchone()[0] == 2  # history kept
    with pytest.raises(UsageError, match="same bytes"):
        catalog.add_verdicts([{"file_a": a, "file_b": c, "verdict": "same"}], origin="api")
    with pytest.raises(UsageError, match="verdict must be"):
        catalog.add_verdicts([{"file_a": a, "file_b": b, "verdict": "maybe"}], origin="api")
    with pytest.raises(NotFoundError, match="no image with id 999"):
        catalog.add_verdicts([{"file_a": a, "file_b": 999, "verdict": "same"}], origin="api")
    # A failing batch stores nothing.
    with pytest.raises(NotFoundError):
        catalog.add_verdicts([{"file_a": a, "file_b": b, "verdict": "same"},
                              {"file_a": a, "file_b": 998, "verdict": "same"}], origin="api")
    assert catalog.conn.execute("SELECT COUNT(*) FROM verdicts").fetchone()[0] == 2
    assert catalog.file_id_for_path(tmp_path / "b.jpg") == b
    assert catalog.file_id_for_path(tmp_path / "zzz.jpg") is None
