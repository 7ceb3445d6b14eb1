"""The nightly run: an existing store re-indexed after its folders changed.

Real files in two source folders, a real SQLite catalog, real FAISS indexes, real `nearsight`
processes killed with SIGKILL, a real HTTP server on 127.0.0.1. The references are outside
the code under test: Pillow's decoded pixels say which files are the same picture, exhaustive
search (NumPy over every pair) says which pairs an index must give, statsmodels checks the
z-test of the retraining rule, and an uninterrupted run of the same change is what every
killed-and-resumed run must end as.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import faiss
import numpy as np
import pytest
from PIL import Image

from nearsight.indexer.matching import generations
from nearsight.indexer.building.build import load_vectors
from nearsight.indexer.matching.groups import build_groups
from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.matching.query import Searcher
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store
from nearsight.indexer.learning.train import TrainConfig

from .conftest import ROOT

# Three training steps (the tiny encoder of tests/test_pipeline.py), with 16 originals held out
# so that the retraining rule's held-out comparison has something to compare against.
TINY = TrainConfig(arch="tiny", dim=16, size=32, embed_size=None, batch_size=8, steps=3, minutes=None, heldout=16, workers=0,
                   checkpoint_every_s=3600)
# Only identical pictures group at these thresholds, whatever the tiny encoder learned.
EXACT = {"near_threshold": 0.9999, "similar_threshold": 0.9999}
BASE_SCENES = 80


def _scene(path: Path, seed: int, size=(96, 72)) -> Path:
    """A smooth random picture (an upscaled 5 x 7 grid of random colours), JPEG quality 92."""
    rng = np.random.default_rng(seed)
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(rng.integers(0, 256, (5, 7, 3), dtype=np.uint8)).resize(size, Image.Resampling.BICUBIC) \
        .save(path, quality=92)
    return path


def _same_pixels(src: Path, dest: Path) -> Path:
    """Another file (PNG) with the pixels Pillow decodes from `src`."""
    dest.parent.mkdir(parents=True, exist_ok=True)
    Image.open(src).save(dest)
    return dest


def _copy(src: Path, dest: Path) -> Path:
    dest.parent.mkdir(parents=True, exist_ok=True)
    shutil.copy2(src, dest)
    return dest


def _settings(store_dir: Path | None = None, **overrides):
    return load_settings(store_dir=store_dir, environ={}, overrides={"workers": 1, **overrides})


def _open(store_dir: Path, **overrides) -> Store:
    """The store with its settings.toml (if any) and `overrides`, as the command line would open it."""
    return Store.open(store_dir, create=True, settings=_settings(store_dir, **overrides))


@pytest.fixture(scope="module")
def models(tmp_path_factory) -> Path:
    """One tiny encoder for the module (each store copies it: no test trains unless it means to)."""
    base = tmp_path_factory.mktemp("model")
    for i in range(BASE_SCENES):
        _scene(base / "photos" / f"{i:02d}.jpg", 1000 + i)
    with _open(base / "store") as store:
        run_index(store, [base / "photos"], progress=False, train_config=TINY, calibrate=False)
    return base / "store" / "models"


def _store_with_model(models: Path, store_dir: Path) -> Path:
    shutil.copytree(models, store_dir / "models")
    return store_dir


def _first_collection(root: Path) -> list[Path]:
    """Two source folders: photos/ (80 scenes, a byte copy of 05) and scans/ (07 again, as PNG)."""
    photos, scans = root / "photos", root / "scans"
    for i in range(BASE_SCENES):
        _scene(photos / f"{i:02d}.jpg", i)
    _copy(photos / "05.jpg", photos / "a" / "05-copy.jpg")
    _same_pixels(photos / "07.jpg", scans / "07.png")
    _scene(scans / "s1.jpg", 500)
    return [photos, scans]


def _change_collection(photos: Path, scans: Path, extra: int = 0) -> None:
    """Between two runs: add, modify, rename, move between the folders, delete, copy, touch."""
    _scene(photos / "new1.jpg", 100)                               # added
    _scene(scans / "new2.jpg", 101)                                # added (other folder)
    _same_pixels(photos / "10.jpg", photos / "b" / "10-again.png")  # added: same pixels as 10
    _copy(photos / "08.jpg", photos / "c" / "08-copy.jpg")          # added: same bytes as 08 (its original stays)
    _scene(photos / "03.jpg", 103)                                 # modified in place
    os.rename(photos / "04.jpg", photos / "04-renamed.jpg")        # renamed
    (scans / "moved").mkdir()
    os.rename(photos / "05.jpg", scans / "moved" / "05.jpg")       # moved to the other source folder
    (photos / "06.jpg").unlink()                                   # deleted
    (scans / "07.png").unlink()                                    # deleted: the 07 group dissolves
    os.utime(photos / "09.jpg", ns=(1_700_000_000_000_000_000,) * 2)  # touched only
    for i in range(extra):
        _scene(photos / "extra" / f"{i:03d}.jpg", 2000 + i)


def _ids_by_path(store: Store) -> dict[str, int]:
    rows = store.catalog.file_rows(r["id"] for r in store.catalog.files_with_hashes())
    return {str(Path(r["root"]) / r["relpath"]): i for i, r in rows.items()}


def _states(store: Store) -> dict[str, str]:
    rows = store.catalog.conn.execute(
        "SELECT s.root, f.relpath, f.state FROM files f JOIN sources s ON s.id = f.source_id").fetchall()
    return {str(Path(r[0]) / r[1]): r[2] for r in rows}


def _index_vectors(gen) -> dict[int, np.ndarray]:
    index = gen.load_index()
    inner = faiss.downcast_index(index)
    ids = faiss.vector_to_array(inner.id_map)
    return {int(i): index.reconstruct(int(i)) for i in ids}


def _group_paths(gen) -> set[frozenset[str]]:
    return {frozenset(m["path"] for m in g["members"]) for g in gen.load_groups()["groups"]}


def _pixel_classes(paths) -> set[frozenset[str]]:
    """Reference: files whose decoded pixels (Pillow, RGB) are equal, in classes of two or more."""
    by_pixels: dict[bytes, set[str]] = {}
    for path in paths:
        im = Image.open(path).convert("RGB")
        by_pixels.setdefault(im.tobytes() + repr(im.size).encode(), set()).add(str(path))
    return {frozenset(v) for v in by_pixels.values() if len(v) > 1}


def _exhaustive_pairs(xb: np.ndarray, ids: np.ndarray, t: float) -> set[tuple[int, int]]:
    """Reference: every pair with cosine >= t, by NumPy over all pairs (exhaustive search)."""
    sims = xb @ xb.T
    a, b = np.nonzero(np.triu(sims >= t, 1))
    return {tuple(sorted((int(ids[i]), int(ids[j])))) for i, j in zip(a, b)}


# ------------------------------------------------------------------------------ a changed collection

def test_a_changed_collection_ends_in_the_expected_state_and_only_new_bytes_are_embedded(models, tmp_path):
    photos, scans = _first_collection(tmp_path)
    store_dir = _store_with_model(models, tmp_path / "store")
    with _open(store_dir, **EXACT) as store:
        first = run_index(store, [photos, scans], progress=False, calibrate=False)
        before = _ids_by_path(store)
        _change_collection(photos, scans)
        second = run_index(store, [photos, scans], progress=False, calibrate=False)

        # Counts by kind of change; nothing is retrained (no one asked, the collection barely grew).
        assert (second["new"], second["changed"], second["moved"], second["removed"]) == (4, 1, 2, 2)
        assert second["retrain"]["retrain"] is False and "trained" not in second
        # Embedded: new1, new2, 10-again.png and the modified 03 are bytes never seen; the byte copy
        # of 08 and the moved and renamed files are not (vectors are kept by content).
        assert second["embedded"] == 4
        assert second["build"]["kind"] == "incremental"
        assert second["build"]["change"] == {"added": 4, "removed": 2, "replaced": 1}

        # Catalog: moved and renamed files keep their ids, the modified one too; new files get new ids.
        after = _ids_by_path(store)
        assert after[str(scans / "moved" / "05.jpg")] == before[str(photos / "05.jpg")]
        assert after[str(photos / "04-renamed.jpg")] == before[str(photos / "04.jpg")]
        assert after[str(photos / "03.jpg")] == before[str(photos / "03.jpg")]
        for added in (photos / "new1.jpg", scans / "new2.jpg", photos / "b" / "10-again.png",
                      photos / "c" / "08-copy.jpg"):
            assert after[str(added)] not in before.values()
        states = _states(store)
        assert states[str(photos / "06.jpg")] == states[str(scans / "07.png")] == "removed"
        assert str(photos / "05.jpg") not in states and str(photos / "04.jpg") not in states
        on_disk = sorted(str(p) for root in (photos, scans) for p in root.rglob("*.*"))
        assert sorted(p for p, s in states.items() if s == "ok") == on_disk

        # Index: exactly the present files, each stored as its catalog vector in the generation's space.
        gen = generations.current(store)
        assert gen.name == second["generation"] != first["generation"]
        stored = _index_vectors(gen)
        ids, xb = load_vectors(store, gen.meta["model"])
        assert sorted(stored) == sorted(after[p] for p in on_disk) == sorted(ids.tolist())
        xb = gen.load_whitening().apply(xb)
        np.testing.assert_allclose(np.stack([stored[int(i)] for i in ids]), xb, atol=1e-5)

        # Groups: the classes of equal pixels per Pillow, with the moved file under its new path.
        assert _group_paths(gen) == _pixel_classes(on_disk)
        assert frozenset({str(scans / "moved" / "05.jpg"), str(photos / "a" / "05-copy.jpg")}) in _group_paths(gen)
        assert second["group_changes"] == {"new": 2, "grown": 0, "shrunk": 0, "reshaped": 0, "unchanged": 1,
                                           "dissolved": 1}
        # Only the components the change touched were regrouped, not the whole collection.
        assert second["build"]["regrouped"]["files_regrouped"] < 12 < second["indexed"]
        # The pairs the next run starts from are the pairs exhaustive search finds.
        a, b, _ = gen.load_pairs()
        assert set(zip(a.tolist(), b.tolist())) == _exhaustive_pairs(xb, ids, EXACT["similar_threshold"])


@pytest.mark.parametrize("thresholds", [{}, {"near_threshold": 0.45, "similar_threshold": 0.35}],
                         ids=["defaults", "tighter"])
def test_incremental_groups_equal_groups_made_from_scratch(models, tmp_path, thresholds):
    """At the default thresholds the tiny encoder's pairs form one large component that complete linkage
    must split; at tighter ones, several components of which the change touches a few. Either way the
    nightly update has to reach the groups that grouping every pair anew gives."""
    photos, scans = _first_collection(tmp_path)
    store_dir = _store_with_model(models, tmp_path / "store")
    with _open(store_dir, **thresholds) as store:
        run_index(store, [photos, scans], progress=False, calibrate=False)
        _change_collection(photos, scans, extra=6)
        second = run_index(store, [photos, scans], progress=False, calibrate=False)
        assert second["build"]["kind"] == "incremental"
        gen = generations.current(store)
        t_near, t_similar = gen.meta["thresholds"]["near"], gen.meta["thresholds"]["similar"]
        ids, xb = load_vectors(store, gen.meta["model"])
        xb = gen.load_whitening().apply(xb)
        pairs = _exhaustive_pairs(xb, ids, t_similar)
        a, b, _ = gen.load_pairs()
        assert set(zip(a.tolist(), b.tolist())) == pairs
        assert len(pairs) >= 50   # plenty of pairs: the components are not trivial
        # From scratch: every exhaustive pair, exact cosines, the same grouping function.
        row = {int(i): n for n, i in enumerate(ids)}
        ea = np.array([p[0] for p in pairs], np.int64)
        eb = np.array([p[1] for p in pairs], np.int64)
        es = np.einsum("ij,ij->i", xb[[row[i] for i in ea]], xb[[row[i] for i in eb]])
        scratch = build_groups(ea, eb, es, store.catalog.image_meta(ids.tolist()), t_near=t_near, t_similar=t_similar,
                               vectors=lambda sub: xb[[row[int(i)] for i in sub]])
        published = gen.load_groups()["groups"]
        assert [(g.gid, g.keeper, g.tier) for g in scratch] == [(g["gid"], g["keeper"], g["tier"]) for g in published]
        if thresholds:  # several components: groups the change did not touch were carried over as they were
            regrouped = second["build"]["regrouped"]
            assert regrouped["groups_kept"] > 0 and regrouped["files_regrouped"] < second["indexed"]


def test_a_regroup_at_a_threshold_equals_grouping_every_exhaustive_pair(models, tmp_path):
    """`groups --threshold` and the quarantine plan (verdict_groups.current_groups) start from the generation's
    stored pairs and search only below them. Above and below the generation's similar threshold, the groups
    equal complete linkage over every pair that exhaustive NumPy search finds at the asked threshold."""
    from nearsight.indexer.building.verdict_groups import current_groups

    photos, scans = _first_collection(tmp_path)
    store_dir = _store_with_model(models, tmp_path / "store")
    with _open(store_dir, near_threshold=0.45, similar_threshold=0.35) as store:
        run_index(store, [photos, scans], progress=False, calibrate=False)
        gen = generations.current(store)
        ids, xb = load_vectors(store, gen.meta["model"])
        xb = gen.load_whitening().apply(xb)
        a, b, _ = gen.load_pairs()
        assert set(zip(a.tolist(), b.tolist())) == _exhaustive_pairs(xb, ids, 0.35)  # no verified pair beyond them
        row = {int(i): n for n, i in enumerate(ids)}
        for t in (0.4, 0.3):  # above the stored pairs' floor, and below it (searched)
            pairs = sorted(_exhaustive_pairs(xb, ids, t))
            assert len(pairs) >= 8
            ea = np.array([p[0] for p in pairs], np.int64)
            eb = np.array([p[1] for p in pairs], np.int64)
            es = np.einsum("ij,ij->i", xb[[row[i] for i in ea]], xb[[row[i] for i in eb]])
            scratch = build_groups(ea, eb, es, store.catalog.image_meta(ids.tolist()), t_near=t, t_similar=t,
                                   vectors=lambda sub: xb[[row[int(i)] for i in sub]])
            got = current_groups(store, threshold=t).groups
            assert [(g.keeper, sorted(m.id for m in g.members)) for g in got] == \
                [(g.keeper, sorted(m.id for m in g.members)) for g in scratch]


def test_a_run_with_nothing_changed_publishes_without_rebuilding(models, tmp_path):
    photos, scans = _first_collection(tmp_path)
    store_dir = _store_with_model(models, tmp_path / "store")
    with _open(store_dir, **EXACT) as store:
        first = run_index(store, [photos, scans], progress=False, calibrate=False)
        again = run_index(store, [photos, scans], progress=False, calibrate=False)
        assert (again["new"], again["changed"], again["moved"], again["removed"], again["embedded"]) == (0, 0, 0, 0, 0)
        assert again["build"]["kind"] == "unchanged" and again["generation"] != first["generation"]
        old, new = (store.generations_dir / first["generation"]), (store.generations_dir / again["generation"])
        for name in ("index.faiss", "groups.json", "items.npz", "pairs.npz", "whitening.npz"):
            assert os.path.samefile(old / name, new / name)   # shared, not rewritten
        assert again["group_changes"]["unchanged"] == first["groups"]["groups"]


def test_the_calibration_is_reused_for_small_changes_and_redone_past_recalibrate_change(models, tmp_path):
    """The rule of the setting recalibrate_change (10 %): the figures are the files changed since the
    calibration against the collection it measured."""
    photos, scans = _first_collection(tmp_path)
    store_dir = _store_with_model(models, tmp_path / "store")
    with _open(store_dir) as store:
        first = run_index(store, [photos, scans], progress=False)
        assert first["thresholds"]["source"] == "calibrated" and "calibrate" in first["stages"]
        _scene(photos / "one-more.jpg", 4242)                      # 1 of 83: reuse
        small = run_index(store, [photos, scans], progress=False)
        assert "calibrate" not in small["stages"] and small["thresholds"] == first["thresholds"]
        assert small["calibration"]["reused_from"] == first["generation"]
        assert small["build"]["since_calibration"] == {"indexed": 83, "changes": 1}
        old, new = (store.generations_dir / g / "calibration.json" for g in (first["generation"], small["generation"]))
        assert os.path.samefile(old, new)
        _change_collection(photos, scans, extra=6)                 # 1 + 13 of 83: over 10 %, calibrate again
        large = run_index(store, [photos, scans], progress=False)
        assert "calibrate" in large["stages"] and "reused_from" not in large["calibration"]
        assert large["build"]["since_calibration"] == {"indexed": 92, "changes": 0}


# ------------------------------------------------------------------------------ killed runs

# Each kill costs a child process (~8 s here): one stage runs in the quick suite, the rest with -m slow.
KILL_STAGES = [pytest.param(stage, marks=() if stage == "embed" else pytest.mark.slow)
               for stage in ("scan", "embed", "index", "publish", "pointer")]
NIGHTLY_FLAGS = ("--no-calibrate", "--retrain", "never", "--no-progress", "-q")


def _snapshot(store_dir: Path) -> dict:
    """The end state a run leaves: ids and states by path, the index's ids and vectors, the groups."""
    with Store.open(store_dir, settings=_settings(store_dir)) as store:
        gen = generations.current(store)
        vectors = _index_vectors(gen)
        return {"ids": _ids_by_path(store), "states": _states(store), "indexed": sorted(vectors),
                "vectors": vectors, "groups": _group_paths(gen), "model": gen.meta["model"], "generation": gen.name}


