"""A full disk during `nearsight index`: a real store on a small tmpfs (Linux's RAM file system, mounted with
`size=`), filled up with a ballast file while a second index adds new photos (scikit-image's bundled ones).

What must hold: the failing run says so in one clear line (no traceback), the previous generation still
answers (`similar` finds a photo from it) and `verify` finds the store whole; once space is freed, a rerun
completes, and its catalog and groups equal those of the same two runs on a roomy disk (a copy of the
store taken before the failing run, so both use the same encoder). Skipped with the reason where mounting
is not permitted (not root, or a container without CAP_SYS_ADMIN).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

pytestmark = pytest.mark.slow


def _cli(*args, check=True) -> subprocess.CompletedProcess:
    proc = subprocess.run([sys.executable, "-m", "nearsight", *map(str, args)], cwd=ROOT, capture_output=True,
                          text=True, timeout=600)
    if check:
        assert proc.returncode == 0, proc.stderr[-3000:]
    return proc


@pytest.fixture
def small_disk(tmp_path):
    mount = tmp_path / "small-disk"
    mount.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=64m", "tmpfs", str(mount)], capture_output=True,
                          text=True)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {done.stderr.strip() or 'mount failed'}")
    yield mount
    subprocess.run(["umount", "-l", str(mount)], capture_output=True)


def _archive(folder: Path, names) -> None:
    from .test_train import skimage_photos

    folder.mkdir(parents=True)
    for name, im in skimage_photos():
        if name in names:
            im.thumbnail((320, 320))
            im.save(folder / f"{name}.jpg", quality=90)
            im.save(folder / f"{name}-same-pixels.png")


def _state(store: Path) -> tuple:
    """What two runs must agree on: every catalogued file (path, content hash, state) and the groups."""
    import sqlite3

    conn = sqlite3.connect(store / "catalog.sqlite")
    files = sorted(conn.execute("SELECT f.relpath, c.hash, f.state FROM files f LEFT JOIN contents c "
                                "ON c.id = f.content_id").fetchall())
    conn.close()
    pointer = (store / "generations" / "CURRENT").read_text().strip()
    groups = json.loads((store / "generations" / pointer / "groups.json").read_text())["groups"]
    members = sorted(sorted((Path(m["path"]).name, m["tier"]) for m in g["members"]) for g in groups)
    return files, members


def test_a_full_disk_loses_nothing_and_the_rerun_converges(small_disk, tmp_path):
    from .test_train import skimage_photos

    names = [name for name, _ in skimage_photos()]
    first, later = names[:8], names[8:14]
    archive = tmp_path / "archive"
    _archive(archive / "first", first)
    store = small_disk / "store"
    _cli("index", archive / "first", "--store", store, "--no-progress", "--train-minutes", "0.05")
    generation = (store / "generations" / "CURRENT").read_text()
    roomy = tmp_path / "roomy-store"
    shutil.copytree(store, roomy, symlinks=True)

    _archive(archive / "later", later)
    ballast = small_disk / "ballast"
    free = shutil.disk_usage(small_disk).free
    with open(ballast, "wb") as fh:  # leave about 200 KiB: the new photos' copies and vectors do not fit
        fh.truncate(0)
        fh.write(b"\0" * max(0, free - 200 * 1024))
    failed = _cli("index", archive / "first", archive / "later", "--store", store, "--no-progress",
                  "--retrain", "never", check=False)
    assert failed.returncode != 0
    assert "Traceback" not in failed.stderr, failed.stderr[-2000:]
    # Beside the progress lines ("scanning ..."), one line says what went wrong and what to do.
    errors = [line for line in failed.stderr.splitlines() if "error" in line.lower() or "warning" in line.lower()]
    assert len(errors) == 1 and "disk is full" in errors[0] and "free some space" in errors[0], failed.stderr

    # The previous generation still answers, and the store is whole.
    assert (store / "generations" / "CURRENT").read_text() == generation
    answer = json.loads(_cli("similar", archive / "first" / f"{first[0]}.jpg", "--store", store, "--json",
                             "-k", "1").stdout)
    assert Path(answer["results"][0]["path"]).name in (f"{first[0]}.jpg", f"{first[0]}-same-pixels.png")
    assert _cli("verify", "--store", store, check=False).returncode == 0

    os.remove(ballast)
    _cli("index", archive / "first", archive / "later", "--store", store, "--no-progress", "--retrain", "never")
    _cli("index", archive / "first", archive / "later", "--store", roomy, "--no-progress", "--retrain", "never")
    assert _state(store) == _state(roomy)
