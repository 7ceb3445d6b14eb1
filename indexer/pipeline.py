"""The main job as one call: scan -> train (first run) -> embed -> index and groups -> publish.

Each stage is its own module; this one only runs them in order under the
store's lock, times them and records the run in the catalog.
"""

from __future__ import annotations

import logging
import time
from pathlib import Path
from typing import Sequence

from . import generations
from .models import current_model_dir
from .scan import scan_source
from .store import Store

log = logging.getLogger(__name__)

# Keys of the run summary that add up over source folders.
COUNT_KEYS = ("seen", "new", "changed", "unchanged", "unreadable", "removed", "ignored", "same_bytes", "decoded")


def _scan_all(store: Store, folders, progress) -> dict:
    per_source = [scan_source(store, folder, progress=progress).to_dict() for folder in folders]
    summary = {key: sum(s[key] for s in per_source) for key in COUNT_KEYS}
    reasons: dict[str, int] = {}
    for s in per_source:
        for code, n in s["unreadable_reasons"].items():
            reasons[code] = reasons.get(code, 0) + n
    summary["unreadable_reasons"] = reasons
    summary["sources"] = per_source
    return summary


def _ensure_model(store: Store, train_config, progress) -> tuple[Path | None, dict | None]:
    """The current model, training one first when the store has none."""
    model_dir = current_model_dir(store)
    if model_dir is not None:
        return model_dir, None
    from .models import train_into_store
    from .train import MIN_TRAIN_IMAGES

    readable = len(store.catalog.readable_contents())
    if readable < MIN_TRAIN_IMAGES:
        log.warning("only %d readable images: too few to train an encoder (need %d); no index built",
                    readable, MIN_TRAIN_IMAGES)
        return None, None
    result = train_into_store(store, train_config, progress=progress)
    return result.model_dir, {"model": result.version, "steps": result.steps, "heldout": result.heldout,
                              "heldout_random_init": result.heldout_random_init}


def run_index(store: Store, folders: Sequence[str | Path], *, progress: bool | None = None,
              train_config=None, build: bool = True, index_spec: str | None = None) -> dict:
    """Scan every folder into the store, then (with `build`) train if needed, embed, index, group and publish."""
    with store.lock():
        run_id = store.catalog.start_run("index")
        stages: dict[str, float] = {}
        try:
            started = time.monotonic()
            summary = _scan_all(store, folders, progress)
            stages["scan"] = time.monotonic() - started
            summary.update(embedded=0, generation=None)
            if build:
                summary.update(_build(store, stages, progress, train_config, index_spec))
        except BaseException as exc:
            store.catalog.finish_run(run_id, "failed", {"error": str(exc)})
            raise
        summary["stages"] = {k: round(v, 3) for k, v in stages.items()}
        summary["run"] = run_id
        store.catalog.finish_run(run_id, "ok", summary)
    return summary


def _build(store: Store, stages: dict, progress, train_config, index_spec) -> dict:
    from .build import build_generation
    from .train import TrainConfig
    from .vectors import embed_missing

    settings = store.settings
    out: dict = {}
    started = time.monotonic()
    config = train_config or TrainConfig(minutes=settings.train_minutes)
    model_dir, trained = _ensure_model(store, config, progress)
    stages["train"] = time.monotonic() - started
    if trained:
        out["trained"] = trained
    if model_dir is None:
        return out
    started = time.monotonic()
    embedded = embed_missing(store, model_dir, progress=progress)
    stages["embed"] = time.monotonic() - started
    out.update(model=embedded["model"], embedded=embedded["embedded"], embed_failed=len(embedded["embed_failed"]))
    built = build_generation(
        store, model_dir, t_near=settings.near_threshold, t_similar=settings.similar_threshold,
        index_spec=index_spec, keep=settings.keep_generations,
    )
    stages.update(built.pop("stages", {}))
    out.update(built)
    return out


def store_status(store: Store) -> dict:
    """What `nearsight status` and GET /v1/status report."""
    counts = store.catalog.counts()
    last = store.catalog.last_run("index")
    gen = generations.current(store)
    model_dir = current_model_dir(store)
    return {
        "store": str(store.root),
        "schema_version": store.catalog.schema_version(),
        **counts,
        "source_folders": [s["root"] for s in store.catalog.sources()],
        "model": model_dir.name if model_dir else None,
        "generation": None if gen is None else {
            "name": gen.name, "indexed": gen.meta.get("indexed"), "groups": gen.meta.get("groups"),
            "thresholds": gen.meta.get("thresholds"), "index_spec": gen.meta.get("index_spec"),
        },
        "last_index_run": None
        if last is None
        else {k: last[k] for k in ("id", "status", "started_at", "finished_at")},
    }
