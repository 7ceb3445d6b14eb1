"""Build and publish a generation from scratch: the index over every embedded file, and its groups.

`full_build` is the full build (whitening fitted, index built and tuned, calibration,
every pair, every group) and `recalibrated` the current generation calibrated again;
each returns a `publish.Built` that `refresh.make_generation`, the one entry, publishes.
`refresh.py` updates a previous generation instead when that is cheaper, and shares the
calibration (`calibrate_thresholds`) and grouping (`regroup`) steps defined here.
"""

from __future__ import annotations

import hashlib
import json
import logging
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..core.errors import ImageReadError, NotReadyError
from ..core.pause import pause_at
from ..learning.classic import DEFAULT_CLASSIC_WEIGHT
from ..learning.model import read_card
from ..matching import generations
from ..matching import index as faiss_index
from ..matching.fusion import fit_classic_weight
from ..matching.groups import build_groups
from ..matching.index_spec import choose_spec
from ..matching.regions import regions_extra, regions_for_generation
from ..matching.whiten import fit_whitening
from ..reading.images import read_image
from ..storage.store import Store
from .publish import Built

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


def whitened_vectors(store: Store, model: str, whitening, ids: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(ids, xb) in a generation's descriptor space (`whitening`, whiten.Whitening): every present readable
    file embedded under `model` (`load_vectors`), or the files `ids` in that order. The one way every stage
    that searches or groups gets a generation's vectors."""
    if ids is None:
        ids, xb = load_vectors(store, model)
        return ids, (whitening.apply(xb) if len(ids) else xb)
    ids = np.asarray(ids, np.int64)
    if len(ids) == 0:
        return ids, np.zeros((0, 0), np.float32)  # no row to say the width from: callers that search pass index.d
    stored = store.catalog.file_vectors(ids.tolist(), model)
    return ids, whitening.apply(np.stack([stored[int(i)] for i in ids]))


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


def with_asked_pairs(store: Store, space: "Space", q_ids: np.ndarray, xq: np.ndarray, pairs, thresholds: dict):
    """`pairs` joined by the strongly verified results of the files `q_ids` (rows `xq`), each asked through the
    query path over `space` (indexer/matching/pair_ask.py); unchanged when `ask_pairs` is off, verification is
    off or the space has no model to ask with."""
    if not (store.settings.ask_pairs and int(store.settings.verify_top) > 0 and space.model_dir is not None
            and space.index is not None and len(q_ids)):
        return pairs
    from ..learning.runtime import load_encoder
    from ..matching.pair_ask import asked_pairs
    from ..matching.query import Searcher

    encoder, card = load_encoder(space.model_dir, store.settings.runtime)
    searcher = Searcher.for_build(store, space.index, space.whitening, encoder, card, thresholds["near"],
                                  regions=space.regions)
    va, vb, vs = asked_pairs(searcher, q_ids, xq, t_near=thresholds["near"])
    a, b, sims = pairs
    return faiss_index.canonical_pairs(np.r_[a, va], np.r_[b, vb], np.r_[sims, vs].astype(np.float32))


def groups_from_pairs(store: Store, ids: np.ndarray, xb: np.ndarray, a, b, sims, *, t_near: float,
                      t_similar: float) -> list:
    """Groups that do not chain over the files `ids` (rows of `xb`) and their pairs. With verification on,
    the missing pairs of small components are verified first (pair_verify.complete_components), so that a
    group of edited copies is not split for want of a score between two of them, nor for want of one
    between two edits of one original that each match it in a common part (settings.shared_part)."""
    if int(store.settings.verify_top) > 0:
        from ..matching.pair_verify import complete_components

        a, b, sims = complete_components(store, ids, xb, (a, b, sims), t_near=t_near,
                                         shared_part=float(store.settings.shared_part))
    meta = store.catalog.image_meta(ids.tolist())
    _add_pixel_hashes(store, meta, a, b, sims, t_near)
    row = {int(i): n for n, i in enumerate(ids)}

    def vectors(sub_ids: np.ndarray) -> np.ndarray:
        return xb[[row[int(i)] for i in sub_ids]]

    return build_groups(a, b, sims, meta, t_near=t_near, t_similar=t_similar, vectors=vectors)


@dataclass
class Space:
    """A generation's descriptor space as a build sees it: the FAISS `index` over the files `ids` (None where
    nothing is searched: `regroup` from known pairs above their floor), their
    whitened vectors `xb` (row i is file ids[i]), the `whitening` that made them and the region index
    (matching/regions.py: (index, grid))."""

    index: Any
    ids: np.ndarray
    xb: np.ndarray
    whitening: Any
    regions: tuple = (None, 0)
    model_dir: Any = None  # the generation's model, to ask each file through the query path (pair_ask.py)


def regroup(store: Store, space: Space, thresholds: dict, *, known: tuple | None = None) -> tuple[tuple, list]:
    """Every pair at or above the similar threshold, joined by the verified pairs, and the groups that do not
    chain: ((a, b, sims), groups). The one regroup of the full build, a recalibration, an incremental build
    whose thresholds moved, and `groups`/quarantine at a threshold of the user's (verdict_groups.current_groups).

    `known` = (a, b, sims, floor): a published generation's pairs, every pair at or above `floor` with its
    verified pairs among them. They are taken instead of verifying every file's neighbours again (seconds
    per thousand files), and only the pairs below `floor`, when the threshold asks for them, are searched."""
    if len(space.ids) == 0:
        empty = (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.float32))
        return empty, []
    t = thresholds["similar"]
    if known is None:
        pairs = with_verified_pairs(store, space.index, space.ids, space.xb,
                                    compute_pairs(space.index, space.ids, space.xb, t), thresholds)
        pairs = with_asked_pairs(store, space, space.ids, space.xb, pairs, thresholds)
    else:
        a, b, sims, floor = known
        keep = (sims >= t) & np.isin(a, space.ids) & np.isin(b, space.ids)  # files quarantined since: out
        pairs = (a[keep], b[keep], sims[keep].astype(np.float32))
        if t < floor:
            more = compute_pairs(space.index, space.ids, space.xb, t)
            pairs = faiss_index.canonical_pairs(np.r_[pairs[0], more[0]], np.r_[pairs[1], more[1]],
                                                np.r_[pairs[2], more[2]].astype(np.float32))
    groups = groups_from_pairs(store, space.ids, space.xb, *pairs, t_near=thresholds["near"],
                               t_similar=thresholds["similar"])
    return pairs, groups


