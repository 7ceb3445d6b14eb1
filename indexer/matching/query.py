"""Similarity queries against the current generation: image files in, neighbours out.

Each query is answered on its own: a query file that cannot be read gets an
error entry and the others still answer.
"""

from __future__ import annotations

import logging
import os
from pathlib import Path
from typing import Collection, Iterator, Sequence

import numpy as np
from PIL import Image, ImageOps

from ..core.errors import ImageReadError, NotFoundError, NotReadyError
from ..learning.embed import embed_images
from ..reading.images import ImageInfo, read_image
from ..storage.store import Store
from . import index as faiss_index
from .generations import require_current

log = logging.getLogger(__name__)

QUERY_BATCH = 32
BACKGROUND_K = 10  # neighbours averaged for a query's background statistic (Pizzi et al. use 10, from memory)
BACKGROUND_SEARCH = 32  # neighbours searched for it: room for 21 copies of the query to be skipped


def background_statistic(sims: Sequence[float], k: int = BACKGROUND_K, copy_threshold: float = np.inf) -> float:
    """The mean of a query's k best similarities in the collection after its closest one and every one
    at or above `copy_threshold` are skipped (0 when none is left).

    Query-adaptive score normalisation (Pizzi et al. 2022, "A self-supervised descriptor for
    image copy detection", sec. 3.3) subtracts beta times this from every score of the query,
    so a score says how far a candidate stands out from what the query resembles anyway: a
    textured photo's many look-alikes no longer score like copies. The background set is the
    generation's own index; the closest one is skipped since it is the copy, if there is one, and
    so are the scores the generation calls copies, so that an image with several copies in the
    collection is not measured against its own copies."""
    ranked = sorted(sims, reverse=True)[1:]
    ranked = [s for s in ranked if s < copy_threshold][:k]
    return float(np.mean(ranked)) if ranked else 0.0


def expand_queries(paths: Sequence[str], extensions: tuple[str, ...]) -> list[str]:
    """Each PATH as given, or for a folder, the image files under it (sorted)."""
    out: list[str] = []
    for given in paths:
        path = Path(given)
        if path.is_dir():
            found = sorted(
                str(Path(dirpath) / name)
                for dirpath, _dirs, names in os.walk(path)
                for name in names
                if os.path.splitext(name)[1].lower() in extensions
            )
            if not found:
                log.warning("no image files under %s", given)
            out.extend(found)
        else:
            out.append(str(given))
    return out


def read_query(given: str, max_side: int):
    """A query file's pixels for searching (longest side `max_side`); NotFoundError when there is no such
    file, ImageReadError when it is not a readable image."""
    if not Path(given).exists():
        raise NotFoundError(f"no such file: {given}")
    return read_image(given, max_side=max_side)[0]


def read_queries(paths: Sequence[str], max_side: int) -> list:
    """`read_query` of each path, decoded on every core at once (indexer/core/cores.py): per path its image, or
    the NotFoundError or ImageReadError that says why there is none."""
    from ..core.cores import each_on_cores

    def one(given):
        try:
            return read_query(given, max_side)
        except (ImageReadError, NotFoundError) as exc:
            return exc

    return each_on_cores(one, list(paths))


def _quarter_turn_left(im: Image.Image) -> Image.Image:
    return im.transpose(Image.Transpose.ROTATE_90)


def _quarter_turn_right(im: Image.Image) -> Image.Image:
    return im.transpose(Image.Transpose.ROTATE_270)


# Verification places for files found through the query's own parts (`Searcher._with_query_regions`): each
# part's nearest file, and at least this many. Ranked by score alone, 3 places went to the parts that show an
# added caption band or border, which resemble many files' regions more than the untouched part resembles its
# original's. Re-scored on one trained store (benchmarks/rescore.py, 4,992 queries): each part's nearest file
# (up to 9) took µAP 0.966 -> 0.968, recall at precision 0.99 0.938 -> 0.940, crops' recall@1 0.944 -> 0.951,
# strong combinations' 0.938 -> 0.951, no match-less query flagged, at no cost measurable in
# benchmarks/bench_query.py; 6 such places gave nearly as much, the 3 best of them nothing. Recalibrated, the
# query verdict's threshold rose 0.520 -> 0.527 (a few more negatives reach a look-alike through a part) and its
# recall went 0.916 -> 0.908 (benchmarks/results/query-regions.md).
QUERY_PART_PLACES = 3


