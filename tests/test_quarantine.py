"""Quarantine, restore and keeper rules on real files, a real SQLite catalog and a real store.

The invented scenario: a small photo club's shared drive, "photos/" with its "masters/"
folder, and a second source "other/" holding copies under the same relative paths.
Every check of a file's bytes hashes it with hashlib's SHA-256 (FIPS 180-4) directly,
never with nearsight's own content hash, so the code under test does not grade itself.
"""

import errno
import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from collections import Counter
from contextlib import contextmanager
from pathlib import Path, PurePosixPath

import faiss
import numpy as np
import pytest
from PIL import Image

from nearsight.indexer.matching import generations
from nearsight.indexer.core.errors import NearsightError, UsageError
from nearsight.indexer.acting.keepers import FORMAT_ALIASES, KeeperRules, normalize_format, path_matches
from nearsight.indexer.matching.groups import ImageMeta
from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.acting.quarantine import TEST_PAUSE_ENV, apply_quarantine, plan_quarantine
from nearsight.indexer.acting.restore import restore
from nearsight.indexer.reading.scan import scan_source
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store
from nearsight.indexer.learning.train import TrainConfig

ROOT = Path(__file__).resolve().parent.parent
TINY = TrainConfig(arch="tiny", dim=16, size=32, embed_size=None, batch_size=8, steps=3, minutes=None, heldout=4, workers=0,
                   checkpoint_every_s=3600)
# Thresholds so high that only identical pictures group, whatever the tiny encoder learned:
# same-bytes and same-pixels groups do not depend on the model.
EXACT = {"near_threshold": 0.9999, "similar_threshold": 0.9999}


# ---------------------------------------------------------------- helpers

def _scene(path: Path, seed: int, size=(140, 100)) -> None:
    rng = np.random.default_rng(seed)
    small = rng.integers(0, 256, (5, 7, 3), dtype=np.uint8)
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(small).resize(size, Image.Resampling.BICUBIC).save(path)


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def tree(*roots: Path) -> dict[str, str]:
    """Every file under the roots (manifests aside) -> its SHA-256."""
    out = {}
    for root in roots:
        for path in sorted(Path(root).rglob("*")):
            if path.is_file() and not path.name.startswith("manifest-"):
                out[str(path)] = sha256(path)
    return out


def contents(*roots: Path) -> Counter:
    """How many files hold each byte string: equal before and after = nothing lost, nothing duplicated."""
    return Counter(tree(*roots).values())


def records(manifest: Path) -> list[dict]:
    """A manifest read as JSON Lines (jsonlines.org): one JSON object per line, by the json module."""
    lines = Path(manifest).read_text(encoding="utf-8").splitlines()
    return [json.loads(line) for line in lines if line.strip()]


def _archive(tmp_path: Path, *, resized: bool = False) -> list[Path]:
    photos, other = tmp_path / "photos", tmp_path / "other"
    for i in range(10):
        _scene(photos / "a" / f"{i:02d}.png", i)
    for copy in (photos / "a" / "00-copy.png", photos / "masters" / "00.png", other / "a" / "00-copy.png"):
        copy.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy(photos / "a" / "00.png", copy)                      # same bytes
    Image.open(photos / "a" / "01.png").save(photos / "a" / "01.bmp")   # same pixels, other bytes
    if resized:
        Image.open(photos / "a" / "02.png").resize((70, 50)).save(other / "02-small.png")
    # Oldest first, so the default policy keeps photos/a/00.png among its byte-identical copies.
    for age, path in enumerate((photos / "a" / "00.png", photos / "a" / "00-copy.png",
                                other / "a" / "00-copy.png", photos / "masters" / "00.png")):
        os.utime(path, ns=(1_600_000_000_000_000_000 + age * 10**9,) * 2)
    return [photos, other]


@pytest.fixture(scope="module")
def trained_models(tmp_path_factory):
    """One tiny encoder for the module; each test's store starts from a copy of it (no retraining)."""
    base = tmp_path_factory.mktemp("model")
    for i in range(10):
        _scene(base / "photos" / f"{i}.png", 100 + i)
    with Store.open(base / "store", create=True, settings=load_settings(environ={})) as store:
        run_index(store, [base / "photos"], progress=False, train_config=TINY)
    return base / "store" / "models"


