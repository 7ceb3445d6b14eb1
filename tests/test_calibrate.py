"""Calibration: its rates, intervals and fits against reference libraries, and the command on a real store."""

import csv
import hashlib
import json
import re

import numpy as np
import pytest
from PIL import Image

from nearsight.indexer.core.errors import NotReadyError, UsageError
from nearsight.indexer.matching.generations import threshold_for_precision
from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.core.rates import counts_at_or_above, fit_mixture, survival, wilson_interval
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store
from nearsight.indexer.calibration.verdicts import verdict_report

from .test_pipeline import TINY, _scene


# -- statistics against reference libraries ----------------------------------------------------
def test_negatives_floor_keeps_100_neighbours_an_image_at_most_a_tenth_and_ignores_the_copies_low_tail():
    """Reference: numpy.quantile (linear interpolation, its default). Random-pair scores ~ N(0.1, 0.1) and
    synthetic copies' scores ~ Beta(8, 1) (scipy.stats draws both); n = 20,000 keeps 100 / n of the pairs,
    n = 300 a tenth. Replacing the harshest 5 % of the copies by scores near 0 (the draw's few hardest
    edits) leaves the floor where it was; only a collection whose random pairs score above a tenth of
    its copies (mostly duplicates) takes the copies' 10 % quantile."""
    from scipy import stats

    from nearsight.indexer.calibration.calibrate import negatives_floor

    random_scores = stats.norm.rvs(0.1, 0.1, size=50_000, random_state=0)
    copies = stats.beta.rvs(8, 1, size=512, random_state=1)
    assert negatives_floor(random_scores, copies, 20_000) == pytest.approx(np.quantile(random_scores, 1 - 100 / 20_000))
    assert negatives_floor(random_scores, copies, 300) == pytest.approx(np.quantile(random_scores, 0.9))
    harsher = np.sort(copies)
    harsher[:26] = np.linspace(0.0, 0.05, 26)
    assert negatives_floor(random_scores, harsher, 300) == negatives_floor(random_scores, copies, 300)
    duplicates_everywhere = random_scores + 0.6
    assert negatives_floor(duplicates_everywhere, copies, 300) == pytest.approx(np.quantile(copies, 0.1))


