"""The catalog is a real SQLite file in WAL mode with a recorded, migratable schema."""

import sqlite3

import pytest

from indexer.catalog import SCHEMA_VERSION, Catalog
from indexer.errors import StoreError


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
