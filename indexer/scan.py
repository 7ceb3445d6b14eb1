"""Scanning: find every image file under a source folder and record it in the catalog.

A file whose size and mtime match the catalog is unchanged and is not read
again. Any other file is hashed; content the catalog has never seen is decoded
once (at reduced scale) to check that it is a readable image and to cache a
small copy for later stages. Byte-identical files share one content row. Work
is committed in chunks, so a run killed mid-way keeps what it finished and the
next run resumes where it stopped.
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

from . import images
from .errors import ImageReadError, NotFoundError, UsageError
from .fsutil import hash_file
from .read_errors import os_error_reason
from .progress import Progress
from .store import Store

log = logging.getLogger(__name__)

CHUNK_FILES = 256  # files per catalog transaction


@dataclass
class ScanSummary:
    """Counts for one scan. new/changed/unchanged partition the image files seen;
    unreadable counts those among them that cannot be decoded."""

    source: str = ""
    seen: int = 0
    new: int = 0
    changed: int = 0
    unchanged: int = 0
    unreadable: int = 0
    removed: int = 0
    ignored: int = 0
    same_bytes: int = 0
    decoded: int = 0
    folders_unreadable: int = 0
    seconds: float = 0.0
    reasons: Counter = field(default_factory=Counter)

    def to_dict(self) -> dict:
        out = {k: v for k, v in self.__dict__.items() if k != "reasons"}
        out["unreadable_reasons"] = dict(self.reasons.most_common())
        out["seconds"] = round(self.seconds, 3)
        return out


def _walk(root: Path, extensions: tuple[str, ...], skip_hidden: bool, exclude: Path) -> tuple[list[tuple[str, str]], int, int]:
    """List (relpath, abspath) of image-named files; count ignored files and unlistable folders."""
    found: list[tuple[str, str]] = []
    ignored = 0
    folder_errors: list[OSError] = []
    for dirpath, dirnames, filenames in os.walk(root, onerror=folder_errors.append, followlinks=False):
        here = Path(dirpath)
        # Never descend into the store itself, nor into hidden folders when asked.
        dirnames[:] = sorted(
            d for d in dirnames
            if not (skip_hidden and d.startswith(".")) and (here / d).absolute() != exclude
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
    }


class _InProcess(Executor):
    """Runs jobs in this process: small scans are not worth starting workers for."""

    def map(self, fn, *iterables, timeout=None, chunksize=1) -> Iterator:
        return map(fn, *iterables)


def _executor(workers: int, n_files: int) -> Executor:
    workers = workers or os.cpu_count() or 1
    if workers <= 1 or n_files < 2 * CHUNK_FILES // 4:
        return _InProcess()
    # spawn, not fork: the parent may hold SQLite handles and threads.
    return ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"))


def scan_source(store: Store, folder: str | os.PathLike, *, progress: bool | None = None) -> ScanSummary:
    """Scan one folder recursively into the store's catalog and return the counts."""
    root = Path(folder)
    if not root.exists():
        raise NotFoundError(f"folder not found: {folder}")
    if not root.is_dir():
        raise UsageError(f"not a folder: {folder}")
    root = root.resolve()
    settings = store.settings
    catalog = store.catalog
    started = time.time()
    summary = ScanSummary(source=str(root))

    source_id = catalog.add_source(root)
    known = catalog.files_of_source(source_id)
    candidates, summary.ignored, summary.folders_unreadable = _walk(
        root, settings.extensions, settings.skip_hidden, store.root.resolve()
    )
    log.info("scanning %s: %d image files, %d other files ignored", root, len(candidates), summary.ignored)

    with _executor(settings.workers, len(candidates)) as pool, Progress(len(candidates), "scan", enabled=progress) as bar:
        for start in range(0, len(candidates), CHUNK_FILES):
            chunk = candidates[start : start + CHUNK_FILES]
            _scan_chunk(store, source_id, known, chunk, pool, summary)
            bar.update(len(chunk))

    summary.removed = catalog.mark_missing_removed(source_id, started)
    catalog.mark_source_scanned(source_id, started)
    summary.seconds = time.time() - started
    log.info(
        "scanned %s: %d new, %d changed, %d unchanged, %d unreadable, %d removed in %.1fs",
        root, summary.new, summary.changed, summary.unchanged, summary.unreadable, summary.removed, summary.seconds,
    )
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
        kind = "new" if row is None or row.state == "removed" else "changed"
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
                        "mtime_ns": mtime_ns, "reason": problem,
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
                if content_id == rec["old_content_id"]:
                    kind = "unchanged"  # only the mtime moved: same bytes as before
                elif known_before:
                    summary.same_bytes += 1
            if state == "unreadable":
                _count_unreadable(summary, reason)
            setattr(summary, kind, getattr(summary, kind) + 1)
            catalog.upsert_file(
                conn, source_id, rec["relpath"], size=rec["size"], mtime_ns=rec["mtime_ns"],
                content_id=content_id, state=state, reason=reason, now=now,
            )
        catalog.touch_files(conn, unchanged_ids, now)
