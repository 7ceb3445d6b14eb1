"""Scoring levers measured on one trained model: every combination on the same descriptors.

The quality benchmark trains a model and indexes the collection; this module then
re-describes the collection and the queries with that model once (learned vector,
classical descriptors, mirrored queries) and scores every combination of the levers
that act after training:

* whitening of the learned part (indexer/matching/whiten.py);
* fusion with a classical descriptor at weight w (indexer/learning/classic.py);
* flip-robust queries: the better of the image and its mirror;
* query-adaptive score normalisation: s - beta * (mean of the query's top similarities
  to a background set drawn from the collection), optionally also the reference's own
  (Pizzi et al. 2022, "A self-supervised descriptor for image copy detection", sec. 3.3).

Scores are exhaustive (NumPy), so the figures measure the descriptors, not the index.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np

from benchmarks import metrics


@dataclass
class Described:
    """Raw stored rows (learned part, then every classical descriptor by name) of a set of images."""

    learned: np.ndarray
    classic: dict[str, np.ndarray]


# Region boxes (x0, y0, x1, y1) as fractions of the image: the 2 x 2 quadrants and the centre at half
# the side (a quarter of the area each), then the four corners at 0.7 of the side (half the area).
REGIONS = {
    "r5": [(0, 0, .5, .5), (.5, 0, 1, .5), (0, .5, .5, 1), (.5, .5, 1, 1), (.25, .25, .75, .75)],
    "r9": [(0, 0, .5, .5), (.5, 0, 1, .5), (0, .5, .5, 1), (.5, .5, 1, 1), (.25, .25, .75, .75),
           (0, 0, .7, .7), (.3, 0, 1, .7), (0, .3, .7, 1), (.3, .3, 1, 1)],
}


def _regions(im, boxes):
    w, h = im.size
    return [im.crop((round(a * w), round(b * h), round(c * w), round(d * h))) for a, b, c, d in boxes]


def describe(paths: Sequence[Path], model_dir: Path, classics: Sequence[str], mirror: bool = False,
             batch: int = 64, regions: str | None = None) -> Described:
    """Describe image files the way `nearsight index` and `similar` read them (read_image, preprocess);
    with `regions`, the rows are each file's regions in REGIONS order instead."""
    import torch

    from nearsight.indexer.learning.classic import classic_descriptor
    from nearsight.indexer.learning.encoder import pixels, preprocess
    from nearsight.indexer.reading.images import read_image
    from nearsight.indexer.learning.model import load_model

    encoder, card = load_model(model_dir)
    size = int(card["image_size"])
    learned, classic = [], {name: [] for name in classics}
    with torch.inference_mode():
        for start in range(0, len(paths), batch):
            images = [read_image(p, max_side=2 * size)[0] for p in paths[start : start + batch]]
            if regions:
                images = [r for im in images for r in _regions(im, REGIONS[regions])]
            x = preprocess(images, size)
            if mirror:
                x = torch.flip(x, dims=[-1])
            learned.append(encoder.forward_head(encoder.forward_features(x)).numpy())
            for name in classics:
                classic[name].append(classic_descriptor(pixels(x), name).numpy())
    return Described(np.concatenate(learned), {k: np.concatenate(v) for k, v in classic.items()})


@dataclass(frozen=True)
class Lever:
    whiten: bool = True
    classic: str | None = None
    weight: float = 0.0
    flip: bool = False  # the better of the query and its mirror
    flip_sym: bool = False  # flip-invariant descriptors: learned(x) + learned(mirror x); |odd horizontal DCT terms|
    beta: float = 0.0
    regions: str | None = None  # db side: also the best of each image's region descriptors ...
    region_penalty: float = 0.0  # ... less this
    verify: int = 0  # geometric verification of each query's best `verify` candidates (indexer/matching/rerank.py)
    symmetric: bool = False  # normalise by the reference's background statistic too

    @property
    def name(self) -> str:
        parts = ["whitened" if self.whiten else "raw"]
        if self.classic and self.weight:
            parts.append(f"{self.classic} w={self.weight:g}")
        if self.flip:
            parts.append("flip")
        if self.flip_sym:
            parts.append("flip-invariant")
        if self.regions:
            parts.append(f"regions {self.regions} -{self.region_penalty:g}")
        if self.beta:
            parts.append(f"norm b={self.beta:g}" + (" sym" if self.symmetric else ""))
        if self.verify:
            parts.append(f"verified top {self.verify}")
        return ", ".join(parts)


def _odd_columns(name: str) -> np.ndarray:
    """Mask of a flattened dctK descriptor's terms with an odd horizontal frequency (they change sign
    when the image is mirrored; the constant term is not stored)."""
    k = int(name[3:])
    return (np.arange(k * k) % k % 2 == 1)[1:]


