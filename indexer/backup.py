"""`nearsight backup DEST`: a consistent copy of a store, made while `serve` and `index` keep running.

What makes it consistent without stopping anyone:

- The catalog is copied through SQLite's online backup API (`sqlite3.Connection.backup`, all pages in one
  step under one read transaction), so the copy is the database as of one commit, whatever writers do
  meanwhile (the catalog runs in WAL mode: a reader never waits for them, nor they for it).
- Published generations and models are never changed once their folder is renamed into place (a new one is
  written beside them and a pointer switched), so each is copied as it is: hard-linked when DEST is on the
  same filesystem (no bytes copied; the store replaces files by renaming new ones in, never by writing into
  them, so a link cannot change under the backup), else copied. A generation pruned while it is copied is
  skipped; if it was the current one, the new current one is copied instead.
- Generations are copied before the catalog, so every file id a copied generation names is in the copied
  catalog (ids are never reused; the catalog only grows).
- The small copies are content-addressed files written once; linked or copied the same way.

The copy is built in a hidden folder beside DEST and renamed to DEST at the end, so an interrupted backup
leaves no half-made DEST. DEST is a store: `nearsight status --store DEST` and every query work on it, and
restoring is copying it back (or pointing `--store` at it).
"""

from __future__ import annotations

import errno
import logging
import os
import shutil
import sqlite3
import time
from pathlib import Path

from .core.errors import StoreError, UsageError
from .core.fsutil import atomic_write_text, fsync_dir
from .core.settings import SETTINGS_FILE
from .storage.store import CATALOG_FILE, Store

log = logging.getLogger(__name__)

ATTEMPTS = 3  # times the current generation is looked up again when a publish swaps it mid-copy


def _link_or_copy(src: Path, dst: Path, counts: dict) -> None:
    try:
        if counts.get("copy_only"):
            raise OSError(errno.EXDEV, "copies asked for")
        os.link(src, dst)
        counts["linked"] += 1
    except OSError as exc:
        if exc.errno not in (errno.EXDEV, errno.EPERM, errno.EMLINK, errno.ENOTSUP, errno.EACCES):
            raise
        shutil.copy2(src, dst)
        counts["copied"] += 1
        counts["bytes_copied"] += dst.stat().st_size


def _raise(error: OSError) -> None:
    raise error


def _copy_tree(src: Path, dst: Path, counts: dict) -> None:
    """Every file under `src` linked or copied to the same place under `dst`; hidden entries (a run's
    temporary folders) are left out. A folder that vanishes meanwhile raises FileNotFoundError."""
    if not src.is_dir():
        raise FileNotFoundError(str(src))
    for folder, dirs, files in os.walk(src, onerror=_raise):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        rel = Path(folder).relative_to(src)
        (dst / rel).mkdir(parents=True, exist_ok=True)
        for name in sorted(files):
            if not name.startswith("."):
                _link_or_copy(Path(folder) / name, dst / rel / name, counts)


def _check_copy(folder: Path) -> None:
    """Every file a generation's checksums name is in the copy with its size (FileNotFoundError if not:
    the generation was pruned while it was copied). Generations from before checksums pass as they are."""
    import json

    from .matching.generations import CHECKSUMS_FILE

    try:
        recorded = json.loads((folder / CHECKSUMS_FILE).read_text("utf-8"))
    except FileNotFoundError:
        return
    for filename, want in recorded.items():
        if (folder / filename).stat().st_size != want["size"]:
            raise FileNotFoundError(f"{folder / filename} was cut short while it was copied")


def _published(folder: Path) -> list[str]:
    if not folder.is_dir():
        return []
    return sorted(p.name for p in folder.iterdir() if p.is_dir() and not p.name.startswith("."))


def _check_destination(store: Store, dest: Path) -> Path:
    dest = Path(dest).absolute()
    root = store.root.resolve()
    if dest.exists() and (not dest.is_dir() or any(dest.iterdir())):
        raise UsageError(f"the backup folder {dest} exists and is not empty: give a new or empty folder")
    resolved = dest.parent.resolve() / dest.name
    if resolved == root or root in resolved.parents or resolved in root.parents:
        raise UsageError(f"the backup folder {dest} must be outside the store {root}, and the store outside it")
    if not dest.parent.is_dir():
        raise UsageError(f"the folder {dest.parent} does not exist: create it first")
    return dest


