"""nearsight from Python: the commands' work as calls that return plain dataclasses.

    import nearsight

    with nearsight.open_store("archive-store", create=True) as store:
        run = store.index(["photos/"])
        for answer in store.similar(["new/holiday.jpg"], k=5):
            print(answer.query, [(m.path, m.similarity, m.duplicate) for m in answer.matches])
        plan = store.plan_quarantine("quarantine/")   # a dry run: nothing moves

A thin layer like the CLI (indexer/commands.py): every call goes to the same functions of
`nearsight.indexer`, under the same rules (limits.py for thresholds, precisions and k; the store's write
lock for `index`). Results are dataclasses with `to_dict()`, the dictionaries the CLI prints with `--json`
(a plan's without the CLI's `"applied": false`). An Archive holds one SQLite connection: use it from the
thread that opened it (open one per thread). Nothing here moves a file: applying a plan stays with `nearsight quarantine --apply`, where it
is journalled and verified by content hash.
"""

from __future__ import annotations

import os
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

from nearsight.indexer.core import limits
from nearsight.indexer.core.errors import ImageReadError, NearsightError, NotFoundError, UsageError
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store, resolve_store_path


@dataclass(frozen=True)
class Match:
    """One catalogued image found for a query."""

    id: int
    path: str | None
    similarity: float  # the score the answer is ranked by (normalised per query, raised when verified)
    descriptor_similarity: float  # the cosine of the two descriptors before that
    duplicate: bool  # the store's verdict: a copy of the query
    probability: float | None  # calibrated chance that it is a copy (None without a calibration)
    evidence: dict | None = None  # geometric verification: verified, inliers, matched box, ...

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class Answer:
    """A query's matches, best first; or, for an input that is not a readable image, its error."""

    query: str
    matches: tuple[Match, ...] = ()
    error: dict | None = None

    @property
    def ok(self) -> bool:
        return self.error is None

    def to_dict(self) -> dict:
        out: dict[str, Any] = {"query": self.query}
        if self.error is not None:
            out["error"] = self.error
        else:
            out["results"] = [m.to_dict() for m in self.matches]
        return out


@dataclass(frozen=True)
class IndexRun:
    """What one `index` did: counts of the scan, and the generation published (None with a scan only)."""

    new: int
    changed: int
    moved: int
    unchanged: int
    unreadable: int
    removed: int
    generation: str | None
    indexed: int | None
    summary: dict = field(repr=False)  # everything the CLI's `index --json` prints

    def to_dict(self) -> dict:
        return dict(self.summary)


@dataclass(frozen=True)
class Status:
    """The store at a glance."""

    files: int
    readable: int
    unreadable: int
    model: str | None
    generation: str | None
    details: dict = field(repr=False)  # everything the CLI's `status --json` prints

    def to_dict(self) -> dict:
        return dict(self.details)


def _label(item) -> str:
    if isinstance(item, (str, os.PathLike)):
        return str(item)
    if isinstance(item, (bytes, bytearray)):
        return f"<{len(item)} bytes>"
    return f"<{type(item).__name__}>"