def _better_of(direct: list[tuple[float, int]], other: list[tuple[float, int]],
               head: int | None = None) -> list[tuple[float, bool, int]]:
    """(similarity, whether it came from the other view, id) for every id of either list, with its better
    similarity, best first. With `head`, the other view's score is taken only where it ranks among the
    first `head` (the candidates verification will check); elsewhere the direct score stands, and an id
    the direct list lacks is left out."""
    best: dict[int, tuple[float, bool]] = {i: (d, False) for d, i in direct}
    for d, i in other:
        if d > best.get(i, (-np.inf, False))[0]:
            best[i] = (d, True)
    ranked = sorted(((d, m, i) for i, (d, m) in best.items()), key=lambda t: -t[0])
    if head is None:
        return ranked
    own = dict((i, d) for d, i in direct)
    kept = ranked[:head] + [(own[i], False, i) for _, m, i in ranked[head:] if m and i in own] + \
        [t for t in ranked[head:] if not t[1]]
    return sorted(kept, key=lambda t: -t[0])


def _with_regions(merged: list[tuple[float, object, int]], found: list[tuple[float, int]], head: int,
                  places: int) -> list[tuple[float, object, int]]:
    """`merged` (similarity, other view, id) with up to `places` files found through region descriptors
    (`found`, best first) put right after its first `head`, each with the better of its region score
    (then marked "region") and the score it had; no file is listed twice (one `found` through the whole
    query and through one of its parts takes one place, at its first)."""
    first = merged[:head]
    have = {i for _, _, i in first}
    rest = {i: (d, m) for d, m, i in merged[head:]}
    regions = []
    for d, i in found:
        if len(regions) == places:
            break
        if i not in have:
            have.add(i)
            regions.append((d, "region", i) if d > rest.get(i, (-np.inf, False))[0] else (*rest[i], i))
    moved = {i for _, _, i in regions}
    return first + regions + [t for t in merged[head:] if t[2] not in moved]


def _settle_views(results: list[dict], direct: dict[int, float], shift: float) -> None:
    """A result that scored through another view of the query (its mirror, the picture inside its frame, a
    region of the candidate) keeps that score only when verification confirmed it, and a region's only
    when confirmed without mirroring the query (one wing of a symmetric subject would confirm the other);
    otherwise it falls back to its direct score, or leaves the list when the image as given did not find
    it. Re-sorted in place."""
    for r in list(results):
        view = r.pop("_other_view", False)
        evidence = r.get("evidence") or {}
        if not view or (evidence.get("verified") and not (view == "region" and evidence.get("mirrored"))):
            continue
        if evidence.get("verified"):  # a region confirmed only by the mirrored query: not evidence of a copy
            r["evidence"] = {**evidence, "verified": False, "reason": "a region matched only mirrored"}
        if r["id"] in direct:
            d = direct[r["id"]]
            r["similarity"], r["descriptor_similarity"] = round(d - shift, 6), round(d, 6)
        else:
            results.remove(r)
    results.sort(key=lambda r: -r["similarity"])


