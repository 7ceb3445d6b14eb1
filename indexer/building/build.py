"""Build and publish a generation from scratch: the index over every embedded file, and its groups.

`build_generation` is the full build (whitening fitted, index built and tuned,
calibration, every pair, every group); `refresh.py` updates a previous generation
instead when that is cheaper, and shares the calibration, grouping and publishing
steps defined here.
"""

from __future__ import annotations

import hashlib
import json
import logging
import time

import numpy as np

from ..core.errors import ImageReadError, NotReadyError
from ..core.pause import pause_at
from ..learning.classic import DEFAULT_CLASSIC_WEIGHT
from ..learning.model import read_card
from ..matching import generations
from ..matching import index as faiss_index
from ..matching.fusion import fit_classic_weight
from ..matching.groups import build_groups, summarize
from ..matching.index_spec import choose_spec
from ..matching.regions import regions_extra, regions_for_generation
from ..matching.whiten import fit_whitening
from ..reading.images import read_image
from ..storage.store import Store
from .publish import npz_bytes, publish

log = logging.getLogger(__name__)

TUNE_QUERIES = 2_000


def load_vectors(store: Store, model: str) -> tuple[np.ndarray, np.ndarray]:
    """(ids, xb) for every present readable file embedded under `model`, read block by block
    (raw encoder output: a generation's whitening is applied by the caller)."""
    ids_blocks, xb_blocks = [], []
    for ids, xb in store.catalog.iter_file_vectors(model):
        ids_blocks.append(ids)
        xb_blocks.append(xb)
    if not ids_blocks:
        return np.zeros(0, np.int64), np.zeros((0, 0), np.float32)
    return np.concatenate(ids_blocks), np.ascontiguousarray(np.concatenate(xb_blocks))


def whitened_vectors(store: Store, model: str, whitening) -> tuple[np.ndarray, np.ndarray]:
    """(ids, xb) of `load_vectors` in a generation's descriptor space (`whitening`, whiten.Whitening): the one
    way every stage that searches or groups gets a generation's vectors."""
    ids, xb = load_vectors(store, model)
    return ids, (whitening.apply(xb) if len(ids) else xb)


def pixel_hash(path: str) -> str:
    """Hash of the decoded, upright RGB pixels at full size: equal for the same picture saved twice."""
    im, _info = read_image(path)
    digest = hashlib.blake2b(digest_size=32)
    digest.update(f"{im.width}x{im.height}".encode())
    digest.update(im.tobytes())
    return digest.hexdigest()


def _add_pixel_hashes(store: Store, meta: dict, a: np.ndarray, b: np.ndarray, sims: np.ndarray, t_near: float) -> None:
    """Decode in full only the files that could be the same pixels: near pairs of equal size, different bytes."""
    wanted = set()
    for i, j, s in zip(a.tolist(), b.tolist(), sims.tolist()):
        x, y = meta[i], meta[j]
        if s >= t_near and (x["width"], x["height"]) == (y["width"], y["height"]) and x["content_hash"] != y["content_hash"]:
            wanted.update(k for k in (i, j) if meta[k]["pixel_hash"] is None)
    computed: dict[str, str] = {}
    for k in sorted(wanted):
        digest = meta[k]["content_hash"]
        if digest not in computed:
            try:
                computed[digest] = pixel_hash(meta[k]["path"])
            except (ImageReadError, OSError) as exc:  # the file changed since the scan: skip it
                log.warning("cannot hash pixels of %s: %s", meta[k]["path"], exc)
                continue
        meta[k]["pixel_hash"] = computed[digest]
    if computed:
        store.catalog.set_pixel_hashes(computed)
        log.info("hashed the pixels of %d candidate contents", len(computed))


def compute_pairs(index, ids: np.ndarray, xb: np.ndarray, t_similar: float):
    """Every pair of `ids` at or above `t_similar` (FAISS range search, exact cosines from `xb`); on an IVF
    index with the nprobe that finds 0.99 of the exact pairs on a sample (`index.tune_pair_search`)."""
    tuned = faiss_index.tune_pair_search(index, xb, ids, t_similar)
    a, b, sims = faiss_index.range_pairs(index, xb, ids, t_similar, params=tuned["params"])
    # An index read back from a generation may hold files quarantined or removed since: drop their pairs.
    known = np.isin(a, ids) & np.isin(b, ids)
    return a[known], b[known], sims[known]


def verify_floor_of(thresholds: dict) -> float:
    """The cosine from which verified neighbours count: the calibration's floor, else the similar threshold."""
    return float(thresholds.get("verify_floor", thresholds["similar"]))


def with_verified_pairs(store: Store, index, q_ids: np.ndarray, xq: np.ndarray, pairs, thresholds: dict):
    """`pairs` (a, b, sims) joined by the verified pairs among the queries' closest neighbours
    (indexer/matching/pair_verify.py): a heavily edited copy joins its group on geometric evidence."""
    from ..matching.pair_verify import verified_pairs

    top = int(store.settings.verify_top)
    if top <= 0 or len(q_ids) == 0:
        return pairs
    floor = verify_floor_of(thresholds)
    va, vb, vs = verified_pairs(store, index, q_ids, xq, top=top, floor=floor, t_near=thresholds["near"])
    a, b, sims = pairs
    return faiss_index.canonical_pairs(np.r_[a, va], np.r_[b, vb], np.r_[sims, vs].astype(np.float32))