def _build(tmp_path: Path, models: Path, sources: list[Path], **overrides) -> Path:
    store_dir = tmp_path / "store"
    shutil.copytree(models, store_dir / "models")
    with _open(store_dir, **overrides) as store:
        run_index(store, sources, progress=False, train_config=TINY)
    return store_dir


def _open(store_dir: Path, **overrides) -> Store:
    return Store.open(store_dir, create=True, settings=load_settings(store_dir=store_dir, environ={},
                                                                     overrides=overrides))


@pytest.fixture
def exact(tmp_path, trained_models):
    """(sources, store folder, quarantine folder) for the archive grouped at EXACT thresholds."""
    sources = _archive(tmp_path)
    store_dir = _build(tmp_path, trained_models, sources, **EXACT)
    return sources, store_dir, tmp_path / "quarantine"


def _planned(plan: dict) -> list[dict]:
    return [m for g in plan["groups"] for m in g["moves"]]


# ---------------------------------------------------------------- the dry run

def test_the_dry_run_moves_nothing_and_its_bytes_freed_add_up(exact, run_cli):
    sources, store_dir, qdir = exact
    before = tree(*sources)
    proc = run_cli("quarantine", "--store", store_dir, "--to", qdir, "--json", check_exit=0)
    plan = json.loads(proc.stdout)
    listed = [m["path"] for m in _planned(plan)]
    # 3 byte-identical copies of photos/a/00.png and the BMP or PNG of 01 (same pixels).
    assert len(listed) == 4 and plan["applied"] is False
    # The figure is the sum of the sizes os.stat reports for the files listed.
    assert plan["summary"]["bytes_freed"] == sum(os.stat(p).st_size for p in listed)
    assert tree(*sources) == before and not qdir.exists()
    human = run_cli("quarantine", "--store", store_dir, "--to", qdir, check_exit=0).stdout
    assert "dry run" in human and all(p in human for p in listed)
    assert f"({plan['summary']['bytes_freed']} bytes)" in human
    assert tree(*sources) == before and not qdir.exists()


# ---------------------------------------------------------------- quarantine then restore

def test_quarantine_then_restore_leaves_the_tree_byte_identical(tmp_path, trained_models, run_cli):
    sources = _archive(tmp_path, resized=True)
    store_dir = _build(tmp_path, trained_models, sources)
    qdir = tmp_path / "quarantine"
    before = tree(*sources)
    # Regrouping at a threshold has no "similar" tier, so every identical class is acted on.
    proc = run_cli("quarantine", "--store", store_dir, "--to", qdir, "--threshold", "0.5", "--apply", "--json",
                   check_exit=0)
    result = json.loads(proc.stdout)
    assert result["moved"] == len(result["moved_files"]) >= 4   # at least the identical copies
    for group in result["plan"]["groups"]:
        assert Path(group["keeper"]["path"]).is_file()          # every group keeps a file in place
    for moved in result["moved_files"]:
        assert not os.path.lexists(moved["path"])
        assert sha256(moved["dest"]) == before[moved["path"]]
    # Two sources with the same relative path land in their own sub-folders of the quarantine.
    dests = {Path(m["path"]).relative_to(tmp_path).as_posix(): m["dest"] for m in result["moved_files"]}
    if {"photos/a/00-copy.png", "other/a/00-copy.png"} <= set(dests):
        assert dests["photos/a/00-copy.png"] != dests["other/a/00-copy.png"]
    assert contents(*sources, qdir) == Counter(before.values())
    with _open(store_dir) as store:
        assert store.catalog.counts()["quarantined"] == result["moved"]

    # Without --store: the manifest names the store it was written for.
    restored = json.loads(run_cli("restore", result["manifest"], "--apply", "--json", check_exit=0).stdout)
    assert restored["counts"] == {"restored": result["moved"]}
    assert tree(*sources) == before
    # Only the manifest is left there: no file, and no folder the restored files emptied.
    assert sorted(qdir.rglob("*")) == [Path(result["manifest"])]
    with _open(store_dir) as store:
        assert store.catalog.counts()["quarantined"] == 0


