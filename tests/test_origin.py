"""Keeper by origin: EXIF capture time, camera and ICC profile read through Pillow, and the keeper rule that
prefers the file that still carries them (issue: keep the camera's file, not a stripped re-save).

References: files written by Pillow itself with EXIF tags (Exif 2.3: DateTimeOriginal in the Exif IFD as
"YYYY:MM:DD HH:MM:SS", Make and Model in IFD0) and an sRGB profile from Pillow's ImageCms (littleCMS); the
photos are scikit-image's bundled ones; files are compared by SHA-256 (hashlib).
"""

import hashlib
import sqlite3

import pytest
from PIL import ExifTags, Image, ImageCms

from nearsight.indexer.matching.groups import ImageMeta, keeper_key
from nearsight.indexer.reading.images import capture_time, probe, read_image


def _exif(when="2019:06:01 10:20:30", make="Fernhill", model="FX-20"):
    exif = Image.Exif()
    exif[ExifTags.Base.Make] = make
    exif[ExifTags.Base.Model] = model
    exif.get_ifd(ExifTags.IFD.Exif)[ExifTags.Base.DateTimeOriginal] = when
    return exif


def _srgb() -> bytes:
    return ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB")).tobytes()


def _photo(name="astronaut", side=320):
    import skimage.data

    im = Image.fromarray(getattr(skimage.data, name)()).convert("RGB")
    im.thumbnail((side, side))
    return im


def test_capture_time_camera_and_profile_are_read_as_pillow_wrote_them(tmp_path):
    path = tmp_path / "camera.jpg"
    _photo().save(path, quality=92, exif=_exif(), icc_profile=_srgb())
    _, info = read_image(path, max_side=64)
    assert (info.captured, info.camera, info.icc) == ("2019-06-01T10:20:30", "Fernhill FX-20", True)
    header = probe(path)  # the header alone says the same, without decoding
    assert (header.captured, header.camera, header.icc) == (info.captured, info.camera, info.icc)
    bare = tmp_path / "bare.jpg"
    _photo().save(bare, quality=92)
    _, none = read_image(bare)
    assert (none.captured, none.camera, none.icc) == (None, None, False)


def test_a_png_carries_its_exif_and_profile_too(tmp_path):
    path = tmp_path / "exported.png"
    _photo().save(path, exif=_exif(when="2021:12:31 23:59:58"), icc_profile=_srgb())
    _, info = read_image(path)
    assert (info.captured, info.camera, info.icc) == ("2021-12-31T23:59:58", "Fernhill FX-20", True)


@pytest.mark.parametrize("raw, expected", [
    ("2019:06:01 10:20:30", "2019-06-01T10:20:30"),
    ("2019:06:01 10:20:30\x00", "2019-06-01T10:20:30"),  # NUL-terminated ASCII, as Exif stores text
    ("0000:00:00 00:00:00", None),  # a camera without a set clock (common practice)
    ("    :  :     :  :  ", None),  # blank, as Exif 2.3 allows for an unknown time
    ("2019-06-01 10:20:30", None),  # not Exif's form
    (None, None),
])
def test_exif_times_follow_the_standards_form(raw, expected):
    assert capture_time(raw) == expected


def _meta(name, **kw):
    base = dict(path=f"/a/{name}", content_hash=name, width=1000, height=1000, file_size=100_000, format="JPEG",
                mtime=0.0)
    return ImageMeta(**{**base, **kw})


