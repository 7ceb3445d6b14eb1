"""Threshold calibration: each tier's threshold comes with a measured precision for this collection.

Positives are synthetic copies (`edits.py`, Pillow only, independent of the
training views) of originals held out of training: mild edits for the
near-duplicate tier, strong ones for the similar tier. Negatives are every
neighbour above a floor of a sample of query images (the hard ones), less the
pairs already known to be duplicates (same bytes, same pixels, or a person's
"same"), plus random pairs for the bulk of the distribution.

Per threshold t, with D the collection's duplicate pairs and FP(t) its wrong
pairs above t (both from the mixture fit in `rates.py`, scaled from the query
sample to the collection):

    precision(t) = D * recall(t) / (D * recall(t) + FP(t))

so the estimate accounts for the collection's size: FP(t) counts pairs, not a
per-pair rate. The result is stored as ``calibration.json`` in the generation.
"""

from __future__ import annotations

import logging
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from ..core.errors import NotReadyError, UsageError
from ..core.rates import counts_at_or_above, fit_mixture, wilson_interval
from ..learning.edits import DEFAULT_STRENGTHS, EDIT_KINDS, EditStrengths, edited_copies
from ..learning.embed import embed_images
from ..matching import index as faiss_index
from ..matching.generations import threshold_for_precision
from ..matching.query_verdict import QueryVerdictConfig, calibrate_query
from ..reading.images import readable_images
from ..storage.store import Store

log = logging.getLogger(__name__)

# The strong family for the similar tier: the same edits pushed further (heavier crops,
# colour changes and re-encodes) and always combined; a person still calls these "the same photo".
SIMILAR_STRENGTHS = EditStrengths(
    jpeg_quality=(20, 50), resize_scale=(0.25, 0.6), crop_area=(0.4, 0.7), brightness=(0.6, 1.45),
    contrast=(0.6, 1.45), saturation=(0.4, 1.6), overlay_height=(0.15, 0.25), border_frac=(0.08, 0.18),
    rotate_degrees=(4.0, 8.0), combo_size=(2, 3),
)
TIER_EDITS = {"near": (DEFAULT_STRENGTHS, EDIT_KINDS), "similar": (SIMILAR_STRENGTHS, ("combo",))}
GRID_STEP = 0.005
MIN_IMAGES = 20
DECODE_FACTOR = 4  # originals decoded at 4x the model input, as the held-out check does (train.py)


@dataclass(frozen=True)
class CalibrationConfig:
    target_precision: float = 0.99
    similar_target_precision: float = 0.90
    originals: int = 256  # originals edited into synthetic positives (held-out ones first)
    edits_per_original: int = 2
    queries: int = 2_000  # images whose neighbours above the floor are the hard negatives
    random_pairs: int = 50_000
    min_verdicts: int = 30  # verdicts needed (with at least 5 of each kind) before they are used
    query: QueryVerdictConfig = field(default_factory=QueryVerdictConfig)
    seed: int = 0
    tiers: dict = field(default_factory=lambda: {"near": "near-duplicate", "similar": "similar"})

    @classmethod
    def from_settings(cls, settings, *, target_precision: float | None = None,
                      similar_target_precision: float | None = None) -> "CalibrationConfig":
        """The configuration the store's settings ask for; a given target overrides its setting."""
        return cls(target_precision=target_precision or settings.target_precision,
                   similar_target_precision=similar_target_precision or settings.similar_target_precision,
                   query=QueryVerdictConfig(false_flag_rate=settings.false_flag_rate, prior=settings.copy_prior))

    def validate(self) -> None:
        self.query.validate()
        for name in ("target_precision", "similar_target_precision"):
            value = getattr(self, name)
            if not 0.5 <= value < 1.0:
                raise UsageError(f"{name.replace('_', ' ')} must be in [0.5, 1), not {value}")
        self.query.validate()
        if self.originals < 10 or self.edits_per_original < 1 or self.queries < 10:
            raise UsageError("calibration needs at least 10 originals, 1 edit each and 10 queries")

    def target(self, tier: str) -> float:
        return self.target_precision if tier == "near" else self.similar_target_precision


