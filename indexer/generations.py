"""Index generations: each build is published whole, then a pointer is switched.

A generation is a directory ``generations/<name>/`` holding ``index.faiss``,
``meta.json`` (model version, counts, index spec, search parameters, time) and
``groups.json``. It is written under a temporary name, fsynced, renamed into
place, and only then does ``generations/CURRENT`` (written atomically) name it.
A reader therefore sees the previous generation or the new one, never a
half-written index; a run killed at any moment leaves at most a ``.tmp-*``
directory that the next publish removes.
"""

from __future__ import annotations

import json
import logging
import os
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

import faiss

from . import index as faiss_index
from .errors import NotReadyError, StoreError
from .fsutil import atomic_write_bytes, atomic_write_text, fsync_dir
from .store import Store

log = logging.getLogger(__name__)

POINTER = "generations/CURRENT"
INDEX_FILE = "index.faiss"
META_FILE = "meta.json"
GROUPS_FILE = "groups.json"
WHITENING_FILE = "whitening.npz"


@dataclass(frozen=True)
class Generation:
    name: str
    path: Path
    meta: dict

    def load_index(self, *, mmap: bool = False) -> faiss.Index:
        return faiss_index.load_index(self.path / INDEX_FILE, mmap=mmap, params=self.meta.get("search_params"))

    def load_whitening(self):
        from .whiten import Whitening

        return Whitening.load(self.path / WHITENING_FILE)

    def load_groups(self) -> dict:
        path = self.path / GROUPS_FILE
        if not path.is_file():
            return {"groups": []}
        return json.loads(path.read_text(encoding="utf-8"))


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


def publish(store: Store, index: faiss.Index, meta: dict, groups: dict, *, keep: int,
            extra: dict[str, bytes] | None = None) -> Generation:
    """Write a complete generation directory (plus `extra` files), then switch the pointer to it."""
    root = store.generations_dir
    root.mkdir(parents=True, exist_ok=True)
    remove_incomplete(store)
    name = _new_name(store)
    tmp = root / f".tmp-{name}"
    tmp.mkdir()
    meta = {**meta, "generation": name, "published_at": time.time()}
    faiss_index.save_index(index, tmp / INDEX_FILE)
    atomic_write_text(tmp / GROUPS_FILE, json.dumps(groups, sort_keys=True))
    for filename, data in (extra or {}).items():
        atomic_write_bytes(tmp / filename, data)
    atomic_write_text(tmp / META_FILE, json.dumps(meta, sort_keys=True, indent=2))
    os.rename(tmp, root / name)
    fsync_dir(root)
    store.write_pointer(POINTER, name)
    log.info("published generation %s (%d vectors)", name, index.ntotal)
    prune(store, keep)
    return Generation(name, root / name, meta)


def current(store: Store) -> Generation | None:
    """The generation the pointer names, or None before the first publish."""
    name = store.read_pointer(POINTER)
    if not name:
        return None
    path = store.generations_dir / name
    try:
        meta = json.loads((path / META_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise StoreError(f"generation {name} named by {POINTER} cannot be read: {exc}") from None
    return Generation(name, path, meta)


def require_current(store: Store) -> Generation:
    gen = current(store)
    if gen is None:
        raise NotReadyError(f"store {store.root} has no index yet: run `nearsight index FOLDER --store {store.root}`")
    return gen


def remove_incomplete(store: Store) -> int:
    """Delete ``.tmp-*`` generation directories left by a killed publish."""
    removed = 0
    for path in store.generations_dir.glob(".tmp-*"):
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
