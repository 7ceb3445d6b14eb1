"""Putting quarantined files back where they were, from a quarantine manifest.

Each file the manifest moved (or was about to move when a run was killed) is
examined on disk, so a restore can be repeated or resumed at any point:

- ``to-restore``: the original path is free and the quarantined copy holds the
  recorded bytes: it is moved back, verified by content hash (`moves.move_verified`);
- ``in-place``: the original path already holds the recorded bytes: counted as
  restored; a quarantined copy still there is left in place and reported;
- ``refused``: a different file is now at the original path: never overwritten;
- ``changed``: the quarantined copy no longer holds the recorded bytes: left alone;
- ``missing``: the bytes are at neither path.

Restored files are 'ok' again in the catalog; the next publish indexes them.
"""

from __future__ import annotations

import logging
import os
from collections import Counter
from pathlib import Path

from ..core.errors import NearsightError, UsageError
from ..core.fsutil import fsync_dir
from ..storage.store import Store
from . import manifest
from .moves import HashMismatch, holds, move_verified, partial_path

log = logging.getLogger(__name__)

PROBLEMS = ("refused", "changed", "missing")


def _examine(entry: manifest.Entry) -> tuple[str, str | None]:
    original, copy, digest = Path(entry.intent["from"]), Path(entry.intent["to"]), entry.intent["hash"]
    if os.path.lexists(original):
        if holds(original, digest):
            return "in-place", f"the quarantined copy stays at {copy}" if os.path.lexists(copy) else None
        return "refused", f"a different file is now at {original}; it was not overwritten (the copy stays at {copy})"
    if holds(copy, digest):
        return "to-restore", None
    if os.path.lexists(copy):
        return "changed", f"the quarantined copy at {copy} no longer holds the bytes that were moved"
    return "missing", f"the file is at neither {original} nor {copy}"


def _items(records: list[dict]) -> list[dict]:
    items = []
    for entry in manifest.entries(records).values():
        if entry.outcome is not None and entry.outcome["record"] == "abandoned":
            continue  # never moved: the file stayed at its path
        status, note = _examine(entry)
        # The last restore record of this file: an intent alone means a restore was killed mid-move.
        last = next((r["record"] for r in reversed(entry.records) if r["record"].startswith("restore")), None)
        items.append({"seq": entry.seq, "id": entry.intent["file_id"], "path": entry.intent["from"],
                      "quarantined": entry.intent["to"], "hash": entry.intent["hash"], "size": entry.intent["size"],
                      "status": status, "note": note, "restore_started": last == "restore-intent",
                      "recorded_restored": last == "restored"})
    return items


def store_of_manifest(manifest_path: str | os.PathLike) -> str:
    """The store a manifest was written for (its first record names it)."""
    records = manifest.read(Path(manifest_path))
    store = records[0].get("store") if records else None
    if not store:
        raise UsageError(f"{manifest_path} does not name its store: give --store")
    return store


def _check_store(store: Store, records: list[dict], path: Path) -> None:
    written_by = records[0].get("store")
    if written_by != str(store.root):
        raise UsageError(f"{path} was written for the store {written_by}, not {store.root}: "
                         f"run `nearsight restore` with --store {written_by}")


def _restore_one(store: Store, item: dict, journal: manifest.ManifestWriter) -> str:
    """Carry out one item; its final status."""
    original, copy = Path(item["path"]), Path(item["quarantined"])
    if item["status"] == "in-place" and item["restore_started"] and holds(copy, item["hash"]):
        os.unlink(copy)  # a restore killed after linking back: this is the second name of the file in place
        fsync_dir(copy.parent)
        item["note"] = None
    elif item["status"] == "to-restore":
        if item["restore_started"]:
            partial_path(original).unlink(missing_ok=True)  # our unfinished copy from the killed restore
        journal.write("restore-intent", seq=item["seq"])
        try:
            method = move_verified(copy, original, item["hash"])
        except (HashMismatch, FileExistsError) as exc:
            journal.write("restore-skipped", seq=item["seq"], reason=str(exc))
            item["note"] = str(exc)
            return "refused"
        except OSError as exc:
            journal.write("restore-failed", seq=item["seq"], error=f"{exc.strerror or exc}")
            raise NearsightError(
                f"cannot move {copy} back to {original}: {exc.strerror or exc}. Nothing was lost: the file is "
                f"still at {copy}. Fix the cause and run the same restore again to continue") from None
        journal.write("restored", seq=item["seq"], method=method)
        _mark_ok(store, item)
        return "restored"
    if item["status"] == "in-place":
        if not item["recorded_restored"]:
            journal.write("restored", seq=item["seq"], method="already-in-place")
        _mark_ok(store, item)
        return "in-place"
    journal.write("restore-skipped", seq=item["seq"], reason=item["note"])
    return item["status"]


def _mark_ok(store: Store, item: dict) -> None:
    row = store.catalog.file_rows([item["id"]]).get(item["id"])
    if row is None or str(Path(row["root"]) / row["relpath"]) != item["path"]:
        log.warning("catalog has no file %s at %s; its state is left as it is", item["id"], item["path"])
        return
    store.catalog.mark_restored(item["id"])


def restore(store: Store, manifest_path: str | os.PathLike, *, apply: bool = False) -> dict:
    """Examine (dry run) or carry out (`apply`) the restore of every file a manifest moved."""
    path = Path(manifest_path).absolute()
    records = manifest.read(path)
    _check_store(store, records, path)
    if not apply:
        items = _items(records)
        for item in items:
            item["outcome"] = "would-restore" if item["status"] == "to-restore" else item["status"]
        return _report(path, items, applied=False)
    with store.lock():
        items = _items(manifest.read(path))
        with manifest.ManifestWriter(path) as journal:
            journal.write("restore")
            for item in items:
                item["outcome"] = _restore_one(store, item, journal)
            report = _report(path, items, applied=True)
            journal.write("restore-end", **report["counts"])
        _remove_emptied_folders(items, Path(records[0].get("quarantine") or path.parent))
    log.debug("restore from %s: %s", path, ", ".join(f"{k} {n}" for k, n in report["counts"].items()))
    return report


def _remove_emptied_folders(items: list[dict], quarantine: Path) -> None:
    """The folders under the quarantine folder that restored files left empty (the quarantine folder
    itself, which holds the manifest, stays). os.rmdir removes only an empty folder, so nothing else
    a person put there can go."""
    emptied = {Path(item["quarantined"]).parent for item in items if item["outcome"] in ("restored", "in-place")}
    for folder in sorted(emptied, key=lambda p: -len(p.parts)):
        while folder != quarantine and quarantine in folder.parents:
            try:
                folder.rmdir()
            except OSError:  # not empty (or already gone): its parents are not empty either
                break
            fsync_dir(folder.parent)
            folder = folder.parent


def _report(path: Path, items: list[dict], *, applied: bool) -> dict:
    counts = Counter(item["outcome"] for item in items)
    files = [{k: item[k] for k in ("id", "path", "quarantined", "size", "outcome", "note")} for item in items]
    return {"manifest": str(path), "applied": applied, "counts": dict(sorted(counts.items())),
            "problems": sum(counts[p] for p in PROBLEMS), "files": files}
