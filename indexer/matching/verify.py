"""Geometric verification: is a candidate match really a copy of (part of) the query?

The encoder says two images look alike; this checks that the same pixels reappear,
moved by one rotation, uniform scale and translation. ORB keypoints (Rublee et al.
2011) on grey images of a modest size, their contrast stretched (`stretch_contrast`),
brute-force Hamming matching with Lowe's ratio test (Lowe 2004), then a similarity
transform fitted with RANSAC (Fischler and Bolles 1981) through
`cv2.estimateAffinePartial2D`. Enough inliers, spread over the
images rather than bunched on one shared detail, at a plausible scale make a verified
match; the transform also gives the query's footprint in the candidate (a crop's box).
A horizontally mirrored copy is caught by trying the mirrored query when the direct
one fails.

Every constant's source is beside it in `VerifyConfig`; the measured ones come from
`benchmarks/bench_verify.py` (report: benchmarks/results/verify.md). OpenCV is
imported inside the functions that need it, so importing this module stays cheap.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np
from PIL import Image

from ..core.errors import ImageReadError, UsageError
from ..reading.images import to_rgb


@dataclass(frozen=True)
class VerifyConfig:
    """Settings of the verification; defaults chosen in benchmarks/results/verify.md."""

    # Each measured value below is from benchmarks/results/verify.md (16 scikit-image
    # photos and their tiles: 816 copies, 896 non-copies), changing one setting at a time.
    #
    # Longer side of the grey working images, in px; both images are brought to it, up
    # or down. Measured: 320 costs 0.8x as much but lost a 30 %-area crop and let a pair
    # of neighbouring tiles of a page of text through; 480 cost more and verified fewer.
    max_side: int = 400
    # Below this side an image is refused: ORB's descriptor patch is 31 px and its
    # border margin (edgeThreshold) 31 px (OpenCV defaults), so smaller images give
    # no keypoints at all once brought to a useful size.
    min_side: int = 32
    # Keypoints kept per image; OpenCV's default, and "a few hundred" is common practice.
    # Measured: 1000 verified 5 more copies of 816 at 1.4x the cost, and one more non-copy.
    n_features: int = 500
    # FAST corner threshold (OpenCV's default is 20). Measured: 20 verified 57 fewer
    # copies (low-contrast photos and small tiles find too few corners); 5 verified 20
    # more but let neighbouring tiles of a page of text through, at 1.3x the cost.
    fast_threshold: int = 10
    # Lowe's ratio test: keep a match when its distance is below `ratio` times the
    # second-best's. 0.8 is the value of Lowe 2004 (from memory). Measured: 0.7 verified
    # fewer copies and more non-copies; 0.9 verified 8 more copies and 2 more non-copies.
    ratio: float = 0.8
    # RANSAC inlier distance in working-image px: OpenCV's default for
    # estimateAffinePartial2D, under 1 % of the side at 400 px. Not swept.
    ransac_px: float = 3.0
    # Measured ("Inlier gates"): among non-copies whose spread passes the gate, the
    # largest inlier count was 7 (neighbouring brick tiles), leaving aside three pairs
    # that do share pixels (a cloned patch in the grass photo, a shared caption on the
    # nearly flat colour wheel). 12 leaves a margin; 10 to 15 move the copies' rate by
    # about 1 %, 20 and more lose 30 %-area crops.
    min_inliers: int = 12
    # Plausible query-to-candidate scale in working px. ORB's pyramid (8 levels of
    # 1.2, OpenCV defaults) spans 1.2**7 = 3.6x each way; a fit outside [1/6, 6] is
    # a degenerate RANSAC solution (points collapsed onto one), not a copy. Not swept.
    scale_range: tuple[float, float] = (1 / 6, 6.0)
    # Smallest share that the inliers' convex hull must cover of the hull of all the
    # keypoints, on the side (query or candidate) where it covers more. Measured
    # ("Inlier gates"): without it, at 12 inliers, 6 pairs of neighbouring tiles (a page
    # of text, whose lines repeat the same glyphs; gravel) and 2 pairs of photos carrying
    # the same caption verify, all with spreads of 0.02 to 0.06. 0.1 turns them away at
    # the cost of 1 copy of 816; 0.2 costs 4 more and turns away nothing more.
    min_spread: float = 0.1
    # Try the horizontally mirrored query when the direct one does not verify.
    try_mirrored: bool = True
    # Percentiles of the grey working image stretched to black and white before ORB (None: as it is). FAST
    # finds corners by a fixed brightness step, so a dark or flat picture (a star field, an underexposed or
    # blurred copy) gives few keypoints where a stretched one gives enough. Measured on the quality
    # benchmark's photos with 832 planted copies (each file's 10 closest neighbours, 13,405 pairs; one-off
    # script): duplicate pairs verified 1,070 -> 1,115 of 1,240, on 24 or more inliers 1,000 -> 1,044;
    # pairs of different pictures verified 1 -> 7, every one on 12-18 inliers and between two of the demo
    # archive's drawn pictures; on the demo archive (5,326 pairs) no duplicate lost or gained, 0 of 27
    # look-alikes verified either way, others 2 -> 5 (12-15 inliers). CLAHE instead: 1,099 and 1,043.
    # With one trained model, re-scored: the quality benchmark's recall at precision 0.99 0.923 -> 0.933,
    # crops' recall@1 0.935 -> 0.951; groups' pair recall 0.807 -> 0.834 (benchmarks/results/SUMMARY.md).
    stretch: tuple[float, float] | None = (1.0, 99.5)

    def __post_init__(self) -> None:
        if self.max_side < 64 or self.min_side < 1 or self.n_features < 10:
            raise UsageError("verify: max_side must be >= 64, min_side >= 1 and n_features >= 10")
        if not 0 < self.ratio <= 1 or self.ransac_px <= 0 or not 0 <= self.min_spread <= 1:
            raise UsageError("verify: ratio must be in (0, 1], ransac_px > 0 and min_spread in [0, 1]")
        if self.min_inliers < 3 or not 0 < self.scale_range[0] < self.scale_range[1]:
            raise UsageError("verify: min_inliers must be >= 3 and scale_range an increasing positive pair")
        if self.stretch is not None and not 0 <= self.stretch[0] < self.stretch[1] <= 100:
            raise UsageError("verify: stretch must be None or two increasing percentiles in [0, 100]")


DEFAULT_VERIFY = VerifyConfig()


@dataclass(frozen=True)
class Features:
    """ORB keypoints of one image at working size; empty with a `reason` when there are none."""

    xy: np.ndarray  # (n, 2) float32 keypoint positions in the working image
    descriptors: np.ndarray  # (n, 32) uint8 ORB descriptors
    size: tuple[int, int]  # original (width, height)
    work_size: tuple[int, int]  # working (width, height)
    reason: str = ""
    mirrored: bool = False  # computed on the horizontally mirrored image

    @property
    def scale(self) -> float:
        """Working px per original px."""
        return self.work_size[0] / self.size[0] if self.size[0] else 1.0

    def __len__(self) -> int:
        return len(self.xy)


@dataclass(frozen=True)
class Verification:
    """The verdict on one (query, candidate) pair.

    `box` is the query's footprint in the candidate as (x0, y0, x1, y1) in candidate
    pixels, clipped to the candidate (set only when verified); `query_box` the other way
    round, the candidate's footprint in the query in query pixels, and `query_size` the
    query's (width, height), so that a page can draw the common region on both images.
    Whenever a transform was
    fitted: `transform` maps query pixels to candidate pixels (2 x 3, rows of an affine
    matrix; a mirrored match includes the mirror), `scale` is candidate px per query px,
    `angle` the rotation in degrees, positive when the query is the candidate turned
    counter-clockwise on screen (as Pillow's `Image.rotate` turns; applied after the
    mirror, if any), and `spread` the share of the keypoints' extent that the inliers
    cover (see VerifyConfig.min_spread).
    `mirrored` says the mirrored query was the one matched.
    """

    verified: bool
    inliers: int = 0
    matches: int = 0
    inlier_ratio: float = 0.0
    box: tuple[int, int, int, int] | None = None
    scale: float | None = None
    angle: float | None = None
    spread: float = 0.0
    transform: tuple[tuple[float, float, float], tuple[float, float, float]] | None = None
    mirrored: bool = False
    reason: str = ""
    query_box: tuple[int, int, int, int] | None = None
    query_size: tuple[int, int] | None = None
    candidate_size: tuple[int, int] | None = None

    def boxes(self) -> tuple[list[float] | None, list[float] | None]:
        """(the candidate's footprint in the query, the query's footprint in the candidate), each as
        fractions (x0, y0, x1, y1) of that image's width and height, to draw on both; (None, None)
        unless verified."""
        return fractions(self.query_box, self.query_size), fractions(self.box, self.candidate_size)

    def to_dict(self) -> dict:
        """Plain JSON-ready values (lists for the box and the transform)."""
        out = dataclasses.asdict(self)
        out["box"] = list(self.box) if self.box is not None else None
        out["query_box"] = list(self.query_box) if self.query_box is not None else None
        out["query_size"] = list(self.query_size) if self.query_size is not None else None
        out["candidate_size"] = list(self.candidate_size) if self.candidate_size is not None else None
        out["transform"] = [list(row) for row in self.transform] if self.transform is not None else None
        return out


def fractions(box, size) -> list[float] | None:
    """A pixel box (x0, y0, x1, y1) as fractions of an image's (width, height), as pages draw it."""
    if box is None or not size:
        return None
    w, h = size
    return [round(box[0] / w, 4), round(box[1] / h, 4), round(box[2] / w, 4), round(box[3] / h, 4)]