@pytest.fixture(scope="module")
def killable(models, tmp_path_factory):
    """A store indexed once, its folders changed since (74 new contents: two blocks of embedding),
    and the state an uninterrupted nightly run of that change ends in."""
    base = tmp_path_factory.mktemp("killable")
    sources = _first_collection(base)
    store_dir = _store_with_model(models, base / "store")
    # 78 of 83 files change: over the default rebuild_fraction, so allow the incremental update here
    # (the file is read by the child processes too).
    (store_dir / "settings.toml").write_text("rebuild_fraction = 1.0\n")
    with _open(store_dir) as store:
        run_index(store, sources, progress=False, calibrate=False)
    first = _snapshot(store_dir)
    _change_collection(*sources, extra=70)
    control_dir = base / "control"
    shutil.copytree(store_dir, control_dir)
    with _open(control_dir) as store:
        control = run_index(store, sources, progress=False, calibrate=False, retrain="never")
    assert control["embedded"] == 74 and control["build"]["kind"] == "incremental"
    return {"sources": sources, "store": store_dir, "first": first, "control": control,
            "end": _snapshot(control_dir)}


def _nightly_env(**extra) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith("NEARSIGHT_")}
    env.update(PYTHONPATH=str(ROOT), NEARSIGHT_WORKERS="1", **extra)
    return env


