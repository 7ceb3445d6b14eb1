"""The pairs a person should judge first: those whose verdict tells most about the threshold.

Uncertainty sampling (Lewis & Gale 1994): ask about the pairs whose answer is least predictable.
From the current generation's pairs (pairs.npz: every pair at or above the similar threshold, with
the score groups were built from), with t the near-duplicate threshold groups use:

1. Left out: pairs of one content (same bytes) or of the same pixels (nothing to judge), pairs whose
   two contents already have a verdict, and pairs with a file no longer present.
2. Band: the `window` pairs left nearest t on each side, by score (ties by file ids).
3. Order: the estimated P(same | score) nearest 1/2 first; ties by |score - t|, then by file ids.
   P(same) is read on the pairs' own (descriptor) scale: the isotonic fit to a person's verdicts
   when calibration used them (`verdicts.verdict_report`), else the pairwise mixture's posterior
   D p(s) / (D p(s) + exp(a - b s)) (`rates.MixtureFit`). Without a calibration, |score - t| alone.
   The query verdict's `probability` is not used: it maps the query score (normalised, moved up
   by geometric verification), another scale than these pairs'.
4. Dealt in rounds: within a round each image is in at most one pair (a pair goes to the first
   round where neither of its images is yet), so one image with many look-alikes does not fill
   the first page.

Why this narrows the interval at t: the precision of the collection's pairs at or above t is the
share of "same" among them. A pair not judged yet adds its Bernoulli variance p (1 - p) to what is
unknown about that share, and its verdict removes it: most at p = 1/2, almost nothing for a pair
far above t (surely "same") or far below (surely "different", and not counted at t at all). Each
judged pair at or above t also adds one to the count the Wilson interval of the judged precision
at t is computed on. Pairs just below t are in the band because they decide the precision one
step lower and the isotonic fit's crossing, and a "same" among them joins groups at once. The
judged pairs are then not a random sample above t: they over-represent the hard pairs near it,
so the judged precision errs low, on the side of a stricter threshold.
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from ..core.errors import NotReadyError
from ..core.rates import MixtureFit

log = logging.getLogger(__name__)

WINDOW = 500  # pairs offered on each side of the threshold: far more than one sitting judges
SOURCES = {"verdicts": "your verdicts", "calibration": "the calibration's pair model"}
FILE_FIELDS = ("path", "width", "height", "file_size")


@dataclass(frozen=True)
class ReviewPair:
    a: dict  # id, path, width, height, file_size
    b: dict
    similarity: float
    probability: float | None
    round: int
    why: str

    def to_dict(self) -> dict:
        return {"a": self.a, "b": self.b, "similarity": round(self.similarity, 6),
                "probability": None if self.probability is None else round(self.probability, 4),
                "round": self.round, "why": self.why}


@dataclass(frozen=True)
class ReviewQueue:
    generation: str
    threshold: float
    source: str | None  # where P(same) comes from: "verdicts", "calibration", or None
    pairs: list[ReviewPair]
    left_out: dict = field(default_factory=dict)  # reason -> pairs not offered


def probability_model(calibration: dict | None) -> tuple[str | None, Callable | None]:
    """(source, scores -> P(same)) on the pairs' descriptor scale from a generation's calibration
    (see the module docstring), or (None, None)."""
    if not calibration:
        return None, None
    verdicts = calibration.get("verdicts") or {}
    if verdicts.get("used") and verdicts.get("isotonic"):
        grid, p = np.asarray(verdicts["isotonic"], dtype=np.float64).T
        # Linear between the grid's points and clipped at its ends, as IsotonicRegression.predict does.
        return "verdicts", lambda s: np.interp(s, grid, p)
    near = (calibration.get("tiers") or {}).get("near") or {}
    positives = (calibration.get("distributions") or {}).get("near")
    if near.get("fit") and positives:
        fit = MixtureFit(**near["fit"])
        return "calibration", lambda s: fit.duplicate_probability(s, positives)
    return None, None


def review_queue(catalog, generation, *, window: int = WINDOW) -> ReviewQueue:
    """The pairs of `generation` (generations.Generation) to judge, best first, as the module
    docstring says; `catalog` gives the files, their contents and the verdicts so far."""
    started = time.monotonic()
    pairs = generation.load_pairs()
    if pairs is None:
        raise NotReadyError(f"generation {generation.name} has no pairs file (an older build, or pruned since it "
                            "was loaded): run `nearsight index` again to publish one that has")
    a, b, sims = pairs
    t = float(generation.meta["thresholds"]["near"])
    keep, left_out, meta = _judgeable(catalog, a, b)
    a, b, s = a[keep], b[keep], sims[keep].astype(np.float64)
    band = _band(a, b, s, t, window)
    a, b, s = a[band], b[band], s[band]
    source, model = probability_model(generation.load_calibration())
    p = None if model is None else np.asarray(model(s), dtype=np.float64)
    uncertainty = np.zeros_like(s) if p is None else np.abs(p - 0.5)
    order = np.lexsort((b, a, np.abs(s - t), uncertainty))  # the last key sorts first
    out = []
    for row, rnd in deal(order.tolist(), a.tolist(), b.tolist()):
        pa = None if p is None else float(p[row])
        out.append(ReviewPair(_file(meta, int(a[row])), _file(meta, int(b[row])), float(s[row]), pa, rnd,
                              _why(float(s[row]), t, pa, source)))
    log.info("review queue of generation %s: %d pairs near threshold %.3f (P(same) from %s; left out %s) in %.2f s",
             generation.name, len(out), t, source or "nothing",
             ", ".join(f"{k} {n}" for k, n in left_out.items()) or "none", time.monotonic() - started)
    return ReviewQueue(generation.name, t, source, out, left_out)


def _judgeable(catalog, a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, dict, dict]:
    """(which pairs are left to judge, how many others were left out per reason, the files' metadata)."""
    ids = np.unique(np.r_[a, b])
    meta = catalog.image_meta(ids.tolist())  # present, readable files only
    content_of = catalog.content_ids_of(ids.tolist())
    pixel_codes: dict[str, int] = {}
    present = np.array([i in meta and i in content_of for i in ids.tolist()], dtype=bool)
    content = np.array([content_of.get(i, -1) for i in ids.tolist()], dtype=np.int64)
    # Pixel hashes exist where the build looked for them (near pairs of equal size, different bytes).
    pixels = np.array([pixel_codes.setdefault(meta[i]["pixel_hash"], len(pixel_codes))
                       if i in meta and meta[i]["pixel_hash"] else -1 for i in ids.tolist()], dtype=np.int64)
    ra, rb = np.searchsorted(ids, a), np.searchsorted(ids, b)
    absent = ~(present[ra] & present[rb])
    same_bytes = ~absent & (content[ra] == content[rb])
    same_pixels = ~absent & ~same_bytes & (pixels[ra] >= 0) & (pixels[ra] == pixels[rb])
    span = int(content.max()) + 1 if len(content) else 1
    lo, hi = np.minimum(content[ra], content[rb]), np.maximum(content[ra], content[rb])
    verdict_keys = np.array([v["content_a"] * span + v["content_b"] for v in catalog.latest_verdicts()
                             if v["content_b"] < span], dtype=np.int64)  # content_a < content_b
    judged = ~absent & ~same_bytes & ~same_pixels & np.isin(lo * span + hi, verdict_keys)
    keep = ~(absent | same_bytes | same_pixels | judged)
    left_out = {"judged": int(judged.sum()), "same-bytes": int(same_bytes.sum()),
                "same-pixels": int(same_pixels.sum()), "absent": int(absent.sum())}
    return keep, left_out, meta


def _band(a: np.ndarray, b: np.ndarray, s: np.ndarray, t: float, window: int) -> np.ndarray:
    """Rows of the `window` pairs nearest `t` at or above it and the `window` nearest below it."""
    above, below = np.flatnonzero(s >= t), np.flatnonzero(s < t)
    above = above[np.lexsort((b[above], a[above], s[above]))[:window]]
    below = below[np.lexsort((b[below], a[below], -s[below]))[:window]]
    return np.sort(np.r_[above, below])


def deal(order: list[int], a: list[int], b: list[int]) -> list[tuple[int, int]]:
    """(row, round) for the rows in `order`, round by round and in `order` within each: a row goes
    to the first round in which no row before it holds one of its two images."""
    rounds_of: dict[int, set[int]] = {}
    placed = []
    for position, row in enumerate(order):
        taken_a, taken_b = rounds_of.setdefault(a[row], set()), rounds_of.setdefault(b[row], set())
        rnd = 0
        while rnd in taken_a or rnd in taken_b:
            rnd += 1
        taken_a.add(rnd)
        taken_b.add(rnd)
        placed.append((rnd, position, row))
    placed.sort()
    return [(row, rnd) for rnd, _position, row in placed]


def _file(meta: dict, file_id: int) -> dict:
    return {"id": file_id, **{k: meta[file_id][k] for k in FILE_FIELDS}}


def _why(s: float, t: float, p: float | None, source: str | None) -> str:
    side = "above" if s >= t else "below"
    text = f"similarity {s:.3f}, {abs(s - t):.3f} {side} the duplicate threshold {t:.3f}"
    if p is None:
        return text + "; no calibration yet: the pairs nearest the threshold come first"
    odds = ("about even odds: a verdict here settles what the estimate cannot" if 0.25 <= p <= 0.75
            else "among the least certain pairs left near the threshold")
    return text + f"; P(same) {p:.2f} by {SOURCES[source]}, {odds}"