class Searcher:
    """The current generation's index and model, loaded once, answering many queries."""

    def __init__(self, store: Store):
        generation = require_current(store)
        # Memory-mapped where FAISS allows: several service processes then share one copy in the page cache.
        from ..learning.runtime import load_encoder

        encoder, card = load_encoder(store.models_dir / generation.meta["model"], store.settings.runtime)
        calibration = generation.load_calibration() or {}
        regions = generation.load_regions(mmap=True) if store.settings.region_grid else (None, 0)
        self._setup(store, generation.load_index(mmap=True), generation.load_whitening(), encoder, card,
                    near_threshold=generation.threshold("near"), query_calibration=calibration.get("query"),
                    regions=regions)
        self.generation = generation

    @classmethod
    def for_build(cls, store: Store, index, whitening, encoder, card, near_threshold: float, *,
                  regions=(None, 0)) -> "Searcher":
        """A searcher over a generation being built (not yet published): calibration asks its
        questions through the very function that answers users' queries."""
        searcher = cls.__new__(cls)
        searcher._setup(store, index, whitening, encoder, card, near_threshold=near_threshold, query_calibration=None,
                        regions=regions)
        searcher.generation = None
        return searcher

    def _setup(self, store: Store, index, whitening, encoder, card, *, near_threshold: float,
               query_calibration: dict | None, regions=(None, 0)) -> None:
        self.store = store
        self.index = index
        self.whitening = whitening
        self.encoder, self.card = encoder, card
        self.size = int(card["image_size"])
        self.threshold = near_threshold  # the collection's pairwise near-duplicate threshold (descriptor scale)
        self.query_calibration = query_calibration  # the query verdict (indexer/matching/query_verdict.py), if calibrated
        self.verify_top = int(store.settings.verify_top)
        self.score_norm = float(store.settings.score_norm)
        self.frame_views = bool(store.settings.frame_views)
        self.query_regions = bool(store.settings.query_regions)
        self.haze_view = bool(store.settings.haze_view)
        self.same_frame = bool(store.settings.same_frame)
        self.mirror_view = str(store.settings.mirror_view)
        self.turned_views = bool(store.settings.turned_views)
        self.verify_more = int(store.settings.verify_more) if self.verify_top else 0
        self.verify_fine = int(store.settings.verify_fine) if self.verify_top else 0
        # The region descriptors' index and grid (indexer/matching/regions.py), searched in the second round.
        self.regions, self.region_grid = regions if self.verify_top else (None, 0)
        self.verify_regions = int(store.settings.verify_regions) if self.regions is not None else 0

    @property
    def verdict_threshold(self) -> float:
        """What a result's `duplicate` is judged against by default: the query verdict's threshold
        (on the scale of `similarity`) when calibrated, else the near-duplicate threshold."""
        return float(self.query_calibration["threshold"]) if self.query_calibration else self.threshold

    def vectors_for_images(self, images) -> np.ndarray:
        """Query vectors in the generation's space (encoder output, then its whitening)."""
        return self.whitening.apply(embed_images(self.encoder, images, self.size))

    def own_parts(self, file_ids: Sequence[int]) -> dict[int, np.ndarray]:
        """file id -> the (grid**2, d) vectors of its parts in the generation's space, for indexed files asked as
        they are: their region vectors, made at index time from the same small copy, cut on the same grid and
        embedded by the same encoder as `_with_query_regions` would (tests/test_regions.py). Empty when the
        generation has no regions or the query is not cut into parts."""
        if not (self.regions is not None and self.query_regions and self.region_grid):
            return {}
        from .regions import region_rows

        cells = self.region_grid * self.region_grid
        parents, xr = region_rows(self.store, self.card["version"], self.region_grid,
                                   np.asarray(list(file_ids), np.int64), self.whitening)
        return {int(parents[k]): xr[k:k + cells] for k in range(0, len(parents), cells)}

    def neighbours(self, xq: np.ndarray, k: int, threshold: float | None = None, *,
                   catalog=None, exclude: Collection[int] = (), excludes: Sequence[Collection[int]] | None = None,
                   images=None, parts: Sequence[np.ndarray | None] | None = None) -> list[list[dict]]:
        """Top-k neighbours for each query vector, as dicts with id, path, similarity,
        descriptor_similarity, evidence, duplicate and probability.

        `catalog` is the connection to read paths with (SQLite connections belong to one thread:
        a multi-threaded caller passes its own; default the store's). Ids in `exclude` are left
        out, and k more are asked for so that k remain; `excludes` gives each query row its own set
        instead. With the query `images` (one per row of `xq`), the best `verify_top` candidates are
        verified and re-ranked (indexer/matching/rerank.py); a query whose best candidate is still unverified
        then has its other views searched (its mirror image, itself upside down, a quarter-turn either
        way, the picture inside its frame) and the collection's region descriptors (indexer/matching/regions.py), by
        the query as a whole and by its own parts cut on the same grid, its mirrored keypoints
        tried and `verify_more` more candidates verified (`verify_regions` more for regions), and, when none
        confirms, its first `verify_fine` unconfirmed ones checked at twice the side (`rerank.rerank_fine`).
        `duplicate` follows the query verdict (`judge`) unless a `threshold` is given. `parts`, when given, holds
        per query the vectors of its parts on the region grid where they are known already (`own_parts`: an indexed
        file asked as it is), so that they are not embedded again; None where not."""
        catalog = catalog if catalog is not None else self.store.catalog
        # The background statistic needs k + 1 neighbours and more for the copies it skips.
        wanted = max(k, BACKGROUND_SEARCH) if self.score_norm else max(k, self.verify_top + self.verify_more)
        excludes = [set(e) for e in excludes] if excludes is not None else [set(exclude)] * len(xq)
        if len(excludes) != len(xq):
            raise ValueError(f"{len(excludes)} exclusion sets for {len(xq)} queries")
        n = wanted + max((len(e) for e in excludes), default=0)
        rows = self._search(xq, n, excludes)
        verifying = images is not None and self.verify_top > 0
        # The background statistic comes from the image as given: other views' scores are not its background.
        shifts = [self.score_norm * background_statistic([d for d, _ in kept], copy_threshold=self.threshold)
                  for kept in rows]
        if images is not None and self.mirror_view == "max":
            rows = [[(d, i) for d, _, i in _better_of(kept, more)]
                    for kept, more in zip(rows, self._mirror_rows(images, n, excludes))]
        head = self.verify_top
        # Every candidate verification may reach is answered (cut to k at the end): the best result
        # must not depend on k.
        reach = max(k, head + self.verify_more if verifying else 0) + head
        out = self._answers([_better_of(kept, [])[:reach] for kept in rows], shifts, catalog)
        if verifying:
            from .rerank import best_verified, query_features

            keys = [query_features(im) for im in images]  # each query's keypoints and matches, kept for both rounds
            out = self._verified(keys, out, catalog, more=False)
            # The mirrored query's keypoints, the other views and the further candidates only for a query
            # whose best is not confirmed yet: a copy found as given (most queries) costs none of them.
            pending = [q for q, results in enumerate(out) if not best_verified(results)]
            if pending:
                again = self._other_views(xq[pending], [images[q] for q in pending], [keys[q] for q in pending],
                                          [rows[q] for q in pending], n, [excludes[q] for q in pending], reach,
                                          [shifts[q] for q in pending], catalog,
                                          None if parts is None else [parts[q] for q in pending])
                for q, results in zip(pending, again):
                    out[q] = results
                if self.haze_view:
                    out = self._with_dehazed(images, out, excludes, n, shifts, catalog)
        for results, kept, shift in zip(out, rows, shifts):
            _settle_views(results, dict((i, d) for d, i in kept), shift)
            del results[k:]
        for results in out:
            self.judge(results, threshold)
        return out

    def _answers(self, merged: list[list[tuple[float, bool, int]]], shifts: Sequence[float], catalog) -> list[list[dict]]:
        """Result dicts of (similarity, other view, id) lists, each score less its query's shift."""
        paths = catalog.paths_for([i for kept in merged for _, _, i in kept])  # only the ones answered
        return [[{"id": i, "path": paths.get(i), "similarity": round(d - shift, 6),
                  "descriptor_similarity": round(d, 6), "evidence": None, **({"_other_view": m} if m else {})}
                 for d, m, i in kept]
                for kept, shift in zip(merged, shifts)]

    def _other_views(self, xq, images, keys, rows, n: int, excludes: list[set[int]], reach: int, shifts, catalog,
                     parts=None):
        """The answers of queries whose best candidate did not verify among the first `verify_top`:
        candidates their other views find join the direct ones (`_better_of`), the mirrored query is
        tried too, the files whose region descriptors are nearest to the query (`xq`, its vectors) get
        `verify_regions` places right after the first `verify_top` (and each of its parts' nearest file one
        more, `_with_query_regions`), and verification goes on to
        `verify_more` more (`keys`: the queries' kept keypoints and matches, so nothing matched in the
        first round is matched again)."""
        extra = [[] for _ in rows]
        turns = []
        if self.mirror_view == "verified":
            # Only what the mirror finds as a near-duplicate on the descriptor's scale: a mirrored copy
            # scores like a copy there, while the other half of a symmetric subject (two wings of one
            # butterfly in two files), which verification would also confirm as mirrored, does not.
            turns += [ImageOps.mirror, ImageOps.flip]
        if self.turned_views:
            # A photo whose orientation tag was lost (or applied twice) stands a quarter-turn off its
            # original: turned back, it scores like a copy. The same near-duplicate floor applies.
            turns += [_quarter_turn_left, _quarter_turn_right]
        if turns:
            extra = [[(d, i) for d, i in found if d >= self.threshold]
                     for found in self._turned_rows(images, turns, n, excludes)]
        if self.frame_views:
            extra = self._with_frame_views(images, extra, n, excludes)
        # Another view's candidate takes a place only among those verification checks, and keeps it only
        # when verified (`_settle_views`): a view may not raise a look-alike's score on its own.
        merged = [_better_of(kept, more, self.verify_top) for kept, more in zip(rows, extra)]
        added = 0
        if self.verify_regions:
            from .regions import region_candidates

            found = region_candidates(self.regions, xq, self.verify_regions + self.verify_top, excludes,
                                      self.region_grid)
            added = self.verify_regions
            if self.query_regions:
                found, added = self._with_query_regions(images, found, excludes, parts)
            merged = [_with_regions(m, f, self.verify_top, added) for m, f in zip(merged, found)]
        out = self._answers([m[:reach + added] for m in merged], shifts, catalog)
        return self._verified(keys, out, catalog, more=True, added=added)

    def _with_query_regions(self, images, found: list[list[tuple[float, int]]], excludes,
                            known: Sequence[np.ndarray | None] | None = None) -> tuple[list[list[tuple[float, int]]], int]:
        """`found` (per query, files whose region descriptors are near the whole query) with the files whose
        regions are nearest to one of the query's own parts, cut on the same grid: a copy with a third
        covered by a shape, cut and framed, or turned and filled, still shows some parts as they are in
        the original. The whole query's candidates keep their `verify_regions` places (sharing places lost crops
        that the whole query's search had found); after them each part's nearest file gets one, best first, and
        at least QUERY_PART_PLACES go to the parts (filled by their next best files). Places the parts leave, of
        grid**2, go to the whole query's next files.
        `known`: per query, its parts' vectors when known already (None: cut and embedded here).
        Returns the lists and how many places after the first `verify_top` verification is to check."""
        from .regions import cut_regions, region_candidates

        cells = self.region_grid * self.region_grid
        known = list(known) if known is not None else [None] * len(images)
        todo = [q for q, vectors in enumerate(known) if vectors is None]
        made = self.vectors_for_images([part for q in todo for part in cut_regions(images[q], self.region_grid)]) \
            if todo else None
        for j, q in enumerate(todo):
            known[q] = made[j * cells:(j + 1) * cells]
        xparts = np.concatenate(known) if known else np.zeros((0, self.index.d), np.float32)
        hits = region_candidates(self.regions, xparts, QUERY_PART_PLACES + self.verify_top,
                                 [e for e in excludes for _ in range(cells)], self.region_grid)
        out = []
        for q, whole in enumerate(found):
            head = whole[:self.verify_regions]
            have = {i for _, i in head}
            lists = hits[q * cells:(q + 1) * cells]
            nearest = {}  # each part's nearest file, with its best score over the parts
            for part in lists:
                if part and part[0][1] not in have:
                    nearest[part[0][1]] = max(part[0][0], nearest.get(part[0][1], -np.inf))
            extra = sorted(((d, i) for i, d in nearest.items()), key=lambda t: -t[0])
            by_part = _better_of([], [t for part in lists for t in part])
            more = [(d, i) for d, _, i in by_part if i not in have and i not in nearest]
            extra += more[:max(0, QUERY_PART_PLACES - len(extra))]
            out.append(head + extra + whole[self.verify_regions:])  # a file in both takes one place (`_with_regions`)
        return out, self.verify_regions + max(QUERY_PART_PLACES, cells)

    def _search(self, xq: np.ndarray, n: int, excludes: Sequence[Collection[int]]) -> list[list[tuple[float, int]]]:
        """Per query row, its (similarity, id) neighbours best first, the ids of its set in `excludes` left out."""
        D, I = faiss_index.search(self.index, np.ascontiguousarray(xq, dtype=np.float32), n)
        return [[(float(d), int(i)) for d, i in zip(d_row, i_row) if i >= 0 and int(i) not in exclude]
                for d_row, i_row, exclude in zip(D, I, excludes)]

    def _mirror_rows(self, images, n: int, excludes) -> list[list[tuple[float, int]]]:
        """`_search` of each query image's mirror image."""
        return self._search(self.vectors_for_images([ImageOps.mirror(im) for im in self._squares(images)]), n, excludes)

    def _squares(self, images) -> list[Image.Image]:
        """Each query image as the encoder sees it (its central square at the input side). A mirror image or
        a quarter turn of that square is what the encoder sees of the turned image (a mirror exactly, a quarter
        turn within one grey level: Pillow's two resampling passes swap order; tests/test_query_views.py), so each
        large picture is brought down once, not once a view."""
        from ..learning.inputs import square_batch

        return [Image.fromarray(square) for square in square_batch(images, self.size)]

    def _turned_rows(self, images, turns, n: int, excludes) -> list[list[tuple[float, int]]]:
        """Per query image, `_search` of each of its views `turns` (functions of an image: its mirror
        image, itself upside down, a quarter-turn), in one forward pass, each id with the best of its
        similarities."""
        squares = self._squares(images)
        views = [turn(im) for turn in turns for im in squares]
        found = self._search(self.vectors_for_images(views), n, list(excludes) * len(turns))
        best = found[: len(images)]
        for t in range(1, len(turns)):
            more = found[t * len(images) : (t + 1) * len(images)]
            best = [[(d, i) for d, _, i in _better_of(a, b)] for a, b in zip(best, more)]
        return best

    def _with_dehazed(self, images, out: list[list[dict]], excludes, n: int, shifts, catalog) -> list[list[dict]]:
        """`out` with the candidates that a hazy query (indexer/matching/haze.py) finds once dehazed, where
        the dehazed image verifies them: for queries whose best answer is still unverified after every other
        view. A fogged copy is far from its original for the encoder and for ORB; dehazed, it is near. The
        dehazed image's first `verify_top` candidates are verified with it as the query, as given (not
        mirrored; more candidates, the mirror and the fine check found no more fogged copies on the quality
        benchmark). Only the confirmed ones join the answer, at their verified score."""
        from ..core.cores import each_on_cores
        from .haze import dehazed, looks_hazy
        from .rerank import VERIFY_SIDE, best_verified, rerank_all

        unconfirmed = [q for q, results in enumerate(out) if not best_verified(results)]
        todo = [q for q, hazy in zip(unconfirmed, each_on_cores(looks_hazy, [images[q] for q in unconfirmed])) if hazy]
        if not todo:
            return out
        side = max(VERIFY_SIDE, self.size)
        views = each_on_cores(lambda image: dehazed(image, side), [images[q] for q in todo])
        found = self._search(self.vectors_for_images(views), n, [excludes[q] for q in todo])
        answers = self._answers([[(d, "haze", i) for d, i in more[:self.verify_top]] for more in found],
                                [shifts[q] for q in todo], catalog)
        checked = rerank_all(views, answers, self._small_copies(answers, self.verify_top, catalog), self.verify_top,
                             mirrored=False)
        out = list(out)
        for q, results in zip(todo, checked):
            confirmed = [r for r in results if (r.get("evidence") or {}).get("verified")]
            if confirmed:
                ids = {r["id"] for r in confirmed}
                out[q] = confirmed + [r for r in out[q] if r["id"] not in ids]
        return out

    def _with_frame_views(self, images, extra: list[list[tuple[float, int]]], n: int,
                          excludes) -> list[list[tuple[float, int]]]:
        """`extra` (per query, candidates found through other views) with each framed query image
        (indexer/matching/frames.py) searched once more as the picture inside its frame. Images without a frame,
        most of them, cost one scan of their edges."""
        from .frames import inside_frame

        framed = [(row, view) for row, view in enumerate(map(inside_frame, images)) if view is not None]
        if not framed:
            return extra
        found = self._search(self.vectors_for_images([view for _, view in framed]), n, [excludes[row] for row, _ in framed])
        extra = list(extra)
        for (row, _), more in zip(framed, found):
            extra[row] = [(d, i) for d, _, i in _better_of(extra[row], more)]
        return extra

    def judge(self, results: list[dict], threshold: float | None = None) -> None:
        """Set each result's `duplicate` and `probability`.

        With the generation's query verdict (calibrated for a stated rate of false flags per query,
        indexer/matching/query_verdict.py), a result is a duplicate when its final `similarity` (normalised,
        verified) reaches the verdict's threshold, and `probability` is the calibrated chance that it
        is a copy. Without one, or with an explicit `threshold`, the verdict compares the descriptor
        score, boosted when verified (`rerank.verdict_score`), as the collection's thresholds do."""
        from .query_verdict import copy_probability
        from .rerank import verdict_score

        verdict = self.query_calibration
        for r in results:
            r["probability"] = None if verdict is None else copy_probability(verdict, r["similarity"])
            if threshold is None and verdict is not None:
                r["duplicate"] = bool(r["similarity"] >= verdict["threshold"])
            else:
                r["duplicate"] = bool(verdict_score(r) >= (self.threshold if threshold is None else threshold))

    def _verified(self, queries, answers: list[list[dict]], catalog, *, more: bool, added: int = 0) -> list[list[dict]]:
        """`rerank_all` of the answers (`queries`: images or their rerank.query_features): the first
        `verify_top` of each by the query as given; with `more`, by its mirror image too and, when the
        best is still unverified, the next `verify_more` (and `added` places made for other candidates),
        then the fine check of `verify_fine`."""
        from .rerank import rerank_all

        reach = self.verify_top + (self.verify_more + added if more else 0)
        return rerank_all(queries, answers, self._small_copies(answers, reach, catalog), self.verify_top,
                          more=self.verify_more + added if more else 0, mirrored=more, fine=self.verify_fine if more else 0,
                          aligned=self.same_frame)

    def _small_copies(self, answers: list[list[dict]], reach: int, catalog) -> dict[int, str]:
        """The small copies' paths of the first `reach` results of each answer (what verification reads)."""
        sources = catalog.pixel_sources({r["id"] for results in answers for r in results[:reach]})
        return {i: str(self.store.pixels_path(row)) for i, row in sources.items()}

    def _own_image(self, file_id: int, catalog):
        """A catalogued image's pixels, from its small copy when there is one (None if unreadable)."""
        row = catalog.pixel_sources([file_id]).get(file_id)
        if row is None or self.verify_top == 0:
            return None
        try:
            return read_image(self.store.pixels_path(row), max_side=2 * self.size)[0]
        except (ImageReadError, OSError):
            return None

    def similar_to_upload(self, data, k: int, threshold: float | None = None, *, max_pixels: int | None,
                          catalog=None) -> tuple[list[dict], ImageInfo]:
        """Neighbours of one image given as bytes or a binary file object (an upload), decoded by
        `read_image` like every other image; raises ImageReadError for anything not an image."""
        image, info = read_image(data, max_side=2 * self.size, max_pixels=max_pixels)
        return self.neighbours(self.vectors_for_images([image]), k, threshold, catalog=catalog, images=[image])[0], info

    def similar_to_id(self, file_id: int, k: int, threshold: float | None = None, *, catalog=None) -> list[dict]:
        """Neighbours of a catalogued image, from its stored vector (no decoding); itself left out."""
        catalog = catalog if catalog is not None else self.store.catalog
        model = self.generation.meta["model"]
        stored = catalog.file_vectors([file_id], model)
        if file_id not in stored:
            row = catalog.file(file_id)
            if row is None:
                raise NotFoundError(f"no image with id {file_id}")
            raise NotReadyError(f"image {file_id} ({row['state']}) has no vector under model {model}; "
                                "readable files get one at the next `nearsight index`")
        xq = self.whitening.apply(stored[file_id][None, :])
        own = self._own_image(file_id, catalog)
        return self.neighbours(xq, k, threshold, catalog=catalog, exclude={file_id},
                               images=None if own is None else [own])[0]

    def similar_files(self, paths: Sequence[str], k: int, threshold: float | None = None) -> Iterator[dict]:
        """One result object per query path, in order; unreadable queries carry an error."""
        max_side = 2 * self.size
        for start in range(0, len(paths), QUERY_BATCH):
            block = paths[start : start + QUERY_BATCH]
            images, good, answers = [], [], {}
            for given, read in zip(block, read_queries(block, max_side)):
                if isinstance(read, Exception):
                    answers[given] = {"query": given, "error": read.to_dict()}
                else:
                    images.append(read)
                    good.append(given)
            if images:
                for given, results in zip(good, self.neighbours(self.vectors_for_images(images), k, threshold,
                                                                images=images)):
                    answers[given] = {"query": given, "results": results}
            for given in block:
                yield answers[given]