def _wait_for(predicate, proc, timeout=60.0):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return
        assert proc.poll() is None, "the quarantine ended before the test hook paused it"
        time.sleep(0.05)
    raise AssertionError("the quarantine never reached the pause")


@pytest.mark.parametrize("stage", ["intent", "moved"])
def test_a_killed_quarantine_is_completed_by_the_next_run(exact, run_cli, stage):
    """SIGKILL after the 2nd file's intent (before its move) or after its move (before its record)."""
    sources, store_dir, qdir = exact
    before = contents(*sources)
    plan = json.loads(run_cli("quarantine", "--store", store_dir, "--to", qdir, "--json", check_exit=0).stdout)
    planned = {m["path"]: m["dest"] for m in _planned(plan)}
    env = dict(os.environ, PYTHONPATH=str(ROOT), **{TEST_PAUSE_ENV: f"{stage}:2"})
    with open(qdir.parent / "killed.stderr", "wb") as err:
        proc = subprocess.Popen([sys.executable, "-m", "nearsight", "quarantine", "--store", str(store_dir),
                                 "--to", str(qdir), "--apply"], env=env, stdout=subprocess.DEVNULL, stderr=err)
    try:
        def second_intent():
            found = list(qdir.glob("manifest-*.jsonl"))
            try:
                intent = [r for r in records(found[0]) if r["record"] == "intent" and r["seq"] == 2] if found else []
            except ValueError:   # a line being written
                return None
            return intent[0] if intent and (stage == "intent" or not os.path.lexists(intent[0]["from"])) else None

        _wait_for(second_intent, proc)
        intent = second_intent()
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
    # What the kill left: the 2nd file's story has an intent and no outcome.
    (manifest,) = qdir.glob("manifest-*.jsonl")
    assert [r["record"] for r in records(manifest) if r.get("seq") == 2] == ["intent"]
    assert os.path.lexists(intent["from"]) == (stage == "intent")
    assert os.path.lexists(intent["to"]) == (stage == "moved")

    # The store is usable (the kernel released the lock) and the rerun completes the same manifest.
    rerun = json.loads(run_cli("quarantine", "--store", store_dir, "--to", qdir, "--apply", "--json",
                               check_exit=0).stdout)
    assert list(qdir.glob("manifest-*.jsonl")) == [manifest]
    assert rerun["settled"][str(manifest)]["completed" if stage == "moved" else "abandoned"] == 1
    story = records(manifest)
    assert story[-1]["record"] == "end"
    intents = {r["seq"]: r for r in story if r["record"] == "intent"}
    outcomes = {r["seq"]: r["record"] for r in story if r["record"] in ("moved", "abandoned")}
    assert set(outcomes) == set(intents)                     # every intent has its outcome
    moved_ids = [intents[s]["file_id"] for s, o in outcomes.items() if o == "moved"]
    assert len(moved_ids) == len(set(moved_ids)) == len(planned)   # each planned file moved exactly once
    for src, dest in planned.items():
        assert not os.path.lexists(src) and Path(dest).is_file()
    assert contents(*sources, qdir) == before                # no file lost, none duplicated
    assert not list(qdir.rglob("*.nearsight-partial"))


# ---------------------------------------------------------------- restore's refusals and failures

