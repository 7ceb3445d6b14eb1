"""Re-rank a query's best candidates by geometric verification (indexer/matching/verify.py).

A descriptor alone cannot tell a crop of a photo from a neighbouring tile of it: both
look alike. Keypoints that agree under one similarity transform can. The top
`verify_top` candidates of each query are verified against the query image; a verified
candidate's score moves halfway to 1,

    s_verified = 1 - (1 - s) / 2,

so verified copies rank above unverified look-alikes while the order among verified
candidates, and every unverified score, is kept. Verification never lowers a score: a
true copy that fails it (heavy blur, a flat image) keeps its descriptor's score.

Measured (benchmarks/results/ablation.md): on the quality benchmark, top 3 at 256 px
lifted µAP from 0.885 to 0.941 and recall at precision 0.99 from 0.74 to 0.92. When the best
candidate is still unverified, `verify_more` (12) further candidates are verified: on the
same benchmark µAP 0.925 -> 0.945, crops' recall@1 0.72 -> 0.80 (benchmarks/rescore.py on
the store of benchmarks/results/quality.md). When it is still unverified after those, its first
`verify_fine` (6) unconfirmed candidates are checked once more with the candidate at twice the
side (`rerank_fine`): crops' recall@1 0.821 -> 0.836, crops keeping a fifth of the photo 0.19 -> 0.33,
µAP 0.961 -> 0.963, with no more match-less queries flagged (rescore.py, same store).

Candidates are read from the store's small copies (256 px by default), so verification
never opens a user's original file at query time. A query's keypoints, and every match of
them against a candidate, are found once (verify.QueryFeatures) however many rounds ask.
"""

from __future__ import annotations

import functools
import logging
import os
from typing import Mapping, Sequence

from PIL import Image

from ..core.errors import ImageReadError
from ..reading.images import read_image

log = logging.getLogger(__name__)

VERIFY_SIDE = 256  # both images are verified at this longest side (the small copies' default size)
FEATURE_CACHE = 4096  # candidates' keypoints kept (~20 KB each): the same files come back query after query
# The fine check (`rerank_fine`): the candidate's small copy brought to FINE_FACTOR times VERIFY_SIDE, with
# FINE_FACTOR**2 times the keypoints (the same density). A crop keeping a fifth of a photo fills the query's
# working image but only 0.45 of the candidate's side at VERIFY_SIDE, where too few of the candidate's keypoints,
# at too coarse a scale, fall inside it. Measured on the quality benchmark's store (crops whose original is among
# the first 15 candidates): crop-80 verified 0.19 at VERIFY_SIDE, 0.44 with 1,500 keypoints at that side, 0.81
# at twice the side, and the same 0.81 from the original file at 512 px, so the small copy is enough;
# 0 of 900 pairs of match-less queries and their candidates verified in any variant.
FINE_FACTOR = 2
FINE_CACHE = 1024  # fine keypoints kept (~80 KB each)
# The query's own best candidates (found by the image as given, not through another view) that the fine check
# takes besides its `count`. Measured on the quality benchmark's store (rescore.py, 4,848 queries): crops keeping a
# fifth, recall@1 0.667 -> 0.778, crops overall 0.935 -> 0.948, µAP 0.969 -> 0.970, no more match-less query
# flagged; 6 gave the same as 3.
FINE_DIRECT = 3


def boosted(score: float) -> float:
    """A verified candidate's score: halfway from its descriptor score to 1."""
    return 1.0 - (1.0 - score) / 2.0


def verdict_score(result: dict) -> float:
    """What a result's `duplicate` verdict compares with the calibrated threshold: its descriptor score,
    boosted when verified (calibration measures unnormalised scores, so the query normalisation of
    `similarity` is left out)."""
    d = result["descriptor_similarity"]
    return boosted(d) if (result.get("evidence") or {}).get("verified") else d


def read_small(paths: Mapping[int, str]) -> dict[int, Image.Image]:
    """Each id's pixels at VERIFY_SIDE from its file (a small copy, usually); ids whose file cannot be
    read (changed or gone since it was indexed) are left out."""
    out = {}
    for ident, path in paths.items():
        try:
            out[ident] = read_image(path, max_side=VERIFY_SIDE)[0]
        except (ImageReadError, OSError) as exc:
            log.debug("cannot read %s (id %s) for verification: %s", path, ident, exc)
    return out


def small_features(paths: Mapping[int, str], *, fine: bool = False) -> dict:
    """Each id's ORB features at VERIFY_SIDE (verify.Features), like `read_small` but kept in memory
    while a file keeps its size and modification time: a collection's close neighbours are asked
    for again and again (calibration, grouping, a busy service), and reading and describing them
    is most of verification's cost. Ids whose file cannot be read are left out. `fine`: the fine
    check's keypoints (`fine_config`) instead."""
    at = _fine_features_at if fine else _features_at
    out = {}
    for ident, path in paths.items():
        try:
            st = os.stat(path)
            out[ident] = at(str(path), st.st_mtime_ns, st.st_size)
        except (ImageReadError, OSError) as exc:
            log.debug("cannot read %s (id %s) for verification: %s", path, ident, exc)
    return out