# -- inputs --------------------------------------------------------------------------------
def _originals(store: Store, card: dict, ids: np.ndarray, meta: dict, count: int, rng) -> tuple[list[int], list[str], int]:
    """Rows of `ids` to edit, and their paths: the model's held-out originals first, then random ones.
    Training reads the cached small copies, so held-out paths may name a file or its small copy."""
    paths = {int(i): meta[int(i)]["path"] for i in ids if int(i) in meta}
    by_path = {}
    for r, i in enumerate(ids.tolist()):
        if i in meta:
            by_path.setdefault(meta[i]["path"], r)
            by_path.setdefault(str(store.thumb_path(meta[i]["content_hash"])), r)
    held = [by_path[q] for q in (str(store.here(p)) for p in card.get("data", {}).get("heldout_paths", []))
            if q in by_path]
    held = list(dict.fromkeys(held))[:count]
    held_set = set(held)
    rest = [r for r in rng.permutation(len(ids)).tolist() if r not in held_set]
    rows = held + rest[: max(0, count - len(held))]
    return rows, [paths[int(ids[r])] for r in rows], len(held)


def read_originals(rows: list[int], paths: list[str], size: int) -> list[tuple[int, object]]:
    """(row, image) of each original to edit, decoded once for every tier at DECODE_FACTOR times the model's
    input; one that cannot be read any more (changed or gone since the scan) is left out with a warning."""
    return readable_images(zip(rows, paths), DECODE_FACTOR * size,
                           lambda _row, path, exc: log.warning("calibration skips %s: %s", path, exc))


def positive_scores(encoder, size: int, whitening, xb: np.ndarray, originals: list[tuple[int, object]],
                    strengths: EditStrengths, kinds: tuple[str, ...], per_original: int, rng) -> tuple:
    """Cosine between each edited copy of `originals` ((row, image), `read_originals`) and its original's
    indexed vector; the edit kind of each, the copies themselves, the row of each one's original and the
    copies' vectors."""
    if not originals:
        raise NotReadyError("no original could be read for calibration")
    targets = [row for row, _ in originals for _ in range(per_original)]
    edited, edit_kinds = edited_copies([image for _, image in originals for _ in range(per_original)], kinds,
                                       strengths, rng)
    xq = whitening.apply(embed_images(encoder, edited, size))
    return np.einsum("ij,ij->i", xq, xb[targets]), edit_kinds, edited, targets, xq


def _known_duplicate(meta_a: dict, meta_b: dict) -> str | None:
    if meta_a["content_hash"] == meta_b["content_hash"]:
        return "same-bytes"
    if meta_a["pixel_hash"] and meta_a["pixel_hash"] == meta_b["pixel_hash"]:
        return "same-pixels"
    return None


def neighbour_hits(store: Store, index, ids: np.ndarray, xb: np.ndarray, query_rows: np.ndarray,
                   floor: float, meta: dict, same_pairs: set) -> tuple[np.ndarray, dict]:
    """Similarities of every (query, neighbour) with cosine >= floor, less known duplicates."""
    content = store.catalog.content_ids_of(ids.tolist())
    k = min(len(ids), 64)
    while True:
        D, I = faiss_index.search(index, np.ascontiguousarray(xb[query_rows]), k)
        if k >= len(ids) or D[:, -1].max() < floor:
            break
        k = min(len(ids), 4 * k)  # some query has more neighbours above the floor: look further
    hits, excluded = [], {"same-bytes": 0, "same-pixels": 0, "person-same": 0}
    for row, d_row, i_row in zip(query_rows, D, I):
        q = int(ids[row])
        for d, j in zip(d_row.tolist(), i_row.tolist()):
            if j < 0 or d < floor or j == q:
                continue
            kind = _known_duplicate(meta[q], meta[j]) if q in meta and j in meta else None
            if kind is None and tuple(sorted((content.get(q), content.get(j)))) in same_pairs:
                kind = "person-same"
            if kind:
                excluded[kind] += 1
            else:
                hits.append(d)
    return np.asarray(hits, dtype=np.float64), excluded


