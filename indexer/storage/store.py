"""The store: one directory holding the catalog and every artifact nearsight builds.

Layout (later stages add their folders here and nowhere else)::

    STORE/
      catalog.sqlite      SQLite catalog (WAL mode)
      settings.toml       optional settings file (see settings.py)
      lock                held (flock) by the one run allowed to write
      thumbs/ab/<hash>.jpg small cached copy of every readable content
      thumbs/ab/<hash>.kp  its ORB keypoints, found at index time (indexer/matching/keypoints.py)
      thumbs/ab/<hash>.af  its band image for the same-frame check, made then too (indexer/matching/aligned.py)
      models/             trained encoders
      generations/        published index generations
      reports/            HTML reports, plots
"""

from __future__ import annotations

import fcntl
import os
import socket
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from ..core.errors import NotFoundError, StoreLockedError, UsageError
from ..core.fsutil import atomic_write_text
from ..core.settings import Settings, load_settings
from .catalog import Catalog

ENV_STORE = "NEARSIGHT_STORE"
DEFAULT_STORE = "nearsight-store"
CATALOG_FILE = "catalog.sqlite"
LOCK_FILE = "lock"


def resolve_store_path(given: str | os.PathLike | None) -> Path:
    """--store, else $NEARSIGHT_STORE, else ./nearsight-store."""
    if given:
        return Path(given)
    return Path(os.environ.get(ENV_STORE) or DEFAULT_STORE)


class Store:
    """A store directory: its catalog, its settings and the paths of its artifacts."""

    def __init__(self, root: Path, catalog: Catalog, settings: Settings):
        self.root = root
        self.catalog = catalog
        self.settings = settings

    @classmethod
    def open(
        cls,
        root: str | os.PathLike,
        *,
        create: bool = False,
        settings: Settings | None = None,
    ) -> "Store":
        root = Path(root).absolute()
        catalog_path = root / CATALOG_FILE
        if not catalog_path.exists():
            if root.exists() and not root.is_dir():
                raise UsageError(f"the store path {root} is a file; a store is a folder (give another --store)")
            if not create:
                raise NotFoundError(
                    f"no nearsight store at {root} (run `nearsight index FOLDER --store {root}` first)"
                )
            root.mkdir(parents=True, exist_ok=True)
        settings = settings or load_settings(store_dir=root)
        return cls(root, Catalog(catalog_path, create=create), settings)

    def close(self) -> None:
        self.catalog.close()

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # -- artifact paths ---------------------------------------------------------
    @property
    def thumbs_dir(self) -> Path:
        return self.root / "thumbs"

    def thumb_path(self, digest: str) -> Path:
        return self.thumbs_dir / digest[:2] / f"{digest}.jpg"

    def here(self, path: str | Path) -> Path:
        """`path` as this store sees it: a small copy recorded while the store lived elsewhere (a model card's
        held-out list, after the store was moved or restored from a backup) is found under this store's
        `thumbs/` by its content hash; any other path is returned unchanged."""
        path = Path(path)
        digest = path.stem
        if (path.suffix == ".jpg" and path.parent.name == digest[:2] and path.parent.parent.name == "thumbs"
                and len(digest) == 64 and all(c in "0123456789abcdef" for c in digest)):
            return self.thumb_path(digest)
        return path

    def pixels_path(self, row) -> Path:
        """Where to read a content's pixels: its cached small copy when there is one, else its file.

        `row` has the catalog's `hash`, `thumb`, `root` and `relpath` columns.
        """
        thumb = self.thumb_path(row["hash"])
        return thumb if row["thumb"] and thumb.is_file() else Path(row["root"]) / row["relpath"]

    @property
    def models_dir(self) -> Path:
        return self.root / "models"

    @property
    def generations_dir(self) -> Path:
        return self.root / "generations"

    @property
    def reports_dir(self) -> Path:
        return self.root / "reports"

    # -- pointers -----------------------------------------------------------------
    def read_pointer(self, name: str) -> str | None:
        """A pointer is a one-line file naming the current artifact (e.g. generations/CURRENT)."""
        path = self.root / name
        try:
            return path.read_text(encoding="utf-8").strip() or None
        except FileNotFoundError:
            return None

    def write_pointer(self, name: str, value: str) -> None:
        atomic_write_text(self.root / name, value + "\n")

    # -- the writer's lock --------------------------------------------------------
    @contextmanager
    def lock(self) -> Iterator[None]:
        """Hold the store's write lock for the duration of a run.

        flock is released by the kernel when the holder dies, so a lock left by a
        killed process is never stale: the next run simply takes it.
        """
        path = self.root / LOCK_FILE
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                holder = os.pread(fd, 200, 0).decode("utf-8", "replace").strip() or "another process"
                raise StoreLockedError(f"store {self.root} is busy: locked by {holder}") from None
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"pid {os.getpid()} on {socket.gethostname()}\n".encode(), 0)
            try:
                yield
            finally:
                os.ftruncate(fd, 0)
                fcntl.flock(fd, fcntl.LOCK_UN)
        finally:
            os.close(fd)
