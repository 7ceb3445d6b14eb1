"""The query verdict: its threshold, rates and probabilities against reference libraries, and a
planted collection whose answer is known."""

import json
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from nearsight.indexer.calibration.calibrate import grouping_threshold
from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.matching.query import Searcher
from nearsight.indexer.matching.query_verdict import (DESCRIPTOR_KEY, copy_probability, false_flag_threshold, fit_probability,
                                                     threshold_report)
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store

from .test_pipeline import TINY, _scene


def test_false_flag_threshold_keeps_the_wilson_upper_bound_within_the_target():
    """Reference: statsmodels.stats.proportion.proportion_confint(method="wilson") (Wilson 1927)."""
    from statsmodels.stats.proportion import proportion_confint

    rng = np.random.default_rng(11)
    negatives = np.round(rng.beta(2, 5, 2000), 6)  # each a query's best wrong score
    t, confirmed = false_flag_threshold(negatives, 0.01)
    k = int((negatives >= t).sum())
    _lo, hi = proportion_confint(k, len(negatives), alpha=0.05, method="wilson")
    assert confirmed and hi <= 0.01
    # One negative more above the threshold would break the bound: the threshold is the lowest that holds.
    _lo, hi_more = proportion_confint(k + 1, len(negatives), alpha=0.05, method="wilson")
    assert hi_more > 0.01
    assert (negatives >= t - 1e-4).sum() > k  # a grid step lower flags more
    report = threshold_report(np.array([0.9, 0.95, 0.2]), 1, negatives, t)
    assert report["false_flag_rate"] == round(k / 2000, 4) and report["flagged_negatives"] == k
    assert report["false_flag_interval"] == pytest.approx(proportion_confint(k, 2000, method="wilson"), abs=1e-4)
    # Recall counts the missed copy (not returned at all) as not found: 2 of 4.
    assert report["recall"] == 0.5
    assert report["recall_interval"] == pytest.approx(proportion_confint(2, 4, method="wilson"), abs=1e-4)


def test_too_few_negatives_put_the_threshold_above_all_of_them():
    # 50 queries cannot confirm 1 % even with no flag (Wilson upper bound 3.84 / 53.84 = 0.071).
    negatives = np.linspace(0.1, 0.6, 50)
    t, confirmed = false_flag_threshold(negatives, 0.01)
    assert not confirmed and t > negatives.max() and t - negatives.max() <= 2e-4


def test_probability_is_sklearn_isotonic_regression_at_the_stated_prior():
    """Reference: sklearn.isotonic.IsotonicRegression fitted directly with the same weights."""
    from sklearn.isotonic import IsotonicRegression

    rng = np.random.default_rng(2)
    pos = np.clip(rng.normal(0.8, 0.12, 300), -1, 1)
    neg = np.clip(rng.normal(0.35, 0.15, 900), -1, 1)
    for prior in (0.5, 0.1):
        mapping = fit_probability(pos, neg, prior)
        w = np.r_[np.full(300, prior / 300), np.full(900, (1 - prior) / 900)]
        ref = IsotonicRegression(y_min=0, y_max=1, increasing=True, out_of_bounds="clip").fit(
            np.r_[pos, neg], np.r_[np.ones(300), np.zeros(900)], sample_weight=w)
        queries = np.linspace(-0.3, 1.2, 61)
        ours = [copy_probability({"probability": mapping}, q) for q in queries]
        assert ours == pytest.approx(ref.predict(queries), abs=2e-4)
    # A lower prior lowers every probability (Bayes' rule, common practice).
    high, low = fit_probability(pos, neg, 0.5), fit_probability(pos, neg, 0.1)
    assert copy_probability({"probability": low}, 0.6) < copy_probability({"probability": high}, 0.6)


def test_the_copy_threshold_is_where_sklearns_isotonic_fit_reaches_even_odds():
    """Reference: sklearn.isotonic.IsotonicRegression's predict on the same fit. The score `even_odds_score`
    gives is the lowest on the 1e-4 grid where the predicted chance of a copy is at least one half; one grid
    step lower it is below one half. Worked by hand for the steps (0.311, 0) to (0.452, 1): 0.3815."""
    from sklearn.isotonic import IsotonicRegression

    from nearsight.indexer.matching.query_verdict import even_odds_score

    assert even_odds_score({"scores": [0.016, 0.311, 0.452, 0.863], "probabilities": [0, 0, 1, 1]}) == 0.3815
    rng = np.random.default_rng(5)
    pos = np.clip(rng.normal(0.7, 0.15, 400), -1, 1)
    neg = np.clip(rng.normal(0.4, 0.15, 700), -1, 1)
    w = np.r_[np.full(400, 0.5 / 400), np.full(700, 0.5 / 700)]
    ref = IsotonicRegression(y_min=0, y_max=1, increasing=True, out_of_bounds="clip").fit(
        np.r_[pos, neg], np.r_[np.ones(400), np.zeros(700)], sample_weight=w)
    even = even_odds_score(fit_probability(pos, neg, 0.5))
    assert ref.predict([even])[0] >= 0.5 - 1e-6 and ref.predict([even - 1e-4])[0] < 0.5
    assert even_odds_score({"scores": [0.1, 0.9], "probabilities": [0.6, 1.0]}) is None  # even odds everywhere