def verdict_scores(store: Store, ids: np.ndarray, xb: np.ndarray, verdicts: list[dict]) -> tuple[np.ndarray, np.ndarray]:
    """(similarity, 1 for "same") for each pair with a person's latest verdict, both sides indexed."""
    content = store.catalog.content_ids_of(ids.tolist())
    row_of_content: dict[int, int] = {}
    for r, i in enumerate(ids.tolist()):
        row_of_content.setdefault(content.get(i), r)
    sims, labels = [], []
    for v in verdicts:
        a, b = row_of_content.get(v["content_a"]), row_of_content.get(v["content_b"])
        if a is not None and b is not None:
            sims.append(float(xb[a] @ xb[b]))
            labels.append(1 if v["verdict"] == "same" else 0)
    return np.asarray(sims), np.asarray(labels)


# -- the curves ----------------------------------------------------------------------------
# Of random pairs, the share above the floor: about 100 neighbours per image, never more than a tenth.
FLOOR_NEIGHBOURS = 100
FLOOR_MAX_SHARE = 0.10
# In a small collection random pairs are often duplicates themselves: the floor stays under this
# quantile of the synthetic copies' scores, so that the fit sees where duplicates score.
FLOOR_POSITIVE_QUANTILE = 0.10


def negatives_floor(random_scores: np.ndarray, positives: np.ndarray, n_images: int) -> float:
    """Where the hard negatives start: the score above which min(10 %, 100 / n) of random pairs remain,
    lowered to the synthetic copies' 10 % quantile if that is lower.

    The floor is where the exponential tail is fitted from, and it decides the threshold: on a demo
    store, fitting from 0.32 instead of 0.42 moved the threshold for precision 0.99 from 0.69 to 0.79,
    whatever the positives. It therefore depends on nothing a seed moves much: the random pairs'
    quantile (50,000 pairs) and a quantile of the copies away from their long low tail (an earlier
    rule took the copies' 5 % quantile, which the few harshest edits of each draw set: 0.32 to 0.42
    on one store, thresholds 0.685 to 0.79). Below 1,000 images the floor keeps a tenth of the pairs
    rather than a hundredth, so that the fitted tail covers more than the last few pairs; where
    duplicates and non-duplicates meet, a fit from lower down is the more cautious (the demo's
    realised precision 0.97-0.98 with floors above 0.4, 0.99-1.00 from 0.32-0.35)."""
    share = min(FLOOR_MAX_SHARE, FLOOR_NEIGHBOURS / max(n_images, 1))
    floor = float(np.quantile(random_scores, 1.0 - share))
    return min(floor, float(np.quantile(positives, FLOOR_POSITIVE_QUANTILE)))