def groups_from_pairs(store: Store, ids: np.ndarray, xb: np.ndarray, a, b, sims, *, t_near: float,
                      t_similar: float, verify_floor: float | None = None) -> list:
    """Groups that do not chain over the files `ids` (rows of `xb`) and their pairs. With a
    `verify_floor`, the missing pairs of small near-duplicate components are verified first
    (pair_verify.complete_components), so that a group of edited copies is not split for
    want of a score between two of them."""
    if verify_floor is not None and int(store.settings.verify_top) > 0:
        from ..matching.pair_verify import complete_components

        a, b, sims = complete_components(store, ids, xb, (a, b, sims), t_near=t_near, floor=verify_floor)
    meta = store.catalog.image_meta(ids.tolist())
    _add_pixel_hashes(store, meta, a, b, sims, t_near)
    row = {int(i): n for n, i in enumerate(ids)}

    def vectors(sub_ids: np.ndarray) -> np.ndarray:
        return xb[[row[int(i)] for i in sub_ids]]

    return build_groups(a, b, sims, meta, t_near=t_near, t_similar=t_similar, vectors=vectors)


def compute_groups(store: Store, index, ids: np.ndarray, xb: np.ndarray, *, t_near: float, t_similar: float) -> list:
    """Candidate pairs from FAISS range search above the looser threshold, then groups that do not chain."""
    a, b, sims = compute_pairs(index, ids, xb, t_similar)
    return groups_from_pairs(store, ids, xb, a, b, sims, t_near=t_near, t_similar=t_similar)


def indexed_items(store: Store, index) -> tuple[np.ndarray, np.ndarray]:
    """(file ids, content ids) of everything the index holds, sorted by id: what the next run diffs against."""
    ids = np.sort(faiss_index.stored_ids(index))
    contents = store.catalog.content_ids_of(ids.tolist())
    return ids, np.array([contents.get(int(i), -1) for i in ids], np.int64)


def build_generation(store: Store, model_dir, *, t_near: float, t_similar: float, index_spec: str | None = None,
                     keep: int = 3, threshold_source: str = "default", calibration=None,
                     reason: str = "full build") -> dict:
    """Index every embedded file, calibrate (when `calibration` is a CalibrationConfig), group, publish."""
    card = read_card(model_dir)
    model = card["version"]
    started = time.monotonic()
    ids, xb = load_vectors(store, model)
    if len(ids) == 0:
        log.warning("nothing to index: no embedded readable files")
        return {"generation": None, "indexed": 0}
    # The classical part's weight is fitted with the calibration (both adapt scoring to this collection);
    # `--no-calibrate` keeps the default.
    fusion = fit_classic_weight(store, model_dir, ids, xb) if calibration is not None else None
    weight = fusion.weight if fusion is not None else DEFAULT_CLASSIC_WEIGHT
    whitening = fit_whitening(xb, learned_dim=int(card["dim"]), classic_weight=weight)
    xb = whitening.apply(xb)
    index = faiss_index.build_index(xb, ids, index_spec)
    rng = np.random.default_rng(0)
    sample = xb[rng.choice(len(xb), min(TUNE_QUERIES, len(xb)), replace=False)]
    tuning = faiss_index.tune_search(index, sample, xb=xb, ids=ids)
    regions = regions_for_generation(store, model, whitening)
    stages = {"index": round(time.monotonic() - started, 3)}
    pause_at("index")
    n = int(len(ids))
    meta = {
        "model": model,
        "indexed": n,
        "dim": int(xb.shape[1]),
        "whitening": "pca-shrunk",
        "fusion": fusion.to_dict() if fusion is not None else {"classic_weight": whitening.classic_weight,
                                                                 "reason": "default (not calibrated)"},
        "index_spec": index_spec or choose_spec(len(ids), xb.shape[1]),
        "search_params": tuning["params"],
        "recall_at_10": tuning["recall"],
        "build": {"kind": "full", "reason": reason, "since_full": {"indexed": n, "changes": 0}},
    }
    thresholds, extra = calibrate_thresholds(store, model_dir, index, ids, xb, whitening, meta, stages,
                                             t_near=t_near, t_similar=t_similar, threshold_source=threshold_source,
                                             calibration=calibration, regions=regions)
    extra[generations.WHITENING_FILE] = whitening.to_bytes()
    regions_extra(*regions, meta, extra)
    started = time.monotonic()
    a, b, sims = with_verified_pairs(store, index, ids, xb, compute_pairs(index, ids, xb, thresholds["similar"]),
                                     thresholds)
    groups = groups_from_pairs(store, ids, xb, a, b, sims, t_near=thresholds["near"], t_similar=thresholds["similar"],
                               verify_floor=verify_floor_of(thresholds))
    stages["groups"] = round(time.monotonic() - started, 3)
    return publish_generation(store, index, meta, thresholds, groups, items=indexed_items(store, index),
                              pairs=(a, b, sims), extra=extra, stages=stages, keep=keep)