def test_a_verified_negative_is_a_likely_duplicate_only_when_it_scores_like_the_copies():
    """The floor is numpy's linear quantile of the synthetic copies' descriptor scores (worked by hand for
    0.1 of [0.5, 0.6, ..., 1.4]: 0.59); a verified best result under it stays a negative (a look-alike that
    shares a drawn element or a logo), one at or above it is left out as an unknown duplicate."""
    from nearsight.indexer.matching.query_verdict import DESCRIPTOR_KEY, copy_like

    positives = [{DESCRIPTOR_KEY: 0.5 + 0.1 * i} for i in range(10)]
    assert np.quantile([p[DESCRIPTOR_KEY] for p in positives], 0.1) == pytest.approx(0.59)
    verified = [{DESCRIPTOR_KEY: s, "id": i} for i, s in enumerate((0.35, 0.58, 0.6, 0.97))]
    likely, unlike = copy_like(verified, positives)
    assert [r["id"] for r in likely] == [2, 3] and [r["id"] for r in unlike] == [0, 1]
    assert copy_like(verified, []) == (verified, [])


def test_a_verified_negative_with_a_strong_match_is_a_likely_duplicate_whatever_its_descriptor_score():
    """Under the descriptor floor (0.59, as above), a match on at least twice the inliers verification needs
    (2 x VerifyConfig.min_inliers) takes a verified best result for an unknown duplicate: a heavily edited
    real copy; one on fewer stays a negative (look-alikes verified on 12-18)."""
    from nearsight.indexer.matching.query_verdict import DESCRIPTOR_KEY, copy_like, strong_inliers
    from nearsight.indexer.matching.verify import VerifyConfig

    strong = 2 * VerifyConfig().min_inliers
    assert strong_inliers() == strong
    positives = [{DESCRIPTOR_KEY: 0.5 + 0.1 * i} for i in range(10)]
    verified = [{DESCRIPTOR_KEY: 0.35, "id": 0, "evidence": {"verified": True, "inliers": strong}},
                {DESCRIPTOR_KEY: 0.35, "id": 1, "evidence": {"verified": True, "inliers": strong - 1}},
                {DESCRIPTOR_KEY: 0.35, "id": 2, "evidence": None},
                {DESCRIPTOR_KEY: 0.7, "id": 3, "evidence": {"verified": True, "inliers": 12}}]
    likely, unlike = copy_like(verified, positives)
    assert [r["id"] for r in likely] == [0, 3] and [r["id"] for r in unlike] == [1, 2]


def test_groups_stay_at_the_query_threshold_without_evidence_from_the_collection():
    near = {"threshold": 0.995, "target_met": False, "target_precision": 0.99, "duplicate_pairs": 0.4}
    query = {"descriptor_threshold": 0.93}
    groups = grouping_threshold(near, query, n_images=2000)
    assert groups["threshold"] == 0.93 and groups["source"] == "query" and groups["almost_no_duplicates"]
    # With evidence (the pairwise estimate reaches its target) the collection's own threshold holds.
    met = dict(near, target_met=True, threshold=0.97, duplicate_pairs=300)
    assert grouping_threshold(met, query, 2000)["threshold"] == 0.97
    # No query verdict: nothing to compare with.
    assert grouping_threshold(near, None, 2000)["threshold"] == 0.995


# -- a planted collection: no internal duplicates, queries that are copies or not --------------
@pytest.fixture(scope="module")
def distinct_store(tmp_path_factory):
    """60 distinct scenes (no two are copies), indexed with the tiny encoder and calibrated;
    queries: JPEG re-saves of 12 indexed scenes (copies) and 12 scenes never indexed (non-copies)."""
    root = tmp_path_factory.mktemp("distinct")
    folder, queries = root / "photos", root / "queries"
    folder.mkdir()
    queries.mkdir()
    for i in range(60):
        _scene(folder / f"scene{i:02d}.png", seed=500 + i)
    copies, others = [], []
    for i in range(12):
        with Image.open(folder / f"scene{i:02d}.png") as im:
            im.convert("RGB").save(queries / f"copy{i:02d}.jpg", quality=85)
        copies.append((str(queries / f"copy{i:02d}.jpg"), str(folder / f"scene{i:02d}.png")))
        _scene(queries / f"new{i:02d}.png", seed=900 + i)
        others.append(str(queries / f"new{i:02d}.png"))
    store_dir = root / "store"
    with Store.open(store_dir, create=True, settings=load_settings(environ={})) as store:
        run_index(store, [folder], progress=False, train_config=TINY)
    return store_dir, copies, others