def _copy_generations(store: Store, work: Path, counts: dict) -> tuple[str | None, list[str]]:
    """The published generations linked or copied into `work`; (current generation, generation names)."""
    for _attempt in range(ATTEMPTS):
        current = store.read_pointer("generations/CURRENT")
        done = []
        shutil.rmtree(work / "generations", ignore_errors=True)
        (work / "generations").mkdir()
        for name in _published(store.generations_dir):
            try:
                _copy_tree(store.generations_dir / name, work / "generations" / name, counts)
                _check_copy(work / "generations" / name)
                done.append(name)
            except FileNotFoundError:  # pruned while we copied it
                shutil.rmtree(work / "generations" / name, ignore_errors=True)
                log.debug("generation %s was pruned during the backup", name)
        if current is None or current in done:
            return current, done
        log.info("the current generation changed during the backup; copying again")
    raise StoreError("the store published generations faster than they could be copied; try again")


def _models_needed(store: Store, generations: list[str], work: Path) -> set[str]:
    import json

    needed = {m for m in [store.read_pointer("models/CURRENT")] if m}
    for name in generations:
        try:
            meta = json.loads((work / "generations" / name / "meta.json").read_text("utf-8"))
        except (OSError, ValueError):
            continue
        if meta.get("model"):
            needed.add(meta["model"])
    return needed


def backup_store(store: Store, dest: str | os.PathLike, *, small_copies: bool = True, copy: bool = False) -> dict:
    """Copy the store to `dest` (new or empty, outside the store) and return what was copied. `copy`: copy
    every file even on the same filesystem. A hard link costs nothing and survives the store's own mistakes
    (the store never writes into a published file), but it is the same bytes on the same disk: a backup
    against the loss or decay of that disk must be a copy, on another one."""
    dest = _check_destination(store, Path(dest))
    work = dest.parent / f".{dest.name}.partial-{os.getpid()}"
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir()
    started = time.monotonic()
    counts = {"linked": 0, "copied": 0, "bytes_copied": 0, "copy_only": copy}
    try:
        current, generations = _copy_generations(store, work, counts)
        models = sorted(_models_needed(store, generations, work) & set(_published(store.models_dir)))
        (work / "models").mkdir()
        for name in models:
            _copy_tree(store.models_dir / name, work / "models" / name, counts)
        # After the generations: every file id they name is in this catalog. Through the store's own
        # connection (no URI made from a path, where a '#' or '?' would name another file).
        target = sqlite3.connect(work / CATALOG_FILE)
        try:
            store.catalog.conn.backup(target)
            copied_version = target.execute("PRAGMA user_version").fetchone()[0]
        finally:
            target.close()
        if copied_version != store.catalog.schema_version():
            raise StoreError(f"the catalog's copy is at schema {copied_version}, not {store.catalog.schema_version()}")
        catalog_bytes = (work / CATALOG_FILE).stat().st_size
        if (store.root / SETTINGS_FILE).is_file():
            shutil.copy2(store.root / SETTINGS_FILE, work / SETTINGS_FILE)
        thumbs = 0
        if small_copies and store.thumbs_dir.is_dir():
            _copy_tree(store.thumbs_dir, work / store.thumbs_dir.name, counts)  # with their kept keypoints
            thumbs = sum(1 for _ in (work / store.thumbs_dir.name).rglob("*.jpg"))
        if current:
            atomic_write_text(work / "generations" / "CURRENT", current + "\n")
        model_pointer = store.read_pointer("models/CURRENT")
        if model_pointer and model_pointer in models:
            atomic_write_text(work / "models" / "CURRENT", model_pointer + "\n")
        for folder, _dirs, _files in os.walk(work):
            fsync_dir(Path(folder))
        if dest.exists():
            dest.rmdir()  # checked empty above
        os.rename(work, dest)
        fsync_dir(dest.parent)
    except BaseException:
        shutil.rmtree(work, ignore_errors=True)
        raise
    return {"backup": str(dest), "store": str(store.root), "generation": current, "generations": generations,
            "models": models, "small_copies": thumbs, "catalog_bytes": catalog_bytes,
            **{k: v for k, v in counts.items() if k != "copy_only"},
            "seconds": round(time.monotonic() - started, 2)}