def _start_paused(store_dir: Path, sources, stage: str, log_path: Path, *flags: str) -> subprocess.Popen:
    """`nearsight index` in a child process, held by the test hook at `stage` (see indexer/core/pause.py)."""
    with open(log_path, "wb") as log:
        proc = subprocess.Popen(
            [sys.executable, "-m", "nearsight", "index", *map(str, sources), "--store", str(store_dir),
             *(flags or NIGHTLY_FLAGS)],
            env=_nightly_env(NEARSIGHT_TEST_PAUSE_AT=stage), stdout=subprocess.DEVNULL, stderr=log)
    deadline = time.monotonic() + 300
    while time.monotonic() < deadline:
        if f"pausing at stage {stage}" in log_path.read_text(errors="replace"):
            return proc
        if proc.poll() is not None:
            raise AssertionError(f"the run ended (exit {proc.returncode}) before pausing at {stage}:\n"
                                 + log_path.read_text(errors="replace"))
        time.sleep(0.05)
    proc.kill()
    raise AssertionError(f"the run never paused at {stage}")


def _kill(proc: subprocess.Popen) -> None:
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=60)
    assert proc.returncode == -signal.SIGKILL


def _assert_serving_previous(store_dir: Path, sources, previous: str) -> None:
    """The store opens and answers queries from the generation published before the killed run."""
    with Store.open(store_dir, settings=_settings(store_dir)) as store:
        assert store.catalog.conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        searcher = Searcher(store)
        assert searcher.generation.name == previous
        query = str(sources[0] / "00.jpg")   # unchanged between the runs
        (answer,) = searcher.similar_files([query], k=3)
        assert answer["results"][0]["path"] == query and answer["results"][0]["descriptor_similarity"] > 0.99