def test_a_collection_without_duplicates_flags_copies_and_says_so(distinct_store):
    store_dir, copies, others = distinct_store
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        searcher = Searcher(store)
        cal = searcher.generation.load_calibration()
        verdict = cal["query"]
        # The figures are a count by hand over the stored samples. Those are rounded to 1e-4, the threshold's
        # grid, so a score stored as exactly the threshold may have been just below it: counted either way.
        neg = np.asarray(cal["distributions"]["query_negatives"])
        pos = np.asarray(cal["distributions"]["query_positives"])
        t = verdict["threshold"]
        assert verdict["negatives"] == len(neg)
        assert int((neg > t).sum()) <= verdict["flagged_negatives"] <= int((neg >= t).sum())
        assert verdict["false_flag_rate"] == round(verdict["flagged_negatives"] / len(neg), 4)
        assert int((pos > t).sum()) <= round(verdict["recall"] * verdict["positives"]) <= int((pos >= t).sum())
        # Every image was asked as it is and edited; none of its neighbours is a copy.
        assert verdict["negative_queries"] == {"as_indexed": 60, "edited": 60}
        # The summary says in plain words that there is next to nothing to group.
        assert cal["groups"]["almost_no_duplicates"]
        assert "holds almost no duplicates" in (searcher.generation.path / "calibration.txt").read_text()
        answers = {a["query"]: a for a in searcher.similar_files([q for q, _ in copies] + others, k=3)}
    flagged_copies = sum(answers[q]["results"][0]["duplicate"] and answers[q]["results"][0]["path"] == orig
                         for q, orig in copies)
    flagged_others = sum(any(r["duplicate"] for r in answers[q]["results"]) for q in others)
    assert flagged_copies >= 11, flagged_copies  # JPEG re-saves at quality 85: the mildest copy there is
    assert flagged_others <= 1, flagged_others
    for q, _ in copies:
        best = answers[q]["results"][0]
        assert 0.0 <= best["probability"] <= 1.0 and best["probability"] >= answers[q]["results"][1]["probability"]


def test_per_query_exclusions_in_one_batch_answer_as_one_query_at_a_time(distinct_store):
    """Calibration asks its negatives in batches, each query without its own file: the answers must be
    those of asking each query alone with its exclusion (the reference: the same call, one by one)."""
    from nearsight.indexer.reading.images import read_image

    store_dir, copies, others = distinct_store
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        searcher = Searcher(store)
        paths = [orig for _, orig in copies[:6]] + others[:2]
        images = [read_image(p, max_side=2 * searcher.size)[0] for p in paths]
        ids = {Path(p).name: i for i, p in store.catalog.paths_for(range(1, 200)).items()}
        excludes = [{ids[Path(p).name]} if Path(p).name in ids else set() for p in paths]
        xq = searcher.vectors_for_images(images)
        batched = searcher.neighbours(xq, 4, excludes=excludes, images=images)
        alone = [searcher.neighbours(xq[i : i + 1], 4, exclude=excludes[i], images=[images[i]])[0]
                 for i in range(len(paths))]
    assert batched == alone
    assert all(not (e & {r["id"] for r in results}) for e, results in zip(excludes, batched))
    assert sum(bool(e) for e in excludes) == 6  # the six indexed files really were left out of their own answers


def test_similar_json_carries_probability_beside_similarity(distinct_store, run_cli):
    store_dir, copies, _ = distinct_store
    proc = run_cli("similar", copies[0][0], "--store", store_dir, "--json", "-k", "2", check_exit=0)
    result = json.loads(proc.stdout.splitlines()[0])["results"][0]
    assert {"similarity", "probability", "duplicate", "descriptor_similarity"} <= set(result)


def test_status_and_the_report_show_both_questions(distinct_store, run_cli, tmp_path):
    store_dir, _, _ = distinct_store
    status = json.loads(run_cli("status", "--store", store_dir, "--json", check_exit=0).stdout)
    questions = status["generation"]["questions"]
    cal = json.loads((store_dir / "generations" / status["generation"]["name"] / "calibration.json").read_text())
    assert questions["query"]["threshold"] == cal["query"]["threshold"]
    assert questions["groups"]["threshold"] == cal["groups"]["threshold"] == status["generation"]["thresholds"]["near"]
    text = run_cli("status", "--store", store_dir, check_exit=0).stdout
    assert "query: a result is called a copy of your image from score" in text and "groups: " in text
    out = tmp_path / "report.html"
    run_cli("groups", "--store", store_dir, "--format", "html", "--out", out, check_exit=0)
    page = out.read_text()
    assert "is this result a copy of my image?" in page and "which pairs in this collection are copies?" in page