def test_the_keeper_order_is_origin_first_then_pixels():
    """The order groups.keeper_key states: capture time, camera, pixels, ICC profile, lossless format,
    earlier capture, older file, shallower path, larger file."""
    stripped_big = _meta("big.jpg", width=4000, height=3000)
    camera = _meta("camera.jpg", captured="2019-06-01T10:20:30", camera="Fernhill FX-20")
    dated_only = _meta("dated.jpg", captured="2019-06-01T10:20:30")
    with_profile = _meta("profile.jpg", captured="2019-06-01T10:20:30", camera="Fernhill FX-20", icc=True)
    lossless = _meta("profile.tif", captured="2019-06-01T10:20:30", camera="Fernhill FX-20", icc=True, format="TIFF")
    earlier = _meta("earlier.tif", captured="2018-01-01T00:00:00", camera="Fernhill FX-20", icc=True, format="TIFF")
    order = sorted([stripped_big, camera, dated_only, with_profile, lossless, earlier], key=keeper_key)
    assert [m.path.rsplit("/", 1)[1] for m in order] == [
        "earlier.tif", "profile.tif", "profile.jpg", "camera.jpg", "dated.jpg", "big.jpg"]
    # Without the camera's record, most pixels first: a small lossless copy or one with a colour profile
    # does not win over the full-size file.
    assert sorted([_meta("small.png", format="PNG", width=500, height=500, icc=True), stripped_big],
                  key=keeper_key)[0] is stripped_big
    # Same pixels: the profile, then the lossless format, then the older file, then the shallower path,
    # and only then the larger file (a brightened edit re-saved later is the larger file).
    original = _meta("chelsea.jpg", mtime=100.0, file_size=90_000)
    brighter = _meta("chelsea_bright.jpg", mtime=200.0, file_size=120_000)
    assert sorted([brighter, original], key=keeper_key)[0] is original
    top = ImageMeta(path="/archive/coffee.jpg", content_hash="c", width=10, height=10, file_size=5, format="JPEG",
                    mtime=1.0)
    deep = ImageMeta(path="/archive/backup/2019/coffee-copy.jpg", content_hash="c", width=10, height=10,
                     file_size=5, format="JPEG", mtime=1.0)
    assert sorted([deep, top], key=keeper_key)[0] is top
    # ... and the plan says which rule decided, in words.
    from nearsight.indexer.acting.keepers import KeeperRules

    rules = KeeperRules()
    assert rules.reason(original, [brighter]) == "is the oldest file (modification time)"
    assert rules.reason(top, [deep]) == "is the least deeply filed copy (shortest folder path)"
    assert rules.reason(camera, [stripped_big]) == "still has the camera's capture time (2019-06-01T10:20:30)"
    assert KeeperRules(prefer_formats="png").reason(_meta("p.png", format="PNG"), [stripped_big]) == \
        "is in a preferred format, PNG (prefer_formats)"


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def archive_store(tmp_path_factory):
    """Nine scikit-image photos, and three files of astronaut: the camera's JPEG (EXIF, ICC profile), a
    stripped upscale with more pixels, and a stripped PNG of the same pixels as the camera's."""
    from nearsight.indexer.building.pipeline import run_index
    from nearsight.indexer.core.settings import load_settings
    from nearsight.indexer.storage.store import Store

    from .service_support import _train_config
    from .test_train import skimage_photos

    work = tmp_path_factory.mktemp("origin")
    archive = work / "archive"
    (archive / "camera").mkdir(parents=True)
    (archive / "shared").mkdir()
    for name, im in skimage_photos():
        if name != "astronaut":
            im.thumbnail((256, 256))
            im.save(archive / f"{name}.jpg", quality=90)
    astronaut = _photo("astronaut", 320)
    astronaut.save(archive / "camera" / "IMG_0042.jpg", quality=92, exif=_exif(), icc_profile=_srgb())
    astronaut.resize((480, 480), Image.Resampling.LANCZOS).save(archive / "shared" / "astronaut-big.jpg", quality=95)
    Image.open(archive / "camera" / "IMG_0042.jpg").convert("RGB").save(archive / "shared" / "astronaut.png")
    store_dir = work / "store"
    with Store.open(store_dir, create=True, settings=load_settings(environ={}, overrides={"workers": 1})) as store:
        run_index(store, [archive], progress=False, train_config=_train_config(), calibrate=False)
    return store_dir, archive


def _keeper_of_astronaut(store_dir):
    from nearsight.indexer.acting.plan import plan_quarantine
    from nearsight.indexer.core.settings import load_settings
    from nearsight.indexer.storage.store import Store

    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        plan = plan_quarantine(store, include_unverified=True)
    for group in plan.to_dict()["groups"]:
        paths = [group["keeper"]["path"], *(m["path"] for m in group["moves"])]
        if any("IMG_0042" in p for p in paths):
            _keeper_of_astronaut.reason = group["keeper"]["reason"]
            return group["keeper"]["path"], sorted(m["path"] for m in group["moves"])
    raise AssertionError(f"no group holds the camera's file: {plan.to_dict()['groups']}")


