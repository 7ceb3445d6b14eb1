"""`nearsight verify [--repair]`: is this store whole, and mend what can be made again.

Checks, each giving findings of one line (a problem, or a note that is not one):

- ``catalog``: SQLite's `PRAGMA integrity_check` and `PRAGMA foreign_key_check`;
- ``generation``: the pointer names a published generation, and every file of every published generation
  has the size and BLAKE2b-256 recorded when it was published (generations.CHECKSUMS_FILE; generations
  published before the sums were kept get a note);
- ``index``: the current generation's index holds one vector for each item it lists, and its region index
  (when it has one) only files it lists;
- ``vectors``: every content the current generation indexes has its vector under the generation's model
  in the catalog (incremental builds and grouping read them from there);
- ``small-copies``: every small copy the catalog records exists and is a readable image;
- ``model``: the model pointer names a model folder holding its weights and card, and the current
  generation's model is there (a model is made by training, not derived: a missing one is named, and
  `index --retrain always` trains a new one);
- ``quarantine``: every file the catalog records as quarantined is where its manifest moved it, with the
  bytes it had (its content hash), and its manifest exists; and the other way round, every move a known
  manifest (one the catalog names, and the others in its folder written for this store) records as done is
  a quarantined file in the catalog, and no move was left half-told by a killed run.

`--repair` makes again only what is derived (under the store's lock): a missing or damaged small copy from
its source file (when that file still holds the same bytes), missing vectors from the source files, a
damaged or inconsistent current generation by a full build from the catalog's vectors, and the catalog's
mark of a move a manifest records as done when the file is indeed in the quarantine folder and gone from
its place; a damaged generation that no pointer names any more is removed. It never touches a
user's image, never drops a verdict, and a quarantined file that is missing or changed is reported, not
"repaired".
"""

from __future__ import annotations

import json
import logging
import shutil
import sqlite3
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from .core.fsutil import hash_file
from .matching import generations
from .storage.store import Store

log = logging.getLogger(__name__)

CHECKS = ("catalog", "generation", "index", "vectors", "small-copies", "model", "quarantine")
MODEL_FILES = ("model.pt", "card.json")


@dataclass(frozen=True)
class Finding:
    check: str  # one of CHECKS
    problem: bool  # False: a note, nothing wrong
    message: str
    # what --repair does about it: "small-copy", "vectors", "generation" (a full build), "remove" (a damaged
    # generation no pointer names); None: nothing it may do
    repair: str | None = None
    subject: str | None = None  # the content hash, generation or file concerned

    def to_dict(self) -> dict:
        return asdict(self)

    def line(self) -> str:
        mark = "problem" if self.problem else "note"
        fix = f" (--repair: {self.repair})" if self.problem and self.repair else ""
        return f"{mark:<7}  {self.check:<12}  {self.message}{fix}"


def _catalog(store: Store) -> list[Finding]:
    conn = store.catalog.conn
    try:
        rows = [r[0] for r in conn.execute("PRAGMA integrity_check").fetchall()]
        keys = conn.execute("PRAGMA foreign_key_check").fetchall()
    except sqlite3.DatabaseError as exc:
        return [Finding("catalog", True, f"the catalog cannot be read: {exc}")]
    out = [Finding("catalog", True, f"integrity check: {r}") for r in rows if r != "ok"]
    out += [Finding("catalog", True, f"table {t} row {rowid} names a missing row of {parent}")
            for t, rowid, parent, _ in keys]
    return out


def _generation_files(store: Store, current: str | None) -> list[Finding]:
    out = []
    root = store.generations_dir
    names = sorted(p.name for p in root.iterdir() if p.is_dir() and not p.name.startswith(".")) if root.is_dir() else []
    if current is not None and current not in names:
        out.append(Finding("generation", True, f"generations/CURRENT names {current}, which is not there",
                           "generation", current))
    for name in names:
        folder = root / name
        try:
            recorded = json.loads((folder / generations.CHECKSUMS_FILE).read_text("utf-8"))
        except FileNotFoundError:
            out.append(Finding("generation", False, f"{name} was published before checksums were kept: "
                                                     "its files cannot be checked", subject=name))
            continue
        except ValueError:
            out.append(Finding("generation", True, f"{name}: its checksums file is damaged",
                               "generation" if name == current else "remove", name))
            continue
        for filename, want in sorted(recorded.items()):
            path = folder / filename
            if not path.is_file():
                problem = f"{name}: {filename} is missing"
            elif path.stat().st_size != want["size"]:
                problem = f"{name}: {filename} has {path.stat().st_size} bytes, {want['size']} when published"
            elif hash_file(path) != want["blake2b"]:
                problem = f"{name}: {filename} is not what was published (its content hash differs)"
            else:
                continue
            out.append(Finding("generation", True, problem, "generation" if name == current else "remove", name))
    return out