def _config(config: VerifyConfig | None, overrides: dict) -> VerifyConfig:
    config = DEFAULT_VERIFY if config is None else config
    given = {k: v for k, v in overrides.items() if v is not None}
    return dataclasses.replace(config, **given) if given else config


def verify_pair(
    query: Image.Image,
    candidate: Image.Image,
    *,
    max_side: int | None = None,
    min_inliers: int | None = None,
    config: VerifyConfig | None = None,
) -> Verification:
    """Is `candidate` a copy of `query` (or of part of it, or it of part of `candidate`)?

    `max_side` and `min_inliers` override the same fields of `config`. Tiny, flat and
    unconvertible images give verified=False with a reason; only a non-image argument
    or a bad setting raises (UsageError).
    """
    return verify_candidates(query, [candidate], max_side=max_side, min_inliers=min_inliers, config=config)[0]


class QueryFeatures:
    """A query's keypoints for one configuration, kept for every candidate it is verified against,
    each found on first need; so is each match against a candidate's Features, so that a caller
    verifying in rounds (`Searcher.neighbours`) never matches the same pair twice."""

    def __init__(self, image: Image.Image, config: VerifyConfig = DEFAULT_VERIFY):
        _require_image(image, "query")
        self.image, self.config = image, config
        self._direct: Features | None = None
        self._mirrored: Features | None = None
        self._frame = None
        self._matched: dict[tuple[int, bool], tuple[Features, Verification]] = {}

    @property
    def direct(self) -> Features:
        if self._direct is None:
            self._direct = features_or_reason(self.image, self.config)
        return self._direct

    @property
    def mirrored(self) -> Features:
        if self._mirrored is None:
            self._mirrored = extract_features(self.image, self.config, mirror=True)
        return self._mirrored

    @property
    def frame(self):
        """The query's band image for the same-frame check (indexer/matching/aligned.py), made on first need."""
        if self._frame is None:
            from .aligned import Frame

            self._frame = Frame(self.image)
        return self._frame

    def serves(self, config: VerifyConfig) -> bool:
        """Whether these keypoints were found as `config` would find them (try_mirrored aside)."""
        return dataclasses.replace(self.config, try_mirrored=config.try_mirrored) == config

    def match(self, target: Features, mirrored: bool) -> Verification:
        key = (id(target), mirrored)
        if key not in self._matched:  # the target is kept with its result, so its id is not reused
            self._matched[key] = (target, match_features(self.mirrored if mirrored else self.direct, target, self.config))
        return self._matched[key][1]