@functools.lru_cache(maxsize=FEATURE_CACHE)
def _features_at(path: str, _mtime_ns: int, _size: int):
    from .keypoints import load
    from .verify import features_or_reason

    kept = load(path, 0)  # found at index time (indexer/matching/keypoints.py)
    if kept is not None:
        return kept
    return features_or_reason(read_image(path, max_side=VERIFY_SIDE)[0], verify_config())


@functools.lru_cache(maxsize=FINE_CACHE)
def _fine_features_at(path: str, _mtime_ns: int, _size: int):
    from .keypoints import load
    from .verify import features_or_reason

    kept = load(path, 1)  # found at index time (indexer/matching/keypoints.py)
    if kept is not None:
        return kept
    # Read at VERIFY_SIDE like the other check (the small copies' size), then enlarged to the fine side.
    return features_or_reason(read_image(path, max_side=VERIFY_SIDE)[0], fine_config())


def _evidence(v) -> dict:
    query_box, box = v.boxes()
    return {"verified": bool(v.verified), "inliers": int(v.inliers), "matches": int(v.matches),
            "box": box, "query_box": query_box,
            "scale": None if v.scale is None else round(float(v.scale), 4),
            "mirrored": bool(v.mirrored), "reason": v.reason, "correlation": None}


def rerank(query, results: list[dict], candidates: dict[int, str], top: int,
           threshold: float | None = None, *, mirrored: bool = True, aligned: int = 0) -> list[dict]:
    """Verify the first `top` results (dicts with id and similarity, best first) against `query`
    (an image, or its verify.QueryFeatures at VERIFY_SIDE).

    `candidates` maps result ids to the file to read each candidate's pixels from. Each verified
    result gets the boosted similarity, `descriptor_similarity` (the score before) and `evidence`;
    the list comes back sorted by the new scores. A verified result's `duplicate` is redone against
    `threshold` with its boosted descriptor score (thresholds are calibrated on that scale).
    `mirrored=False` leaves out the mirrored query's try (verify.VerifyConfig.try_mirrored). The first `aligned`
    of the results that keypoints do not confirm get the same-frame check (`_check_aligned`)."""
    from .verify import verify_candidates

    head = [r for r in results[:top] if r["id"] in candidates]
    known = small_features({r["id"]: candidates[r["id"]] for r in head})
    checked = [r for r in head if r["id"] in known]
    features = [known[r["id"]] for r in checked]
    if not checked:
        return results
    # verify_candidates brings the query to VERIFY_SIDE itself.
    for r, v in zip(checked, verify_candidates(query, features, config=verify_config(mirrored))):
        _record(r, v, threshold)
    if aligned:
        _check_aligned(query_features(query), [r for r in checked if not r["evidence"]["verified"]][:aligned],
                       candidates, threshold)
    return sorted(results, key=lambda r: -r["similarity"])


def _check_aligned(query, results: list[dict], candidates: dict[int, str], threshold: float | None) -> None:
    """The same-frame check (indexer/matching/aligned.py) of results that keypoints did not confirm: each gets its
    band correlation in its evidence, and one that reaches MIN_CORRELATION is confirmed like a keypoint match
    (the boosted score), its footprint the whole frame."""
    from .aligned import MIN_CORRELATION, candidate_frames, correlation

    if not results:
        return
    frames = candidate_frames({r["id"]: candidates[r["id"]] for r in results})
    for r in results:
        if r["id"] not in frames:
            continue
        c = correlation(query.frame, frames[r["id"]])
        r["evidence"]["correlation"] = None if c is None else round(c, 4)
        if c is not None and c >= MIN_CORRELATION:
            r["evidence"].update(verified=True, box=[0.0, 0.0, 1.0, 1.0], query_box=[0.0, 0.0, 1.0, 1.0], scale=1.0,
                                 mirrored=False, reason=f"the same frame: band correlation {c:.2f}")
            r["similarity"] = round(boosted(r["similarity"]), 6)
            if threshold is not None:
                r["duplicate"] = bool(verdict_score(r) >= threshold)


def _record(r: dict, v, threshold: float | None) -> None:
    """A result's verification: its evidence, and when verified the boosted score and verdict."""
    r.setdefault("descriptor_similarity", r["similarity"])
    r["evidence"] = _evidence(v)
    if v.verified:
        r["similarity"] = round(boosted(r["similarity"]), 6)
        if threshold is not None:
            r["duplicate"] = bool(verdict_score(r) >= threshold)