def _assert_same_end(got: dict, want: dict) -> None:
    assert got["ids"] == want["ids"]
    assert got["states"] == want["states"]
    assert got["indexed"] == want["indexed"]
    for i in want["indexed"]:   # embedded in other batches: equal up to float rounding
        np.testing.assert_allclose(got["vectors"][i], want["vectors"][i], atol=1e-5)
    assert got["groups"] == want["groups"]
    assert got["model"] == want["model"]


@pytest.mark.parametrize("stage", KILL_STAGES)
def test_a_run_killed_at_any_stage_leaves_the_store_serving_and_the_rerun_ends_as_an_uninterrupted_run(
        killable, tmp_path, stage):
    store_dir = tmp_path / "store"
    shutil.copytree(killable["store"], store_dir)
    previous = killable["first"]["generation"]
    proc = _start_paused(store_dir, killable["sources"], stage, tmp_path / "killed.log")
    _kill(proc)
    leftovers = sorted(p.name for p in (store_dir / "generations").iterdir() if p.is_dir())
    if stage == "publish":      # a half-written generation under its temporary name
        assert any(n.startswith(".tmp-g-") for n in leftovers)
    if stage == "pointer":      # a complete generation that no pointer names
        assert len([n for n in leftovers if n.startswith("g-")]) == 2
    _assert_serving_previous(store_dir, killable["sources"], previous)

    with _open(store_dir) as store:
        rerun = run_index(store, killable["sources"], progress=False, calibrate=False, retrain="never")
        runs = [r["status"] for r in store.catalog.conn.execute("SELECT status FROM runs WHERE kind = 'index'")]
    assert runs == ["ok", "interrupted", "ok"]
    # Finished embedding is not repeated: 64 vectors (one block) were committed before the kill at
    # `embed`; every one of them before the later stages.
    expected = {"scan": 74, "embed": 74 - 64}.get(stage, 0)
    assert rerun["embedded"] == expected
    assert rerun["build"]["kind"] == "incremental"
    _assert_same_end(_snapshot(store_dir), killable["end"])
    names = sorted(p.name for p in (store_dir / "generations").iterdir() if p.is_dir())
    assert names == sorted([previous, rerun["generation"]])   # leftovers of the killed run are gone


