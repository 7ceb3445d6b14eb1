"""The pairs to judge first (indexer/calibration/review_queue.py) on a real calibrated store, against the rule
written out by brute force: contents told apart by hashlib's SHA-256 of the files, pixels by
Pillow's decoded RGB, P(same) by scipy.stats.gaussian_kde and the mixture formula in rates.py's
docstring, the rounds dealt pass by pass. The mixture's posterior is checked on its own against
Bayes' rule with the true densities of a planted mixture (scipy.stats)."""

import hashlib
import shutil
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageOps

from nearsight.indexer.matching.generations import require_current
from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.core.rates import fit_mixture
from nearsight.indexer.calibration.review_queue import probability_model, review_queue
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store
from nearsight.indexer.calibration.verdicts import verdict_report

from .test_calibrate import write_scenes_with_copies
from .test_pipeline import TINY


@pytest.fixture(scope="module")
def store_dir(tmp_path_factory):
    """tests/test_calibrate.py's store (40 scenes, 6 resized JPEG copies, one exact copy), one copy with
    the same pixels in other bytes (PNG at another compression level), and blends of two scenes in
    varying shares (Pillow's Image.blend): pairs that score anywhere between look-alike and copy, so
    the queue has pairs on both sides of the threshold. Tiny encoder, calibrated."""
    root = tmp_path_factory.mktemp("queue")
    folder = root / "photos"
    write_scenes_with_copies(folder)
    Image.open(folder / "scene08.png").save(folder / "scene08-pixels.png", compress_level=1)
    # blend07-09 is 85 % scene07: a pair of it whatever the 3-step encoder learned (at 70 %, a change in the
    # training views' random draws once left it below the stored pairs).
    blends = [(7, 9, 0.15)] + [(10 + k, 20 + k, 0.15 + 0.7 * k / 11) for k in range(12)]
    for i, j, share in blends:
        Image.blend(Image.open(folder / f"scene{i:02d}.png"), Image.open(folder / f"scene{j:02d}.png"), share).save(
            folder / f"blend{i:02d}-{j:02d}.png")
    assert (folder / "scene08-pixels.png").read_bytes() != (folder / "scene08.png").read_bytes()
    store_dir = root / "store"
    with Store.open(store_dir, create=True, settings=load_settings(environ={})) as store:
        run_index(store, [folder], progress=False, train_config=TINY)
        assert require_current(store).load_calibration() is not None, "the fixture's store must be calibrated"
    return store_dir


def _pixels(path: str) -> bytes:
    with Image.open(path) as im:
        im = ImageOps.exif_transpose(im).convert("RGB")
        return f"{im.width}x{im.height}".encode() + im.tobytes()


def _brute_force(pairs, t, paths, verdict_paths, calibration, window):
    """The rule of indexer/calibration/review_queue.py, written out pair by pair."""
    from scipy import stats

    sha = {i: hashlib.sha256(Path(p).read_bytes()).hexdigest() for i, p in paths.items()}
    pixels = {i: _pixels(p) for i, p in paths.items()}
    judged = {frozenset((hashlib.sha256(Path(x).read_bytes()).hexdigest(),
                         hashlib.sha256(Path(y).read_bytes()).hexdigest())) for x, y in verdict_paths}
    left, out_counts = [], {"judged": 0, "same-bytes": 0, "same-pixels": 0, "absent": 0}
    for a, b, s in zip(*(x.tolist() for x in pairs)):
        if sha[a] == sha[b]:
            out_counts["same-bytes"] += 1
        elif pixels[a] == pixels[b]:
            out_counts["same-pixels"] += 1
        elif frozenset((sha[a], sha[b])) in judged:
            out_counts["judged"] += 1
        else:
            left.append((a, b, float(np.float32(s))))
    above = sorted((p for p in left if p[2] >= t), key=lambda p: (p[2], p[0], p[1]))[:window]
    below = sorted((p for p in left if p[2] < t), key=lambda p: (-p[2], p[0], p[1]))[:window]
    band = above + below
    # P(same | s) = D p(s) / (D p(s) + exp(a - b s)), p the KDE of the synthetic copies' scores.
    fit = calibration["tiers"]["near"]["fit"]
    s = np.array([p[2] for p in band])
    duplicates = fit["dup_hits"] * stats.gaussian_kde(calibration["distributions"]["near"])(s) / fit["pos_mass_above_floor"]
    prob = duplicates / (duplicates + np.exp(fit["a"] - fit["b"] * s))
    ranked = sorted(range(len(band)), key=lambda k: (abs(prob[k] - 0.5), abs(band[k][2] - t), band[k][0], band[k][1]))
    dealt, rnd = [], 0
    while ranked:  # one pass per round: take each pair whose two images are still free in this round
        used, later = set(), []
        for k in ranked:
            a, b, _ = band[k]
            if a in used or b in used:
                later.append(k)
            else:
                used |= {a, b}
                dealt.append((a, b, rnd, float(prob[k])))
        ranked, rnd = later, rnd + 1
    return dealt, out_counts


def _as_rows(queue):
    return [(p.a["id"], p.b["id"], p.round, p.probability) for p in queue.pairs]


def _assert_same(queue, expected):
    got = _as_rows(queue)
    assert [r[:3] for r in got] == [r[:3] for r in expected]
    assert np.allclose([r[3] for r in got], [r[3] for r in expected], rtol=0, atol=1e-9)