def tier_curves(positives: np.ndarray, hits: np.ndarray, *, floor: float, n_images: int, n_queries: int,
                grid: np.ndarray) -> dict:
    """Recall, per-pair false-positive rate and precision over `grid`, with Wilson intervals."""
    fit = fit_mixture(hits, positives, floor)
    scale = n_images / (2.0 * n_queries)  # directed hits from the sample -> pairs in the collection
    trials = n_queries * max(1, n_images - 1)  # (query, other image) pairs examined
    n_pairs = n_images * (n_images - 1) / 2
    k_pos = counts_at_or_above(positives, grid)
    recall = k_pos / len(positives)
    r_lo, r_hi = wilson_interval(k_pos, len(positives))
    dup_hits = fit.total_duplicate_hits()
    d_lo, d_hi = (x * trials for x in wilson_interval(dup_hits, trials))
    wrong_hits = fit.wrong_hits_above(grid)
    w_lo, w_hi = (x * trials for x in wilson_interval(wrong_hits, trials))

    def precision(d, r, w):
        tp = d * r
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(tp + w > 0, tp / (tp + w), np.nan)

    p = precision(dup_hits, recall, wrong_hits)
    p_lo = precision(d_lo, r_lo, w_hi)
    p_hi = precision(d_hi, r_hi, w_lo)
    defined = k_pos > 0  # above every positive score, precision is not measured
    observed = counts_at_or_above(hits, grid)
    fpr_lo, fpr_hi = wilson_interval(observed, trials)

    def clean(values):
        return [None if (not ok or np.isnan(v)) else round(float(v), 6) for v, ok in zip(values, defined)]

    return {
        "fit": fit.to_dict(),
        "duplicate_pairs": scale * dup_hits,
        "curve": {
            "threshold": [round(float(t), 4) for t in grid],
            "recall": recall.round(6).tolist(), "recall_lo": r_lo.round(6).tolist(), "recall_hi": r_hi.round(6).tolist(),
            "precision": clean(p), "precision_lo": clean(p_lo), "precision_hi": clean(p_hi),
            "expected_wrong_pairs": (scale * wrong_hits).round(3).tolist(),
            "called_pairs": (scale * (dup_hits * recall + wrong_hits)).round(3).tolist(),
            # Per-pair rate of neighbours above t that are not known duplicates (an upper
            # bound on the false-positive rate: unknown real duplicates are counted in it).
            "fpr_observed": (observed / trials).tolist(), "fpr_lo": fpr_lo.tolist(), "fpr_hi": fpr_hi.tolist(),
            "fpr_model": (scale * wrong_hits / max(n_pairs, 1)).tolist(),
        },
    }


def choose_threshold(curves: dict, target: float) -> tuple[float, bool]:
    """(threshold, target met): the calibrated threshold, or the most precise one if none reaches the target."""
    curve = curves["curve"]
    try:
        return threshold_for_precision(curve["threshold"], curve["precision"], target), True
    except UsageError:
        defined = [(p, t) for t, p in zip(curve["threshold"], curve["precision"]) if p is not None]
        return (max(defined)[1] if defined else 1.0), False


def at_threshold(curves: dict, t: float) -> dict:
    curve = curves["curve"]
    i = int(np.searchsorted(np.asarray(curve["threshold"]), t - 1e-9))
    i = min(i, len(curve["threshold"]) - 1)
    pick = {k: v[i] for k, v in curve.items()}
    return {
        "precision": pick["precision"], "precision_interval": [pick["precision_lo"], pick["precision_hi"]],
        "recall": pick["recall"], "recall_interval": [pick["recall_lo"], pick["recall_hi"]],
        "expected_wrong_pairs": pick["expected_wrong_pairs"], "called_pairs": pick["called_pairs"],
        "fpr_observed": pick["fpr_observed"], "fpr_interval": [pick["fpr_lo"], pick["fpr_hi"]],
        "fpr_model": pick["fpr_model"],
    }


def per_kind_recall(scores: np.ndarray, kinds: list[str], t: float) -> dict:
    out = {}
    kinds_arr = np.asarray(kinds)
    for kind in sorted(set(kinds)):
        s = scores[kinds_arr == kind]
        k = int((s >= t).sum())
        lo, hi = wilson_interval(k, len(s))
        out[kind] = {"n": int(len(s)), "recall": round(k / len(s), 4), "interval": [round(float(lo), 4), round(float(hi), 4)]}
    return out