def test_restore_never_overwrites_a_different_file(exact, run_cli):
    sources, store_dir, qdir = exact
    with _open(store_dir) as store:
        result = apply_quarantine(store, qdir)
    first, second, *rest = result["moved_files"]
    _scene(Path(first["path"]), 999)                 # someone saved another picture there
    shutil.copy2(second["dest"], second["path"])     # someone copied the same bytes back by hand
    stranger, twin = sha256(first["path"]), sha256(second["path"])
    snapshot = tree(*sources, qdir)

    dry = json.loads(run_cli("restore", result["manifest"], "--store", store_dir, "--json").stdout)
    outcome = {f["path"]: f["outcome"] for f in dry["files"]}
    assert outcome[first["path"]] == "refused" and outcome[second["path"]] == "in-place"
    assert all(outcome[m["path"]] == "would-restore" for m in rest)
    assert tree(*sources, qdir) == snapshot          # a dry run moves nothing

    proc = run_cli("restore", result["manifest"], "--store", store_dir, "--apply")
    assert proc.returncode == 1
    assert f"refused           {first['path']}  (a different file is now at {first['path']}" in proc.stdout
    assert sha256(first["path"]) == stranger                          # not overwritten
    assert sha256(first["dest"]) == sha256(second["dest"])            # its quarantined copy is still there
    assert sha256(second["path"]) == twin and Path(second["dest"]).is_file()   # left in place, reported
    assert f"the quarantined copy stays at {second['dest']}" in proc.stdout
    for m in rest:
        assert Path(m["path"]).is_file() and not os.path.lexists(m["dest"])
    with _open(store_dir) as store:
        rows = store.catalog.file_rows([first["id"], second["id"]])
        assert rows[first["id"]]["state"] == "quarantined" and rows[second["id"]]["state"] == "ok"


@contextmanager
def _read_only(folder: Path):
    """chmod a-w; as root chmod does not stop writes, so use the ext4 immutable flag (chattr +i) instead."""
    if os.geteuid() != 0:
        mode = folder.stat().st_mode
        folder.chmod(0o555)
        try:
            yield
        finally:
            folder.chmod(mode)
        return
    if shutil.which("chattr") is None or subprocess.run(["chattr", "+i", str(folder)],
                                                        capture_output=True).returncode != 0:
        pytest.skip("running as root, where chmod does not stop writes, and chattr +i is not available here")
    try:
        yield
    finally:
        subprocess.run(["chattr", "-i", str(folder)], check=True)


def test_restore_into_a_read_only_folder_is_a_clear_error_and_loses_nothing(exact, run_cli):
    sources, store_dir, qdir = exact
    original = contents(*sources)
    with _open(store_dir) as store:
        result = apply_quarantine(store, qdir)
    masters = Path(next(m["path"] for m in result["moved_files"] if "/masters/" in m["path"])).parent
    snapshot = tree(*sources, qdir)
    with _read_only(masters):
        proc = run_cli("restore", result["manifest"], "--store", store_dir, "--apply")
        assert proc.returncode == 1
        (line,) = proc.stderr.strip().splitlines()
        assert line.startswith("nearsight restore: error: cannot move ") and "Nothing was lost" in line
        assert tree(masters) == {k: v for k, v in snapshot.items() if k.startswith(str(masters))}
    assert contents(*sources, qdir) == original                # every byte string still exactly once
    assert not [p for p in tree(*sources, qdir) if p.endswith(".nearsight-partial")]
    assert any(r["record"] == "restore-failed" for r in records(result["manifest"]))
    run_cli("restore", result["manifest"], "--store", store_dir, "--apply", check_exit=0)
    assert contents(*sources) == original


def _force_copy(monkeypatch):
    """Make every move cross file systems: link() across folders fails with EXDEV, as between devices."""
    real_link = os.link

    def link(src, dst, *args, **kwargs):
        if Path(src).parent != Path(dst).parent:
            raise OSError(errno.EXDEV, os.strerror(errno.EXDEV), str(src))
        return real_link(src, dst, *args, **kwargs)

    monkeypatch.setattr(os, "link", link)