def test_a_second_run_is_refused_and_a_killed_holder_leaves_no_stale_lock(killable, tmp_path, run_cli):
    store_dir = tmp_path / "store"
    shutil.copytree(killable["store"], store_dir)
    holder = _start_paused(store_dir, killable["sources"], "scan", tmp_path / "holder.log")
    try:
        second = run_cli("index", *killable["sources"], "--store", store_dir, *NIGHTLY_FLAGS,
                         env=_nightly_env())
        assert second.returncode == 3      # StoreLockedError's exit code (indexer/core/errors.py)
        (line,) = second.stderr.strip().splitlines()
        assert line.startswith("nearsight index: error: store ") and f"is busy: locked by pid {holder.pid}" in line
    finally:
        _kill(holder)
    assert (store_dir / "lock").read_text().startswith(f"pid {holder.pid} ")   # what the dead holder left
    # flock is released by the kernel when its holder dies: the next run takes the lock at once.
    with _open(store_dir) as store:
        summary = run_index(store, killable["sources"], progress=False, calibrate=False, retrain="never")
    assert summary["generation"]
    assert (store_dir / "lock").read_text() == ""          # released cleanly this time
    _assert_same_end(_snapshot(store_dir), killable["end"])


# ------------------------------------------------------------------------------ retraining

