"""`nearsight check`: new material against the archive, without touching the store.

The archive and the new material are scikit-image's bundled photos (open data); the edited copies are made
with Pillow. The CSV output is read back with the standard library's csv module, the JSON Lines with json.
"""

import csv
import hashlib
import io
import json
import shutil

import pytest
from PIL import Image, ImageEnhance
from skimage import data

from nearsight.indexer.matching import generations
from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store
from nearsight.indexer.learning.train import TrainConfig

ARCHIVE = ("astronaut", "coffee", "chelsea", "rocket", "camera", "brick", "immunohistochemistry", "hubble_deep_field",
           "retina", "coins")
NEW = ("grass", "gravel", "moon")  # never catalogued
TINY = TrainConfig(arch="tiny", size=64, embed_size=None, dim=16, batch_size=8, steps=3, minutes=None)


def _photo(name):
    im = Image.fromarray(getattr(data, name)()).convert("RGB")
    im.thumbnail((480, 480))
    return im


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    root = tmp_path_factory.mktemp("check")
    (root / "archive").mkdir()
    for name in ARCHIVE:  # each photo's four quarters: 40 files, enough to whiten and calibrate on
        im = _photo(name)
        w, h = im.size
        for row in range(2):
            for col in range(2):
                box = (col * w // 2, row * h // 2, (col + 1) * w // 2, (row + 1) * h // 2)
                im.crop(box).save(root / "archive" / f"{name}-{row}{col}.png")
    with Store.open(root / "store", create=True, settings=load_settings(environ={})) as store:
        run_index(store, [root / "archive"], progress=False, train_config=TINY)
    donated = root / "donated"
    donated.mkdir()
    shutil.copy(root / "archive" / "coffee-01.png", donated / "coffee-same-bytes.png")
    edited = Image.open(root / "archive" / "astronaut-10.png").convert("RGB").resize((180, 180))
    ImageEnhance.Brightness(edited).enhance(1.15).save(donated / "astronaut-resized.jpg", quality=85)
    for name in NEW:
        _photo(name).save(donated / f"{name}.png")
    (donated / "broken.jpg").write_bytes(b"\xff\xd8\xff\xe0 not really a JPEG")
    return root


def _state(store_dir):
    """What a check must leave as it was: the SHA-256 (hashlib, FIPS 180-4) of catalog.sqlite and of every
    CURRENT pointer, the catalog's rows and the published generations."""
    hashes = {p.relative_to(store_dir).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
              for p in [store_dir / "catalog.sqlite", *store_dir.rglob("CURRENT")]}
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        return (hashes, store.catalog.counts(), len(store.catalog.files_with_hashes()),
                generations.current(store).name, sorted(p.name for p in (store_dir / "generations").iterdir()))


def test_each_file_gets_one_verdict_and_the_store_is_untouched(archive, run_cli):
    before = _state(archive / "store")
    proc = run_cli("check", archive / "donated", "--store", archive / "store", "--json", check_exit=0)
    answers = {a["path"].rsplit("/", 1)[-1]: a for a in map(json.loads, proc.stdout.splitlines())}
    assert set(answers) == {"coffee-same-bytes.png", "astronaut-resized.jpg", "broken.jpg"} | {f"{n}.png" for n in NEW}
    for a in answers.values():
        assert set(a) == {"path", "verdict", "match", "error"}
    same = answers["coffee-same-bytes.png"]
    assert same["verdict"] == "copy" and same["match"]["path"].endswith("/archive/coffee-01.png")
    assert same["match"]["evidence"] == {"same_bytes": True}
    resized = answers["astronaut-resized.jpg"]
    assert resized["verdict"] == "copy" and resized["match"]["path"].endswith("/archive/astronaut-10.png")
    assert resized["match"]["evidence"]["verified"]
    assert answers["broken.jpg"]["verdict"] == "unreadable" and answers["broken.jpg"]["match"] is None
    assert answers["broken.jpg"]["error"]["reason"] in ("corrupt", "truncated", "not-image")
    for name in NEW:  # photos the archive does not hold are never called copies
        assert answers[f"{name}.png"]["verdict"] in ("new", "similar")
    assert _state(archive / "store") == before


def test_fail_on_copy_fails_a_pipeline_and_csv_is_one_row_a_file(archive, run_cli):
    failing = run_cli("check", archive / "donated", "--store", archive / "store", "--csv", "--fail-on", "copy")
    assert failing.returncode == 1
    rows = list(csv.DictReader(io.StringIO(failing.stdout)))
    assert len(rows) == 3 + len(NEW)
    verdicts = {r["path"].rsplit("/", 1)[-1]: r["verdict"] for r in rows}
    assert verdicts["coffee-same-bytes.png"] == "copy" and verdicts["broken.jpg"] == "unreadable"
    clean = run_cli("check", *(archive / "donated" / f"{n}.png" for n in NEW), "--store", archive / "store",
                    "--fail-on", "copy")
    assert clean.returncode == 0, clean.stdout + clean.stderr
    table = clean.stdout.splitlines()
    assert len(table) == len(NEW) and all(line.split()[0] in ("new", "similar") for line in table)


def test_the_html_sheet_shows_each_copy_beside_its_match_and_the_common_region(archive, run_cli, tmp_path):
    """`--format html`: one section a copy or similar file with two pictures (the file, its match) and, for the
    verified resize, the common region outlined on both; the new files and the unreadable one after; every
    picture a JPEG in the folder beside the page (read back with Pillow); and the store as it was."""
    from html.parser import HTMLParser

    class Page(HTMLParser):
        def __init__(self):
            super().__init__()
            self.sections, self.text = [], ""

        def handle_starttag(self, tag, attrs):
            attrs = dict(attrs)
            if tag == "section":
                self.sections.append({"id": attrs.get("id"), "img": [], "regions": 0, "text": ""})
            elif tag == "img" and self.sections:
                self.sections[-1]["img"].append(attrs["src"])
            elif tag == "span" and attrs.get("class") == "region" and self.sections:
                self.sections[-1]["regions"] += 1

        def handle_data(self, data):
            if self.sections:
                self.sections[-1]["text"] += data

    before = _state(archive / "store")
    listing = sorted(p.relative_to(archive / "store") for p in (archive / "store").rglob("*"))
    out = tmp_path / "sheet" / "check.html"
    proc = run_cli("check", archive / "donated", "--store", archive / "store", "--format", "html", "--out", out,
                   check_exit=0)
    assert f"wrote {out}" in proc.stdout
    page = Page()
    page.feed(out.read_text("utf-8"))
    found = [s for s in page.sections if s["id"] is None]
    resized = next(s for s in found if "astronaut-resized.jpg" in s["text"])
    assert len(resized["img"]) == 2 and resized["regions"] == 2 and "keypoints agree" in resized["text"]
    assert any("coffee-same-bytes.png" in s["text"] and "same bytes" in s["text"] for s in found)
    (unreadable,) = [s for s in page.sections if s["id"] == "unreadable"]
    assert "broken.jpg" in unreadable["text"]
    for src in (src for s in page.sections for src in s["img"]):
        with Image.open(out.parent / src) as im:
            assert im.format == "JPEG"
    assert _state(archive / "store") == before
    assert sorted(p.relative_to(archive / "store") for p in (archive / "store").rglob("*")) == listing