def test_wilson_interval_matches_statsmodels():
    """Reference: statsmodels.stats.proportion.proportion_confint(method="wilson") (Wilson 1927)."""
    from statsmodels.stats.proportion import proportion_confint

    for n in (1, 7, 50, 1000, 123_456):
        for k in sorted({0, 1, n // 3, n // 2, n - 1, n}):
            lo, hi = wilson_interval(k, n)
            ref_lo, ref_hi = proportion_confint(k, n, alpha=0.05, method="wilson")
            assert lo == pytest.approx(ref_lo, abs=1e-9) and hi == pytest.approx(ref_hi, abs=1e-9), (k, n)


def test_recall_precision_and_fpr_match_sklearn_curves():
    """Reference: sklearn.metrics.roc_curve and precision_recall_curve on the same scores."""
    from sklearn.metrics import precision_recall_curve, roc_curve

    rng = np.random.default_rng(3)
    pos = rng.normal(0.8, 0.1, 400)
    neg = rng.normal(0.3, 0.15, 3000)
    y = np.r_[np.ones(len(pos)), np.zeros(len(neg))]
    s = np.r_[pos, neg]
    fpr, tpr, thr = roc_curve(y, s, drop_intermediate=False)
    finite = np.isfinite(thr)
    assert np.allclose(survival(pos, thr[finite]), tpr[finite])
    assert np.allclose(survival(neg, thr[finite]), fpr[finite])
    precision, recall, thr2 = precision_recall_curve(y, s)
    tp, fp = counts_at_or_above(pos, thr2), counts_at_or_above(neg, thr2)
    assert np.allclose(tp / (tp + fp), precision[:-1])
    assert np.allclose(tp / len(pos), recall[:-1])
    # The chosen threshold: the lowest from which every higher one keeps precision >= target.
    target = 0.95
    t = threshold_for_precision(list(thr2), list(precision[:-1]), target)
    above = thr2 >= t
    assert (precision[:-1][above] >= target).all()
    below = thr2[thr2 < t]
    if len(below):  # one step lower breaks the target somewhere at or above it
        assert precision[:-1][thr2 >= below.max()].min() < target


def test_threshold_for_an_unreachable_precision_is_a_clear_error():
    with pytest.raises(UsageError, match="no threshold reaches precision 0.99"):
        threshold_for_precision([0.1, 0.5, 0.9], [0.5, 0.8, 0.9], 0.99)


def test_mixture_fit_recovers_a_planted_mixture():
    """Duplicates drawn from a known positive distribution, non-duplicates from an exponential tail
    (scipy.stats.truncexpon draws them); the fit must recover how many duplicates there are."""
    from scipy import stats

    rng = np.random.default_rng(0)
    floor, b = 0.3, 15.0
    positives = np.clip(rng.normal(0.85, 0.06, 2000), -1, 1)  # synthetic positives, the "measured" shape
    dups = np.clip(rng.normal(0.85, 0.06, 300), -1, 1)
    wrong = floor + stats.truncexpon.rvs(b=b * (1 - floor), scale=1 / b, size=5000, random_state=1)
    fit = fit_mixture(np.r_[dups, wrong], positives, floor)
    assert fit.dup_hits == pytest.approx(300, rel=0.15)
    assert fit.b == pytest.approx(b, rel=0.2)
    # Expected non-duplicates above 0.7: the truncated exponential's survival times the 5,000 drawn.
    expected = 5000 * stats.truncexpon.sf(0.7 - floor, b=b * (1 - floor), scale=1 / b)
    assert float(fit.wrong_hits_above(0.7)) == pytest.approx(expected, rel=0.35)


@pytest.mark.filterwarnings("error::RuntimeWarning")
@pytest.mark.parametrize("a, b", [(5.0, 15.0), (40.0, 0.5), (800.0, 2.0), (3.0, 1e-3)])
def test_the_tails_expected_count_is_scipys_integral_without_overflow(a, b):
    """Expected non-duplicates above t: the integral of exp(a - b s) from t to 1, against SciPy's quad
    (scipy.integrate). Extreme parameters, as the optimiser's trial steps reach, give a finite count
    and no RuntimeWarning (turned into an error here)."""
    from scipy import integrate

    from nearsight.indexer.core.rates import MixtureFit

    fit = MixtureFit(floor=0.2, dup_hits=10.0, a=a, b=b, pos_mass_above_floor=1.0)
    for t in (0.2, 0.5, 0.9, 1.0):
        got = float(fit.wrong_hits_above(t))
        assert np.isfinite(got)
        if a < 700:
            reference = integrate.quad(lambda s: np.exp(a - b * s), t, 1.0)[0]
            assert got == pytest.approx(reference, rel=1e-7, abs=1e-12)


def test_verdict_mapping_is_sklearn_isotonic_regression_and_precision_has_wilson_bounds():
    """Reference: sklearn.isotonic.IsotonicRegression fitted directly; statsmodels' Wilson interval."""
    from sklearn.isotonic import IsotonicRegression
    from statsmodels.stats.proportion import proportion_confint

    rng = np.random.default_rng(5)
    sims = rng.uniform(0, 1, 200)
    same = (rng.uniform(0, 1, 200) < sims**3).astype(int)
    grid = np.round(np.arange(0, 1.0001, 0.05), 4)
    report = verdict_report(sims, same, grid, 0.9, min_verdicts=30)
    ref = IsotonicRegression(increasing=True, y_min=0, y_max=1, out_of_bounds="clip").fit(sims, same)
    assert np.allclose([p for _t, p in report["isotonic"]], ref.predict(grid).round(4))
    at = report["precision_at"](0.6)
    k, m = int(same[sims >= 0.6].sum()), int((sims >= 0.6).sum())
    assert (at["same"], at["judged_pairs"]) == (k, m)
    assert at["interval"] == pytest.approx(proportion_confint(k, m, method="wilson"), abs=1e-4)
    too_few = verdict_report(sims[:10], same[:10], grid, 0.9, min_verdicts=30)
    assert too_few["used"] is False and "30 verdicts" in too_few["reason"]


# -- a real store ----------------------------------------------------------------------------------
def write_scenes_with_copies(folder) -> None:
    """40 distinct scenes, 6 of them with a resized JPEG copy and one exact copy."""
    folder.mkdir()
    for i in range(40):
        _scene(folder / f"scene{i:02d}.png", seed=100 + i)
        if i < 6:
            im = Image.open(folder / f"scene{i:02d}.png")
            im.resize((im.width // 2, im.height // 2)).save(folder / f"scene{i:02d}-small.jpg", quality=85)
    (folder / "scene07-copy.png").write_bytes((folder / "scene07.png").read_bytes())


@pytest.fixture(scope="module")
def store_dir(tmp_path_factory):
    """write_scenes_with_copies (the copies are contamination the negatives must leave out), indexed
    with the tiny test encoder and calibrated."""
    root = tmp_path_factory.mktemp("cal")
    folder = root / "photos"
    write_scenes_with_copies(folder)
    store_dir = root / "store"
    with Store.open(store_dir, create=True, settings=load_settings(environ={})) as store:
        run_index(store, [folder], progress=False, train_config=TINY)
    return store_dir


def test_index_calibrates_and_the_result_is_coherent(store_dir):
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        from nearsight.indexer.matching.generations import require_current

        gen = require_current(store)
        cal = gen.load_calibration()
        assert cal is not None and gen.meta["thresholds"]["source"] == "calibrated"
        near, similar = cal["tiers"]["near"], cal["tiers"]["similar"]
        assert gen.meta["thresholds"]["near"] == near["threshold"] >= similar["threshold"]
        # The exact copy was met among the closest pairs and left out, not counted as a wrong pair.
        assert cal["negatives"]["excluded_known_duplicates"]["same-bytes"] >= 1
        curve = near["curve"]
        recall = np.asarray(curve["recall"])
        assert (np.diff(recall) <= 1e-12).all(), "recall cannot rise with the threshold"
        for lo, p, hi in zip(curve["precision_lo"], curve["precision"], curve["precision_hi"]):
            if p is not None:
                assert lo - 1e-9 <= p <= hi + 1e-9
        assert (gen.path / "calibration.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        with Image.open(gen.path / "calibration.png") as im:
            assert im.size[0] > 300
        assert gen.threshold("near") == near["threshold"]


def test_negatives_leave_out_planted_duplicates(store_dir):
    """Contamination: the exact copy and a pair a person marked "same" are among each other's
    closest neighbours; the hard negatives must exclude exactly those pairs (counted with hashlib)."""
    from nearsight.indexer.building.build import load_vectors
    from nearsight.indexer.calibration.calibrate import neighbour_hits
    from nearsight.indexer.matching.generations import require_current

    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        gen = require_current(store)
        ids, xb = load_vectors(store, gen.meta["model"])
        xb = gen.load_whitening().apply(xb)
        index = gen.load_index()
        meta = store.catalog.image_meta(ids.tolist())
        digests = {}
        for i in ids.tolist():
            digests[i] = hashlib.blake2b(open(meta[i]["path"], "rb").read(), digest_size=32).hexdigest()
        same_bytes_directed = sum(1 for i in ids.tolist() for j in ids.tolist() if i != j and digests[i] == digests[j])
        rows = np.arange(len(ids))
        hits, excluded = neighbour_hits(store, index, ids, xb, rows, -1.0, meta, set())
        assert excluded["same-bytes"] == same_bytes_directed == 2
        # Mark scene00 and its small copy "same": that pair leaves the negatives too.
        by_name = {meta[i]["path"].rsplit("/", 1)[1]: i for i in ids.tolist()}
        a, b = by_name["scene00.png"], by_name["scene00-small.jpg"]
        content = store.catalog.content_ids_of([a, b])
        hits2, excluded2 = neighbour_hits(store, index, ids, xb, rows, -1.0, meta, {tuple(sorted(content.values()))})
        assert excluded2["person-same"] == 2 and len(hits2) == len(hits) - 2
        # Without the exclusion the same-bytes pairs (cosine 1) would count as wrong pairs.
        unique = {i: dict(m, content_hash=str(i), pixel_hash=None) for i, m in meta.items()}
        hits3, _ = neighbour_hits(store, index, ids, xb, rows, -1.0, unique, set())
        assert len(hits3) == len(hits) + 2 and (hits3 >= 1 - 1e-5).sum() >= (hits >= 1 - 1e-5).sum() + 2


def test_calibrate_command_summary_precision_flag_and_verdict_import(store_dir, run_cli, tmp_path):
    before = (store_dir / "generations" / (store_dir / "generations" / "CURRENT").read_text().strip())
    proc = run_cli("calibrate", "--store", store_dir, "--target-precision", "0.95", check_exit=0)
    assert re.search(r"threshold -?\d\.\d{3} for precision 0\.95 \(\S+-\S+\): about [\d,]+ wrong pairs expected "
                     r"among [\d,]+ called duplicates; recall \d\.\d\d", proc.stdout), proc.stdout
    # The recalibrated generation shares its index with the one it recalibrates (a hard link: the same inode),
    # and `verify` finds it whole (checksums in its checksums.json).
    after = (store_dir / "generations" / (store_dir / "generations" / "CURRENT").read_text().strip())
    assert after != before and (after / "index.faiss").stat().st_ino == (before / "index.faiss").stat().st_ino
    run_cli("verify", "--store", store_dir, check_exit=0)
    # --precision picks a threshold from the stored curve; both flags at once is a usage error.
    proc = run_cli("similar", str(store_dir.parent / "photos" / "scene03.png"), "--store", store_dir,
                   "--precision", "0.9", "--json", "-k", "2", check_exit=None)
    if proc.returncode == 0:
        assert json.loads(proc.stdout.splitlines()[0])["results"][0]["descriptor_similarity"] > 0.99
    else:  # 0.9 is not reachable on this tiny store: said in one line
        assert "no threshold reaches precision 0.9" in proc.stderr
    proc = run_cli("groups", "--store", store_dir, "--precision", "0.9", "--threshold", "0.5", check_exit=2)
    assert "not both" in proc.stderr
    # Verdicts from CSV: paths or ids; a bad row stores nothing.
    photos = store_dir.parent / "photos"
    good = tmp_path / "v.csv"
    with open(good, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["a", "b", "verdict", "note"])
        w.writerow([photos / "scene01.png", photos / "scene01-small.jpg", "same", "resized copy"])
        w.writerow([photos / "scene01.png", photos / "scene02.png", "different", ""])
    bad = tmp_path / "bad.csv"
    bad.write_text(good.read_text() + f"{photos / 'scene03.png'},{photos / 'nowhere.png'},same,\n")
    proc = run_cli("verdicts", "import", bad, "--store", store_dir, check_exit=2)
    assert "nowhere.png" in proc.stderr and "neither an image id nor a catalogued path" in proc.stderr
    run_cli("verdicts", "import", good, "--store", store_dir, check_exit=0)
    proc = run_cli("verdicts", "show", "--store", store_dir, "--json", check_exit=0)
    assert json.loads(proc.stdout) == {"pairs": 2, "same": 1, "different": 1}
    # The same file format feeds fine-tuning: an image id becomes its catalogued path.
    from nearsight.indexer.storage.store import Store
    from nearsight.indexer.calibration.verdicts import verdict_file_pairs

    with Store.open(store_dir) as store:
        first = store.catalog.file_id_for_path((photos / "scene01.png").resolve())
        ids = tmp_path / "ids.csv"
        ids.write_text(f"a,b,verdict\n{first},{photos / 'scene02.png'},different\n")
        [(a, b, same)] = verdict_file_pairs(store, ids)
        assert (a.resolve(), b, same) == ((photos / "scene01.png").resolve(), photos / "scene02.png", False)
        ids.write_text(f"a,b,verdict\n{first},999999,same\n")
        with pytest.raises(UsageError, match="no image with id 999999"):
            verdict_file_pairs(store, ids)


def test_calibration_refuses_a_store_too_small_to_measure(tmp_path):
    from nearsight.indexer.building.refresh import make_generation
    from nearsight.indexer.calibration.calibrate import CalibrationConfig

    folder = tmp_path / "few"
    folder.mkdir()
    for i in range(10):
        _scene(folder / f"s{i}.png", seed=i)
    with Store.open(tmp_path / "store", create=True, settings=load_settings(environ={})) as store:
        summary = run_index(store, [folder], progress=False, train_config=TINY)
        assert "skipped" in summary["calibration"] and summary["thresholds"]["source"] == "default"
        with pytest.raises(NotReadyError, match="at least 20 indexed images"):
            make_generation(store, build="recalibrate", calibration=CalibrationConfig())
