"""Scanning: find every image file under a source folder and record it in the catalog.

A file whose size and mtime match the catalog is unchanged and is not read
again. Any other file is hashed; content the catalog has never seen is decoded
once (at reduced scale) to check that it is a readable image and to cache a
small copy for later stages. Byte-identical files share one content row. Work
is committed in chunks, so a run killed mid-way keeps what it finished and the
next run resumes where it stopped.

A file found at a path the catalog has never held, with bytes the catalog knows,
is *moved* when a present row with those bytes has lost its own path (the old path
is gone and its source folder is still there): that row takes the new path and
keeps its id, so groups and verdicts stay with the image, also across source
folders of one store. A copy whose original is still in place is *new*. Files not
found are marked removed only after every folder of the run is scanned, so a move
into a folder scanned later is still seen as a move.
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import stat
import time
from collections import Counter
from concurrent.futures import Executor, ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

from ..core.errors import ImageReadError, NotFoundError, UsageError
from ..core.fsutil import hash_file
from ..core.pause import pause_at
from ..core.progress import Progress
from ..storage.store import Store
from . import images
from .read_errors import os_error_reason

log = logging.getLogger(__name__)

CHUNK_FILES = 256  # files per catalog transaction
MIN_PARALLEL = 64  # files to hash or decode in one batch before worker processes are worth starting
# A Dask task lost with its worker is rerun this many times, by the scan and by distributed embedding
# (matching/cluster.py), before the run gives up.
CLUSTER_RETRIES = 3


@dataclass
class ScanSummary:
    """Counts for one scan. new/changed/unchanged/moved partition the image files seen;
    unreadable counts those among them that cannot be decoded."""

    source: str = ""
    seen: int = 0
    new: int = 0
    changed: int = 0
    unchanged: int = 0
    moved: int = 0
    unreadable: int = 0
    removed: int = 0
    ignored: int = 0
    same_bytes: int = 0
    decoded: int = 0
    folders_unreadable: int = 0
    seconds: float = 0.0
    reasons: Counter = field(default_factory=Counter)
    source_id: int = 0
    started: float = 0.0

    def to_dict(self) -> dict:
        out = {k: v for k, v in self.__dict__.items() if k not in ("reasons", "source_id", "started")}
        out["unreadable_reasons"] = dict(self.reasons.most_common())
        out["seconds"] = round(self.seconds, 3)
        return out


def _walk(root: Path, extensions: tuple[str, ...], skip_hidden: bool, exclude: set[Path]) -> tuple[list[tuple[str, str]], int, int]:
    """List (relpath, abspath) of image-named files; count ignored files and unlistable folders."""
    found: list[tuple[str, str]] = []
    ignored = 0
    folder_errors: list[OSError] = []
    for dirpath, dirnames, filenames in os.walk(root, onerror=folder_errors.append, followlinks=False):
        here = Path(dirpath)
        # Never descend into the store itself or a quarantine folder, nor into hidden folders when asked.
        dirnames[:] = sorted(
            d for d in dirnames
            if not (skip_hidden and d.startswith(".")) and (here / d).absolute() not in exclude
        )
        for name in sorted(filenames):
            if skip_hidden and name.startswith("."):
                continue
            if os.path.splitext(name)[1].lower() not in extensions:
                ignored += 1
                continue
            abspath = here / name
            found.append((abspath.relative_to(root).as_posix(), str(abspath)))
    for exc in folder_errors:
        log.warning("cannot list folder %s: %s", exc.filename, exc.strerror)
    return found, ignored, len(folder_errors)


def _hash_one(abspath: str) -> tuple[str | None, str | None]:
    try:
        return hash_file(Path(abspath)), None
    except OSError as exc:
        code, detail = os_error_reason(exc)
        return None, f"{code}: {detail}"


def _decode_one(job: tuple[str, int, int, str | None]) -> dict:
    """Decode one file at reduced scale; write its cached small copy. Runs in a worker."""
    abspath, max_pixels, thumb_side, thumb_path = job
    try:
        im, info = images.read_image(abspath, max_side=thumb_side or 512, max_pixels=max_pixels)
        if thumb_path:
            images.save_thumbnail(im, thumb_path)
    except ImageReadError as exc:
        return {"state": "unreadable", "reason": f"{exc.reason}: {exc.detail}"}
    except OSError as exc:  # e.g. the store's disk is full while writing the small copy
        code, detail = os_error_reason(exc)
        return {"state": "unreadable", "reason": f"{code}: {detail}"}
    return {
        "state": "ok",
        "format": info.format,
        "mode": info.mode,
        "width": info.width,
        "height": info.height,
        "frames": info.frames,
        "thumb": bool(thumb_path),
        "captured": info.captured,
        "camera": info.camera,
        "icc": info.icc,
    }


class _Workers(Executor):
    """Runs small batches in this process and large ones in worker processes, started on first need.

    Starting workers costs seconds (each imports nearsight afresh), more than reading a few dozen
    files, so a nightly scan that finds little to read never starts them."""

    def __init__(self, workers: int):
        self.workers = workers or os.cpu_count() or 1
        self._pool: ProcessPoolExecutor | None = None

    def map(self, fn, *iterables, timeout=None, chunksize=1) -> Iterator:
        items = list(zip(*iterables))
        if self.workers <= 1 or len(items) < MIN_PARALLEL:
            return iter([fn(*args) for args in items])
        if self._pool is None:
            # spawn, not fork: the parent may hold SQLite handles and threads.
            self._pool = ProcessPoolExecutor(max_workers=self.workers,
                                             mp_context=multiprocessing.get_context("spawn"))
        return self._pool.map(fn, *zip(*items), timeout=timeout, chunksize=chunksize)

    def shutdown(self, wait=True, *, cancel_futures=False) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=wait, cancel_futures=cancel_futures)


def _run_chunk(fn, chunk: list[tuple]) -> list:
    return [fn(*args) for args in chunk]


class _ClusterWorkers(Executor):
    """The same `map`, run by a Dask cluster's workers (cluster.py): hashing and decoding, the
    expensive part of a scan, spread over machines that see the same paths. Files go in chunks
    so that the scheduler's per-task cost stays small; a lost worker's chunk is rerun."""

    CHUNK = 64

    def __init__(self, client):
        self.client = client

    def map(self, fn, *iterables, timeout=None, chunksize=1) -> Iterator:
        items = list(zip(*iterables))
        chunks = [items[i : i + self.CHUNK] for i in range(0, len(items), self.CHUNK)]
        futures = self.client.map(_run_chunk, [fn] * len(chunks), chunks, pure=False, retries=CLUSTER_RETRIES)
        return (result for future in futures for result in future.result())


def scan_source(store: Store, folder: str | os.PathLike, *, progress: bool | None = None) -> ScanSummary:
    """Scan one folder recursively into the store's catalog and return the counts."""
    return scan_sources(store, [folder], progress=progress)[0]


