"""The query verdict: "is this result a copy of my image?", calibrated per query.

The collection's pairwise calibration (calibrate.py) asks which pairs inside the collection
are copies; its precision depends on how many duplicate pairs the collection holds, so a
collection with almost none drives its threshold to the top. A query (`similar`, the
service, a nightly upload checked against the archive) asks something else, and the error
that matters there is per query: how often a query whose original is not in the collection
gets a wrong result flagged as a duplicate. That rate does not depend on how many
duplicates the collection happens to hold.

Both sides are measured by asking the generation real questions through `Searcher.neighbours`,
the function that answers users (descriptor, score normalisation, geometric verification):

* positives: synthetic copies of the collection's own images (calibrate.py's mild edits);
  the score of the result that is the original (a miss when it is not returned);
* negatives: images of the collection, as they are and edited, queried against the index
  without themselves and their known duplicates (same bytes, same pixels, a person's "same");
  the score of the best remaining result. Where that result passes geometric verification it is
  most likely an unknown duplicate inside the collection, not a look-alike: it is left out of
  the negatives and counted.

The threshold is the lowest at which the upper end of the Wilson interval of the false-flag
rate stays within the target (so "1 %" holds at 95 % confidence); when the sample is too small
for that, the lowest threshold above every negative. A result's `probability` comes from
isotonic regression of "is a copy" on score over the same positives and negatives, weighted
to a stated prior share of copies among queries.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np

from ..core.errors import UsageError
from ..core.rates import wilson_interval
from ..reading.images import readable_images

log = logging.getLogger(__name__)

ANSWERED = 5  # results asked per calibration query: the verified top 3 and a little room
CHUNK = 256  # images asked at a time once the first plain_negatives (edited_negatives) are asked
# A verified negative counts as an unknown duplicate when its descriptor score reaches this quantile of the
# synthetic copies' (their lowest tenth scores below it).
COPY_LIKE_QUANTILE = 0.1
# ... or when its match has at least this many times the inliers verification needs. Measured with one trained
# model on two collections (every indexed file asked as it is): look-alikes that verified matched on 12-18
# inliers (15 of them, demo archive and quality benchmark's photos with planted copies); real copies that
# verified had 22 or more in 95 % of 1,157 (planted copies, strong edits included) and 72 or more in all 591
# of the demo's. The descriptor rule alone left 130 verified real copies among the negatives of a collection
# rich in edited copies, and its verdict then found 0.58 of the synthetic copies instead of about 0.9.
STRONG_INLIER_FACTOR = 2
DESCRIPTOR_KEY = "descriptor_similarity"


@dataclass(frozen=True)
class QueryVerdictConfig:
    false_flag_rate: float = 0.01  # target share of queries without their original that get a flag
    prior: float = 0.5  # share of queries that are copies, for `probability`
    plain_negatives: int = 1024  # collection images queried as they are that remain negatives (more are asked)
    edited_negatives: int = 512  # ... and edited that remain negatives (more are asked)

    def validate(self) -> None:
        if not 0.0 < self.false_flag_rate < 0.5:
            raise UsageError(f"the false-flag rate must be in (0, 0.5), not {self.false_flag_rate}")
        if not 0.0 < self.prior < 1.0:
            raise UsageError(f"the prior share of copies must be in (0, 1), not {self.prior}")


# -- the statistics ---------------------------------------------------------------------------
def false_flag_threshold(negatives: np.ndarray, target: float, confidence: float = 0.95) -> tuple[float, bool]:
    """(threshold, target confirmed): the lowest threshold whose false-flag rate over `negatives`
    (each a query's best wrong score) has a Wilson upper bound within `target`; if even no flag
    at all cannot confirm it (too few queries), the lowest threshold above every negative."""
    n = len(negatives)
    if n == 0:
        return 1.0, False
    ranked = np.sort(np.asarray(negatives, dtype=np.float64))[::-1]
    ks = np.arange(n + 1)
    _lo, hi = wilson_interval(ks, n, confidence)
    allowed = np.flatnonzero(hi <= target)
    k = int(allowed.max()) if len(allowed) else 0  # flags allowed among the n negatives
    if k >= n:
        return float(ranked[-1]), True
    # Just above the (k+1)-th best negative, on a 1e-4 grid (scores are rounded to 1e-6).
    t = float(np.ceil((ranked[k] + 1e-6) * 1e4) / 1e4)
    return min(t, 1.0), bool(len(allowed))


def fit_probability(positives: np.ndarray, negatives: np.ndarray, prior: float) -> dict:
    """Isotonic regression of "is a copy" on score, positives and negatives weighted so that
    copies make up `prior` of the total weight; the fitted steps as (scores, probabilities)."""
    from sklearn.isotonic import IsotonicRegression

    pos, neg = np.asarray(positives, dtype=np.float64), np.asarray(negatives, dtype=np.float64)
    x = np.concatenate([pos, neg])
    y = np.concatenate([np.ones(len(pos)), np.zeros(len(neg))])
    w = np.concatenate([np.full(len(pos), prior / max(len(pos), 1)), np.full(len(neg), (1 - prior) / max(len(neg), 1))])
    fit = IsotonicRegression(y_min=0.0, y_max=1.0, increasing=True, out_of_bounds="clip").fit(x, y, sample_weight=w)
    return {"prior": prior, "scores": np.round(fit.X_thresholds_, 6).tolist(),
            "probabilities": np.round(fit.y_thresholds_, 6).tolist()}


def copy_probability(verdict: dict, score: float) -> float | None:
    """The calibrated probability that a result with this score is a copy (linear between the
    fitted steps, clipped at both ends, as IsotonicRegression.predict does)."""
    mapping = verdict.get("probability")
    if not mapping or not mapping["scores"]:
        return None
    return round(float(np.interp(score, mapping["scores"], mapping["probabilities"])), 4)


def even_odds_score(mapping: dict | None) -> float | None:
    """The lowest score at which `copy_probability` reaches one half (the fitted steps interpolated
    linearly, as IsotonicRegression.predict does), rounded up to the 1e-4 grid of the thresholds; None
    when every score already gets at least one half, or there is no fit."""
    if not mapping or not mapping["scores"]:
        return None
    scores, probs = mapping["scores"], mapping["probabilities"]
    above = [i for i, p in enumerate(probs) if p >= 0.5]
    if not above:
        return float(np.ceil(scores[-1] * 1e4) / 1e4 + 1e-4)  # never as likely as not: above every fitted score
    i = above[0]
    if i == 0:
        return None
    s0, s1, p0, p1 = scores[i - 1], scores[i], probs[i - 1], probs[i]
    x = s0 + (0.5 - p0) * (s1 - s0) / (p1 - p0)
    return float(np.ceil(round(x, 9) * 1e4) / 1e4)


def threshold_report(positives: np.ndarray, misses: int, negatives: np.ndarray, t: float) -> dict:
    """Realised recall and false-flag rate at `t`, each with its Wilson interval."""
    n_pos = len(positives) + misses
    k_pos = int((np.asarray(positives) >= t).sum())
    k_neg = int((np.asarray(negatives) >= t).sum())
    r_lo, r_hi = wilson_interval(k_pos, n_pos)
    f_lo, f_hi = wilson_interval(k_neg, len(negatives))
    return {"recall": round(k_pos / max(n_pos, 1), 4), "recall_interval": [round(float(r_lo), 4), round(float(r_hi), 4)],
            "false_flag_rate": round(k_neg / max(len(negatives), 1), 4),
            "false_flag_interval": [round(float(f_lo), 4), round(float(f_hi), 4)],
            "flagged_negatives": k_neg, "found_positives": k_pos}


# -- asking the generation ------------------------------------------------------------------
def known_duplicates(ids: np.ndarray, meta: dict, content: dict, same_pairs: set) -> dict[int, set[int]]:
    """Per indexed file, the other indexed files known to be the same picture: same bytes, same
    pixels, or a person's "same" between their contents."""
    by_key: dict[tuple, list[int]] = {}
    for i in ids.tolist():
        m = meta.get(i)
        if m is None:
            continue
        by_key.setdefault(("bytes", m["content_hash"]), []).append(i)
        if m.get("pixel_hash"):
            by_key.setdefault(("pixels", m["pixel_hash"]), []).append(i)
    files_of_content: dict[int, list[int]] = {}
    for i, c in content.items():
        files_of_content.setdefault(c, []).append(i)
    out: dict[int, set[int]] = {}
    for members in by_key.values():
        if len(members) > 1:
            for i in members:
                out.setdefault(i, set()).update(j for j in members if j != i)
    for a, b in same_pairs:
        for i in files_of_content.get(a, []):
            out.setdefault(i, set()).update(files_of_content.get(b, []))
        for j in files_of_content.get(b, []):
            out.setdefault(j, set()).update(files_of_content.get(a, []))
    return out


def positive_answers(searcher, edited: list, targets: list[int], dups: dict[int, set[int]],
                     xq: np.ndarray | None = None) -> tuple[list[dict], int]:
    """For each synthetic copy, the result that is its original (or a known duplicate of it):
    a list of those results, and how many copies did not get their original back. `xq`: the
    copies' vectors when the caller has them already (the searcher's own `vectors_for_images`)."""
    xq = searcher.vectors_for_images(edited) if xq is None else xq
    found, misses = [], 0
    for start in range(0, len(edited), 32):
        answers = searcher.neighbours(xq[start : start + 32], ANSWERED, images=edited[start : start + 32])
        for target, results in zip(targets[start : start + 32], answers):
            same = {target} | dups.get(target, set())
            hit = next((r for r in results if r["id"] in same), None)
            if hit is None:
                misses += 1
            else:
                found.append(hit)
    return found, misses


def negative_answers(searcher, queries: list[tuple[int, object]], dups: dict[int, set[int]],
                     known: list[tuple[np.ndarray, np.ndarray | None] | None] | None = None
                     ) -> tuple[list[dict], list[dict]]:
    """(negatives, likely duplicates): the best result of each (file id, query image) with the
    file and its known duplicates left out, split by whether it passed geometric verification.
    `known[j]`, where given, is query j's vector and its parts' vectors (or None), known already because
    it is an indexed file asked as it is: the same answers for fewer encoder passes."""
    negatives, verified = [], []
    known = known if known is not None else [None] * len(queries)
    for start in range(0, len(queries), 32):
        block = queries[start : start + 32]
        images = [im for _, im in block]
        excludes = [{file_id} | dups.get(file_id, set()) for file_id, _ in block]
        given = known[start : start + 32]
        made = iter(searcher.vectors_for_images([im for im, k in zip(images, given) if k is None]))
        xq = np.stack([next(made) if k is None else k[0] for k in given]).astype(np.float32, copy=False)
        parts = [None if k is None else k[1] for k in given]
        answers = searcher.neighbours(xq, ANSWERED, excludes=excludes, images=images, parts=parts)
        for (file_id, _), results in zip(block, answers):
            if results:
                best = results[0]
                (verified if (best.get("evidence") or {}).get("verified") else negatives).append({"query": file_id, **best})
    return negatives, verified


def strong_inliers() -> int:
    """Inliers that confirm a verified match beyond doubt: twice the least verification accepts."""
    from .verify import VerifyConfig

    return STRONG_INLIER_FACTOR * VerifyConfig().min_inliers


def strongly_verified(result: dict, strong: int) -> bool:
    """Whether a result's geometric match verified on at least `strong` inliers (`strong_inliers()`)."""
    evidence = result.get("evidence") or {}
    return bool(evidence.get("verified")) and int(evidence.get("inliers", 0)) >= strong


def copy_like(verified: list[dict], positives: list[dict], quantile: float = COPY_LIKE_QUANTILE
              ) -> tuple[list[dict], list[dict]]:
    """(those of the `verified` negatives taken for unknown duplicates, the others). One is taken for a duplicate
    when its descriptor score reaches the `quantile` of the positives' (numpy's linear quantile), or when its
    geometric match has at least `strong_inliers()` inliers. Without positives every verified one is taken for
    a duplicate."""
    if not positives:
        return list(verified), []
    floor = float(np.quantile([r[DESCRIPTOR_KEY] for r in positives], quantile))
    strong = strong_inliers()

    def duplicate(r: dict) -> bool:
        return r[DESCRIPTOR_KEY] >= floor or strongly_verified(r, strong)

    return [r for r in verified if duplicate(r)], [r for r in verified if not duplicate(r)]


def own_images(searcher, ids: np.ndarray, rows: list[int], max_side: int) -> list[tuple[int, int, object]]:
    """(row, file id, pixels) of indexed files, read from the store's small copies."""
    sources = searcher.store.catalog.pixel_sources([int(ids[r]) for r in rows])
    wanted = [(r, int(ids[r])) for r in rows if int(ids[r]) in sources]
    read = readable_images([((r, i), searcher.store.pixels_path(sources[i])) for r, i in wanted], max_side,
                           lambda key, _path, exc: log.debug("query calibration skips %s: %s", key[1], exc))
    return [(r, i, image) for (r, i), image in read]


def calibrate_query(searcher, ids: np.ndarray, meta: dict, same_pairs: set, edited: list, targets: list[int],
                    config: QueryVerdictConfig, rng, edit, xq_edited: np.ndarray | None = None,
                    xb: np.ndarray | None = None) -> tuple[dict, dict]:
    """The query verdict for the generation `searcher` answers from: (verdict, score samples).

    `edited` are synthetic copies of the indexed files `targets` (calibrate.py's positives);
    `edit(images, rng)` makes edited negative queries, one of each image; `xq_edited` are the copies' vectors if known;
    `xb`, when given, the indexed vectors of `ids` in the searcher's space: the images asked as they are then take
    their own vector and their parts' region vectors instead of being embedded again."""
    config.validate()
    content = searcher.store.catalog.content_ids_of(ids.tolist())
    dups = known_duplicates(ids, meta, content, same_pairs)
    found, misses = positive_answers(searcher, edited, targets, dups, xq_edited)
    n = len(ids)
    negatives, likely, n_unlike = [], [], 0

    def ask(queries, known=None) -> int:
        """Ask `queries` ((file id, image)), keep their negatives and likely duplicates; how many stayed negatives.
        A verified best result is taken for an unknown duplicate (and left out of the negatives) only when the
        descriptor agrees, scoring it like most of the synthetic copies do, or when the geometric match is
        strong (`copy_like`): a look-alike that shares a drawn element, a logo or a caption with its neighbour
        can verify, on few inliers, and leaving it out would put the threshold where such look-alikes get
        flags; keeping a real copy among the negatives (a collection rich in edited copies) puts it too high."""
        nonlocal n_unlike
        more, more_likely = negative_answers(searcher, queries, dups, known)
        more_likely, more_unlike = copy_like(more_likely, found)
        negatives.extend(more + more_unlike)
        likely.extend(more_likely)
        n_unlike += len(more_unlike)
        return len(more) + len(more_unlike)

    # Each image is asked at most once as it is and once edited, in a random order, until `plain_negatives`
    # and `edited_negatives` of each kind remain negatives (or every image has been asked): in a collection
    # rich in copies most best results are copies, left out as likely duplicates, and too few negatives would
    # put the false-flag bound where the sample runs out, not where the rate is.
    plain_order, edited_order = rng.permutation(n).tolist(), rng.permutation(n).tolist()
    asked_plain = asked_edited = plain_left = edited_left = 0
    while asked_edited < n and edited_left < config.edited_negatives:
        rows = edited_order[asked_edited : asked_edited + max(CHUNK, config.edited_negatives - edited_left)]
        asked_edited += len(rows)
        to_edit = [(i, im) for _r, i, im in own_images(searcher, ids, rows, 2 * searcher.size)]
        edited_left += ask(list(zip([i for i, _ in to_edit], edit([im for _, im in to_edit], rng))))
    while asked_plain < n and plain_left < config.plain_negatives:
        rows = plain_order[asked_plain : asked_plain + max(CHUNK, config.plain_negatives - plain_left)]
        asked_plain += len(rows)
        as_indexed = own_images(searcher, ids, rows, 2 * searcher.size)
        known = None
        if xb is not None:  # their own vectors and region vectors: no encoder pass
            parts = searcher.own_parts([i for _, i, _ in as_indexed])
            known = [(xb[r], parts.get(i)) for r, i, _ in as_indexed]
        plain_left += ask([(i, im) for _, i, im in as_indexed], known)

    pos = np.asarray([r["similarity"] for r in found])
    neg = np.asarray([r["similarity"] for r in negatives])
    t, met = false_flag_threshold(neg, config.false_flag_rate)
    # The same question on the descriptor's own scale (no normalisation, no verification): the
    # scale groups are built on, so the grouping threshold can be compared with this one.
    probability = fit_probability(pos, neg, config.prior) if len(pos) and len(neg) else None
    # A result is called a copy only where a copy is also at least as likely as not: on a collection whose
    # own negatives are scarce near the top (a look-alike that verification confirms is left out of them as
    # a likely duplicate), the false-flag bound alone can fall where the fitted chance of a copy is nil.
    even = even_odds_score(probability)
    t_flags = t
    if even is not None and even > t:
        t = even
    pos_d = np.asarray([r[DESCRIPTOR_KEY] for r in found])
    neg_d = np.asarray([r[DESCRIPTOR_KEY] for r in negatives])
    t_d, _ = false_flag_threshold(neg_d, config.false_flag_rate)
    verdict = {
        "threshold": t, "false_flag_threshold": t_flags, "even_odds_score": even,
        "target_false_flag_rate": config.false_flag_rate, "target_confirmed": met,
        "positives": int(len(pos) + misses), "missed_positives": int(misses), "negatives": int(len(neg)),
        "negative_queries": {"as_indexed": asked_plain, "edited": asked_edited},
        "likely_duplicates": {"verified": len(likely), "not_verified": int(len(neg) - n_unlike),
                              "verified_unlike_copies": n_unlike},
        **threshold_report(pos, misses, neg, t),
        "descriptor_threshold": t_d, "descriptor": threshold_report(pos_d, misses, neg_d, t_d),
        "probability": probability,
    }
    samples = {"query_positives": np.round(pos, 4).tolist(), "query_negatives": np.round(neg, 4).tolist()}
    return verdict, samples