def _symmetric(x: Described, mirrored: Described) -> Described:
    classic = {}
    for name, v in x.classic.items():
        if name.startswith("dct"):
            v = v.copy()
            odd = _odd_columns(name)
            v[:, odd] = np.abs(v[:, odd])
            classic[name] = v
        else:
            classic[name] = v + mirrored.classic[name]
    return Described(x.learned + mirrored.learned, classic)


def _space(lever: Lever, xb: Described, *others: Described):
    from nearsight.indexer.matching.whiten import fit_whitening, identity

    d = xb.learned.shape[1]
    w = lever.weight if lever.classic else 0.0
    stack = lambda x: x.learned if not lever.classic else np.hstack([x.learned, x.classic[lever.classic]])  # noqa: E731
    white = fit_whitening(stack(xb), learned_dim=d, classic_weight=w) if lever.whiten else identity(d, w)
    return [white.apply(stack(x)) for x in (xb, *others)]


def score(lever: Lever, xb: Described, xq: Described, xq_mirror: Described | None, k: int = 10,
          xb_mirror: Described | None = None, xr: dict | None = None) -> metrics.Predictions:
    """Top-k predictions of every query under one combination of levers."""
    if lever.flip_sym:
        xb, xq = _symmetric(xb, xb_mirror), _symmetric(xq, xq_mirror)
    region_rows = xr[lever.regions] if lever.regions else xq
    vb, vq, vm, vr = _space(lever, xb, xq, xq_mirror if xq_mirror is not None else xq, region_rows)
    sims = vq @ vb.T
    if lever.regions:
        per_region = (vq @ vr.T).reshape(len(vq), len(vb), -1).max(axis=2)
        sims = np.maximum(sims, per_region - lever.region_penalty)
    if lever.flip:
        sims = np.maximum(sims, vm @ vb.T)
    if lever.beta:
        from benchmarks.score_norm import fit_background

        background = fit_background(vb, np.arange(len(vb)), beta=lever.beta)
        bq = background.statistic(vq)
        if lever.flip:
            bq = np.maximum(bq, background.statistic(vm))
        # Query-only: both halves of the shift are the query's, as Pizzi et al. apply it.
        br = background.statistic(vb, np.arange(len(vb)))[None, :] if lever.symmetric else bq[:, None]
        sims = background.adjust(sims, bq, br)
    return metrics.top_k(sims, k)


def figures(pred: metrics.Predictions, gt: np.ndarray, families: np.ndarray) -> dict:
    """µAP, recall@1, recall at precision 0.90 / 0.99, the share of match-less queries flagged at the
    precision-0.99 threshold, and recall@1 and µAP per family."""
    precision, recall, thresholds = metrics.pr_curve(pred, gt)
    ok = precision >= 0.99
    t99 = thresholds[ok][np.argmax(recall[ok])] if ok.any() else np.inf
    top = np.full(len(gt), -np.inf)
    np.maximum.at(top, pred.q, pred.score)
    nomatch = gt < 0
    out = {"uap": metrics.micro_ap(pred, gt), "r1": metrics.recall_at_1(pred, gt),
           "r_p90": metrics.recall_at_precision(pred, gt, 0.90), "r_p99": metrics.recall_at_precision(pred, gt, 0.99),
           "nomatch_flagged_p99": float(np.mean(top[nomatch] >= t99)) if nomatch.any() else float("nan"),
           "family_r1": {}, "family_uap": {}}
    for f in dict.fromkeys(families.tolist()):
        queries = np.flatnonzero(families == f)
        sub = pred.subset(np.isin(pred.q, queries))
        out["family_r1"][f] = metrics.recall_at_1(sub, gt, queries)
        out["family_uap"][f] = metrics.micro_ap(sub, gt, queries)
    return out


def default_levers(classics: Sequence[str]) -> list[Lever]:
    """The grid: each lever alone, then together."""
    levers = [Lever(whiten=False), Lever()]
    levers += [Lever(classic=c, weight=w) for c, w in itertools.product(classics, (0.3, 0.5, 0.7))]
    levers += [Lever(flip=True), Lever(beta=1.0), Lever(beta=1.0, symmetric=True)]
    for c in classics:
        for w in (0.3, 0.5):
            levers += [Lever(classic=c, weight=w, flip=True, beta=b, symmetric=s)
                       for b, s in ((0.5, False), (1.0, False), (1.0, True))]
    return levers


def _cached(path: Path | None, make) -> Described:
    if path is not None and path.is_file():
        with np.load(path) as data:
            return Described(data["learned"], {k[8:]: data[k] for k in data.files if k.startswith("classic_")})
    described = make()
    if path is not None:
        np.savez(path, learned=described.learned, **{f"classic_{k}": v for k, v in described.classic.items()})
    return described