def calibrate_thresholds(store, model_dir, index, ids, xb, whitening, meta, stages, *, t_near, t_similar,
                         threshold_source, calibration, required: bool = False, regions=(None, 0)) -> tuple[dict, dict]:
    """The generation's thresholds: calibrated when `calibration` is given and the collection allows,
    else those given. Returns (thresholds, calibration files for the generation); records the outcome
    in `meta` (``calibration``, and ``build.since_calibration`` for the nightly reuse rule)."""
    extra: dict[str, bytes] = {}
    verify_floor = None
    if calibration is not None:
        from ..calibration.calibrate import calibrate
        from ..calibration.calibration_report import plot_png

        started = time.monotonic()
        meta.setdefault("build", {})["since_calibration"] = {"indexed": int(len(ids)), "changes": 0}
        try:
            result = calibrate(store, model_dir=model_dir, index=index, ids=ids, xb=xb, whitening=whitening,
                               config=calibration, regions=regions)
        except NotReadyError as exc:
            if required:
                raise
            log.warning("not calibrated: %s", exc)
            meta["calibration"] = {"skipped": str(exc)}
        else:
            t_near, t_similar = result["tiers"]["near"]["threshold"], result["tiers"]["similar"]["threshold"]
            verify_floor = result["negatives"]["floor"]
            threshold_source = "calibrated"
            meta["calibration"] = {"summary": result["summary"]["headline"]}
            extra[generations.CALIBRATION_FILE] = json.dumps(result, sort_keys=True).encode()
            extra["calibration.png"] = plot_png(result)
            extra["calibration.txt"] = ("\n".join(result["summary"]["lines"]) + "\n").encode()
        stages["calibrate"] = round(time.monotonic() - started, 3)
    thresholds = {"near": t_near, "similar": t_similar, "source": threshold_source}
    if verify_floor is not None:  # where verified neighbours start to count (pair_verify.py)
        thresholds["verify_floor"] = verify_floor
    return thresholds, extra


def publish_generation(store: Store, index, meta: dict, thresholds: dict, groups: list, *, items, pairs,
                       extra: dict, stages: dict, keep: int, links: dict | None = None) -> dict:
    """Publish the generation with its groups, item list and pairs; the run summary's part."""
    started = time.monotonic()
    group_summary = summarize(groups)
    meta = {**meta, "thresholds": thresholds, "groups": group_summary}
    extra = {**extra,
             generations.ITEMS_FILE: npz_bytes(ids=items[0], contents=items[1]),
             generations.PAIRS_FILE: npz_bytes(a=pairs[0], b=pairs[1], sims=pairs[2])}
    gen = publish(store, index, meta, {"summary": group_summary, "groups": [g.to_dict() for g in groups]},
                              keep=keep, extra=extra, links=links)
    stages["publish"] = round(time.monotonic() - started, 3)
    return {"generation": gen.name, "indexed": int(meta["indexed"]), "groups": group_summary,
            "thresholds": thresholds, "calibration": meta.get("calibration"), "build": meta.get("build"),
            "stages": stages}


def recalibrate(store: Store, config, *, keep: int = 3) -> dict:
    """Calibrate the current generation's index and publish it again with the calibrated thresholds and groups."""
    gen = generations.require_current(store)
    model_dir = store.models_dir / gen.meta["model"]
    index = gen.load_index()
    whitening = gen.load_whitening()
    ids, xb = whitened_vectors(store, gen.meta["model"], whitening)
    indexed = np.isin(ids, faiss_index.stored_ids(index))
    ids, xb = ids[indexed], xb[indexed]
    meta = {k: v for k, v in gen.meta.items()
            if k not in ("thresholds", "groups", "calibration", "generation", "published_at")}
    meta["indexed"] = int(len(ids))
    meta["calibrated_from"] = gen.name
    meta["build"] = {**gen.meta.get("build", {}), "kind": "recalibrated", "reason": "nearsight calibrate"}
    stages: dict = {}
    regions = gen.load_regions()
    thresholds, extra = calibrate_thresholds(
        store, model_dir, index, ids, xb, whitening, meta, stages, t_near=gen.meta["thresholds"]["near"],
        t_similar=gen.meta["thresholds"]["similar"], threshold_source=gen.meta["thresholds"].get("source", "default"),
        calibration=config, required=True, regions=regions)
    extra[generations.WHITENING_FILE] = whitening.to_bytes()
    regions_extra(*regions, meta, extra)
    a, b, sims = with_verified_pairs(store, index, ids, xb, compute_pairs(index, ids, xb, thresholds["similar"]),
                                     thresholds)
    groups = groups_from_pairs(store, ids, xb, a, b, sims, t_near=thresholds["near"], t_similar=thresholds["similar"],
                               verify_floor=verify_floor_of(thresholds))
    return publish_generation(store, index, meta, thresholds, groups, items=indexed_items(store, index),
                              pairs=(a, b, sims), extra=extra, stages=stages, keep=keep)