def test_a_full_disk_stops_with_a_clear_error_and_loses_nothing(exact, monkeypatch):
    sources, store_dir, qdir = exact
    before = tree(*sources)
    _force_copy(monkeypatch)

    def copy_until_full(reader, writer, length=0):
        writer.write(reader.read(100))
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))   # POSIX errno for a full device

    monkeypatch.setattr(shutil, "copyfileobj", copy_until_full)
    with _open(store_dir) as store:
        with pytest.raises(NearsightError, match=os.strerror(errno.ENOSPC)) as caught:
            apply_quarantine(store, qdir)
        assert "Nothing was lost" in caught.value.message
        assert store.catalog.counts()["quarantined"] == 0
    assert tree(*sources) == before                   # every file where it was, unchanged
    assert not tree(qdir)                             # no copy, no partial file left behind
    (manifest,) = qdir.glob("manifest-*.jsonl")
    assert [r["record"] for r in records(manifest)][-2:] == ["intent", "failed"]

    monkeypatch.undo()                                # space again: the same command continues
    with _open(store_dir) as store:
        done = apply_quarantine(store, qdir)
    assert done["manifest"] == str(manifest) and done["moved"] == 4
    assert contents(*sources, qdir) == Counter(before.values())


def test_across_file_systems_a_move_is_copy_verify_unlink(exact, monkeypatch):
    sources, store_dir, qdir = exact
    before = tree(*sources)
    mtimes = {p: os.stat(p).st_mtime_ns for p in before}
    _force_copy(monkeypatch)
    with _open(store_dir) as store:
        result = apply_quarantine(store, qdir)
        assert {r["method"] for r in records(result["manifest"]) if r["record"] == "moved"} == {"copy"}
        for m in result["moved_files"]:
            assert sha256(m["dest"]) == before[m["path"]] and not os.path.lexists(m["path"])
            assert os.stat(m["dest"]).st_mtime_ns == mtimes[m["path"]]   # copied with its times
        assert restore(store, result["manifest"], apply=True)["counts"] == {"restored": 4}
    assert tree(*sources) == before
    assert {p: os.stat(p).st_mtime_ns for p in before} == mtimes


# ---------------------------------------------------------------- keeper rules

def test_the_preferred_folders_copy_is_kept(exact, run_cli):
    sources, store_dir, qdir = exact
    photos = sources[0]
    master, oldest = str(photos / "masters" / "00.png"), str(photos / "a" / "00.png")
    by_default = json.loads(run_cli("quarantine", "--store", store_dir, "--to", qdir, "--json").stdout)
    keepers = {g["keeper"]["path"] for g in by_default["groups"]}
    assert oldest in keepers and master in {m["path"] for m in _planned(by_default)}   # oldest mtime wins
    result = json.loads(run_cli("quarantine", "--store", store_dir, "--to", qdir, "--prefer-folder", "masters",
                                "--apply", "--json", check_exit=0).stdout)
    assert master in {g["keeper"]["path"] for g in result["plan"]["groups"]}
    assert Path(master).is_file() and not os.path.lexists(oldest)
    assert sha256(master) == sha256(next(m["dest"] for m in result["moved_files"] if m["path"] == oldest))


def test_an_always_kept_path_is_never_moved(exact, run_cli):
    sources, store_dir, qdir = exact
    photos, other = sources
    kept = [photos / "a" / "00-copy.png", other / "a" / "00-copy.png"]
    hashes = {p: sha256(p) for p in kept}
    (store_dir / "settings.toml").write_text('keep_paths = ["*-copy.png"]\n')   # the store's settings file
    result = json.loads(run_cli("quarantine", "--store", store_dir, "--to", qdir, "--apply", "--json",
                                check_exit=0).stdout)
    (group,) = [g for g in result["plan"]["groups"] if g["tier"] == "same-bytes"]
    # Rule 1 of the policy: an always-kept copy is the keeper, and the other one stays too,
    # so the group keeps two files; the older original and the masters copy move.
    assert {group["keeper"]["path"], *(k["path"] for k in group["kept"])} == {str(p) for p in kept}
    assert {m["path"] for m in group["moves"]} == {str(photos / "a" / "00.png"), str(photos / "masters" / "00.png")}
    assert {p: sha256(p) for p in kept} == hashes
    assert not any(Path(m["path"]).name.endswith("-copy.png") for m in result["moved_files"])


