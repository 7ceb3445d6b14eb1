"""`nearsight verify [--repair]` (indexer/integrity.py) on a real store of scikit-image's photos.

References: SQLite's own `PRAGMA integrity_check`; SHA-256 (hashlib) of what repair makes again and of the
user's files it must leave alone; FAISS's own count of the vectors in a rebuilt index.
"""

import json
import sqlite3

import pytest

from nearsight.indexer.matching import generations
from nearsight.indexer.integrity import repair_store, verify_store

from .service_support import open_plain_store, sha256


@pytest.fixture
def store_dir(service_store):
    return service_store.copy("verify")


def _problems(store_dir):
    with open_plain_store(store_dir) as store:
        return [f for f in verify_store(store) if f.problem]


def test_a_store_just_built_is_whole(store_dir, run_cli):
    assert _problems(store_dir) == []
    out = run_cli("verify", "--store", store_dir, check_exit=0).stdout
    assert "0 problem(s)" in out or "the store is whole" in out


def test_a_changed_generation_file_is_found_and_repair_publishes_a_whole_one(store_dir, run_cli):
    with open_plain_store(store_dir) as store:
        gen = generations.require_current(store)
    groups = gen.path / generations.GROUPS_FILE
    data = bytearray(groups.read_bytes())
    data[len(data) // 2] ^= 0x20  # one flipped bit, same size: only the checksum can tell
    groups.write_bytes(bytes(data))
    found = _problems(store_dir)
    assert [(f.check, f.repair, f.subject) for f in found] == [("generation", "generation", gen.name)]
    assert "not what was published" in found[0].message
    lines = run_cli("verify", "--store", store_dir, "--json", check_exit=1).stdout.splitlines()
    assert json.loads(lines[0])["check"] == "generation"
    run_cli("verify", "--store", store_dir, "--repair", check_exit=0)
    with open_plain_store(store_dir) as store:
        new = generations.require_current(store)
        assert new.name != gen.name and not gen.path.exists()
        items = new.load_items()
        assert new.load_index().ntotal == len(items[0]) == gen.meta["indexed"]
    assert _problems(store_dir) == []


def test_a_lost_small_copy_is_made_again_byte_for_byte(store_dir):
    with open_plain_store(store_dir) as store:
        digest = store.catalog.contents_with_small_copies()[3]
        path = store.thumb_path(digest)
        before = sha256(path)
        path.unlink()
        found = [f for f in verify_store(store) if f.problem]
        assert [(f.check, f.repair, f.subject) for f in found] == [("small-copies", "small-copy", digest)]
        done = repair_store(store, found)
        assert done and "again" in done[0]
    assert sha256(path) == before and _problems(store_dir) == []


def test_a_damaged_small_copy_is_found(store_dir):
    with open_plain_store(store_dir) as store:
        digest = store.catalog.contents_with_small_copies()[0]
        store.thumb_path(digest).write_bytes(b"\xff\xd8\xff\xe0 broken")
    assert [(f.check, f.subject) for f in _problems(store_dir)] == [("small-copies", digest)]


def test_a_missing_vector_is_embedded_again(store_dir):
    with open_plain_store(store_dir) as store:
        gen = generations.require_current(store)
        content = int(gen.load_items()[1][0])
    conn = sqlite3.connect(store_dir / "catalog.sqlite")
    with conn:
        conn.execute("DELETE FROM vectors WHERE content_id = ?", (content,))
    conn.close()
    found = _problems(store_dir)
    assert [(f.check, f.repair) for f in found] == [("vectors", "vectors")] and "1 of the" in found[0].message
    with open_plain_store(store_dir) as store:
        repair_store(store, found)
        assert content in store.catalog.contents_with_vectors(gen.meta["model"], [content])
    assert _problems(store_dir) == []


def test_a_changed_quarantined_file_is_reported_and_left_alone(service_store, tmp_path, run_cli):
    store_dir = service_store.copy_with_archive("verify-quarantine")
    quarantine = tmp_path / "q"
    run_cli("quarantine", "--store", store_dir, "--to", quarantine, "--apply", check_exit=0)
    moved = sorted(p for p in quarantine.rglob("*") if p.is_file() and not p.name.startswith("manifest-"))
    assert moved and _problems(store_dir) == []
    moved[0].write_bytes(moved[0].read_bytes() + b"appended")
    before = sha256(moved[0])
    found = _problems(store_dir)
    assert [(f.check, f.repair) for f in found] == [("quarantine", None)]
    run_cli("verify", "--store", store_dir, "--repair", check_exit=1)
    assert sha256(moved[0]) == before  # never touched


def test_a_damaged_catalog_page_is_found_by_sqlites_integrity_check(store_dir):
    path = store_dir / "catalog.sqlite"
    conn = sqlite3.connect(path)
    conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    page = conn.execute("PRAGMA page_size").fetchone()[0]
    root = conn.execute("SELECT rootpage FROM sqlite_master WHERE name = 'files_state'").fetchone()[0]
    conn.close()
    data = bytearray(path.read_bytes())
    start = (root - 1) * page
    data[start + 8:start + 200] = bytes(192)  # the index's page: its cells zeroed
    path.write_bytes(bytes(data))
    found = _problems(store_dir)
    assert found and all(f.check == "catalog" for f in found)


def test_a_truncated_index_file_is_found_and_repair_rebuilds_it(store_dir):
    """Half of index.faiss cut off: its checksum no longer matches (BLAKE2b, recorded at publishing) and FAISS
    cannot read it; --repair publishes a full build whose index FAISS reads with every item."""
    with open_plain_store(store_dir) as store:
        gen = generations.require_current(store)
    path = gen.path / generations.INDEX_FILE
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    found = _problems(store_dir)
    assert {(f.check, f.repair) for f in found} >= {("generation", "generation")}
    assert any(f.check == "index" and "cannot be read" in f.message for f in found)
    with open_plain_store(store_dir) as store:
        repair_store(store, found)
        new = generations.require_current(store)
        assert new.load_index().ntotal == len(new.load_items()[0]) == gen.meta["indexed"]
    assert _problems(store_dir) == []


def test_a_pointer_to_nothing_is_found_and_repair_publishes_a_generation(store_dir):
    (store_dir / "generations" / "CURRENT").write_text("g-19700101-000000-000000\n")
    found = _problems(store_dir)
    assert [(f.check, f.repair) for f in found] == [("generation", "generation")]
    assert "not there" in found[0].message
    with open_plain_store(store_dir) as store:
        repair_store(store, found)
        assert generations.require_current(store).load_index().ntotal > 0
    assert _problems(store_dir) == []


def test_a_missing_model_file_is_named_and_left_for_training(store_dir, run_cli):
    """A model is made by training, not derived: verify names the missing weights and what to run, and
    --repair (which may only make again what is derived) leaves it and exits with 1."""
    with open_plain_store(store_dir) as store:
        model = generations.require_current(store).meta["model"]
    (store_dir / "models" / model / "model.pt").unlink()
    found = _problems(store_dir)
    assert [(f.check, f.repair, f.subject) for f in found] == [("model", None, model)]
    assert "no model.pt" in found[0].message and "--retrain always" in found[0].message
    run_cli("verify", "--store", store_dir, "--repair", check_exit=1)


def test_an_orphaned_manifest_record_is_found(service_store, tmp_path, run_cli):
    """A manifest line recording a move the catalog never saw (a file still in its place, listed 'ok'):
    verify names it, and --repair, which marks only moves that did happen on disk, leaves it named."""
    store_dir = service_store.copy_with_archive("verify-manifest")
    quarantine = tmp_path / "q"
    run_cli("quarantine", "--store", store_dir, "--to", quarantine, "--apply", check_exit=0)
    assert _problems(store_dir) == []
    (manifest_path,) = quarantine.glob("manifest-*.jsonl")
    with open_plain_store(store_dir) as store:
        moved = {r["id"] for r in store.catalog.quarantined_files()}
        present = next(i for i, m in sorted(store.catalog.image_meta().items()) if i not in moved)
        path = store.catalog.image_meta()[present]["path"]
    with open(manifest_path, "a") as fh:
        fh.write(json.dumps({"record": "intent", "seq": 9999, "file_id": present, "from": path,
                             "to": str(quarantine / "planted.jpg"), "hash": "0" * 64}) + "\n")
        fh.write(json.dumps({"record": "moved", "seq": 9999, "method": "link"}) + "\n")
    found = _problems(store_dir)
    assert [(f.check, f.repair) for f in found] == [("quarantine", "quarantine-marks")]
    assert f"file {present}" in found[0].message
    run_cli("verify", "--store", store_dir, "--repair", check_exit=1)
    assert _problems(store_dir)  # still named: the file never moved
