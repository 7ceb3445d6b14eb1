"""The generation being served, and the swap to a newly published one.

A `Snapshot` is one generation loaded whole: index, whitening, model, groups and
calibration are read once, so a request that took a snapshot answers from it to the
end even if the nightly job publishes (and prunes) generations meanwhile. Its groups
are shown as a person's verdicts leave them (indexer/building/verdict_groups.py), worked out
again only when a verdict was added since. A
`LiveGeneration` watches ``generations/CURRENT``; when it names another generation,
it loads that one beside the old and then replaces the reference in one assignment.
Requests take the reference once, at their start: in-flight requests finish on the
old snapshot, later ones get the new one, and none waits for the load.
"""

from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from nearsight.indexer.core.errors import NearsightError, NotFoundError, StoreError, UsageError
from nearsight.indexer.matching.generations import POINTER, Generation
from nearsight.indexer.matching.groups import TIERS as GROUP_TIERS
from nearsight.indexer.matching.groups import Group
from nearsight.indexer.matching.query import Searcher
from nearsight.indexer.calibration.review_queue import ReviewQueue, review_queue
from nearsight.indexer.core.settings import Settings
from nearsight.indexer.storage.store import Store
from nearsight.indexer.building.verdict_groups import judged_groups

log = logging.getLogger(__name__)

RETRY_FAILED_S = 10.0  # a generation that failed to load is tried again after this long


@dataclass(frozen=True)
class PinnedGeneration(Generation):
    """A generation whose calibration was read once, at load: answers stay the same even if
    its folder is pruned while requests still use it."""

    calibration: dict | None = None

    def load_calibration(self) -> dict | None:
        return self.calibration


class _NoSharedCatalog:
    """Stands in for the loading thread's catalog: SQLite connections belong to one thread, so a
    request must pass its own catalog to the Searcher; using this one is a programming error."""

    def __getattr__(self, name):
        raise RuntimeError("the served Searcher has no shared catalog: pass the request thread's catalog")


def _reader_store(root: Path, settings: Settings) -> Store:
    return Store(root, _NoSharedCatalog(), settings)


class GroupView:
    """The groups as one set of verdicts leaves them, with lookups by gid and by image id."""

    def __init__(self, generation: str, groups: list[Group]):
        self.generation = generation
        self.groups = groups
        self.by_gid = {g.gid: g for g in groups}
        self.gid_of = {m.id: g.gid for g in groups for m in g.members}

    def group(self, gid: str) -> Group:
        try:
            return self.by_gid[gid]
        except KeyError:
            raise NotFoundError(f"no group {gid!r} in generation {self.generation} (a verdict may have "
                                "split or joined it since: list the groups again)") from None

    def find(self, *, tier: str | None, min_size: int, max_size: int | None) -> list[Group]:
        if tier is not None and tier not in GROUP_TIERS:
            raise UsageError(f"tier must be one of {', '.join(GROUP_TIERS)}, not {tier!r}")
        return [g for g in self.groups
                if (tier is None or g.tier == tier) and g.size >= min_size
                and (max_size is None or g.size <= max_size)]


