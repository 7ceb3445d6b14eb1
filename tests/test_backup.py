"""`nearsight backup` (indexer/backup.py) on a real store of scikit-image's photos (tests/service_support.py).

References: SQLite's own `PRAGMA integrity_check` and its transaction semantics (a copy made through the
online backup API holds what was committed, never an open transaction's rows); SHA-256 (hashlib) and the
files' inode numbers (os.stat) for what was copied or linked; the store's own answers before and after.
"""

import json
import sqlite3
import shutil

import pytest

import nearsight
from nearsight.indexer import backup as backup_module
from nearsight.indexer.backup import backup_store
from nearsight.indexer.core.errors import UsageError

from .service_support import COPIED, open_plain_store, sha256, transformed


@pytest.fixture
def store_dir(service_store):
    return service_store.copy("backup")


def test_the_backup_is_a_store_that_answers_as_the_original_does(store_dir, service_store, tmp_path):
    dest = tmp_path / "backup"
    with open_plain_store(store_dir) as store:
        report = backup_store(store, dest)
        small = len(store.catalog.contents_with_small_copies())
    assert report["generation"] and report["models"] and report["small_copies"] == small > 0
    assert len(list((dest / "thumbs").rglob("*.kp"))) == small  # each with the keypoints kept beside it
    conn = sqlite3.connect(dest / "catalog.sqlite")
    assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    conn.close()
    from nearsight.indexer.integrity import verify_store

    with open_plain_store(dest) as copy:
        assert [f for f in verify_store(copy) if f.problem] == []  # `nearsight verify` passes on the backup
    gen = dest / "generations" / report["generation"]
    for f in gen.iterdir():  # the generation's files: the same bytes, and on one filesystem the same inode
        original = store_dir / "generations" / report["generation"] / f.name
        assert sha256(f) == sha256(original) and f.stat().st_ino == original.stat().st_ino
    queries = [transformed(p, tmp_path / f"{n}.jpg") for n, p in service_store.originals.items() if n not in COPIED][:4]
    answers = {}
    for where in (store_dir, dest):
        with nearsight.open_store(where) as s:
            status = s.status().to_dict()
            answers[where] = ([a.to_dict() for a in s.similar(queries, k=5)], s.groups(), status["files"],
                              status["generation"]["name"], status["model"])
    assert answers[dest] == answers[store_dir]


def test_an_open_write_transaction_is_not_in_the_backup_and_does_not_block_it(store_dir, tmp_path):
    """A writer in the middle of a transaction (as `index` is while it commits a block): the backup proceeds
    (WAL: readers do not wait for writers) and holds the last committed state, not the open transaction."""
    writer = sqlite3.connect(store_dir / "catalog.sqlite", isolation_level=None, timeout=1)
    writer.execute("BEGIN IMMEDIATE")
    writer.execute("INSERT INTO meta(key, value) VALUES ('uncommitted', 'x')")
    try:
        with open_plain_store(store_dir) as store:
            backup_store(store, tmp_path / "backup", small_copies=False)
    finally:
        writer.execute("ROLLBACK")
        writer.close()
    copy = sqlite3.connect(tmp_path / "backup" / "catalog.sqlite")
    assert copy.execute("SELECT COUNT(*) FROM meta WHERE key = 'uncommitted'").fetchone()[0] == 0
    original = sqlite3.connect(store_dir / "catalog.sqlite")
    for table in ("files", "contents", "sources", "verdicts"):
        n = original.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0]
        assert copy.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0] == n, table
    copy.close()
    original.close()
    assert not (tmp_path / "backup" / "thumbs").exists()


def test_a_generation_published_during_the_backup_is_the_one_copied(store_dir, tmp_path, monkeypatch):
    """The current generation is pruned while it is copied, a newer one having been published: the backup
    copies the newer one and names it current."""
    real = backup_module._copy_tree
    with open_plain_store(store_dir) as store:
        old = store.read_pointer("generations/CURRENT")
        state = {"swapped": False}

        def publish_meanwhile(src, dst, counts):
            if src.name == old and not state["swapped"]:  # a nightly run publishes and prunes right now
                state["swapped"] = True
                shutil.copytree(src, src.with_name(old + "-newer"))
                store.write_pointer("generations/CURRENT", old + "-newer")
                shutil.rmtree(src)
            return real(src, dst, counts)  # the real copy meets the pruned folder

        monkeypatch.setattr(backup_module, "_copy_tree", publish_meanwhile)
        report = backup_store(store, tmp_path / "backup", small_copies=False)
    assert report["generation"] == old + "-newer" == (tmp_path / "backup" / "generations" / "CURRENT").read_text().strip()
    assert old not in report["generations"]


@pytest.mark.parametrize("where", ["nonempty", "inside", "around", "no-parent"])
def test_a_destination_that_cannot_hold_a_backup_is_refused_and_nothing_is_written(store_dir, tmp_path, where):
    dest = {"nonempty": tmp_path / "full", "inside": store_dir / "backup", "around": store_dir.parent,
            "no-parent": tmp_path / "missing" / "backup"}[where]
    if where == "nonempty":
        dest.mkdir()
        (dest / "keep.txt").write_text("mine")
    before = sorted(p.name for p in tmp_path.iterdir())
    with open_plain_store(store_dir) as store, pytest.raises(UsageError):
        backup_store(store, dest)
    assert sorted(p.name for p in tmp_path.iterdir()) == before
    assert not (store_dir / "backup").exists()
    if where == "nonempty":
        assert [p.name for p in dest.iterdir()] == ["keep.txt"]