@pytest.mark.parametrize("command", [["status"], ["groups"], ["settings"], ["quarantine", "--to", "QDIR"]])
def test_listing_commands_start_without_torch_or_faiss(distinct_store, tmp_path, command):
    """Commands that read what a generation published import neither PyTorch nor FAISS (each costs a
    second or more to import); the check reads the subprocess's own sys.modules."""
    from tests.subprocess_cli import run_fresh

    store_dir, _, _ = distinct_store
    args = [str(tmp_path / "q") if a == "QDIR" else a for a in command] + ["--store", str(store_dir)]
    out = run_fresh(args)
    assert (out["code"], out["loaded"]) == (0, [])


class _AskedCollection:
    """A stand-in for the searcher over a collection in which the files `with_copy` have a copy that verifies
    strongly (40 inliers) and every other file's best result is an unverified look-alike: enough to count what
    `calibrate_query` asks, not to score anything."""

    size = 8

    def __init__(self, n: int, with_copy: set[int]):
        self.n, self.with_copy, self.asked_plain = n, with_copy, 0

        class _Catalog:
            @staticmethod
            def content_ids_of(ids):
                return {i: i for i in ids}

        class _Store:
            catalog = _Catalog()

        self.store = _Store()

    def vectors_for_images(self, images):
        return np.zeros((len(images), 4), np.float32)

    def own_parts(self, ids):
        return {}

    def neighbours(self, xq, k, *, excludes=None, images=None, parts=None):
        out = []
        for image in images:
            kind, i = image
            if kind == "copy":  # a positive: its original comes back verified
                out.append([{"id": i, "similarity": 0.9, DESCRIPTOR_KEY: 0.95, "evidence": {"verified": True, "inliers": 80}}])
                continue
            self.asked_plain += kind == "plain"
            if kind == "plain" and i in self.with_copy:
                out.append([{"id": -i, "similarity": 0.8, DESCRIPTOR_KEY: 0.5, "evidence": {"verified": True, "inliers": 40}}])
            else:
                out.append([{"id": -i, "similarity": 0.3, DESCRIPTOR_KEY: 0.3, "evidence": None}])
        return out


@pytest.mark.parametrize("share_with_copy", [0.0, 0.8])
def test_images_are_asked_as_they_are_until_enough_of_them_remain_negatives(monkeypatch, share_with_copy):
    """In a collection where most images have a copy, their best results are left out as likely duplicates;
    the calibration keeps asking until `plain_negatives` negatives remain (or every image was asked), so the
    false-flag bound rests on as many negatives as in a collection without copies. (Edited queries are
    look-alikes here: their first chunk, at least query_verdict.CHUNK of them, is enough.)"""
    from nearsight.indexer.matching import query_verdict
    from nearsight.indexer.matching.query_verdict import QueryVerdictConfig, calibrate_query

    n, wanted = 2000, 300
    ids = np.arange(1, n + 1, dtype=np.int64)
    with_copy = set(ids[: int(share_with_copy * n)].tolist())
    searcher = _AskedCollection(n, with_copy)
    monkeypatch.setattr(query_verdict, "own_images",
                        lambda _s, ids_, rows, _side: [(r, int(ids_[r]), ("plain", int(ids_[r]))) for r in rows])
    meta = {int(i): {"content_hash": str(i), "pixel_hash": None} for i in ids}
    config = QueryVerdictConfig(plain_negatives=wanted, edited_negatives=10)
    verdict, _ = calibrate_query(searcher, ids, meta, set(), [("copy", int(i)) for i in ids[:40]], ids[:40].tolist(),
                                 config, np.random.default_rng(0), lambda images, rng: [("edited", i) for _k, i in images])
    plain_negatives = verdict["negatives"] - verdict["negative_queries"]["edited"]  # every edited one is a negative here
    assert plain_negatives >= wanted
    if share_with_copy == 0.0:
        assert verdict["negative_queries"]["as_indexed"] == wanted == searcher.asked_plain  # no more than needed
    else:  # about wanted / 0.2 asked, in chunks
        assert verdict["negative_queries"]["as_indexed"] == searcher.asked_plain > wanted / (1 - share_with_copy) - 1
        assert verdict["likely_duplicates"]["verified"] >= searcher.asked_plain - plain_negatives