class Snapshot:
    """One generation, fully loaded: what a request answers from, start to finish."""

    def __init__(self, searcher: Searcher, generation: PinnedGeneration, groups: list[Group]):
        self.searcher = searcher
        self.generation = generation
        self.name = generation.name
        self.groups = groups  # as published
        self.loaded_at = time.time()
        self._view: tuple[int, GroupView] = (0, GroupView(self.name, groups))
        self._view_lock = threading.Lock()
        self._queue: tuple[int, ReviewQueue | None] = (0, None)
        self._queue_lock = threading.Lock()

    def groups_now(self, catalog) -> GroupView:
        """The groups with the latest verdicts applied (`catalog`: the request thread's connection)."""
        version = catalog.verdicts_version()
        with self._view_lock:
            seen, view = self._view
            if seen != version:
                thresholds = self.generation.meta["thresholds"]
                groups = judged_groups(catalog, self.groups, model=self.model, whitening=self.searcher.whitening,
                                       t_near=float(thresholds["near"]), t_similar=float(thresholds["similar"]))
                view = GroupView(self.name, groups)
                self._view = (version, view)
        return view

    def review_queue(self, catalog) -> ReviewQueue:
        """The pairs to judge first (indexer/calibration/review_queue.py), worked out again when a verdict was added."""
        version = catalog.verdicts_version()
        with self._queue_lock:
            seen, queue = self._queue
            if queue is None or seen != version:
                queue = review_queue(catalog, self.generation)
                self._queue = (version, queue)
        return queue

    @classmethod
    def load(cls, root: Path, settings: Settings) -> "Snapshot":
        searcher = Searcher(_reader_store(root, settings))
        gen = searcher.generation
        calibration = gen.load_calibration()
        groups = [Group.from_dict(g) for g in gen.load_groups()["groups"]]
        if not (gen.path / "meta.json").is_file():
            # Pruned while we read it: load_groups would have returned no groups rather than fail.
            raise StoreError(f"generation {gen.name} was removed while it was being loaded")
        pinned = PinnedGeneration(gen.name, gen.path, gen.meta, calibration)
        searcher.generation = pinned
        return cls(searcher, pinned, groups)

    # -- what requests ask of it --------------------------------------------------------
    @property
    def model(self) -> str:
        return self.generation.meta["model"]

    @property
    def size(self) -> int:
        return int(self.searcher.index.ntotal)

    def threshold(self, threshold: float | None, precision: float | None) -> tuple[float, str]:
        """The duplicate threshold for one request and where it came from."""
        asked = self.generation.asked_threshold(threshold, precision)
        if asked is None:
            return self.searcher.verdict_threshold, "generation"
        return asked, "request" if threshold is not None else "precision"

    def thresholds(self) -> dict:
        calibration = self.generation.calibration if isinstance(self.generation.calibration, dict) else {}
        query = calibration.get("query")
        return {"near": self.searcher.threshold, "similar": self.generation.threshold("similar"),
                "query": None if query is None else query["threshold"],
                "source": self.generation.meta.get("thresholds", {}).get("source")}

    def calibration_summary(self):
        calibration = self.generation.calibration
        return calibration.get("summary") if isinstance(calibration, dict) else None


class LiveGeneration:
    """Holds the snapshot being served and swaps in a newly published generation."""

    def __init__(self, root: Path, settings: Settings, *, reload_s: float,
                 on_swap: Callable[[Snapshot], None] | None = None,
                 on_failure: Callable[[], None] | None = None):
        self.root = Path(root)
        self.settings = settings
        self.reload_s = reload_s
        self._on_swap = on_swap or (lambda snapshot: None)
        self._on_failure = on_failure or (lambda: None)
        self._snapshot: Snapshot | None = None
        self._load_lock = threading.Lock()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._failed: tuple[str, float] | None = None  # (generation, when) of the last failed load
        self.swaps = 0
        self.load_failures = 0
        self.last_error: str | None = None

    def current(self) -> Snapshot | None:
        """The snapshot to answer from (one reference read: a swap never shows half-done)."""
        return self._snapshot

    def published(self) -> str | None:
        """The generation the store's pointer names now (may be ahead of the one served)."""
        return _reader_store(self.root, self.settings).read_pointer(POINTER)

    def refresh(self) -> bool:
        """Load the published generation if it is not the one served; True when it swapped."""
        with self._load_lock:
            name = self.published()
            current = self._snapshot
            if name is None or (current is not None and current.name == name):
                return False
            if self._failed and self._failed[0] == name and time.monotonic() - self._failed[1] < RETRY_FAILED_S:
                return False
            started = time.monotonic()
            try:
                snapshot = Snapshot.load(self.root, self.settings)
            except (NearsightError, OSError, RuntimeError, ValueError, KeyError) as exc:
                self._failed = (name, time.monotonic())
                self.load_failures += 1
                self.last_error = f"{name}: {exc}"
                self._on_failure()
                log.warning("cannot load generation %s (still serving %s): %s", name,
                            current.name if current else "nothing", exc)
                return False
            self._snapshot = snapshot
            self._failed = None
            if current is not None:
                self.swaps += 1
            self._on_swap(snapshot)
            log.info("serving generation %s (%d images; loaded in %.1f s)%s", snapshot.name, snapshot.size,
                     time.monotonic() - started, f", replacing {current.name}" if current else "")
            return True

    def start(self) -> None:
        """Watch the pointer every `reload_s` seconds in a daemon thread."""
        if self._thread is not None:
            return
        self._thread = threading.Thread(target=self._watch, name="nearsight-reload", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5)
            self._thread = None

    def _watch(self) -> None:
        while not self._stop.wait(self.reload_s):
            try:
                self.refresh()
            except Exception:  # the watcher must outlive any one failure
                log.exception("checking for a new generation failed")