def test_a_preferred_format_wins_and_flags_beat_the_environment(exact, run_cli):
    sources, store_dir, qdir = exact
    png, bmp = sources[0] / "a" / "01.png", sources[0] / "a" / "01.bmp"
    # The default policy (groups.keeper_key) between these two same-pixel, lossless files without EXIF: the
    # older file, then (same time) the larger one.
    by_default = min((png, bmp), key=lambda p: (os.stat(p).st_mtime_ns, -os.stat(p).st_size))
    other = bmp if by_default == png else png

    def keeper(environ=None, flags=None):
        """The same-pixels group's keeper with settings layered as the CLI does: env, then flags."""
        settings = load_settings(store_dir=store_dir, environ=environ or {}, overrides=flags)
        with Store.open(store_dir, settings=settings) as store:
            plan = plan_quarantine(store, rules=KeeperRules.from_settings(settings)).to_dict()
        (group,) = [g for g in plan["groups"] if g["tier"] == "same-pixels"]
        return group["keeper"]["path"]

    assert keeper() == str(by_default)
    fmt = {png: "png", bmp: "bmp"}
    assert keeper({"NEARSIGHT_PREFER_FORMATS": fmt[other]}) == str(other)
    assert keeper({"NEARSIGHT_PREFER_FORMATS": fmt[other]}, {"prefer_formats": fmt[by_default]}) == str(by_default)
    result = json.loads(run_cli("quarantine", "--store", store_dir, "--to", qdir, "--prefer-format", "png,tiff",
                                "--apply", "--json", check_exit=0).stdout)
    assert str(bmp) in {m["path"] for m in result["moved_files"]}
    with Image.open(png) as kept:                           # Pillow identifies what stayed
        assert kept.format == "PNG"


def test_keeper_policy_order():
    """The order documented in README: always kept, then folder, then format, then the default."""
    def meta(path, fmt="PNG", size=100, mtime=0.0):
        return ImageMeta(path=path, content_hash="c", width=10, height=10, file_size=size, format=fmt, mtime=mtime)

    files = {1: meta("/x/a/big.bmp", "BMP", size=900), 2: meta("/x/masters/m.bmp", "BMP"),
             3: meta("/x/a/p.png"), 4: meta("/x/keep/k.jpg", "JPEG", size=10)}
    assert KeeperRules().choose(files) == 1                                    # larger file
    assert KeeperRules(prefer_formats="png").choose(files) == 3
    assert KeeperRules(prefer_folders=["masters"], prefer_formats="png").choose(files) == 2
    assert KeeperRules(["/x/keep"], ["masters"], "png").choose(files) == 4


def test_patterns_agree_with_the_standard_library():
    """Whenever pathlib's PurePath.match (Python standard library) accepts a pattern, so do we;
    we add folder runs anywhere in the path, anchored absolute patterns and nothing else."""
    paths = ["/club/photos/masters/2019/a.png", "/club/photos/a/b.JPG", "/club/other/masters.png"]
    patterns = ["*.png", "masters/*/*.png", "2019/a.png", "/club/photos/a/b.JPG", "*.jpg", "a/*", "b.*"]
    for path in paths:
        for pattern in patterns:
            if PurePosixPath(path).match(pattern):
                assert path_matches(pattern, path), (pattern, path)
    assert path_matches("masters", paths[0]) and path_matches("/club/photos", paths[1])
    assert not path_matches("/photos", paths[0]) and not path_matches("masters", paths[1])
    # Aliases agree with Pillow's own table of file-name endings.
    registered = Image.registered_extensions()
    for alias, name in FORMAT_ALIASES.items():
        assert normalize_format(registered["." + alias]) == name


# ---------------------------------------------------------------- the catalog, the scanner and the index