def indexed_items(store: Store, index) -> tuple[np.ndarray, np.ndarray]:
    """(file ids, content ids) of everything the index holds, sorted by id: what the next run diffs against."""
    ids = np.sort(faiss_index.stored_ids(index))
    contents = store.catalog.content_ids_of(ids.tolist())
    return ids, np.array([contents.get(int(i), -1) for i in ids], np.int64)


@dataclass
class Calibrated:
    """What `calibrate_thresholds` decided: the thresholds, the generation's calibration record
    (meta["calibration"]; None when no calibration was asked for), its files and the seconds it took."""

    thresholds: dict
    record: dict | None = None
    files: dict[str, bytes] = field(default_factory=dict)
    seconds: float | None = None

    def into(self, built: Built, indexed: int) -> None:
        """Record the outcome in `built`: thresholds, files, meta["calibration"] and, when a calibration
        ran, the nightly reuse rule's starting point (build.since_calibration)."""
        built.thresholds = self.thresholds
        built.files.update(self.files)
        if self.record is not None:
            built.meta["calibration"] = self.record
            built.meta.setdefault("build", {})["since_calibration"] = {"indexed": int(indexed), "changes": 0}
        if self.seconds is not None:
            built.stages["calibrate"] = self.seconds


def calibrate_thresholds(store: Store, model_dir, space: Space, *, fallback: dict, calibration,
                         required: bool = False) -> Calibrated:
    """The generation's thresholds: calibrated when `calibration` (a CalibrationConfig) is given and the
    collection allows, else `fallback` ({"near", "similar", "source"}). A collection that cannot be
    calibrated keeps the fallback with the reason recorded, unless `required` (then NotReadyError)."""
    if calibration is None:
        return Calibrated(dict(fallback))
    from ..calibration.calibrate import calibrate
    from ..calibration.calibration_report import plot_png

    started = time.monotonic()
    try:
        result = calibrate(store, model_dir=model_dir, index=space.index, ids=space.ids, xb=space.xb,
                           whitening=space.whitening, config=calibration, regions=space.regions)
    except NotReadyError as exc:
        if required:
            raise
        log.warning("not calibrated: %s", exc)
        return Calibrated(dict(fallback), {"skipped": str(exc)}, seconds=round(time.monotonic() - started, 3))
    thresholds = {"near": result["tiers"]["near"]["threshold"], "similar": result["tiers"]["similar"]["threshold"],
                  "source": "calibrated",
                  "verify_floor": result["negatives"]["floor"]}  # where verified neighbours count (pair_verify.py)
    files = {generations.CALIBRATION_FILE: json.dumps(result, sort_keys=True).encode(),
             "calibration.png": plot_png(result),
             "calibration.txt": ("\n".join(result["summary"]["lines"]) + "\n").encode()}
    return Calibrated(thresholds, {"summary": result["summary"]["headline"]}, files,
                      round(time.monotonic() - started, 3))


