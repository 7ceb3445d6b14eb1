"""Build and publish a generation: the index over every embedded file, and its groups."""

from __future__ import annotations

import hashlib
import logging
import time

import numpy as np

from . import generations
from . import index as faiss_index
from .errors import ImageReadError
from .groups import build_groups, summarize
from .images import read_image
from .model import read_card
from .store import Store
from .whiten import fit_whitening

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


def compute_groups(store: Store, index, ids: np.ndarray, xb: np.ndarray, *, t_near: float, t_similar: float) -> list:
    """Candidate pairs from FAISS range search above the looser threshold, then groups that do not chain."""
    a, b, sims = faiss_index.range_pairs(index, xb, ids, t_similar)
    meta = store.catalog.image_meta(ids.tolist())
    _add_pixel_hashes(store, meta, a, b, sims, t_near)
    row = {int(i): n for n, i in enumerate(ids)}

    def vectors(sub_ids: np.ndarray) -> np.ndarray:
        return xb[[row[int(i)] for i in sub_ids]]

    return build_groups(a, b, sims, meta, t_near=t_near, t_similar=t_similar, vectors=vectors)


def build_generation(store: Store, model_dir, *, t_near: float, t_similar: float, index_spec: str | None = None,
                     keep: int = 3, threshold_source: str = "default") -> dict:
    """Index every embedded file, group, publish; returns the generation's summary."""
    card = read_card(model_dir)
    model = card["version"]
    started = time.monotonic()
    ids, xb = load_vectors(store, model)
    if len(ids) == 0:
        log.warning("nothing to index: no embedded readable files")
        return {"generation": None, "indexed": 0}
    whitening = fit_whitening(xb)
    xb = whitening.apply(xb)
    index = faiss_index.build_index(xb, ids, index_spec)
    rng = np.random.default_rng(0)
    sample = xb[rng.choice(len(xb), min(TUNE_QUERIES, len(xb)), replace=False)]
    tuning = faiss_index.tune_search(index, sample, xb=xb, ids=ids)
    index_seconds = time.monotonic() - started

    started = time.monotonic()
    groups = compute_groups(store, index, ids, xb, t_near=t_near, t_similar=t_similar)
    group_summary = summarize(groups)
    groups_seconds = time.monotonic() - started

    meta = {
        "model": model,
        "indexed": int(len(ids)),
        "dim": int(xb.shape[1]),
        "whitening": "pca-shrunk",
        "index_spec": index_spec or faiss_index.choose_spec(len(ids), xb.shape[1]),
        "search_params": tuning["params"],
        "recall_at_10": tuning["recall"],
        "thresholds": {"near": t_near, "similar": t_similar, "source": threshold_source},
        "groups": group_summary,
    }
    gen = generations.publish(store, index, meta, {"summary": group_summary, "groups": [g.to_dict() for g in groups]},
                              keep=keep, extra={generations.WHITENING_FILE: whitening.to_bytes()})
    return {"generation": gen.name, "indexed": int(len(ids)), "groups": group_summary,
            "stages": {"index": round(index_seconds, 3), "groups": round(groups_seconds, 3)}}