@pytest.mark.parametrize("before, now, n", [(15, 9, 16), (120, 96, 128), (40, 41, 64), (16, 16, 16), (0, 0, 20)])
def test_the_held_out_drop_test_matches_statsmodels(before, now, n):
    """Reference: statsmodels' two-proportion z-test, one-sided (H1: the earlier recall is larger),
    pooled variance (its default)."""
    from statsmodels.stats.proportion import proportions_ztest

    from nearsight.indexer.learning.retrain import recall_drop

    got = recall_drop(before, now, n)
    assert got["drop"] == pytest.approx((before - now) / n)
    if 0 < before + now < 2 * n:
        z, p = proportions_ztest([before, now], [n, n], alternative="larger")
        assert got["z"] == pytest.approx(z) and got["p_value"] == pytest.approx(p)
    else:  # no variance at all: no evidence of a drop (statsmodels divides by zero here)
        assert got["z"] == 0.0 and got["p_value"] == 0.5


def test_the_retrain_policy_follows_its_settings(models, tmp_path):
    from nearsight.indexer.learning.retrain import SIGNIFICANCE, decide

    photos, scans = _first_collection(tmp_path)
    store_dir = _store_with_model(models, tmp_path / "store")
    with _open(store_dir) as store:
        run_index(store, [photos, scans], progress=False, calibrate=False, retrain="never")
        model_dir = store.models_dir / store.read_pointer("models/CURRENT")
        # 82 distinct readable images now, 80 when the model was trained: it grew by 2.5 %.
        assert decide(store, model_dir, "never", _settings(retrain_growth=0.0))["retrain"] is False
        assert decide(store, model_dir, "always", _settings(retrain_growth=10.0))["retrain"] is True
        grown = decide(store, model_dir, "auto", _settings(retrain_growth=0.02))
        assert grown["retrain"] is True and grown["growth"] == pytest.approx(82 / 80 - 1) and "grew by 2%" in grown["reason"]
        # Below the growth limit the held-out check decides. This store's images all arrived after the
        # model was made (it was trained in another store), so 16 of them meet its 16 held-out originals.
        checked = decide(store, model_dir, "auto", _settings(retrain_growth=0.5, retrain_heldout_drop=0.0))
        check = checked["heldout"]
        assert check["n"] == 16 and 0 <= check["before"] <= 1 and 0 <= check["now"] <= 1
        assert checked["retrain"] is (check["drop"] >= 0.0 and check["p_value"] < SIGNIFICANCE)
        never_enough = decide(store, model_dir, "auto", _settings(retrain_growth=0.5, retrain_heldout_drop=1.01))
        assert never_enough["retrain"] is False
        with pytest.raises(Exception, match="must be one of auto, never, always"):
            run_index(store, [photos], progress=False, retrain="sometimes")


