"""Index generations: each build is published whole, then a pointer is switched.

A generation is a directory ``generations/<name>/`` holding ``index.faiss``,
``meta.json`` (model version, counts, index spec, search parameters, time) and
``groups.json``. It is written under a temporary name, fsynced, renamed into
place, and only then does ``generations/CURRENT`` (written atomically) name it.
A reader therefore sees the previous generation or the new one, never a
half-written index; a run killed at any moment leaves at most a ``.tmp-*``
directory that the next publish removes (or a complete directory no pointer
names yet, which pruning removes in turn).

Two more files let the next run update a generation instead of rebuilding it
(`refresh.py`): ``items.npz`` (the file ids indexed and the content id of each)
and ``pairs.npz`` (every pair at or above the similar threshold). ``regions.faiss``
holds the region descriptors (indexer/regions.py) when the store makes them. Files are
never changed once published, so a generation that changes nothing may share
them with its predecessor through hard links.
"""

from __future__ import annotations

import io
import json
import logging
import os
import shutil
import time
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .errors import NotReadyError, StoreError, UsageError
from .fsutil import atomic_write_bytes, atomic_write_text, fsync_dir
from .pause import pause_at
from .store import Store

if TYPE_CHECKING:
    import faiss

log = logging.getLogger(__name__)

POINTER = "generations/CURRENT"
INDEX_FILE = "index.faiss"
META_FILE = "meta.json"
GROUPS_FILE = "groups.json"
WHITENING_FILE = "whitening.npz"
CALIBRATION_FILE = "calibration.json"
CALIBRATION_EXTRAS = ("calibration.png", "calibration.txt")
ITEMS_FILE = "items.npz"
PAIRS_FILE = "pairs.npz"
REGIONS_FILE = "regions.faiss"  # the region descriptors' index (indexer/regions.py), when the store makes them
# Every other file's BLAKE2b-256 and size as published, so that `nearsight verify` can tell a damaged file.
CHECKSUMS_FILE = "checksums.json"
TIERS = ("near", "similar")


@dataclass(frozen=True)
class Generation:
    name: str
    path: Path
    meta: dict

    def load_index(self, *, mmap: bool = False) -> faiss.Index:
        from . import index as faiss_index  # FAISS only where an index is read: listing commands start fast

        return faiss_index.load_index(self.path / INDEX_FILE, mmap=mmap, params=self.meta.get("search_params"))

    def load_regions(self, *, mmap: bool = False):
        """The region descriptors' index and its grid, or (None, 0) when this generation has none."""
        grid = int((self.meta.get("regions") or {}).get("grid", 0))
        if not grid or not (self.path / REGIONS_FILE).is_file():
            return None, 0
        from . import index as faiss_index

        return faiss_index.load_index(self.path / REGIONS_FILE, mmap=mmap), grid

    def load_whitening(self):
        from .whiten import Whitening

        return Whitening.load(self.path / WHITENING_FILE)

    def load_calibration(self) -> dict | None:
        """The calibration stored with this generation (see calibrate.py), or None."""
        path = self.path / CALIBRATION_FILE
        if not path.is_file():
            return None
        return json.loads(path.read_text(encoding="utf-8"))

    def asked_threshold(self, threshold: float | None, precision: float | None) -> float | None:
        """The near-duplicate threshold a question asks for: `threshold` as given, or the calibrated one for
        `precision`; None when it gives neither (the generation's own verdict). Both: UsageError. The one
        rule of the commands, the service, grouping and the Python API."""
        if threshold is not None and precision is not None:
            raise UsageError("give a threshold or a precision, not both")
        return self.threshold("near", precision) if precision is not None else threshold

    def threshold(self, tier: str = "near", precision: float | None = None) -> float:
        """The cosine threshold for a tier: the calibrated one, else the build's default; with
        `precision`, the lowest calibrated threshold whose estimated precision reaches it."""
        if tier not in TIERS:
            raise UsageError(f"tier must be one of {', '.join(TIERS)}, not {tier!r}")
        calibration = self.load_calibration()
        if precision is None:
            if calibration and tier in calibration.get("tiers", {}):
                return float(calibration["tiers"][tier]["threshold"])
            return float(self.meta["thresholds"][tier])
        from .limits import PRECISION

        PRECISION.check(precision)
        if not calibration or tier not in calibration.get("tiers", {}):
            raise NotReadyError(f"generation {self.name} has no calibration: run `nearsight calibrate` "
                                "or give a threshold instead of a precision")
        curve = calibration["tiers"][tier]["curve"]
        return threshold_for_precision(curve["threshold"], curve["precision"], precision)

    def load_items(self) -> tuple[np.ndarray, np.ndarray] | None:
        """(file ids, content ids) this generation indexed, or None for a generation built before
        they were stored."""
        path = self.path / ITEMS_FILE
        if not path.is_file():
            return None
        with np.load(path, allow_pickle=False) as data:
            return data["ids"].astype(np.int64), data["contents"].astype(np.int64)

    def load_pairs(self) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
        """(a, b, sims): the pairs its groups were built from, or None (see load_items)."""
        path = self.path / PAIRS_FILE
        if not path.is_file():
            return None
        with np.load(path, allow_pickle=False) as data:
            return data["a"].astype(np.int64), data["b"].astype(np.int64), data["sims"].astype(np.float32)

    def load_groups(self) -> dict:
        path = self.path / GROUPS_FILE
        if not path.is_file():
            return {"groups": []}
        return json.loads(path.read_text(encoding="utf-8"))


def threshold_for_precision(thresholds, precisions, target: float) -> float:
    """The lowest threshold from which every higher one has estimated precision >= target.

    `thresholds` ascend; `precisions` are the estimates at each. Scanning from the top keeps
    the answer on the safe side of any dip in a noisy curve. Undefined points (None) are skipped."""
    chosen = None
    for t, p in zip(reversed(thresholds), reversed(precisions)):
        if p is None:  # above every measured positive: nothing to judge by
            continue
        if p < target:
            break
        chosen = t
    if chosen is None:
        best = max((p for p in precisions if p is not None), default=0.0)
        raise UsageError(f"no threshold reaches precision {target}; the highest estimated is {best:.4f}")
    return float(chosen)


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
    from .fsutil import hash_file

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
        from . import index as faiss_index

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