def _query_verdict(store, index, whitening, encoder, card, ids, xb, meta, same_pairs, near_copies, near_threshold,
                   config: CalibrationConfig, rng, regions=(None, 0)) -> tuple[dict | None, dict]:
    """The query verdict (query_verdict.py), asked through the searcher that will answer users."""
    from ..matching.query import Searcher

    edited, targets, xq = near_copies
    searcher = Searcher.for_build(store, index, whitening, encoder, card, near_threshold, regions=regions)
    strengths, kinds = TIER_EDITS["near"]

    def edit(images, rng):
        return edited_copies(images, kinds, strengths, rng)[0]

    return calibrate_query(searcher, ids, meta, same_pairs, edited, [int(ids[r]) for r in targets], config.query,
                           rng, edit, xq_edited=xq, xb=xb)


def grouping_threshold(near: dict, query: dict | None, n_images: int) -> dict:
    """The threshold groups are built at, and why.

    The pairwise estimate's threshold when it reaches its target: the collection itself then
    says how precise its pairs are, whichever side of the query threshold that falls. When it
    does not (a collection with almost no duplicates pushes the pairwise threshold to the top,
    however clear its copies are), the query verdict's threshold on the descriptor's scale:
    groups are then no stricter than what `similar` calls a copy."""
    t_pairs = float(near["threshold"])
    expected = float(near.get("duplicate_pairs", 0.0))
    few = expected < max(1.0, 0.01 * n_images)
    if query is None or near["target_met"]:
        reason = (f"pairwise precision {near['target_precision']:.2f} reached" if near["target_met"]
                  else "pairwise precision target not reached and no query verdict: the most precise threshold")
        return {"threshold": t_pairs, "source": "pairs", "reason": reason, "almost_no_duplicates": few,
                "expected_duplicate_pairs": round(expected, 1)}
    t = min(t_pairs, float(query["descriptor_threshold"]))
    return {"threshold": t, "source": "query", "almost_no_duplicates": few, "expected_duplicate_pairs": round(expected, 1),
            "reason": "pairwise precision target not reached: groups use the query verdict's threshold "
                      "(the descriptor's scale)"}