def _index(store: Store, gen) -> list[Finding]:
    items = gen.load_items()
    if items is None:
        return [Finding("index", True, f"{gen.name} has no list of its items", "generation", gen.name)]
    ids, contents = items
    try:
        index = gen.load_index()
    except Exception as exc:  # FAISS raises RuntimeError for a damaged file
        return [Finding("index", True, f"{gen.name}: the index cannot be read ({exc})", "generation", gen.name)]
    out = []
    if index.ntotal != len(ids):
        out.append(Finding("index", True, f"{gen.name}: the index holds {index.ntotal} vectors for {len(ids)} "
                                          "items", "generation", gen.name))
    if (gen.meta.get("regions") or {}).get("grid"):
        try:
            regions, _grid = gen.load_regions()
        except Exception as exc:
            return out + [Finding("index", True, f"{gen.name}: the region index cannot be read ({exc})",
                                  "generation", gen.name)]
        if regions is not None and regions.ntotal:
            import faiss

            region_ids = np.unique(faiss.vector_to_array(faiss.downcast_index(regions).id_map))
            stray = np.setdiff1d(region_ids, ids)
            if len(stray):
                out.append(Finding("index", True, f"{gen.name}: the region index holds {len(stray)} files the "
                                                  "generation does not list", "generation", gen.name))
    return out


def _vectors(store: Store, gen) -> list[Finding]:
    items = gen.load_items()
    model = gen.meta.get("model")
    if items is None or not model:
        return []
    contents = sorted(set(int(c) for c in items[1]))
    have = store.catalog.contents_with_vectors(model, contents)
    missing = len(contents) - len(have)
    if missing:
        return [Finding("vectors", True, f"{missing} of the {len(contents)} contents that {gen.name} indexes "
                                         f"have no vector under model {model}", "vectors", gen.name)]
    return []


def _small_copies(store: Store) -> list[Finding]:
    from PIL import Image

    out = []
    for digest in store.catalog.contents_with_small_copies():
        path = store.thumb_path(digest)
        try:
            with Image.open(path) as im:
                im.verify()
        except FileNotFoundError:
            out.append(Finding("small-copies", True, f"the small copy of content {digest[:12]} is missing",
                               "small-copy", digest))
        except Exception as exc:  # Pillow raises many kinds for a damaged file
            out.append(Finding("small-copies", True, f"the small copy of content {digest[:12]} is damaged ({exc})",
                               "small-copy", digest))
    return out


def _quarantine(store: Store) -> list[Finding]:
    out = []
    rows = store.catalog.quarantined_files()
    for row in rows:
        where = Path(row["quarantine_path"] or "")
        label = f"file {row['id']} ({row['relpath']})"
        if not row["quarantine_path"] or not where.is_file():
            out.append(Finding("quarantine", True, f"{label}: not at {where}, where its quarantine moved it",
                               subject=str(where)))
        elif hash_file(where) != row["hash"]:
            out.append(Finding("quarantine", True, f"{label}: {where} no longer holds the bytes that were moved",
                               subject=str(where)))
        if row["quarantine_manifest"] and not Path(row["quarantine_manifest"]).is_file():
            out.append(Finding("quarantine", True, f"{label}: its manifest {row['quarantine_manifest']} is missing "
                                                   "(`restore` needs it)", subject=row["quarantine_manifest"]))
    return out + _manifest_records(store, rows)


def _model(store: Store, gen) -> list[Finding]:
    from .learning.models import POINTER as MODEL_POINTER

    out = []
    current = store.read_pointer(MODEL_POINTER)
    wanted = {current} if current else set()
    if gen is not None and gen.meta.get("model"):
        wanted.add(gen.meta["model"])
    retrain = "; `nearsight index --retrain always` trains a new one"
    for name in sorted(wanted):
        folder = store.models_dir / name
        if not folder.is_dir():
            out.append(Finding("model", True, f"model {name} is missing{retrain}", subject=name))
            continue
        for filename in MODEL_FILES:
            path = folder / filename
            if not path.is_file() or path.stat().st_size == 0:
                out.append(Finding("model", True, f"model {name} has no {filename}{retrain}", subject=name))
        try:
            json.loads((folder / "card.json").read_text("utf-8"))
        except (OSError, ValueError):
            if (folder / "card.json").is_file():
                out.append(Finding("model", True, f"model {name}: its card.json is damaged{retrain}", subject=name))
    return out


def _manifest_records(store: Store, rows: list[dict]) -> list[Finding]:
    """Moves known manifests record as done that the catalog does not show, and moves left half-told."""
    from .acting import manifest
    from .core.errors import UsageError

    known = {Path(r["quarantine_manifest"]) for r in rows if r["quarantine_manifest"]}
    for folder in {p.parent for p in known}:
        known.update(folder.glob("manifest-*.jsonl"))
    by_id = {r["id"]: r for r in rows}
    out = []
    for path in sorted(known):
        try:
            records = manifest.read(path)
        except (OSError, UsageError):
            continue  # a missing manifest is reported with its files; a foreign file is not ours
        if records[0].get("store") != str(store.root):
            continue
        for entry in manifest.entries(records).values():
            moved = entry.outcome is not None and entry.outcome["record"] == "moved"
            restored = any(r["record"] == "restored" for r in entry.records)
            file_id, to = entry.intent["file_id"], entry.intent["to"]
            if entry.outcome is None and not restored:
                out.append(Finding("quarantine", True, f"{path.name}: the move of file {file_id} to {to} was left "
                                   "half-told by a stopped run; `nearsight quarantine --to "
                                   f"{path.parent}` settles it", subject=str(path)))
            elif moved and not restored and by_id.get(file_id, {}).get("quarantine_path") != to:
                out.append(Finding("quarantine", True, f"{path.name}: records file {file_id} moved to {to}, but "
                                   "the catalog does not list it there", "quarantine-marks", str(path)))
    return out