def test_the_plan_keeps_the_cameras_file_over_a_bigger_stripped_copy(archive_store):
    store_dir, archive = archive_store
    before = {p: _sha(p) for p in archive.rglob("*") if p.is_file()}
    keeper, moves = _keeper_of_astronaut(store_dir)
    assert keeper.endswith("camera/IMG_0042.jpg")
    assert _keeper_of_astronaut.reason == "still has the camera's capture time (2019-06-01T10:20:30)"
    assert moves and all("shared/astronaut" in m for m in moves)
    assert {p: _sha(p) for p in archive.rglob("*") if p.is_file()} == before  # a plan moves nothing


def test_a_store_from_before_reads_the_facts_once_at_its_next_index(archive_store, tmp_path):
    """A catalog whose contents predate the facts (as schema 4 left them) gets them at the next `index`,
    from the files' headers, and the plan's keeper is the camera's file again."""
    import shutil

    from nearsight.indexer.building.pipeline import run_index
    from nearsight.indexer.core.settings import load_settings
    from nearsight.indexer.storage.store import Store

    from .service_support import _train_config

    store_src, archive = archive_store
    store_dir = tmp_path / "store"
    shutil.copytree(store_src, store_dir)
    with sqlite3.connect(store_dir / "catalog.sqlite") as conn:
        conn.execute("UPDATE contents SET captured = NULL, camera = NULL, icc = 0, origin_read = 0")
    conn.close()
    keeper, _ = _keeper_of_astronaut(store_dir)
    assert not keeper.endswith("IMG_0042.jpg")  # without the facts, the most pixels win, as before
    assert _keeper_of_astronaut.reason == "has the most pixels (480 x 480)"
    with Store.open(store_dir, settings=load_settings(environ={}, overrides={"workers": 1})) as store:
        run_index(store, [archive], progress=False, train_config=_train_config(), calibrate=False)
        assert store.catalog.contents_without_origin() == []
    keeper, _ = _keeper_of_astronaut(store_dir)
    assert keeper.endswith("camera/IMG_0042.jpg")


def test_the_report_shows_each_files_metadata_side_by_side_and_why_the_keeper_stays(archive_store, run_cli, tmp_path):
    """`groups --format html`: the astronaut group's section names the keeper's reason in the plan's words,
    shows the capture time and camera Pillow wrote into the camera's file beside the stripped copies' "no
    capture time", and outlines the common region; its pictures are files beside the page (parsed with the
    standard library's html.parser)."""
    from html.parser import HTMLParser

    store_dir, _ = archive_store

    class Sections(HTMLParser):
        def __init__(self):
            super().__init__()
            self.sections, self.images, self.regions = [], [], 0

        def handle_starttag(self, tag, attrs):
            attrs = dict(attrs)
            if tag == "section":
                self.sections.append([])
            elif tag == "img":
                self.images.append(attrs["src"])
            elif tag == "span" and attrs.get("class") == "region":
                self.regions += 1

        def handle_data(self, data):
            if self.sections:
                self.sections[-1].append(data)

    out = tmp_path / "report" / "groups.html"
    run_cli("groups", "--store", store_dir, "--format", "html", "--out", out, check_exit=0)
    page = Sections()
    page.feed(out.read_text("utf-8"))
    (text,) = [" ".join(s) for s in page.sections if "IMG_0042.jpg" in " ".join(s)]
    assert "it still has the camera's capture time (2019-06-01T10:20:30)" in text
    assert "2019-06-01 10:20:30" in text and "Fernhill FX-20" in text and "ICC profile" in text
    assert "no capture time" in text and "not named" in text  # the stripped copies, side by side
    assert page.regions >= 1
    assert page.images and all((out.parent / src).is_file() and src.startswith("groups_files/") for src in page.images)