def scan_sources(store: Store, folders, *, progress: bool | None = None, client=None) -> list[ScanSummary]:
    """Scan every folder, then mark what each did not find as removed (moves between them are moves).
    With a Dask `client`, its workers hash and decode (they must see the folders and the store)."""
    summaries = [_scan_one(store, folder, progress, client) for folder in folders]
    for summary in summaries:
        summary.removed = store.catalog.mark_missing_removed(summary.source_id, summary.started)
        store.catalog.mark_source_scanned(summary.source_id, summary.started)
        log.info(
            "scanned %s: %d new, %d changed, %d moved, %d unchanged, %d unreadable, %d removed in %.1fs",
            summary.source, summary.new, summary.changed, summary.moved, summary.unchanged, summary.unreadable,
            summary.removed, summary.seconds,
        )
    return summaries


def check_folders(folders) -> None:
    """Refuse, before anything is written, a folder to scan that does not exist or is a file."""
    for folder in folders:
        root = Path(folder)
        if not root.exists():
            raise NotFoundError(f"folder not found: {folder}")
        if not root.is_dir():
            raise UsageError(f"not a folder: {folder} (give the folder that holds it)")


def _scan_one(store: Store, folder: str | os.PathLike, progress: bool | None, client=None) -> ScanSummary:
    """Scan one folder's files into the catalog (removals are marked by the caller)."""
    check_folders([folder])
    root = Path(folder).resolve()
    settings = store.settings
    catalog = store.catalog
    quarantine_dirs = {Path(p) for p in catalog.quarantine_dirs()}
    for qdir in quarantine_dirs:
        if root == qdir or qdir in root.parents:
            raise UsageError(f"{root} is inside the quarantine folder {qdir}: its files are copies moved "
                             "out of a source, not new images (use `nearsight restore MANIFEST` to put them back)")
    started = time.time()
    source_id = catalog.add_source(root)
    summary = ScanSummary(source=str(root), source_id=source_id, started=started)

    known = catalog.files_of_source(source_id)
    candidates, summary.ignored, summary.folders_unreadable = _walk(
        root, settings.extensions, settings.skip_hidden, {store.root.resolve(), *quarantine_dirs}
    )
    log.info("scanning %s: %d image files, %d other files ignored", root, len(candidates), summary.ignored)

    workers = _ClusterWorkers(client) if client is not None else _Workers(settings.workers)
    with workers as pool, Progress(len(candidates), "scan", enabled=progress) as bar:
        for start in range(0, len(candidates), CHUNK_FILES):
            chunk = candidates[start : start + CHUNK_FILES]
            _scan_chunk(store, source_id, known, chunk, pool, summary)
            bar.update(len(chunk))
            pause_at("scan")
    summary.seconds = time.time() - started
    return summary


