"""The main job through the store: train once, embed by content, publish generations, answer queries."""

import json
import shutil

import numpy as np
import pytest
from PIL import Image

from nearsight.indexer.matching import generations
from nearsight.indexer.core.errors import NotReadyError
from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.matching.query import Searcher
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store
from nearsight.indexer.learning.train import TrainConfig

# A training run of a few steps: these tests check the plumbing, not the encoder's quality.
TINY = TrainConfig(arch="tiny", dim=16, size=32, embed_size=None, batch_size=8, steps=3, minutes=None, heldout=4, workers=0,
                   checkpoint_every_s=3600)


def _scene(path, seed):
    rng = np.random.default_rng(seed)
    small = rng.integers(0, 256, (5, 7, 3), dtype=np.uint8)
    Image.fromarray(small).resize((140, 100), Image.Resampling.BICUBIC).save(path, quality=92)


@pytest.fixture
def folder(tmp_path):
    root = tmp_path / "photos"
    (root / "a").mkdir(parents=True)
    for i in range(24):
        _scene(root / "a" / f"{i:02d}.jpg", i)
    return root


def _store(tmp_path, **overrides):
    return Store.open(tmp_path / "store", create=True, settings=load_settings(environ={}, overrides=overrides))


def test_first_run_trains_embeds_indexes_and_publishes(folder, tmp_path):
    with _store(tmp_path) as store:
        summary = run_index(store, [folder], progress=False, train_config=TINY)
        assert summary["trained"]["steps"] == 3
        assert summary["embedded"] == 24 and summary["indexed"] == 24
        gen = generations.current(store)
        assert gen.name == summary["generation"]
        assert gen.meta["indexed"] == 24 and gen.meta["model"] == summary["model"]
        assert set(gen.meta["thresholds"]) == {"near", "similar", "source", "verify_floor"}


def test_moved_and_copied_files_are_not_embedded_again(folder, tmp_path):
    with _store(tmp_path) as store:
        first = run_index(store, [folder], progress=False, train_config=TINY)
        (folder / "b").mkdir()
        shutil.move(folder / "a" / "00.jpg", folder / "b" / "moved.jpg")
        shutil.copy(folder / "a" / "01.jpg", folder / "b" / "copy.jpg")
        _scene(folder / "b" / "fresh.jpg", 999)
        second = run_index(store, [folder], progress=False, train_config=TINY)
        assert "trained" not in second           # the store's model is reused
        assert second["embedded"] == 1            # only the new content
        assert second["indexed"] == 26            # 24 (one of them moved) + copy + fresh
        assert second["generation"] != first["generation"]


def test_query_answers_and_bad_queries_get_their_own_error(folder, tmp_path):
    with _store(tmp_path) as store:
        run_index(store, [folder], progress=False, train_config=TINY)
        bad = tmp_path / "bad.jpg"
        bad.write_bytes(b"not a picture")
        queries = [str(folder / "a" / "03.jpg"), str(bad), str(tmp_path / "missing.jpg"), str(folder / "a" / "04.jpg")]
        answers = list(Searcher(store).similar_files(queries, k=3))
        assert [a["query"] for a in answers] == queries
        assert answers[1]["error"]["reason"] == "not-image"
        assert answers[2]["error"]["error"] == "not_found"
        for answer in (answers[0], answers[3]):
            results = answer["results"]
            assert len(results) == 3
            # The indexed file itself comes first, at similarity ~1 (its vector was made from the
            # cached small copy, the query's from the file: same pixels up to JPEG re-encoding).
            assert results[0]["path"] == answer["query"] and results[0]["descriptor_similarity"] > 0.99
            assert [r["similarity"] for r in results] == sorted((r["similarity"] for r in results), reverse=True)


def test_searching_before_any_index_is_a_clear_error(tmp_path):
    with _store(tmp_path) as store:
        with pytest.raises(NotReadyError, match="no index yet"):
            Searcher(store)


def test_publish_keeps_the_newest_generations_and_clears_leftovers(folder, tmp_path):
    with _store(tmp_path, keep_generations=2) as store:
        names = []
        for _ in range(3):
            names.append(run_index(store, [folder], progress=False, train_config=TINY)["generation"])
        (store.generations_dir / ".tmp-g-killed").mkdir()   # a publish killed half-way
        names.append(run_index(store, [folder], progress=False, train_config=TINY)["generation"])
        on_disk = sorted(p.name for p in store.generations_dir.iterdir() if p.is_dir())
        assert on_disk == sorted(names[-2:])
        assert store.read_pointer(generations.POINTER) == names[-1]
        meta = json.loads((store.generations_dir / names[-1] / "meta.json").read_text())
        assert meta["generation"] == names[-1]


def test_same_pixels_in_another_format_is_its_own_tier(folder, tmp_path):
    Image.open(folder / "a" / "05.jpg").save(folder / "a" / "05-again.bmp")   # same pixels, other bytes
    shutil.copy(folder / "a" / "06.jpg", folder / "a" / "06-copy.jpg")         # same bytes
    # Thresholds so high that only identical pictures group, whatever the tiny encoder learned.
    with _store(tmp_path, near_threshold=0.9999, similar_threshold=0.9999) as store:
        run_index(store, [folder], progress=False, train_config=TINY)
        groups = generations.current(store).load_groups()["groups"]
    # A member's tier says how it relates to its group's keeper.
    tier_to_keeper = {}
    for g in groups:
        for m in g["members"]:
            if m["id"] != g["keeper"]:
                tier_to_keeper[frozenset(x["path"].rsplit("/", 1)[-1] for x in (m, g["members"][0]))] = m["tier"]
    assert g["members"][0]["id"] == g["keeper"]
    assert tier_to_keeper[frozenset(("05.jpg", "05-again.bmp"))] == "same-pixels"
    assert tier_to_keeper[frozenset(("06.jpg", "06-copy.jpg"))] == "same-bytes"


def test_an_index_run_logs_plain_words_and_no_warning(folder, tmp_path, caplog, recwarn):
    """What a person reads at the default level, for a first and a nightly run: no Python repr of a
    dict or list, no internal index name, and no warning of any kind raised along the way."""
    import logging

    with caplog.at_level(logging.INFO), _store(tmp_path) as store:
        run_index(store, [folder], progress=False, train_config=TINY)
        _scene(folder / "a" / "new.jpg", 500)
        run_index(store, [folder], progress=False, train_config=TINY)
    lines = [r.getMessage() for r in caplog.records if r.levelno >= logging.INFO]
    assert lines
    for line in lines:
        assert "{'" not in line and '{"' not in line and "['" not in line, line
        assert "IDMap" not in line and "range_pairs" not in line, line
    assert not [str(w.message) for w in recwarn if issubclass(w.category, (RuntimeWarning, UserWarning))]


def test_long_work_logs_its_progress_when_no_terminal_shows_a_bar(caplog):
    """In a cron job (stderr not a terminal) the bar is off and a plain line is logged instead, with the
    count, the total, the rate and what the work reports (a training loop's loss)."""
    import logging

    from nearsight.indexer.core.progress import Progress

    with caplog.at_level(logging.INFO, logger="nearsight.indexer.core.progress"):
        with Progress(200, "train", enabled=False, unit="step", initial=50, every_s=0.0) as bar:
            bar.update(1, loss="3.142")
    (line,) = [r.getMessage() for r in caplog.records]
    assert line.startswith("train: 51 of 200 steps (") and line.endswith(" a second, loss 3.142)")