def verify_candidates(
    query: Image.Image | QueryFeatures,
    candidates: list[Image.Image | Features],
    *,
    max_side: int | None = None,
    min_inliers: int | None = None,
    config: VerifyConfig | None = None,
) -> list[Verification]:
    """Verify each candidate against one query, whose keypoints (and mirrored ones) are computed once.

    A candidate may be given as its Features, extracted with the same configuration (a caller
    that meets the same candidates again keeps them: `rerank.small_features`); so may the query,
    as QueryFeatures (a caller that verifies it in several rounds). The mirrored query is tried
    on a candidate the direct one does not verify, unless `config.try_mirrored` is off."""
    cfg = _config(config, {"max_side": max_side, "min_inliers": min_inliers})
    if not (isinstance(query, QueryFeatures) and query.serves(cfg)):
        query = QueryFeatures(query.image if isinstance(query, QueryFeatures) else query, cfg)
    for i, im in enumerate(candidates):
        if not isinstance(im, Features):
            _require_image(im, f"candidate {i}")
    direct = query.direct
    out = []
    for im in candidates:
        if direct.reason:
            out.append(Verification(False, reason=f"query: {direct.reason}"))
            continue
        target = im if isinstance(im, Features) else features_or_reason(im, cfg)
        if target.reason:
            out.append(Verification(False, reason=f"candidate: {target.reason}"))
            continue
        result = query.match(target, mirrored=False)
        if not result.verified and cfg.try_mirrored:
            flipped = query.match(target, mirrored=True)
            result = flipped if flipped.verified or flipped.inliers > result.inliers else result
        out.append(result)
    return out


