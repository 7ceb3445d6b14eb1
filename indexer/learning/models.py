"""The store's trained encoders: where they live, which one is current, training one in.

A model is trained under ``models/.training-<stamp>/`` (its checkpoints make
`--resume` possible), renamed to ``models/<version>/`` when finished, and only
then named by the pointer ``models/CURRENT``. Training reads the small copies
cached at scan time, so no original is decoded twice.
"""

from __future__ import annotations

import logging
import os
import sys
import time
from pathlib import Path

from ..core.errors import NotReadyError, UsageError
from ..core.fsutil import fsync_dir
from ..storage.store import Store

log = logging.getLogger(__name__)

POINTER = "models/CURRENT"


def current_model_dir(store: Store) -> Path | None:
    version = store.read_pointer(POINTER)
    return store.models_dir / version if version else None


def require_model_dir(store: Store) -> Path:
    path = current_model_dir(store)
    if path is None:
        raise NotReadyError(f"store {store.root} has no trained model yet: run `nearsight train --store {store.root}`")
    return path


def training_images(store: Store) -> list[Path]:
    """One image per readable content: its cached small copy when there is one, else the file."""
    return [store.pixels_path(row) for row in store.catalog.readable_contents()]


def _work_dir(store: Store) -> Path:
    stamp = time.strftime("%Y%m%d-%H%M%S", time.gmtime())
    return store.models_dir / f".training-{stamp}-{os.getpid()}"


def _make_current(store: Store, work: Path, version: str) -> Path:
    final = store.models_dir / version
    os.rename(work, final)
    fsync_dir(store.models_dir)
    store.write_pointer(POINTER, version)
    return final


def _resumable_dir(store: Store) -> Path | None:
    candidates = sorted(store.models_dir.glob(".training-*"))
    return candidates[-1] if candidates else None


def train_into_store(store: Store, config, *, resume: bool = False, progress: bool | None = None):
    """Train an encoder on the store's images and make it the current model; returns TrainResult."""
    from .train import train

    images = training_images(store)
    if not images:
        raise UsageError(f"store {store.root} has no readable images to train on: index a folder first")
    store.models_dir.mkdir(parents=True, exist_ok=True)
    work = _resumable_dir(store) if resume else None
    if resume and work is None:
        raise UsageError("nothing to resume: no interrupted training in this store")
    work = work or _work_dir(store)
    log.info("training on %d images into %s", len(images), work)
    result = train(images, work, config, resume=resume, progress=_show(progress))
    result.model_dir = _make_current(store, work, result.version)
    return result


def fine_tune_into_store(store: Store, pairs, config=None, *, progress: bool | None = None):
    """Fine-tune the current model on verdict pairs into a new model version, made current."""
    from .fine_tune import FineTuneConfig, fine_tune_from_pairs

    base = require_model_dir(store)
    work = _work_dir(store)
    result = fine_tune_from_pairs(base, pairs, out_dir=work, config=config or FineTuneConfig(), progress=_show(progress))
    result.model_dir = _make_current(store, work, result.version)
    return result


def _show(progress: bool | None) -> bool:
    return sys.stderr.isatty() if progress is None else progress