def rerank_fine(query, results: list[dict], candidates: dict[int, str], count: int,
                threshold: float | None = None, *, mirrored: bool = True) -> list[dict]:
    """The first `count` results that verification has not confirmed (and the first FINE_DIRECT of them found by
    the query as given, when other views' candidates fill those places), checked again with the candidate at
    FINE_FACTOR times the side (`fine_config`), so that a query showing a small part of it (a hard crop)
    meets it at a similar scale. A result confirmed here gets the boosted score and evidence like `rerank`;
    one that is not keeps what it had. `query`: an image or its `query_features` (at VERIFY_SIDE)."""
    from .verify import verify_candidates

    query = query_features(query)
    if query.direct.reason:  # a query too small or flat for keypoints: no candidate could verify
        return results
    unconfirmed = [r for r in results if r["id"] in candidates and not (r.get("evidence") or {}).get("verified")]
    pending = unconfirmed[:count]
    # Candidates another view found (regions, the mirror) carry that view's higher score until it is settled, and
    # can fill all `count` places ahead of the query's own best candidates: the first FINE_DIRECT of the query's
    # own are checked as well.
    direct = [r for r in unconfirmed if not r.get("_other_view")][:FINE_DIRECT]
    chosen = {r["id"] for r in pending}
    pending += [r for r in direct if r["id"] not in chosen]
    known = small_features({r["id"]: candidates[r["id"]] for r in pending}, fine=True)
    checked = [r for r in pending if r["id"] in known]
    if not checked:
        return results
    features = [known[r["id"]] for r in checked]
    for r, v in zip(checked, verify_candidates(query, features, config=verify_config(mirrored))):
        if v.verified:
            _record(r, v, threshold)
    return sorted(results, key=lambda r: -r["similarity"])


def verify_config(mirrored: bool = True):
    """The verification settings of re-ranking: both images at VERIFY_SIDE."""
    from .verify import VerifyConfig

    return VerifyConfig(max_side=VERIFY_SIDE, try_mirrored=mirrored)


def fine_config(mirrored: bool = True):
    """The candidate's side of the fine check (`rerank_fine`): FINE_FACTOR times VERIFY_SIDE, with as many
    keypoints per pixel as at VERIFY_SIDE; every other setting as `verify_config`."""
    import dataclasses

    base = verify_config(mirrored)
    return dataclasses.replace(base, max_side=VERIFY_SIDE * FINE_FACTOR, n_features=base.n_features * FINE_FACTOR ** 2)


def query_features(query):
    """A query image's verify.QueryFeatures for re-ranking (found once, kept for every round)."""
    from .verify import QueryFeatures

    return query if isinstance(query, QueryFeatures) else QueryFeatures(query, verify_config())


def rerank_all(queries: Sequence, answers: list[list[dict]], candidates: dict[int, str], top: int,
               threshold: float | None = None, more: int = 0, *, mirrored: bool = True, fine: int = 0,
               aligned: bool = True) -> list[list[dict]]:
    """`rerank` for each (query, results) pair; with `more`, a query whose best result is still not
    verified has its next `more` results verified too, and with `fine` then its first `fine` unconfirmed
    ones checked finely (`rerank_more`). A query is an image or its `query_features`. The queries are
    shared among the cores (indexer/core/cores.py)."""
    from ..core.cores import each_on_cores

    def one(pair):
        return rerank_more(pair[0], pair[1], candidates, top, more, threshold, mirrored=mirrored, fine=fine,
                           aligned=aligned)

    return each_on_cores(one, list(zip(queries, answers)))


def best_verified(results: list[dict]) -> bool:
    """Whether the first of `results` is confirmed by verification."""
    return bool(results) and bool((results[0].get("evidence") or {}).get("verified"))


def rerank_more(query, results: list[dict], candidates: dict[int, str], top: int, more: int,
                threshold: float | None = None, *, mirrored: bool = True, fine: int = 0, aligned: bool = True) -> list[dict]:
    """`rerank` of the first `top`; then, when the best result is not verified, of the next `more`; then,
    when it still is not, `rerank_fine` of the first `fine` results not confirmed.

    A hard crop often ranks its original a little below the first few candidates, and shows so small a
    part of it that only the fine check meets it at its scale; a query with no copy at all has nothing to
    verify; a query whose best candidate verified stops at `top`. With `aligned`, the results of either round that
    keypoints do not confirm get the same-frame check (`_check_aligned`)."""
    query = query_features(query)  # keypoints found once for every round
    # The head is verified first; the next `more` are taken in the order given, not re-sorted by the head's
    # new scores, so that candidates placed right after the head (another view's, a region's) are checked
    # whatever their score and however long the list is (the answer must not depend on k).
    head = rerank(query, results[:top], candidates, top, threshold, mirrored=mirrored, aligned=top if aligned else 0)
    rest = results[top:]
    results = sorted(head + rest, key=lambda r: -r["similarity"])
    if more and results and not best_verified(results):
        rest = rerank(query, rest, candidates, more, threshold, mirrored=mirrored, aligned=more if aligned else 0)
        results = sorted(head + rest, key=lambda r: -r["similarity"])
    if fine and results and not best_verified(results):
        results = rerank_fine(query, results, candidates, fine, threshold, mirrored=mirrored)
    return results