def default_thresholds(settings) -> dict:
    """The settings' thresholds, for a generation built without calibration."""
    return {"near": settings.near_threshold, "similar": settings.similar_threshold, "source": "default"}


def full_build(store: Store, model_dir, *, index_spec: str | None = None, calibration=None,
               reason: str = "full build") -> Built | None:
    """Index every embedded file, calibrate (when `calibration` is a CalibrationConfig) and group; None when
    nothing is embedded."""
    card = read_card(model_dir)
    model = card["version"]
    started = time.monotonic()
    ids, xb = load_vectors(store, model)
    if len(ids) == 0:
        log.warning("nothing to index: no embedded readable files")
        return None
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
    space = Space(index, ids, xb, whitening, regions_for_generation(store, model, whitening), model_dir)
    n = int(len(ids))
    built = Built("full", index=index, thresholds={}, items=indexed_items(store, index), meta={
        "model": model,
        "indexed": n,
        "dim": int(xb.shape[1]),
        "whitening": "pca-shrunk",
        "fusion": fusion.to_dict() if fusion is not None else {"classic_weight": whitening.classic_weight,
                                                                 "reason": "default (not calibrated)"},
        "index_spec": index_spec or choose_spec(len(ids), xb.shape[1]),
        "search_params": tuning["params"],
        "recall_at_10": tuning["recall"],
        "build": {"reason": reason, "since_full": {"indexed": n, "changes": 0}},
    }, files={generations.WHITENING_FILE: whitening.to_bytes()}, stages={"index": round(time.monotonic() - started, 3)})
    pause_at("index")
    calibrate_thresholds(store, model_dir, space, fallback=default_thresholds(store.settings),
                         calibration=calibration).into(built, n)
    regions_extra(*space.regions, built.meta, built.files)
    started = time.monotonic()
    built.pairs, built.groups = regroup(store, space, built.thresholds)
    built.stages["groups"] = round(time.monotonic() - started, 3)
    return built


def recalibrated(store: Store, config) -> Built:
    """The current generation calibrated again (with `config`, a CalibrationConfig), its groups made anew at
    the calibrated thresholds; its index, whitening and region index shared unchanged by hard links."""
    gen = generations.require_current(store)
    model_dir = store.models_dir / gen.meta["model"]
    index = gen.load_index()
    whitening = gen.load_whitening()
    ids, xb = whitened_vectors(store, gen.meta["model"], whitening)
    indexed = np.isin(ids, faiss_index.stored_ids(index))
    space = Space(index, ids[indexed], xb[indexed], whitening, gen.load_regions(), model_dir)
    meta = {k: v for k, v in gen.meta.items()
            if k not in ("thresholds", "groups", "calibration", "generation", "published_at")}
    meta.update(indexed=int(len(space.ids)), calibrated_from=gen.name,
                build={**gen.meta.get("build", {}), "reason": "nearsight calibrate"})
    shared = (generations.INDEX_FILE, generations.WHITENING_FILE, generations.REGIONS_FILE)
    built = Built("recalibrated", meta, {}, items=indexed_items(store, index),
                  links={f: gen.path / f for f in shared if (gen.path / f).is_file()})
    calibrate_thresholds(store, model_dir, space, fallback=gen.meta["thresholds"], calibration=config,
                         required=True).into(built, len(space.ids))  # required: never the fallback
    started = time.monotonic()
    built.pairs, built.groups = regroup(store, space, built.thresholds)
    built.stages["groups"] = round(time.monotonic() - started, 3)
    return built