def _require_image(im, what: str) -> None:
    if not isinstance(im, Image.Image):
        raise UsageError(f"verify: {what} must be a PIL image, not {type(im).__name__}")


def features_or_reason(im: Image.Image, cfg: VerifyConfig) -> Features:
    """extract_features, with an unconvertible image turned into empty features and a reason."""
    try:
        return extract_features(im, cfg)
    except ImageReadError as exc:
        return _empty(im.size, (0, 0), exc.detail)


def _empty(size: tuple[int, int], work_size: tuple[int, int], reason: str) -> Features:
    return Features(np.zeros((0, 2), np.float32), np.zeros((0, 32), np.uint8), size, work_size, reason)


# A picture whose stretch percentiles lie closer than this (in grey levels) is flat: stretching it would
# only amplify noise and compression blocks, so it is left as it is.
MIN_STRETCH_RANGE = 8


def grey_percentiles(grey: np.ndarray, percentiles) -> list[float]:
    """numpy.percentile(grey, percentiles) (its default, linear method) for a uint8 image, from a histogram of
    its 256 levels instead of a sort: the order statistics k and k + 1 each percentile falls between are read
    off the cumulative counts (several times faster on a 256 px image, and this runs for every image verified)."""
    counts = np.cumsum(np.bincount(grey.ravel(), minlength=256))
    out = []
    for q in percentiles:
        pos = q / 100.0 * (int(counts[-1]) - 1)
        k = int(np.floor(pos))
        below, above = np.searchsorted(counts, [k, k + 1], side="right")
        above = min(int(above), 255)
        out.append(float(below) + (pos - k) * (above - float(below)))
    return out


def stretch_contrast(grey: np.ndarray, percentiles: tuple[float, float]) -> np.ndarray:
    """`grey` (uint8) mapped linearly so that its `percentiles` (numpy's) become 0 and 255, clipped; a flat
    picture (the two closer than MIN_STRETCH_RANGE levels) unchanged."""
    import cv2

    lo, hi = grey_percentiles(grey, percentiles)
    if hi - lo < MIN_STRETCH_RANGE:
        return grey
    # The map of each of the 256 levels, applied by table look-up (cv2.LUT) rather than per pixel in floats.
    levels = (np.arange(256, dtype=np.float32) - np.float32(lo)) * np.float32(255.0 / (hi - lo))
    return cv2.LUT(grey, np.clip(np.rint(levels), 0, 255).astype(np.uint8))


def working_grey(im: Image.Image, max_side: int, stretch: tuple[float, float] | None = None) -> np.ndarray:
    """The image as 8-bit grey with its longer side brought to `max_side` (transparency on white), its
    contrast stretched between the `stretch` percentiles when given (`stretch_contrast`)."""
    import cv2

    grey = np.asarray(to_rgb(im).convert("L"))
    h, w = grey.shape
    scale = max_side / max(w, h)
    size = (max(1, round(w * scale)), max(1, round(h * scale)))
    # INTER_AREA for shrinking (it averages, so no aliasing), INTER_LINEAR for enlarging:
    # the usual OpenCV advice for each direction.
    grey = cv2.resize(grey, size, interpolation=cv2.INTER_AREA if scale < 1 else cv2.INTER_LINEAR)
    return grey if stretch is None else stretch_contrast(grey, stretch)