def _scan_chunk(store: Store, source_id: int, known: dict, chunk: list[tuple[str, str]], pool: Executor, summary: ScanSummary) -> None:
    """Classify, hash, decode and record one chunk of files in one transaction."""
    records, unchanged_ids = _classify(chunk, known, summary)
    to_hash = [r for r in records if r["reason"] is None]
    for rec, (digest, reason) in zip(to_hash, pool.map(_hash_one, [r["abspath"] for r in to_hash], chunksize=8)):
        rec["digest"], rec["reason"] = digest, reason
    decoded = _decode_fresh(store, records, pool)
    summary.decoded += len(decoded)
    _record(store.catalog, source_id, records, decoded, unchanged_ids, summary)


def _count_unreadable(summary: ScanSummary, reason: str | None) -> None:
    summary.unreadable += 1
    summary.reasons[(reason or "").split(":")[0]] += 1


def _classify(chunk: list[tuple[str, str]], known: dict, summary: ScanSummary) -> tuple[list[dict], list[int]]:
    """Split a chunk into unchanged files (same size and mtime, or the same stat error)
    and records of new or changed files still to be read."""
    records: list[dict] = []
    unchanged_ids: list[int] = []
    for relpath, abspath in chunk:
        summary.seen += 1
        row = known.get(relpath)
        # A quarantined file found at its path again (put back by hand, or another file) is read afresh.
        kind = "new" if row is None or row.state in ("removed", "quarantined") else "changed"
        size = mtime_ns = None
        try:
            st = os.stat(abspath)
            problem = None if stat.S_ISREG(st.st_mode) else "not-file: not a regular file"
            size, mtime_ns = st.st_size, st.st_mtime_ns
        except OSError as exc:
            problem = "%s: %s" % os_error_reason(exc)
        if kind == "changed" and (
            (problem is None and (row.size, row.mtime_ns) == (size, mtime_ns))
            or (problem is not None and row.state == "unreadable" and row.reason == problem)
        ):
            unchanged_ids.append(row.id)
            summary.unchanged += 1
            if row.state == "unreadable":
                _count_unreadable(summary, row.reason)
            continue
        if problem is not None:
            size = mtime_ns = None
        records.append({"relpath": relpath, "abspath": abspath, "kind": kind, "size": size,
                        "mtime_ns": mtime_ns, "reason": problem, "fresh_path": row is None,
                        "old_content_id": row.content_id if kind == "changed" else None})
    return records, unchanged_ids


def _decode_fresh(store: Store, records: list[dict], pool: Executor) -> dict[str, dict]:
    """Decode each content the catalog has never seen, once, even if several files share it."""
    fresh: dict[str, dict] = {}
    for rec in records:
        digest = rec.get("digest")
        if digest and digest not in fresh and store.catalog.content_by_hash(digest) is None:
            fresh[digest] = rec
    settings = store.settings
    thumb_side = settings.thumb_side
    jobs = [
        (rec["abspath"], settings.max_pixels, thumb_side, str(store.thumb_path(d)) if thumb_side else None)
        for d, rec in fresh.items()
    ]
    return dict(zip(fresh, pool.map(_decode_one, jobs, chunksize=4)))


