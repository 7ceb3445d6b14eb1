"""Index generations: each build is published whole, then a pointer is switched.

A generation is a directory ``generations/<name>/`` holding ``index.faiss``,
``meta.json`` (model version, counts, index spec, search parameters, time) and
``groups.json``. It is written under a temporary name, fsynced, renamed into
place, and only then does ``generations/CURRENT`` (written atomically) name it.
A reader therefore sees the previous generation or the new one, never a
half-written index; a run killed at any moment leaves at most a ``.tmp-*``
directory that the next publish removes (or a complete directory no pointer
names yet, which pruning removes in turn).

This module reads generations: their file names, `Generation` with its loaders, and which one is
current. Writing one is the building stage's (indexer/building/publish.py).

Two more files let the next run update a generation instead of rebuilding it
(`refresh.py`): ``items.npz`` (the file ids indexed and the content id of each)
and ``pairs.npz`` (every pair at or above the similar threshold). ``regions.faiss``
holds the region descriptors (indexer/matching/regions.py) when the store makes them. Files are
never changed once published, so a generation that changes nothing may share
them with its predecessor through hard links.
"""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from ..core.errors import NotReadyError, StoreError, UsageError
from ..storage.store import Store

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
REGIONS_FILE = "regions.faiss"  # the region descriptors' index (indexer/matching/regions.py), when the store makes them
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
        from ..core.limits import PRECISION

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