def test_a_failed_backup_leaves_no_destination_and_no_partial_folder(store_dir, tmp_path, monkeypatch):
    def full_disk(*args, **kwargs):
        raise OSError(28, "No space left on device")

    with open_plain_store(store_dir) as store:
        monkeypatch.setattr(backup_module.sqlite3, "connect", full_disk)  # the catalog's copy fails
        with pytest.raises(OSError):
            backup_store(store, tmp_path / "backup")
    assert list(tmp_path.iterdir()) == []


def test_the_command_prints_what_it_copied(store_dir, tmp_path, run_cli):
    out = run_cli("backup", tmp_path / "b1", "--store", store_dir, check_exit=0).stdout
    assert "hard-linked" in out and str(tmp_path / "b1") in out
    report = json.loads(run_cli("backup", tmp_path / "b2", "--store", store_dir, "--json", check_exit=0).stdout)
    assert report["copied"] == 0 and report["linked"] > 0
    run_cli("status", "--store", tmp_path / "b2", check_exit=0)
    assert "not empty" in run_cli("backup", tmp_path / "b2", "--store", store_dir, check_exit=2).stderr


def test_a_store_path_with_uri_characters_is_backed_up_whole(service_store, tmp_path):
    """'#', '?' and '%' mean something in an SQLite URI; the copy must still be this catalog, row for row."""
    store_dir = tmp_path / "store #1?a=b%20"
    import shutil as _shutil

    _shutil.copytree(service_store.template, store_dir)
    with open_plain_store(store_dir) as store:
        backup_store(store, tmp_path / "backup", small_copies=False, copy=True)
    copy = sqlite3.connect(tmp_path / "backup" / "catalog.sqlite")
    original = sqlite3.connect(store_dir / "catalog.sqlite")
    for table in ("files", "contents", "vectors"):
        n = original.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0]
        assert n > 0 and copy.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0] == n, table
    copy.close()
    original.close()
    gen = next(p for p in (tmp_path / "backup" / "generations").iterdir() if p.is_dir())
    assert all(f.stat().st_nlink == 1 for f in gen.iterdir())  # --copy: copies, not links



@pytest.mark.slow
def test_a_backup_taken_while_index_and_serve_run_verifies_and_answers_like_its_source(service_store, tmp_path):
    """`nearsight backup` started while `nearsight index` adds new photos and `nearsight serve` answers on the
    same store (real processes): all three finish, the server answers throughout, the backup passes
    `verify`, and it answers like the source did at the generation it holds (the one before the index run or
    the one it published)."""
    import subprocess
    import sys
    import time

    from .service_support import ROOT, ServerProcess

    store_dir = service_store.copy("backup-live")  # indexing reads the shared archive, moves nothing
    queries = [transformed(p, tmp_path / f"{n}.jpg") for n, p in service_store.originals.items() if n not in COPIED][:3]

    def answers(where):
        with nearsight.open_store(where) as s:
            return s.status().to_dict()["generation"]["name"], [a.to_dict() for a in s.similar(queries, k=5)]

    before = answers(store_dir)
    new_photos = tmp_path / "new-photos"
    new_photos.mkdir()
    for n, path in list(service_store.originals.items())[:4]:
        transformed(path, new_photos / f"{n}-donated.jpg")
    server = ServerProcess(store_dir).start()
    client = server.client()
    env = {k: v for k, v in __import__("os").environ.items() if not k.startswith("NEARSIGHT_")}
    index = subprocess.Popen([sys.executable, "-m", "nearsight", "index", str(service_store.archive), str(new_photos),
                              "--store", str(store_dir), "--no-progress", "--retrain", "never", "--no-calibrate"],
                             cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        time.sleep(1.0)  # the index run has the store's lock and is scanning
        backup = subprocess.run([sys.executable, "-m", "nearsight", "backup", str(tmp_path / "backup"), "--store",
                                 str(store_dir)], cwd=ROOT, env=env, capture_output=True, text=True, timeout=300)
        statuses = [client.get("/v1/status").status for _ in range(5)]
        _, index_err = index.communicate(timeout=300)
    finally:
        if index.poll() is None:
            index.kill()
        client.close()
        server.stop()
    assert backup.returncode == 0, backup.stderr
    assert index.returncode == 0, index_err
    assert statuses == [200] * 5
    assert subprocess.run([sys.executable, "-m", "nearsight", "verify", "--store", str(tmp_path / "backup")],
                          cwd=ROOT, env=env, capture_output=True, text=True).returncode == 0
    after = answers(store_dir)
    held = answers(tmp_path / "backup")
    assert held in (before, after)


def test_a_moved_store_calibrates_on_the_same_held_out_originals(service_store, tmp_path):
    """The model card lists its held-out originals by the path of their small copies in the store where it
    was trained. A backup (or a store moved to another folder) must find them under its own thumbs/, or its
    calibration edits other originals and lands on other thresholds than the store it copies."""
    import numpy as np

    from nearsight.indexer.calibration.calibrate import _originals
    from nearsight.indexer.learning.model import read_card
    from nearsight.indexer.learning.models import current_model_dir

    dest = tmp_path / "backup"
    with open_plain_store(service_store.copy("moved")) as store:
        backup_store(store, dest)
    chosen = {}
    for where in (service_store.template, dest):
        with open_plain_store(where) as store:
            card = read_card(current_model_dir(store))
            meta = store.catalog.image_meta()
            ids = np.array(sorted(meta), dtype=np.int64)
            rows, paths, held = _originals(store, card, ids, meta, 6, np.random.default_rng(0))
            chosen[where] = (rows, [p.replace(str(where), "") for p in paths], held)
    assert chosen[dest][2] > 0  # the card's held-out originals are found in the backup too
    assert chosen[dest] == chosen[service_store.template]