@pytest.mark.slow
def test_a_new_model_is_built_beside_the_served_generation_and_replaces_it_only_when_published(killable, tmp_path):
    store_dir = tmp_path / "store"
    shutil.copytree(killable["store"], store_dir)
    old_model = killable["first"]["model"]
    proc = _start_paused(store_dir, killable["sources"], "index", tmp_path / "retrain.log",
                         "--retrain", "always", "--arch", "tiny", "--dim", "16", "--size", "32", "--batch-size", "8",
                         "--epochs", "0.2", "--no-calibrate", "--no-progress")
    try:
        with Store.open(store_dir, settings=_settings(store_dir)) as store:
            new_model = store.read_pointer("models/CURRENT")
            assert new_model != old_model                       # trained, and every image embedded with it ...
            searcher = Searcher(store)                          # ... while the old generation answers with its own
            assert searcher.generation.name == killable["first"]["generation"]
            assert searcher.card["version"] == old_model
    finally:
        _kill(proc)
    _assert_serving_previous(store_dir, killable["sources"], killable["first"]["generation"])
    with _open(store_dir) as store:
        rerun = run_index(store, killable["sources"], progress=False, calibrate=False)   # --retrain auto
        readable = len(store.catalog.readable_contents())
        assert store.catalog.count_vectors(new_model) == readable
    assert "trained" not in rerun and rerun["retrain"]["retrain"] is False   # the new model is current now
    assert rerun["embedded"] == 0                                            # nothing embedded twice
    assert rerun["build"]["kind"] == "full" and "new model" in rerun["build"]["reason"]
    end = _snapshot(store_dir)
    assert end["model"] == new_model and end["ids"] == killable["end"]["ids"]
    assert end["indexed"] == killable["end"]["indexed"]


