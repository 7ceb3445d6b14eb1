"""The main job as one call: scan -> train (first run, or by the retrain policy) -> embed -> index
and groups -> publish.

Each stage is its own module; this one only runs them in order under the
store's lock, times them and records the run in the catalog. Run again on an
existing store it is the nightly job: the scan finds what changed, only new
contents are embedded, and `refresh.py` updates the previous generation in
proportion to the change.
"""

from __future__ import annotations

import logging
import time
from pathlib import Path
from typing import Sequence

from ..learning.models import current_model_dir
from ..matching import generations
from ..reading.scan import read_origins, scan_sources
from ..storage.store import Store

log = logging.getLogger(__name__)

# Keys of the run summary that add up over source folders.
COUNT_KEYS = ("seen", "new", "changed", "moved", "unchanged", "unreadable", "removed", "ignored", "same_bytes",
              "decoded")


def _scan_all(store: Store, folders, progress, cluster: str | None = None) -> dict:
    if cluster:
        from ..matching.cluster import dask_client

        with dask_client(cluster) as client:
            per_source = [s.to_dict() for s in scan_sources(store, folders, progress=progress, client=client)]
    else:
        per_source = [s.to_dict() for s in scan_sources(store, folders, progress=progress)]
    read_origins(store)  # once, for contents catalogued before their EXIF and ICC facts were kept
    summary = {key: sum(s[key] for s in per_source) for key in COUNT_KEYS}
    reasons: dict[str, int] = {}
    for s in per_source:
        for code, n in s["unreadable_reasons"].items():
            reasons[code] = reasons.get(code, 0) + n
    summary["unreadable_reasons"] = reasons
    summary["sources"] = per_source
    return summary


def _ensure_model(store: Store, train_config, progress, retrain: str, stages: dict) -> tuple[Path | None, dict | None, dict]:
    """The model to embed with: the current one, or a new one when the store has none or the
    retrain policy says so (see retrain.py). Returns (model folder, training summary, decision)."""
    from ..learning.retrain import decide

    model_dir = current_model_dir(store)
    if model_dir is not None:
        started = time.monotonic()
        decision = decide(store, model_dir, retrain, store.settings)
        stages["retrain_check"] = time.monotonic() - started
        if not decision["retrain"]:
            return model_dir, None, decision
    else:
        decision = {"policy": retrain, "retrain": True, "reason": "the store has no model yet"}
    from ..learning.models import train_into_store
    from ..learning.train import MIN_TRAIN_IMAGES

    readable = len(store.catalog.readable_contents())
    if readable < MIN_TRAIN_IMAGES:
        log.warning("only %d readable images: too few to train an encoder (need %d); no index built",
                    readable, MIN_TRAIN_IMAGES)
        return model_dir, None, {**decision, "retrain": False, "reason": f"too few images to train ({readable})"}
    started = time.monotonic()
    result = train_into_store(store, train_config, progress=progress)
    stages["train"] = time.monotonic() - started
    return result.model_dir, {"model": result.version, "steps": result.steps, "heldout": result.heldout,
                              "heldout_random_init": result.heldout_random_init}, decision


def run_index(store: Store, folders: Sequence[str | Path], *, progress: bool | None = None,
              train_config=None, build: bool = True, index_spec: str | None = None, calibrate: bool = True,
              retrain: str = "auto", cluster: str | None = None) -> dict:
    """Scan every folder into the store, then (with `build`) train if needed, embed, index, group and publish.
    With `cluster` (a Dask scheduler address) the embedding runs on that cluster's workers."""
    from ..core.errors import UsageError
    from ..learning.retrain import POLICIES

    if retrain not in POLICIES:
        raise UsageError(f"--retrain must be one of {', '.join(POLICIES)}, not {retrain!r}")
    with store.lock():
        interrupted = store.catalog.close_abandoned_runs("index")
        if interrupted:
            log.info("%d earlier index run(s) ended without finishing (killed); this run resumes their work",
                     interrupted)
        run_id = store.catalog.start_run("index")
        stages: dict[str, float] = {}
        try:
            started = time.monotonic()
            summary = _scan_all(store, folders, progress, cluster)
            stages["scan"] = time.monotonic() - started
            summary.update(embedded=0, generation=None)
            if build:
                summary.update(_build(store, stages, progress, train_config, index_spec, calibrate, retrain,
                                      cluster=cluster))
        except BaseException as exc:
            try:
                store.catalog.finish_run(run_id, "failed", {"error": str(exc)})
            except Exception as also:  # a full disk may refuse this record too: the run's own error comes first
                log.debug("could not record the failed run: %s", also)
            raise
        summary["stages"] = {k: round(v, 3) for k, v in stages.items()}
        summary["run"] = run_id
        store.catalog.finish_run(run_id, "ok", summary)
    _log_summary(summary)
    return summary