# -- the whole calibration -------------------------------------------------------------------
def calibrate(store: Store, *, model_dir: Path, index, ids: np.ndarray, xb: np.ndarray, whitening,
              config: CalibrationConfig | None = None, progress=None, regions=(None, 0)) -> dict:
    """Calibrate every tier for the index over (ids, xb) (whitened vectors); returns calibration.json's content.
    `regions`: the generation's region index and grid (indexer/matching/regions.py), searched as users' queries will."""
    from ..learning.runtime import load_encoder
    from .verdicts import verdict_report

    config = config or CalibrationConfig()
    config.validate()
    n = len(ids)
    if n < MIN_IMAGES:
        raise NotReadyError(f"calibration needs at least {MIN_IMAGES} indexed images, the store has {n}")
    started = time.monotonic()
    rng = np.random.default_rng(config.seed)
    encoder, card = load_encoder(model_dir, store.settings.runtime)
    size = int(card["image_size"])

    meta = store.catalog.image_meta(ids.tolist())
    rows, paths, n_held = _originals(store, card, ids, meta, min(config.originals, n), rng)
    originals = read_originals(rows, paths, size)
    positives = {}
    for tier, (strengths, kinds) in TIER_EDITS.items():
        positives[tier] = positive_scores(encoder, size, whitening, xb, originals, strengths, kinds,
                                          config.edits_per_original, rng)
    near_copies = positives["near"][2:]
    positives = {tier: scores_kinds[:2] for tier, scores_kinds in positives.items()}

    a = rng.integers(0, n, config.random_pairs)
    b = (a + rng.integers(1, n, config.random_pairs)) % n  # never a == b
    random_scores = np.einsum("ij,ij->i", xb[a], xb[b])
    floor = negatives_floor(random_scores, positives["near"][0], n)
    query_rows = np.sort(rng.choice(n, min(config.queries, n), replace=False))
    latest = store.catalog.latest_verdicts()
    verdict_s, verdict_y = verdict_scores(store, ids, xb, latest)
    same_pairs = {(v["content_a"], v["content_b"]) for v in latest if v["verdict"] == "same"}
    hits, excluded = neighbour_hits(store, index, ids, xb, query_rows, floor, meta, same_pairs)

    grid = np.round(np.arange(np.floor(floor / GRID_STEP) * GRID_STEP, 1.0 + GRID_STEP / 2, GRID_STEP), 4)
    tiers = {}
    for tier in TIER_EDITS:
        scores, kinds = positives[tier]
        curves = tier_curves(scores, hits, floor=floor, n_images=n, n_queries=len(query_rows), grid=grid)
        t, met = choose_threshold(curves, config.target(tier))
        tiers[tier] = {"name": config.tiers[tier], "target_precision": config.target(tier), "target_met": met,
                       "threshold": t, "positives": int(len(scores)), **curves}
    if all(p is None for p in tiers["near"]["curve"]["precision"]):
        raise NotReadyError("calibration could not separate copies from other pairs in this collection "
                            f"({len(hits)} close pairs above {floor:.3f}); the default thresholds stay")
    query, query_samples = _query_verdict(store, index, whitening, encoder, card, ids, xb, meta, same_pairs, near_copies,
                                          tiers["near"]["threshold"], config, rng, regions)
    tiers["near"]["threshold_pairs"] = tiers["near"]["threshold"]
    groups = grouping_threshold(tiers["near"], query, n)
    tiers["near"]["threshold"] = groups["threshold"]
    verdicts = verdict_report(verdict_s, verdict_y, grid, config.target_precision, config.min_verdicts)
    if verdicts and verdicts.get("threshold") is not None and verdicts["threshold"] > tiers["near"]["threshold"]:
        tiers["near"]["threshold_synthetic"] = tiers["near"]["threshold"]
        tiers["near"]["threshold"] = verdicts["threshold"]  # a person's verdicts say the synthetic one is too loose
    tiers["similar"]["threshold"] = min(tiers["similar"]["threshold"], tiers["near"]["threshold"])
    for tier in tiers:
        t = tiers[tier]["threshold"]
        tiers[tier]["at_threshold"] = at_threshold(tiers[tier], t)
        tiers[tier]["recall_by_edit"] = per_kind_recall(*positives[tier], t)
    if verdicts:
        verdicts["at_threshold"] = verdicts["precision_at"](tiers["near"]["threshold"])
        verdicts.pop("precision_at")

    result = {
        "version": 1,
        "model": card["version"],
        "created_at": time.time(),
        "seconds": round(time.monotonic() - started, 2),
        "config": {k: v for k, v in asdict(config).items()},
        "collection": {"images": n, "pairs": n * (n - 1) // 2, "queries": int(len(query_rows))},
        "positives": {"originals": len(rows), "held_out_originals": n_held,
                      "edits": {tier: list(TIER_EDITS[tier][1]) for tier in TIER_EDITS}},
        "negatives": {"floor": round(floor, 4), "hard_pairs": int(len(hits)), "random_pairs": int(len(random_scores)),
                      "excluded_known_duplicates": excluded},
        "assumptions": [
            "real duplicates in this collection score like the synthetic edited copies of its own images",
            f"similarities of pairs that are not duplicates fall off exponentially above {floor:.3f}",
            "neighbours of the sampled images represent the whole collection (scaled by its size)",
        ],
        "tiers": tiers,
        "query": query,
        "groups": groups,
        "verdicts": verdicts,
        "distributions": {tier: positives[tier][0].round(4).tolist() for tier in positives}
        | {"hard_negatives": hits.round(4).tolist()[:20_000], "random": random_scores.round(3).tolist()}
        | query_samples,
    }
    from .calibration_report import summary_text

    result["summary"] = summary_text(result)
    log.info("calibrated in %.1f s: %s", result["seconds"], result["summary"]["headline"])
    return result