# ------------------------------------------------------------------------------ the running service

@pytest.mark.slow
def test_a_running_service_swaps_to_the_nightly_generation_without_a_failed_request(service_store, tmp_path, run_cli):
    from .service_support import QueryLoad, ServerProcess

    store_dir = service_store.copy("nightly")
    arrivals = tmp_path / "arrivals"
    new_files = [_scene(arrivals / f"arrival-{i}.jpg", 7000 + i, size=(320, 240)) for i in range(2)]
    server = ServerProcess(store_dir).start()
    with Store.open(store_dir, settings=_settings(store_dir)) as store:
        old = generations.current(store).name
    def request(c, i):
        return c.get(f"/v1/images/{1 + i % 150}/similar?k=5" if i % 2 else "/v1/groups?limit=5")

    try:
        with QueryLoad(server, 3, request) as load:
            time.sleep(1.0)
            nightly = run_cli("index", service_store.archive, arrivals, "--store", store_dir, *NIGHTLY_FLAGS,
                              "--json", env=_nightly_env())
            assert nightly.returncode == 0, nightly.stderr
            summary = json.loads(nightly.stdout)
            assert (summary["new"], summary["embedded"], summary["build"]["kind"]) == (2, 2, "incremental")
            load.wait_for(summary["generation"], settle_s=1.0)
            with Store.open(store_dir, settings=_settings(store_dir)) as store:
                new_ids = [store.catalog.file_id_for_path(p) for p in new_files]
            c = server.client()
            for image_id in new_ids:   # the new images are served by the new generation
                r = c.get(f"/v1/images/{image_id}/similar?k=3")
                assert r.status == 200 and r.headers["x-nearsight-generation"] == summary["generation"]
            c.close()
    finally:
        server.stop()
    load.assert_swapped(old, summary["generation"])
    assert "Traceback" not in server.log()