def _build(store: Store, stages: dict, progress, train_config, index_spec, calibrate: bool, retrain: str, *,
           cluster: str | None = None) -> dict:
    from ..calibration.calibrate import CalibrationConfig
    from ..learning.train import TrainConfig
    from ..matching.regions import embed_missing_regions
    from ..matching.vectors import embed_missing
    from .refresh import group_changes, make_generation

    settings = store.settings
    out: dict = {}
    config = train_config or TrainConfig(minutes=settings.train_minutes, max_images=settings.train_sample)
    model_dir, trained, decision = _ensure_model(store, config, progress, retrain, stages)
    out["retrain"] = decision
    if trained:
        out["trained"] = trained
    if model_dir is None:
        return out
    if settings.runtime != "torch":
        from ..learning.runtime import ensure_onnx

        ensure_onnx(model_dir)  # a model saved before the export existed gets its ONNX file once
    started = time.monotonic()
    embedded = embed_missing(store, model_dir, progress=progress, cluster=cluster)
    stages["embed"] = time.monotonic() - started
    if settings.region_grid:
        started = time.monotonic()
        embed_missing_regions(store, model_dir, settings.region_grid, progress=progress)
        stages["regions"] = time.monotonic() - started
    if settings.keep_keypoints and settings.thumb_side:
        from ..matching.keypoints import keep_missing

        started = time.monotonic()
        keep_missing(store)
        stages["keypoints"] = time.monotonic() - started
    out.update(model=embedded["model"], embedded=embedded["embedded"], embed_failed=len(embedded["embed_failed"]))
    prev = generations.current(store)
    before = prev.load_groups()["groups"] if prev is not None else []
    built = make_generation(store, model_dir, index_spec=index_spec,
                            calibration=CalibrationConfig.from_settings(settings) if calibrate else None)
    stages.update(built.pop("stages", {}))
    out.update(built)
    if built.get("generation"):
        after = generations.current(store).load_groups()["groups"]
        out["group_changes"] = group_changes(before, after)
    return out


def _log_summary(summary: dict) -> None:
    log.info("changes: %s", ", ".join(f"{k} {summary[k]}" for k in ("new", "changed", "moved", "removed",
                                                                      "unreadable", "unchanged")))
    if "retrain" in summary:
        log.info("model %s; retrain: %s", summary.get("model"), summary["retrain"].get("reason"))
    if summary.get("generation"):
        build = summary.get("build") or {}
        log.info("generation %s (%s build: %s); %d embedded, %d indexed", summary["generation"], build.get("kind"),
                 build.get("reason"), summary["embedded"], summary["indexed"])
        log.info("groups: %s", ", ".join(f"{k} {v}" for k, v in summary.get("group_changes", {}).items()))
    log.info("stages (s): %s", ", ".join(f"{k} {v}" for k, v in summary["stages"].items()))


def store_status(store: Store, *, with_questions: bool = True) -> dict:
    """What `nearsight status` and GET /v1/status report. `with_questions` reads the generation's
    calibration for its two questions (the service has them loaded already and says False)."""
    from ..calibration.calibration_report import questions

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
            "questions": questions(gen.load_calibration()) if with_questions else None,
        },
        "last_index_run": None
        if last is None
        else {k: last[k] for k in ("id", "status", "started_at", "finished_at")},
    }