def extract_features(im: Image.Image, config: VerifyConfig = DEFAULT_VERIFY, *, mirror: bool = False) -> Features:
    """ORB keypoints and descriptors of `im` at working size (of its mirror image when `mirror`).

    Too small or featureless images give empty Features with a reason, never an error;
    a mode Pillow cannot convert raises ImageReadError.
    """
    import cv2

    w, h = im.size
    if min(w, h) < config.min_side:
        return _empty((w, h), (0, 0), f"too small ({w}x{h} px; at least {config.min_side} px a side needed)")
    grey = working_grey(im, config.max_side, config.stretch)
    if mirror:
        grey = np.ascontiguousarray(grey[:, ::-1])
    work_size = (grey.shape[1], grey.shape[0])
    orb = cv2.ORB_create(nfeatures=config.n_features, fastThreshold=config.fast_threshold)
    keypoints, descriptors = orb.detectAndCompute(grey, None)
    if descriptors is None or len(keypoints) == 0:
        return _empty((w, h), work_size, "no keypoints (a flat or nearly flat image)")
    xy = np.array([kp.pt for kp in keypoints], np.float32)
    return Features(xy, descriptors, (w, h), work_size, mirrored=mirror)


def ratio_matches(query: Features, candidate: Features, ratio: float) -> np.ndarray:
    """(m, 2) index pairs (query keypoint, candidate keypoint) that pass Lowe's ratio test.

    One-to-one: when several query keypoints pick the same candidate keypoint only the
    closest stays (the lowest query index among equals), so RANSAC cannot count one candidate
    point many times over. The two nearest candidate descriptors of each query descriptor
    come from the whole table of Hamming distances (`nearest_two`), as OpenCV's
    BFMatcher(NORM_HAMMING) finds them (tests/test_verify.py checks it against it); everything
    after is array arithmetic, so no Python object is made per keypoint.
    """
    n, m = len(query.descriptors), len(candidate.descriptors)
    if n == 0 or m == 0:
        return np.zeros((0, 2), np.int64)
    first, second, nearest = nearest_two(query.descriptors, candidate.descriptors)
    keep = first < ratio * second  # with one candidate keypoint the second is inf: every match is kept
    qi = np.flatnonzero(keep)
    ci, d = nearest[qi].astype(np.int64), first[qi]
    # One query keypoint per candidate keypoint: the closest, ties to the lowest query index.
    order = np.lexsort((qi, d, ci))
    qi, ci = qi[order], ci[order]
    lead = np.ones(len(ci), bool)
    lead[1:] = ci[1:] != ci[:-1]
    pairs = np.stack([qi[lead], ci[lead]], axis=1)
    return pairs[np.lexsort((pairs[:, 1], pairs[:, 0]))].reshape(-1, 2)