def test_quarantined_files_leave_the_index_keep_their_history_and_come_back(exact):
    sources, store_dir, qdir = exact
    with _open(store_dir, **EXACT) as store:
        other_copy = store.catalog.file_id_for_path(sources[1] / "a" / "00-copy.png")
        neighbour = store.catalog.file_id_for_path(sources[0] / "a" / "05.png")
        store.catalog.add_verdicts([{"file_a": other_copy, "file_b": neighbour, "verdict": "different"}],
                                   origin="api")
        result = apply_quarantine(store, qdir)
        moved = {m["id"] for m in result["moved_files"]}
        assert other_copy in moved

        summary = run_index(store, sources, progress=False, train_config=TINY)
        assert summary["removed"] == 0                        # absent on purpose, not removed
        assert {r["state"] for r in store.catalog.file_rows(moved).values()} == {"quarantined"}
        index = generations.current(store).load_index()
        indexed = set(faiss.vector_to_array(faiss.downcast_index(index).id_map).tolist())
        assert not indexed & moved and len(indexed) == summary["indexed"]
        assert any({v["file_a"], v["file_b"]} == {other_copy, neighbour} for v in store.catalog.latest_verdicts())

        with pytest.raises(UsageError, match="inside the quarantine folder"):
            scan_source(store, qdir, progress=False)         # moved copies are never new images
        with pytest.raises(UsageError, match="inside the source folder"):
            plan_quarantine(store, to=sources[0] / "dupes")

        restore(store, result["manifest"], apply=True)
        run_index(store, sources, progress=False, train_config=TINY)
        index = generations.current(store).load_index()
        assert moved <= set(faiss.vector_to_array(faiss.downcast_index(index).id_map).tolist())


def test_a_quarantine_folder_inside_a_source_is_a_one_line_usage_error(exact, run_cli):
    sources, store_dir, _ = exact
    proc = run_cli("quarantine", "--store", store_dir, "--to", sources[0] / "dupes", "--apply")
    assert proc.returncode == 2
    (line,) = proc.stderr.strip().splitlines()
    assert line.startswith("nearsight quarantine: error: quarantine folder ") and "inside the source folder" in line
    assert not (sources[0] / "dupes").exists()
    both = run_cli("quarantine", "--store", store_dir, "--to", "q", "--threshold", "0.9", "--precision", "0.9")
    assert both.returncode == 2 and "not allowed with argument" in both.stderr      # argparse's own message
    uncalibrated = run_cli("quarantine", "--store", store_dir, "--to", "q", "--precision", "0.9")
    assert uncalibrated.returncode == 1 and "calibrat" in uncalibrated.stderr.strip().splitlines()[-1]


# ---------------------------------------------------------------- what may move without a person

def _skimage(name: str) -> Image.Image:
    import skimage.data

    return Image.fromarray(getattr(skimage.data, name)()).convert("RGB")


def _force_vectors(store: Store, copies: dict[Path, Path]) -> None:
    """Give each file the stored vector of another, as an encoder fooled by a look-alike would, and
    publish a generation grouped from those vectors (cosine 1.0, above any duplicate threshold)."""
    from nearsight.indexer.building.refresh import make_generation

    model = generations.current(store).meta["model"]
    ids = {p: store.catalog.file_id_for_path(p) for pair in copies.items() for p in pair}
    contents = store.catalog.content_ids_of(ids.values())
    stored = store.catalog.file_vectors(ids.values(), model)
    store.catalog.put_vectors(model, [contents[ids[copy]] for copy in copies],
                              [stored[ids[original]] for original in copies.values()])
    make_generation(store, store.models_dir / model, build="full")  # the store's settings are EXACT