class Verifier:
    """Geometric verification of (query, reference) pairs the way `similar` runs it, each pair once."""

    def __init__(self, query_paths: Sequence[Path], db_paths: Sequence[Path]):
        self.query_paths, self.db_paths = query_paths, db_paths
        self.done: dict[tuple[int, int], bool] = {}
        self.images: dict[int, object] = {}

    def _image(self, path: Path):
        from nearsight.indexer.reading.images import read_image
        from nearsight.indexer.matching.rerank import VERIFY_SIDE

        return read_image(path, max_side=VERIFY_SIDE)[0]

    def verified(self, q: int, refs: Sequence[int]) -> list[bool]:
        from nearsight.indexer.matching.rerank import VERIFY_SIDE
        from nearsight.indexer.matching.verify import VerifyConfig, verify_candidates

        todo = [r for r in refs if (q, r) not in self.done]
        if todo:
            for r in todo:
                if r not in self.images:
                    self.images[r] = self._image(self.db_paths[r])
            results = verify_candidates(self._image(self.query_paths[q]), [self.images[r] for r in todo],
                                        config=VerifyConfig(max_side=VERIFY_SIDE))
            self.done.update({(q, r): v.verified for r, v in zip(todo, results)})
        return [self.done[q, r] for r in refs]

    def rerank(self, pred: metrics.Predictions, top: int) -> metrics.Predictions:
        from nearsight.indexer.matching.rerank import boosted

        score = pred.score.copy()
        for q in np.unique(pred.q):
            rows = np.flatnonzero(pred.q == q)
            rows = rows[np.argsort(-pred.score[rows], kind="stable")][:top]
            for row, ok in zip(rows, self.verified(int(q), pred.r[rows].tolist())):
                if ok:
                    score[row] = boosted(score[row])
        return metrics.Predictions(pred.q, pred.r, score)


def report_levers() -> list[Lever]:
    """What the quality report shows: the baseline, each lever alone on top of the default fusion, then together."""
    default = dict(classic="dct8", weight=0.5)
    return [Lever(whiten=False), Lever(), Lever(**default), Lever(classic="dct8", weight=0.3),
            Lever(classic="dct8", weight=0.7), Lever(classic="thumb16", weight=0.5),
            Lever(flip=True), Lever(beta=1.0), Lever(beta=1.0, symmetric=True),
            Lever(**default, flip=True), Lever(**default, flip_sym=True), Lever(**default, beta=1.0),
            Lever(**default, beta=1.0, symmetric=True), Lever(**default, regions="r9", region_penalty=0.1),
            Lever(**default, beta=1.0, regions="r9", region_penalty=0.1),
            Lever(**default, beta=1.0, symmetric=True, flip_sym=True, regions="r9", region_penalty=0.1),
            Lever(verify=3), Lever(**default, verify=3), Lever(**default, verify=5),
            Lever(**default, beta=1.0, verify=3)]


def run(model_dir: Path, db_paths: Sequence[Path], query_paths: Sequence[Path], gt: np.ndarray,
        families: np.ndarray, classics: Sequence[str] = ("dct8", "dct12", "thumb16"),
        levers: Sequence[Lever] | None = None, cache: Path | None = None) -> dict[str, dict]:
    """Figures for every lever combination; `cache` (a folder) keeps the descriptors between runs."""
    if cache is not None:
        cache.mkdir(parents=True, exist_ok=True)
    where = (lambda name: cache / f"{name}.npz") if cache is not None else (lambda name: None)  # noqa: E731
    xb = _cached(where("db"), lambda: describe(db_paths, model_dir, classics))
    xq = _cached(where("queries"), lambda: describe(query_paths, model_dir, classics))
    xm = _cached(where("mirrored"), lambda: describe(query_paths, model_dir, classics, mirror=True))
    xbm = _cached(where("db-mirrored"), lambda: describe(db_paths, model_dir, classics, mirror=True))
    xr = {name: _cached(where(f"db-{name}"), lambda name=name: describe(db_paths, model_dir, classics, regions=name))
          for name in REGIONS}
    verifier = Verifier(query_paths, db_paths)
    out = {}
    for lever in levers or default_levers(classics):
        pred = score(lever, xb, xq, xm, xb_mirror=xbm, xr=xr)
        out[lever.name] = figures(verifier.rerank(pred, lever.verify) if lever.verify else pred, gt, families)
    return out


def table(results: dict[str, dict]) -> str:
    families = list(next(iter(results.values()))["family_r1"])
    head = "| levers | µAP | recall@1 | R@P90 | R@P99 | no-match flagged @P99 | " + " | ".join(
        f"R@1 {f}" for f in families) + " |"
    rows = [head, "|" + "---|" * (6 + len(families))]
    for name, f in results.items():
        rows.append(f"| {name} | {f['uap']:.3f} | {f['r1']:.3f} | {f['r_p90']:.3f} | {f['r_p99']:.3f} | "
                    f"{f['nomatch_flagged_p99']:.3f} | " + " | ".join(f"{f['family_r1'][k]:.2f}" for k in families) + " |")
    return "\n".join(rows)