class Archive:
    """An open store. Use it as a context manager, or call `close()`."""

    def __init__(self, store: Store):
        self._store = store
        self._searcher = None

    # -- life ---------------------------------------------------------------------------
    @property
    def path(self) -> Path:
        return self._store.root

    def close(self) -> None:
        self._store.close()

    def __enter__(self) -> "Archive":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"<nearsight store {self._store.root}>"

    # -- building ---------------------------------------------------------------------------
    def index(self, folders: Sequence[str | os.PathLike], *, train_minutes: float | None = None,
              epochs: int | None = None, retrain: str = "auto", calibrate: bool = True,
              scan_only: bool = False, progress: bool = False, train=None) -> IndexRun:
        """`nearsight index`: scan the folders, train the encoder when needed, embed, index, group,
        calibrate and publish a generation. `epochs` alone replaces the time budget, as on the command line;
        `train`, an indexer.learning.train.TrainConfig, replaces every training option at once."""
        from nearsight.indexer.building.pipeline import run_index
        from nearsight.indexer.reading.scan import check_folders
        from nearsight.indexer.learning.train import TrainConfig

        if isinstance(folders, (str, os.PathLike)):
            raise UsageError("index takes a list of folders, e.g. index([\"photos/\"])")
        check_folders([str(f) for f in folders])
        settings = self._store.settings
        minutes = train_minutes if train_minutes is not None else (None if epochs is not None else settings.train_minutes)
        config = train or TrainConfig.from_options(minutes=minutes, epochs=epochs, max_images=settings.train_sample)
        summary = run_index(self._store, [str(f) for f in folders], progress=progress, train_config=config,
                            build=not scan_only, calibrate=calibrate, retrain=retrain)
        self._searcher = None  # a new generation: the next query loads it
        return IndexRun(new=summary["new"], changed=summary["changed"], moved=summary["moved"],
                        unchanged=summary["unchanged"], unreadable=summary["unreadable"], removed=summary["removed"],
                        generation=summary.get("generation"), indexed=summary.get("indexed"), summary=summary)

    # -- asking ---------------------------------------------------------------------------
    def status(self) -> Status:
        """`nearsight status`: files, model, generation and what the calibration says."""
        from nearsight.indexer.building.pipeline import store_status

        st = store_status(self._store)
        gen = st.get("generation") or {}
        return Status(files=st["files"], readable=st["ok"], unreadable=st["unreadable"], model=st.get("model"),
                      generation=gen.get("name"), details=st)

    def similar(self, images: Iterable, *, k: int = 10, threshold: float | None = None,
                precision: float | None = None) -> list[Answer]:
        """`nearsight similar`: for each image (a path, a folder of them, the bytes of a file, or a PIL image;
        one alone or a list) its `k` nearest
        catalogued images, best first, each with the store's copy verdict. `threshold` (a cosine in (0, 1]) or
        `precision` (read off the calibration) replaces the calibrated verdict, as on the command line. An
        input that is not a readable image gets an Answer with its error; nothing is raised for it."""
        from nearsight.indexer.matching.query import QUERY_BATCH

        k = limits.K.check(k)
        searcher = self._current_searcher()
        cut = self._threshold(searcher, threshold, precision)
        items = self._queries(images)
        out = []
        for start in range(0, len(items), QUERY_BATCH):  # decoded a batch at a time, as `similar` does
            block = items[start:start + QUERY_BATCH]
            read = self._read(searcher, block)
            good = [i for i, r in enumerate(read) if not isinstance(r, NearsightError)]
            pixels = [read[i] for i in good]
            found = dict(zip(good, searcher.neighbours(searcher.vectors_for_images(pixels), k, cut, images=pixels)
                             if pixels else []))
            for i, item in enumerate(block):
                if i in found:
                    out.append(Answer(_label(item), tuple(Match(**{f: r.get(f) for f in Match.__dataclass_fields__})
                                                          for r in found[i])))
                else:
                    out.append(Answer(_label(item), error=read[i].to_dict()))
        return out

    def check(self, paths, *, threshold: float | None = None, precision: float | None = None):
        """`nearsight check`: each file of new material (a path or a list of them; folders are expanded) as
        `copy`, `similar`, `new` or `unreadable` against the archive (indexer/check.py's CheckAnswer), the
        store untouched. `threshold` or `precision` as in `similar`."""
        from nearsight.indexer.check import check_files
        from nearsight.indexer.matching.query import expand_queries

        searcher = self._current_searcher()
        cut = self._threshold(searcher, threshold, precision)
        if isinstance(paths, (str, os.PathLike)):
            paths = [paths]
        given = expand_queries([str(p) for p in paths], self._store.settings.extensions)
        return list(check_files(searcher, given, threshold=cut))

    def groups(self, *, tier: str | None = None, threshold: float | None = None, precision: float | None = None):
        """`nearsight groups`: the current groups (indexer/matching/groups.py's Group: keeper first, each member's tier
        and similarity), a person's verdicts applied; optionally regrouped at a threshold or precision, and
        only those of one `tier` ("exact", "near-duplicate" or "similar")."""
        from nearsight.indexer.matching.groups import TIERS
        from nearsight.indexer.building.verdict_groups import current_groups

        threshold, precision = limits.THRESHOLD.check(threshold), limits.PRECISION.check(precision)
        if tier is not None and tier not in TIERS:
            raise UsageError(f"tier must be one of {', '.join(TIERS)}, not {tier!r}")
        groups = current_groups(self._store, threshold=threshold, precision=precision).groups
        return [g for g in groups if g.tier == tier] if tier else list(groups)

    def plan_quarantine(self, to: str | os.PathLike | None = None, *, tier: str | None = None,
                        threshold: float | None = None, precision: float | None = None,
                        include_unverified: bool = False):
        """`nearsight quarantine` as a dry run: per group the keeper (the store's keeper rules), the files
        that would move into `to` and why, and those left alone (indexer/acting/plan.py's Plan; `to_dict()` is the
        CLI's `--json`). Nothing moves; apply a plan with `nearsight quarantine --apply`."""
        from nearsight.indexer.acting.keepers import KeeperRules
        from nearsight.indexer.acting.plan import plan_quarantine

        threshold, precision = limits.THRESHOLD.check(threshold), limits.PRECISION.check(precision)
        return plan_quarantine(self._store, to=to, tier=tier, threshold=threshold, precision=precision,
                               rules=KeeperRules.from_settings(self._store.settings),
                               include_unverified=include_unverified)

    # -- inside ---------------------------------------------------------------------------
    def _current_searcher(self):
        """The current generation's Searcher, loaded again when a newer generation has been published."""
        from nearsight.indexer.matching.query import Searcher

        current = self._store.read_pointer("generations/CURRENT")
        if self._searcher is None or self._searcher.generation.name != current:
            self._searcher = Searcher(self._store)
        return self._searcher

    @staticmethod
    def _threshold(searcher, threshold, precision) -> float | None:
        return searcher.generation.asked_threshold(limits.THRESHOLD.check(threshold), limits.PRECISION.check(precision))

    def _queries(self, images) -> list:
        """The inputs as a list: one path, bytes or image alone is one query; folders are expanded to their
        image files, as `nearsight similar` does."""
        from nearsight.indexer.matching.query import expand_queries

        if isinstance(images, (str, os.PathLike, bytes, bytearray)) or hasattr(images, "getpixel"):
            images = [images]
        out: list = []
        for item in images:
            if isinstance(item, (str, os.PathLike)) and Path(item).is_dir():
                out.extend(expand_queries([str(item)], self._store.settings.extensions))
            else:
                out.append(item)
        return out

    @staticmethod
    def _read(searcher, items: list) -> list:
        """Each input's pixels as the query path reads a file, or the NearsightError saying why not."""
        from PIL import Image

        from nearsight.indexer.reading.images import from_pil, read_image
        from nearsight.indexer.matching.query import read_queries

        max_side = 2 * searcher.size
        out: list = [None] * len(items)
        paths = [i for i, item in enumerate(items) if isinstance(item, (str, os.PathLike))]
        for i, got in zip(paths, read_queries([str(items[i]) for i in paths], max_side)):
            out[i] = got
        for i in sorted(set(range(len(items))) - set(paths)):
            item = items[i]
            try:
                if isinstance(item, Image.Image):
                    out[i] = from_pil(item, max_side)
                    continue
                if not isinstance(item, (bytes, bytearray)):
                    raise UsageError(f"a query is a path, the bytes of an image file or a PIL image, "
                                     f"not {type(item).__name__}")
                out[i] = read_image(bytes(item), max_side=max_side)[0]
            except (ImageReadError, UsageError, NotFoundError) as exc:
                out[i] = exc
        return out


def open_store(path: str | os.PathLike | None = None, *, create: bool = False,
               settings: Mapping[str, Any] | None = None) -> Archive:
    """Open the store at `path` (default: `NEARSIGHT_STORE`, else ./nearsight-store), with its settings
    (defaults < STORE/settings.toml < NEARSIGHT_* environment < `settings`). `create=True` makes a new store
    when there is none, as `nearsight index` does; otherwise a missing store raises NotFoundError."""
    root = resolve_store_path(None if path is None else str(path))
    loaded = load_settings(store_dir=root, overrides=dict(settings or {}))
    return Archive(Store.open(root, create=create, settings=loaded))
