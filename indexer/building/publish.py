"""Publishing a generation: written whole under a temporary name, then the pointer switched.

The order (indexer/matching/generations.py describes the files): every file is written and fsynced
in ``generations/.tmp-<name>/``, with checksums of each; the folder is renamed into place; only then
does ``generations/CURRENT`` (written atomically) name it. A reader sees the previous generation or
the new one, never a half-written index; a run killed at any moment leaves at most a ``.tmp-*``
folder or a complete folder no pointer names, which the next publish removes. Old generations beyond
the store's `keep_generations` are pruned after the switch.
"""

from __future__ import annotations

import io
import json
import logging
import os
import shutil
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ..core.errors import StoreError
from ..core.fsutil import atomic_write_bytes, atomic_write_text, fsync_dir
from ..core.pause import pause_at
from ..matching.generations import (
    CHECKSUMS_FILE,
    GROUPS_FILE,
    INDEX_FILE,
    ITEMS_FILE,
    META_FILE,
    PAIRS_FILE,
    POINTER,
    Generation,
)
from ..matching.groups import summarize
from ..storage.store import Store

if TYPE_CHECKING:
    import faiss

log = logging.getLogger(__name__)


def _new_name(store: Store) -> str:
    """A name that sorts by publication time (UTC, to the microsecond)."""
    existing = {p.name.removeprefix(".tmp-") for p in store.generations_dir.iterdir()}
    while True:
        now = time.time_ns()
        stamp = time.strftime("%Y%m%d-%H%M%S", time.gmtime(now // 1_000_000_000))
        name = f"g-{stamp}-{now // 1000 % 1_000_000:06d}"
        if name not in existing:
            return name
        time.sleep(1e-6)


def npz_bytes(**arrays) -> bytes:
    """Arrays as the bytes of an .npz file (for `publish`'s `extra`)."""
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


def _link_or_copy(src: Path, dest: Path) -> None:
    try:
        os.link(src, dest)
    except OSError:  # another file system, or links not allowed: a copy does the same
        shutil.copy2(src, dest)


def checksums(folder: Path, links: dict[str, Path] | None = None) -> dict[str, dict]:
    """{file name: {"blake2b": hex digest, "size": bytes}} of every file in `folder` but the checksums
    themselves. A file linked from an earlier generation (`links`) takes that generation's recorded sum
    when it has one (the same bytes: published files are never written again), so an unchanged night
    hashes only what it wrote."""
    from ..core.fsutil import hash_file

    earlier: dict[str, dict] = {}
    for filename, src in (links or {}).items():
        try:
            recorded = json.loads((src.parent / CHECKSUMS_FILE).read_text("utf-8")).get(src.name)
        except (OSError, ValueError):
            recorded = None
        if recorded and recorded.get("size") == (folder / filename).stat().st_size:
            earlier[filename] = recorded
    return {f.name: earlier.get(f.name) or {"blake2b": hash_file(f), "size": f.stat().st_size}
            for f in sorted(folder.iterdir()) if f.is_file() and f.name != CHECKSUMS_FILE}


def publish(store: Store, index: faiss.Index | None, meta: dict, groups: dict | None, *, keep: int,
            extra: dict[str, bytes] | None = None, links: dict[str, Path] | None = None) -> Generation:
    """Write a complete generation directory (plus `extra` files, and `links`: files of an earlier
    generation shared unchanged), then switch the pointer to it."""
    root = store.generations_dir
    root.mkdir(parents=True, exist_ok=True)
    remove_incomplete(store)
    name = _new_name(store)
    tmp = root / f".tmp-{name}"
    tmp.mkdir()
    meta = {**meta, "generation": name, "published_at": time.time()}
    for filename, src in (links or {}).items():
        _link_or_copy(src, tmp / filename)
    if index is not None:
        from ..matching import index as faiss_index

        faiss_index.save_index(index, tmp / INDEX_FILE)
    if groups is not None:
        atomic_write_text(tmp / GROUPS_FILE, json.dumps(groups, sort_keys=True))
    for filename, data in (extra or {}).items():
        atomic_write_bytes(tmp / filename, data)
    atomic_write_text(tmp / META_FILE, json.dumps(meta, sort_keys=True, indent=2))
    missing = [f for f in (INDEX_FILE, GROUPS_FILE) if not (tmp / f).is_file()]
    if missing:
        raise StoreError(f"generation {name} would lack {', '.join(missing)}")
    atomic_write_text(tmp / CHECKSUMS_FILE, json.dumps(checksums(tmp, links), sort_keys=True, indent=1))
    fsync_dir(tmp)
    pause_at("publish")
    os.rename(tmp, root / name)
    fsync_dir(root)
    pause_at("pointer")
    store.write_pointer(POINTER, name)
    log.info("published generation %s (%s vectors)", name, meta.get("indexed", "?"))
    prune(store, keep)
    return Generation(name, root / name, meta)


@dataclass
class Built:
    """A generation made and not yet published: what every kind of build returns (full, incremental,
    unchanged, recalibrated; indexer/building/refresh.py says which runs when), and `publish_built` the one
    place that writes it. `groups` None means nothing was regrouped: every file comes from `links` (the
    previous generation's, shared by hard links) and `meta` already holds the thresholds and groups summary."""

    kind: str
    meta: dict
    thresholds: dict
    index: Any = None                                  # a FAISS index, or None when `links` holds one
    groups: list | None = None                         # matching.groups.Group
    pairs: tuple | None = None                         # (a, b, sims) at or above the similar threshold
    items: tuple | None = None                         # (file ids, content ids) the index holds
    files: dict[str, bytes] = field(default_factory=dict)  # calibration, whitening, regions ...
    links: dict[str, Path] = field(default_factory=dict)   # file name -> an earlier generation's file
    stages: dict[str, float] = field(default_factory=dict)  # seconds per stage, for the run summary


def publish_built(store: Store, built: Built, *, keep: int) -> dict:
    """Publish `built` and return the run summary's part: the one way a generation reaches the store."""
    started = time.monotonic()
    meta, files, groups = dict(built.meta), dict(built.files), None
    meta["build"] = {**meta.get("build", {}), "kind": built.kind}
    if built.groups is not None:
        summary = summarize(built.groups)
        meta.update(thresholds=built.thresholds, groups=summary)
        groups = {"summary": summary, "groups": [g.to_dict() for g in built.groups]}
        files[ITEMS_FILE] = npz_bytes(ids=built.items[0], contents=built.items[1])
        files[PAIRS_FILE] = npz_bytes(a=built.pairs[0], b=built.pairs[1], sims=built.pairs[2])
    gen = publish(store, built.index, meta, groups, keep=keep, extra=files, links=built.links)
    stages = {**built.stages, "publish": round(time.monotonic() - started, 3)}
    return {"generation": gen.name, "indexed": int(meta["indexed"]), "groups": meta["groups"],
            "thresholds": meta["thresholds"], "calibration": meta.get("calibration"), "build": meta["build"],
            "stages": stages}


def remove_incomplete(store: Store) -> int:
    """Delete what a killed publish left (the caller holds the store's lock): ``.tmp-*``
    directories, and complete directories newer than the current generation, which a run
    killed between the rename and the pointer switch published to no one."""
    removed = 0
    for path in store.generations_dir.glob(".tmp-*"):
        shutil.rmtree(path, ignore_errors=True)
        removed += 1
    cur = store.read_pointer(POINTER)
    for path in store.generations_dir.glob("g-*"):
        if path.is_dir() and (cur is None or path.name > cur):
            log.info("removing generation %s: published by a run killed before the pointer named it", path.name)
            shutil.rmtree(path, ignore_errors=True)
            removed += 1
    return removed


def prune(store: Store, keep: int) -> list[str]:
    """Keep the newest `keep` generations (always including the current one)."""
    keep = max(1, keep)
    cur = store.read_pointer(POINTER)
    names = sorted(p.name for p in store.generations_dir.iterdir() if p.is_dir() and p.name.startswith("g-"))
    doomed = [n for n in names[:-keep] if n != cur]
    for name in doomed:
        shutil.rmtree(store.generations_dir / name, ignore_errors=True)
    if doomed:
        log.info("pruned %d old generation(s)", len(doomed))
    return doomed