def verify_store(store: Store) -> list[Finding]:
    """Every finding of every check (module docstring), problems and notes."""
    findings = _catalog(store)
    if any(f.check == "catalog" for f in findings):
        return findings  # the other checks read the catalog
    current = store.read_pointer(generations.POINTER)
    findings += _generation_files(store, current)
    gen = generations.current(store) if current and (store.generations_dir / current).is_dir() else None
    if gen is not None:
        findings += _index(store, gen)
        findings += _vectors(store, gen)
    findings += _small_copies(store)
    findings += _model(store, gen)
    findings += _quarantine(store)
    return findings


def repair_store(store: Store, findings: list[Finding] | None = None) -> list[str]:
    """Make again what is derivable, under the store's lock; returns what was done. The store is checked
    again once the lock is held (`findings`, from before, only say whether to take it): a run that held
    the lock meanwhile may have changed what is wrong."""
    done: list[str] = []
    if findings is not None and not any(f.problem and f.repair for f in findings):
        return done
    with store.lock():
        findings = verify_store(store)
        wanted = {f.repair for f in findings if f.problem and f.repair}
        for f in findings:
            if f.problem and f.repair == "small-copy":
                done.append(_remake_small_copy(store, f.subject))
        for path in sorted({f.subject for f in findings if f.problem and f.repair == "quarantine-marks"}):
            done.append(_sync_marks(store, Path(path)))
        if wanted & {"vectors", "generation"}:
            done += _rebuild_generation(store, embed="vectors" in wanted)
        current = store.read_pointer(generations.POINTER)
        for name in sorted({f.subject for f in findings if f.problem and f.repair in ("remove", "generation")}):
            folder = store.generations_dir / name
            if name != current and folder.is_dir():  # a damaged generation no pointer names: derived, unusable
                shutil.rmtree(folder)
                done.append(f"removed the damaged generation {name} (not the current one)")
    return done


def _sync_marks(store: Store, path: Path) -> str:
    """The catalog's quarantine marks from a manifest, for moves that did happen (the file is at its new
    path and gone from its old one): quarantine.py's own settling, without moving anything."""
    from .acting import manifest
    from .acting.quarantine import sync_catalog

    before = {r["id"] for r in store.catalog.quarantined_files()}
    sync_catalog(store, manifest.read(path), path)
    marked = {r["id"] for r in store.catalog.quarantined_files()} - before
    if marked:
        return f"marked {len(marked)} file(s) quarantined as {path.name} records"
    return f"{path.name}: its records of moves do not match the files on disk; left for you to check"


def _remake_small_copy(store: Store, digest: str) -> str:
    from .core.errors import ImageReadError
    from .reading.images import read_image, save_thumbnail

    for source in store.catalog.present_files_with_hash(digest):
        path = Path(source["path"])
        try:
            if hash_file(path) != digest:
                continue  # the file changed since it was scanned: not this content any more
            im, _ = read_image(path, max_side=store.settings.thumb_side, max_pixels=store.settings.max_pixels)
        except (OSError, ImageReadError):
            continue
        save_thumbnail(im, store.thumb_path(digest))
        return f"made the small copy of content {digest[:12]} again from {path}"
    return f"could not make the small copy of content {digest[:12]} again: no file holds its bytes now"


def _rebuild_generation(store: Store, *, embed: bool) -> list[str]:
    from .building.refresh import make_generation
    from .calibration.calibrate import CalibrationConfig
    from .learning.models import current_model_dir

    settings = store.settings
    model_dir = current_model_dir(store)
    if model_dir is None:
        return ["could not rebuild the generation: the store has no model"]
    done = []
    if embed:
        from .matching.vectors import embed_missing

        embedded = embed_missing(store, model_dir, progress=False)
        done.append(f"embedded {embedded['embedded']} contents that had no vector")
    # Rebuilt as the generation it replaces was built: calibrated when it was (the calibration is derived from
    # the collection too), not when it was built with --no-calibrate.
    current = store.read_pointer(generations.POINTER)
    calibrated = current is None or (store.generations_dir / current / generations.CALIBRATION_FILE).is_file()
    built = make_generation(store, model_dir, build="full", reason="repair",
                            calibration=CalibrationConfig.from_settings(settings) if calibrated else None)
    done.append(f"published generation {built.get('generation')} by a full build from the catalog's vectors")
    return done
