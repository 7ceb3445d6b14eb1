"""Scanning a folder into the catalog: states, reasons, incremental runs, crash safety."""

import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import time

import numpy as np
import pytest
from PIL import Image

from nearsight.indexer.reading.scan import scan_source
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store

from .conftest import ROOT


def _photo(path, seed, size=(320, 240), quality=90):
    """A smooth random picture (not noise, so JPEG behaves as on photos)."""
    rng = np.random.default_rng(seed)
    small = rng.integers(0, 256, (6, 8, 3), dtype=np.uint8)
    Image.fromarray(small).resize(size, Image.Resampling.BICUBIC).save(path, quality=quality)


def _open_store(path, **overrides):
    return Store.open(path, create=True, settings=load_settings(environ={}, overrides=overrides))


@pytest.fixture
def archive(tmp_path):
    root = tmp_path / "archive"
    (root / "trip").mkdir(parents=True)
    for i in range(4):
        _photo(root / f"photo{i}.jpg", i)
    shutil.copy(root / "photo0.jpg", root / "trip" / "photo0-copy.jpg")
    (root / "empty.jpg").write_bytes(b"")
    (root / "notes.txt").write_text("not an image, not recorded")
    good = (root / "photo1.jpg").read_bytes()
    (root / "cut.jpg").write_bytes(good[: len(good) // 2])
    return root


def _states(store):
    return {r["relpath"]: (r["state"], (r["reason"] or "").split(":")[0]) for r in store.catalog.files_with_hashes()}


def test_every_file_is_recorded_with_its_state(archive, tmp_path):
    with _open_store(tmp_path / "store") as store:
        summary = scan_source(store, archive, progress=False)
        assert _states(store) == {
            "photo0.jpg": ("ok", ""), "photo1.jpg": ("ok", ""), "photo2.jpg": ("ok", ""),
            "photo3.jpg": ("ok", ""), "trip/photo0-copy.jpg": ("ok", ""),
            "empty.jpg": ("unreadable", "empty"), "cut.jpg": ("unreadable", "truncated"),
        }
    assert (summary.new, summary.unreadable, summary.ignored, summary.same_bytes) == (7, 2, 1, 1)


def test_byte_identical_files_share_one_content_and_are_decoded_once(archive, tmp_path):
    with _open_store(tmp_path / "store") as store:
        summary = scan_source(store, archive, progress=False)
        rows = {r["relpath"]: r for r in store.catalog.files_with_hashes()}
        assert rows["photo0.jpg"]["hash"] == rows["trip/photo0-copy.jpg"]["hash"]
        distinct = {r["hash"] for r in rows.values()}
        # 4 photos + empty + cut: the copy adds no content and no decode.
        assert len(distinct) == summary.decoded == 6


def test_small_copies_are_cached_for_later_stages(archive, tmp_path):
    with _open_store(tmp_path / "store", thumb_side=128) as store:
        scan_source(store, archive, progress=False)
        contents = store.catalog.readable_contents()
        assert len(contents) == 4
        for row in contents:
            cached = Image.open(store.thumb_path(row["hash"]))
            assert max(cached.size) == 128
            # Reference: Pillow's own resize of the original to the same size (JPEG q92 in between).
            original = Image.open(archive / row["relpath"]).convert("RGB").resize(cached.size, Image.Resampling.LANCZOS)
            diff = np.abs(np.asarray(cached, float) - np.asarray(original, float)).mean()
            assert diff < 3.0, diff


def test_second_run_reads_only_what_changed(archive, tmp_path):
    with _open_store(tmp_path / "store") as store:
        first = scan_source(store, archive, progress=False)
        ids = {r["relpath"]: r["id"] for r in store.catalog.files_with_hashes()}

        again = scan_source(store, archive, progress=False)
        assert (again.new, again.changed, again.unchanged, again.decoded) == (0, 0, 7, 0)
        assert again.unreadable == first.unreadable == 2

        os.utime(archive / "photo1.jpg", ns=(1, 1))      # touched: same bytes
        _photo(archive / "photo2.jpg", 99)                # edited in place
        (archive / "photo3.jpg").unlink()                 # deleted
        _photo(archive / "trip" / "new.jpg", 42)          # added
        third = scan_source(store, archive, progress=False)
        assert (third.new, third.changed, third.removed, third.decoded) == (1, 1, 1, 2)
        assert third.unchanged == 5  # photo0, its copy, photo1 (only touched), empty, cut
        rows = {r["relpath"]: r for r in store.catalog.files_with_hashes()}
        assert "photo3.jpg" not in rows
        assert rows["photo2.jpg"]["id"] == ids["photo2.jpg"]  # an edited file keeps its id
        assert store.catalog.counts()["removed"] == 1


def test_a_store_inside_the_scanned_folder_is_not_scanned(archive):
    with _open_store(archive / "store") as store:
        scan_source(store, archive, progress=False)
        assert not any(r["relpath"].startswith("store/") for r in store.catalog.files_with_hashes())
        scan_source(store, archive, progress=False)
        assert not any(r["relpath"].startswith("store/") for r in store.catalog.files_with_hashes())


def test_several_folders_share_one_catalog(archive, tmp_path):
    other = tmp_path / "other"
    other.mkdir()
    shutil.copy(archive / "photo0.jpg", other / "same-as-photo0.jpg")
    with _open_store(tmp_path / "store") as store:
        scan_source(store, archive, progress=False)
        summary = scan_source(store, other, progress=False)
        assert summary.same_bytes == 1 and summary.decoded == 0
        assert len(store.catalog.sources()) == 2


SCAN_ONLY = "import sys; from nearsight.indexer.cli import main; sys.exit(main(sys.argv[1:]))"


def test_a_killed_scan_leaves_the_store_usable_and_the_rerun_completes(tmp_path):
    """SIGKILL in the middle of a scan: committed chunks stay, the next run resumes."""
    folder = tmp_path / "many"
    folder.mkdir()
    rng = np.random.default_rng(0)
    for i in range(3000):
        Image.fromarray(rng.integers(0, 256, (24, 24, 3), dtype=np.uint8)).save(folder / f"{i:04d}.png")
    store_dir = tmp_path / "store"
    env = dict(os.environ, PYTHONPATH=str(ROOT), NEARSIGHT_WORKERS="1")
    child = subprocess.Popen([sys.executable, "-c", SCAN_ONLY, "index", str(folder), "--store", str(store_dir), "-q"],
                             env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    seen = 0
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and child.poll() is None:
        try:
            with sqlite3.connect(store_dir / "catalog.sqlite", timeout=1) as conn:
                seen = conn.execute("SELECT COUNT(*) FROM files").fetchone()[0]
        except sqlite3.Error:
            seen = 0
        if seen > 0:
            break
        time.sleep(0.01)
    child.send_signal(signal.SIGKILL)
    child.wait()
    assert 0 < seen < 3000, f"could not kill mid-scan (saw {seen} files)"

    with Store.open(store_dir) as store:
        assert store.catalog.conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        committed = store.catalog.counts()["files"]
        assert committed >= seen
        summary = scan_source(store, folder, progress=False)
        assert summary.unchanged == committed          # finished work is not repeated
        assert summary.new == 3000 - committed
        assert store.catalog.counts()["ok"] == 3000