def test_look_alike_textures_stay_and_a_verified_crop_moves(tmp_path, trained_models):
    """Two non-overlapping halves of scikit-image's gravel photo, forced to one vector (a learned
    match at cosine 1.0), are left in place by a default quarantine; a real crop and JPEG re-save of
    scikit-image's astronaut, forced likewise, moves with evidence "verified" (ORB + RANSAC).
    Bytes are checked with hashlib's SHA-256."""
    photos = tmp_path / "photos"
    photos.mkdir()
    gravel, astronaut = _skimage("gravel"), _skimage("astronaut")
    w, h = gravel.size
    gravel.crop((0, 0, w // 2, h)).save(photos / "gravel-left.png")
    gravel.crop((w // 2, 0, w, h)).save(photos / "gravel-right.png")
    astronaut.save(photos / "astronaut.png")  # the most pixels: the keeper of its group
    aw, ah = astronaut.size
    astronaut.crop((aw // 10, ah // 10, aw // 10 + int(aw * 0.8), ah // 10 + int(ah * 0.8))).save(
        photos / "astronaut-crop.jpg", quality=85)
    store_dir = _build(tmp_path, trained_models, [photos], **EXACT)
    qdir = tmp_path / "quarantine"
    before = tree(photos)
    with _open(store_dir, **EXACT) as store:
        _force_vectors(store, {photos / "gravel-right.png": photos / "gravel-left.png",
                               photos / "astronaut-crop.jpg": photos / "astronaut.png"})
        plan = plan_quarantine(store).to_dict()
        by_path = {m["path"]: m for g in plan["groups"] for m in g["moves"]}
        left_alone = {u["path"]: u for g in plan["groups"] for u in g["unverified"]}
        gravel_group = [g for g in plan["groups"] if Path(g["keeper"]["path"]).name.startswith("gravel")]
        assert len(gravel_group) == 1 and gravel_group[0]["tier"] == "near-duplicate"  # grouped, so at stake
        assert not gravel_group[0]["moves"] and len(gravel_group[0]["unverified"]) == 1
        assert next(iter(left_alone.values()))["reason"].startswith("not verified against the keeper")
        assert by_path[str(photos / "astronaut-crop.jpg")]["evidence"] == "verified"
        assert plan["summary"]["evidence"] == {"verified": 1} and plan["summary"]["unverified"] == 1

        opted_in = plan_quarantine(store, include_unverified=True).to_dict()
        assert opted_in["summary"]["evidence"] == {"verified": 1, "unverified (opted in)": 1}

        result = apply_quarantine(store, qdir)
    assert [m["path"] for m in result["moved_files"]] == [str(photos / "astronaut-crop.jpg")]
    assert sha256(result["moved_files"][0]["dest"]) == before[str(photos / "astronaut-crop.jpg")]
    for name in ("gravel-left.png", "gravel-right.png", "astronaut.png"):
        assert sha256(photos / name) == before[str(photos / name)]
    intent = next(r for r in records(result["manifest"]) if r["record"] == "intent")
    assert intent["evidence"] == "verified" and intent["keeper_path"] == str(photos / "astronaut.png")


def test_exact_copies_of_a_file_that_stays_still_move_as_its_copies(tmp_path, trained_models):
    """The right half of the gravel photo stays (its learned match to the left half, the keeper by
    folder preference, is not verified), but a byte-identical copy of it (shutil) moves as a copy of
    that half, not of the keeper. SHA-256 checks."""
    photos = tmp_path / "photos"
    (photos / "masters").mkdir(parents=True)
    gravel = _skimage("gravel")
    w, h = gravel.size
    gravel.crop((0, 0, w // 2, h)).save(photos / "masters" / "gravel-left.png")
    gravel.crop((w // 2, 0, w, h)).save(photos / "gravel-right.png")
    shutil.copy(photos / "gravel-right.png", photos / "gravel-right-copy.png")
    store_dir = _build(tmp_path, trained_models, [photos], **EXACT)
    before = tree(photos)
    rules = KeeperRules(prefer_folders=("masters",))
    with _open(store_dir, **EXACT) as store:
        _force_vectors(store, {photos / "gravel-right.png": photos / "masters" / "gravel-left.png"})
        (group,) = plan_quarantine(store, rules=rules).to_dict()["groups"]
        assert group["keeper"]["path"] == str(photos / "masters" / "gravel-left.png")
        (move,) = group["moves"]
        halves = {str(photos / "gravel-right.png"), str(photos / "gravel-right-copy.png")}
        assert move["evidence"] == "same-bytes" and {move["path"], move["copy_of"]["path"]} == halves
        assert [u["path"] for u in group["unverified"]] == [move["copy_of"]["path"]]
        result = apply_quarantine(store, tmp_path / "quarantine", rules=rules)
    assert result["moved"] == 1 and sha256(result["moved_files"][0]["dest"]) == before[move["path"]]
    assert all(sha256(p) == before[p] for p in before if p != move["path"])