def _record(catalog, source_id: int, records: list[dict], decoded: dict[str, dict], unchanged_ids: list[int], summary: ScanSummary) -> None:
    now = time.time()
    with catalog.transaction() as conn:
        contents: dict[str, tuple[int, str, str | None]] = {}
        for rec in records:
            digest = rec.get("digest")
            content_id, state, reason = None, "unreadable", rec["reason"]
            kind = rec["kind"]
            if digest:
                known_before = digest not in decoded or digest in contents
                if digest not in contents:
                    if digest in decoded:
                        info = decoded[digest]
                        cid = catalog.add_content(conn, digest, rec["size"], info, now)
                        contents[digest] = (cid, info["state"], info.get("reason"))
                    else:
                        existing = catalog.content_by_hash(digest)
                        contents[digest] = (existing.id, existing.state, existing.reason)
                content_id, state, reason = contents[digest]
                moved_from = _moved_from(catalog, content_id) if rec["fresh_path"] and known_before else None
                if content_id == rec["old_content_id"]:
                    kind = "unchanged"  # only the mtime moved: same bytes as before
                elif moved_from is not None:
                    kind = "moved"
                elif known_before:
                    summary.same_bytes += 1
            if state == "unreadable":
                _count_unreadable(summary, reason)
            setattr(summary, kind, getattr(summary, kind) + 1)
            if kind == "moved":
                log.debug("moved: %s -> %s", moved_from["path"], rec["abspath"])
                catalog.move_file(conn, moved_from["id"], source_id, rec["relpath"], size=rec["size"],
                                  mtime_ns=rec["mtime_ns"], now=now)
                continue
            catalog.upsert_file(
                conn, source_id, rec["relpath"], size=rec["size"], mtime_ns=rec["mtime_ns"],
                content_id=content_id, state=state, reason=reason, now=now,
            )
        catalog.touch_files(conn, unchanged_ids, now)


def _moved_from(catalog, content_id: int) -> dict | None:
    """The present row with these bytes whose path is gone, if any (lowest id first).

    A row whose whole source folder is missing (an unmounted disk) is not a candidate:
    its files are absent, not moved."""
    for row in catalog.vanished_with_content(content_id):
        root = Path(row["root"])
        old = root / row["relpath"]
        try:
            os.lstat(old)
        except (FileNotFoundError, NotADirectoryError):
            if root.is_dir():
                return {"id": row["id"], "path": str(old)}
        except OSError:  # unreachable, not gone
            continue
    return None


ORIGIN_BATCH = 500  # contents whose facts are committed together
# Reasons (read_errors.py) that say the file could not be reached now, not that it is no image.
TRANSIENT_REASONS = frozenset({"missing", "permission", "io-error"})


def read_origins(store) -> int:
    """Read once the EXIF and ICC facts (images.ImageInfo: captured, camera, icc) of contents catalogued
    before the catalog kept them, from the header of one present file each (no decoding); the keeper rule
    then weighs every file alike. A file that cannot be read now is recorded as having none. Returns how
    many contents were read."""
    missing = store.catalog.contents_without_origin()
    if not missing:
        return 0
    log.info("reading the capture facts (EXIF, ICC profile) of %d images catalogued before this version", len(missing))
    found: dict = {}
    read = 0
    for row in missing:
        try:
            found[row["id"]] = images.origin(row["path"])
        except OSError as exc:  # cannot be opened now (permissions, a NAS away): tried again at the next run
            log.debug("no capture facts for %s yet: %s", row["path"], exc)
        except ImageReadError as exc:
            if exc.reason in TRANSIENT_REASONS:
                log.debug("no capture facts for %s yet: %s", row["path"], exc)
            else:  # not readable as an image: it has none, and asking again will not change that
                found[row["id"]] = (None, None, False)
        if len(found) >= ORIGIN_BATCH:
            store.catalog.set_origins(found)
            read += len(found)
            found = {}
    store.catalog.set_origins(found)
    return read + len(found)