def nearest_two(xq: np.ndarray, xb: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For each binary code of `xq` (uint8 rows), the Hamming distances to its nearest and second nearest
    rows of `xb` (float64; the second is inf when `xb` has one row) and the nearest one's index (the lowest
    among equals).

    The whole n x m table of distances comes from FAISS's `hammings` and the two smallest of each row from
    NumPy. A k-nearest search (`IndexBinaryFlat.search` with k = 2, used before) keeps a heap per query and
    took 2-4 times as long on 500 x 500 ORB descriptors; matching was then the largest cost of a query
    (benchmarks/results/query.md)."""
    import faiss

    xq, xb = np.ascontiguousarray(xq, np.uint8), np.ascontiguousarray(xb, np.uint8)
    n, m = len(xq), len(xb)
    table = np.empty((n, m), np.int32)
    faiss.hammings(faiss.swig_ptr(xq), faiss.swig_ptr(xb), n, m, xq.shape[1], faiss.swig_ptr(table))
    rows = np.arange(n)
    nearest = table.argmin(axis=1)
    first = table[rows, nearest].astype(np.float64)
    if m < 2:
        return first, np.full(n, np.inf), nearest
    table[rows, nearest] = np.iinfo(np.int32).max
    return first, table.min(axis=1).astype(np.float64), nearest


def match_features(query: Features, candidate: Features, config: VerifyConfig = DEFAULT_VERIFY) -> Verification:
    """Fit a similarity transform query -> candidate to the ratio-test matches and judge it."""
    import cv2

    if query.reason or candidate.reason:
        side = "query" if query.reason else "candidate"
        return Verification(False, reason=f"{side}: {query.reason or candidate.reason}")
    pairs = ratio_matches(query, candidate, config.ratio)
    n = len(pairs)
    if n < config.min_inliers:
        reason = f"too few matches ({n} < {config.min_inliers})"
        return Verification(False, matches=n, mirrored=query.mirrored, reason=reason)
    src, dst = query.xy[pairs[:, 0]], candidate.xy[pairs[:, 1]]
    transform, mask = cv2.estimateAffinePartial2D(
        src, dst, method=cv2.RANSAC, ransacReprojThreshold=config.ransac_px
    )
    if transform is None:
        return Verification(False, matches=n, mirrored=query.mirrored, reason="no transform fits the matches")
    keep = mask.ravel().astype(bool)
    spread = max(hull_share(src[keep], query.xy), hull_share(dst[keep], candidate.xy))
    return _judge(transform, int(keep.sum()), n, spread, query, candidate, config)


def hull_share(points: np.ndarray, everywhere: np.ndarray) -> float:
    """Area of the points' convex hull as a share of the hull of all the image's keypoints."""
    whole = _hull_area(everywhere)
    return min(1.0, _hull_area(points) / whole) if whole > 0 else 0.0


def _hull_area(points: np.ndarray) -> float:
    import cv2

    if len(points) < 3:
        return 0.0
    return float(cv2.contourArea(cv2.convexHull(np.ascontiguousarray(points, np.float32))))


def _judge(
    transform: np.ndarray,
    inliers: int,
    n: int,
    spread: float,
    query: Features,
    candidate: Features,
    config: VerifyConfig,
) -> Verification:
    """The verdict for a fitted working-size transform: the gates, then the footprint box."""
    a, b = float(transform[0, 0]), float(transform[1, 0])
    work_scale = math.hypot(a, b)
    mapping = to_pixels(transform, query, candidate)
    found = dict(
        inliers=inliers, matches=n, inlier_ratio=inliers / n, spread=spread, mirrored=query.mirrored,
        scale=work_scale * query.scale / candidate.scale, angle=math.degrees(math.atan2(b, a)),
        transform=tuple(tuple(float(v) for v in row) for row in mapping),
    )
    low, high = config.scale_range
    if not low <= work_scale <= high:
        return Verification(False, **found, reason=f"implausible scale {work_scale:.3g} (working px)")
    if inliers < config.min_inliers:
        return Verification(False, **found, reason=f"too few inliers ({inliers} < {config.min_inliers})")
    if spread < config.min_spread:
        return Verification(False, **found, reason=f"inliers cover only {spread:.0%} of the keypoints' extent")
    box = footprint(mapping, query.size, candidate.size)
    if box is None:
        return Verification(False, **found, reason="the query's footprint falls outside the candidate")
    back = np.linalg.inv(np.vstack([mapping, [0.0, 0.0, 1.0]]))[:2]  # candidate pixels -> query pixels
    return Verification(True, **found, box=box, query_box=footprint(back, candidate.size, query.size),
                        query_size=tuple(query.size), candidate_size=tuple(candidate.size),
                        reason=f"{inliers} of {n} matches agree on one transform")


def to_pixels(transform: np.ndarray, query: Features, candidate: Features) -> np.ndarray:
    """A working-size transform as a 2 x 3 map from original query pixels to original candidate pixels."""
    into_work = np.diag([query.work_size[0] / query.size[0], query.work_size[1] / query.size[1], 1.0])
    if query.mirrored:  # the keypoints were found on grey[:, ::-1]: x -> width - 1 - x
        into_work = np.array([[-1.0, 0, query.work_size[0] - 1], [0, 1, 0], [0, 0, 1]]) @ into_work
    out_of_work = np.diag([candidate.size[0] / candidate.work_size[0], candidate.size[1] / candidate.work_size[1]])
    return out_of_work @ np.asarray(transform, np.float64) @ into_work


def footprint(mapping: np.ndarray, query_size: tuple[int, int], candidate_size: tuple[int, int]):
    """The bounding box of the query's corners mapped into the candidate, clipped to it; None if empty."""
    w, h = query_size
    corners = np.array([[0, 0, 1], [w, 0, 1], [w, h, 1], [0, h, 1]], np.float64)
    mapped = corners @ mapping.T
    x0, y0 = np.clip(mapped.min(axis=0), 0, candidate_size)
    x1, y1 = np.clip(mapped.max(axis=0), 0, candidate_size)
    if x1 - x0 < 1 or y1 - y0 < 1:
        return None
    return (int(round(x0)), int(round(y0)), int(round(x1)), int(round(y1)))