@pytest.mark.parametrize("window", [3, 10_000])
def test_the_queue_follows_the_rule_and_judged_pairs_leave_it(store_dir, window, tmp_path):
    shutil.copytree(store_dir, tmp_path / "store")  # the verdicts below stay in this test's copy
    with Store.open(tmp_path / "store", settings=load_settings(environ={})) as store:
        gen = require_current(store)
        calibration = gen.load_calibration()
        pairs = gen.load_pairs()
        t = float(gen.meta["thresholds"]["near"])
        meta = store.catalog.image_meta()
        paths = {i: m["path"] for i, m in meta.items()}
        assert all(p.startswith(str(store_dir.parent)) for p in paths.values())  # the copy reads the same photos
        by_name = {Path(p).name: i for i, p in paths.items()}

        queue = review_queue(store.catalog, gen, window=window)
        expected, left_out = _brute_force(pairs, t, paths, [], calibration, window)
        assert queue.source == "calibration" and queue.threshold == t
        _assert_same(queue, expected)
        assert queue.left_out == left_out
        assert left_out["same-bytes"] >= 1 and left_out["same-pixels"] >= 1  # the planted copies are never offered
        assert queue.pairs[0].round == 0
        first_round = [f for p in queue.pairs if p.round == 0 for f in (p.a["id"], p.b["id"])]
        assert len(first_round) == len(set(first_round))  # no image twice in the first round

        # Verdicts act by content: one on scene07 also settles its byte-for-byte copy's pair.
        seven, copy = by_name["scene07.png"], by_name["scene07-copy.png"]
        partners = [b if a == seven else a for a, b in zip(pairs[0].tolist(), pairs[1].tolist()) if seven in (a, b)]
        other = next(o for o in partners if o != copy)
        # And a "same" on the first offered pair that involves none of them (which pair comes first
        # depends on the trained encoder).
        top = next(p for p in queue.pairs if not {p.a["id"], p.b["id"]} & {seven, copy, other})
        verdicts = [(paths[seven], paths[other]), (top.a["path"], top.b["path"])]
        store.catalog.add_verdicts([{"file_a": seven, "file_b": other, "verdict": "different"},
                                    {"file_a": top.a["id"], "file_b": top.b["id"], "verdict": "same"}],
                                   origin="api")
        after = review_queue(store.catalog, gen, window=window)
        expected, left_out = _brute_force(pairs, t, paths, verdicts, calibration, window)
        _assert_same(after, expected)
        assert after.left_out == left_out and left_out["judged"] >= 3  # scene07, its copy, and the top pair
        offered = {frozenset((p.a["id"], p.b["id"])) for p in after.pairs}
        assert frozenset((top.a["id"], top.b["id"])) not in offered
        assert frozenset((copy, other)) not in offered


def test_probabilities_come_from_the_verdicts_once_calibration_used_them():
    """Reference: sklearn.isotonic.IsotonicRegression's predict on the grid points, which verdict_report
    stores; between them the queue interpolates linearly, as predict does between its own steps."""
    from sklearn.isotonic import IsotonicRegression

    rng = np.random.default_rng(11)
    sims = rng.uniform(0.5, 1.0, 120)
    same = (rng.uniform(0, 1, 120) < (sims - 0.5) * 2).astype(int)
    grid = np.round(np.arange(0.5, 1.0001, 0.05), 4)
    report = verdict_report(sims, same, grid, 0.9, min_verdicts=30)
    report.pop("precision_at")
    source, model = probability_model({"verdicts": report})
    ref = IsotonicRegression(increasing=True, y_min=0, y_max=1, out_of_bounds="clip").fit(sims, same)
    assert source == "verdicts"
    assert np.allclose(model(grid), ref.predict(grid), atol=1e-4)  # the stored fit is rounded to 4 places
    assert model(0.1) == pytest.approx(float(ref.predict([grid[0]])[0]), abs=1e-4)  # clipped below the grid
    assert probability_model(None) == (None, None)


def test_duplicate_probability_recovers_the_planted_posterior():
    """The planted mixture of tests/test_calibrate.py: 300 duplicates ~ N(0.85, 0.06) among 5,000
    non-duplicates ~ truncated exponential above the floor (scipy.stats draws both). Bayes' rule with
    those true densities gives P(duplicate | s); the fitted posterior must come close to it."""
    from scipy import stats

    rng = np.random.default_rng(0)
    floor, b, n_dup, n_wrong = 0.3, 15.0, 300, 5000
    positives = np.clip(rng.normal(0.85, 0.06, 2000), -1, 1)
    dups = np.clip(rng.normal(0.85, 0.06, n_dup), -1, 1)
    wrong = floor + stats.truncexpon.rvs(b=b * (1 - floor), scale=1 / b, size=n_wrong, random_state=1)
    fit = fit_mixture(np.r_[dups, wrong], positives, floor)
    s = np.linspace(0.55, 0.95, 401)
    f_dup = n_dup * stats.norm(0.85, 0.06).pdf(s)
    f_wrong = n_wrong * stats.truncexpon.pdf(s - floor, b=b * (1 - floor), scale=1 / b)
    truth = f_dup / (f_dup + f_wrong)
    got = fit.duplicate_probability(s, positives)
    # Near its crossing the posterior climbs about 10 per unit of score, so the fit's small errors in D and b
    # (test_calibrate: within 15 % and 20 %) shift it by a few thousandths of a score: up to 0.1 in height.
    assert np.abs(got - truth).max() < 0.1
    # Where P(duplicate) crosses 1/2, the pairs the queue asks first: the same score to within 0.005.
    assert abs(s[np.argmin(np.abs(got - 0.5))] - s[np.argmin(np.abs(truth - 0.5))]) <= 0.005
