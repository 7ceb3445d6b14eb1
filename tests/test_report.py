"""indexer.acting.report: the page parses with the standard library's html.parser, holds one
section per group, marks keepers, escapes every path, keeps its pictures as files in a folder
beside it and loads nothing from outside."""

import io
import re
from html.parser import HTMLParser

import numpy as np
import pytest
from PIL import Image

from nearsight.indexer.matching.groups import ImageMeta, build_groups
from nearsight.indexer.acting.report import human_bytes, write_html_report


class Collector(HTMLParser):
    """Records the tags, attributes and text the page really contains."""

    def __init__(self):
        super().__init__()
        self.tags, self.text = [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def jpeg(colour):
    out = io.BytesIO()
    Image.new("RGB", (32, 24), colour).save(out, "JPEG")
    return out.getvalue()


def make_groups():
    evil = '/photos/<script>alert("x")</script>&.jpg'
    paths = {1: "/photos/beach.jpg", 2: evil, 3: "/photos/beach copy.jpg",
             4: "/photos/cat.png", 5: "/photos/cat (1).png"}
    meta = {i: ImageMeta(path=p, content_hash=f"c{i}", width=640 - i, height=480, file_size=9000 + i,
                         format="JPEG", mtime=1.0) for i, p in paths.items()}
    groups = build_groups(np.array([1, 1, 2, 4]), np.array([2, 3, 3, 5]),
                          np.array([0.97, 0.96, 0.98, 0.93]), meta, t_near=0.95, t_similar=0.9)
    return groups, evil


def render(tmp_path, thumbnail=None):
    groups, evil = make_groups()
    out = tmp_path / "report" / "groups.html"
    write_html_report(groups, out, thumbnail=thumbnail or (lambda i: jpeg((40 * i, 90, 120))),
                      title="Groups <in> test", summary={"threshold": 0.9})
    page = out.read_text("utf-8")
    parser = Collector()
    parser.feed(page)
    parser.close()
    return groups, evil, page, parser


def test_one_section_per_group_and_keeper_marked(tmp_path):
    groups, _, _, parser = render(tmp_path)
    sections = [a for t, a in parser.tags if t == "section"]
    assert [s["id"] for s in sections] == [f"group-{g.gid}" for g in groups]
    keepers = [a for t, a in parser.tags if t == "figure" and a.get("class") == "keeper"]
    assert len(keepers) == len(groups)
    assert sum(t == "figure" for t, _ in parser.tags) == sum(g.size for g in groups)
    assert "keeper" in "".join(parser.text)


def test_text_is_escaped(tmp_path):
    _, evil, page, parser = render(tmp_path)
    assert "<script" not in page  # escaped, never a tag
    assert not any(t == "script" for t, _ in parser.tags)
    assert evil in "".join(parser.text)  # the parser unescapes it back to the real path
    assert "Groups <in> test" in "".join(parser.text)


def test_images_are_files_beside_the_page_and_nothing_external(tmp_path):
    groups, _, page, parser = render(tmp_path)
    images = [a["src"] for t, a in parser.tags if t == "img"]
    assert len(images) == sum(g.size for g in groups)
    folder = tmp_path / "report"
    for src in images:
        assert src.startswith("groups_files/") and src.endswith(".jpg")
        with Image.open(folder / src) as im:  # a real JPEG, read back with Pillow
            assert im.format == "JPEG" and im.size == (32, 24)
    assert not re.search(r"https?://|//[a-z0-9.-]+\.[a-z]{2,}/", page)
    assert not any(t in ("link", "script", "iframe") for t, _ in parser.tags)


def test_missing_thumbnails_and_summary(tmp_path):
    def thumbnail(ident):
        if ident == 2:
            raise OSError("file vanished")
        return None if ident == 3 else jpeg((0, 0, 0))

    groups, _, page, parser = render(tmp_path, thumbnail)
    assert page.count("no preview") == 2
    text = "".join(parser.text)
    freed = sum(m.meta.file_size for g in groups for m in g.members if m.id != g.keeper)
    assert human_bytes(freed) in text and "threshold" in text
    # no temp file or folder left, and only the pictures there are in the folder
    assert sorted(p.name for p in (tmp_path / "report").iterdir()) == ["groups.html", "groups_files"]
    assert len(list((tmp_path / "report" / "groups_files").iterdir())) == sum(g.size for g in groups) - 2


def test_human_bytes():
    # Binary units (1 KiB = 1024 B, IEC 80000-13).
    assert human_bytes(512) == "512 B"
    assert human_bytes(1536) == "1.5 KiB"
    assert human_bytes(3 * 1024**3) == "3.0 GiB"


def test_a_second_report_replaces_the_first_whole(tmp_path):
    groups, _ = make_groups()
    out = tmp_path / "report" / "groups.html"
    write_html_report(groups, out, thumbnail=lambda i: jpeg((10, 10, 10)), title="first", summary={})
    write_html_report(groups[:1], out, thumbnail=lambda i: jpeg((200, 10, 10)), title="second", summary={})
    parser = Collector()
    parser.feed(out.read_text("utf-8"))
    images = [a["src"] for t, a in parser.tags if t == "img"]
    assert len(images) == groups[0].size
    assert sorted(p.name for p in (tmp_path / "report" / "groups_files").iterdir()) == sorted(
        src.split("/", 1)[1] for src in images)  # nothing of the first report is left behind


def test_a_region_lands_on_the_picture_inside_its_square_tile():
    """The tile shows a picture whole and centred (CSS object-fit: contain, as the CSS specification defines
    it): a 200 x 100 picture fills the tile's width and the middle half of its height, so the picture's whole
    area is the band y 0.25-0.75, and its right half is x 0.5-1 of that band. Worked by hand."""
    from nearsight.indexer.acting.report import in_square

    assert in_square((0, 0, 1, 1), (200, 100)) == (0.0, 0.25, 1.0, 0.75)
    assert in_square((0.5, 0, 1, 1), (200, 100)) == (0.5, 0.25, 1.0, 0.75)
    assert in_square((0, 0.5, 1, 1), (100, 400)) == (0.375, 0.5, 0.625, 1.0)


@pytest.mark.slow
def test_a_report_of_ten_thousand_groups_is_whole(tmp_path):
    """A synthetic generation of 10,000 groups of three (benchmarks/bench_report.py, which states the time and
    memory): one section per group, one picture file per file, each referenced once, nothing left out."""
    from benchmarks.bench_report import synthetic_groups

    groups = synthetic_groups(10_000)
    out = tmp_path / "big" / "groups.html"
    write_html_report(groups, out, thumbnail=lambda ident: jpeg((ident % 256, 90, 120)), title="big", summary={})
    parser = Collector()
    parser.feed(out.read_text("utf-8"))
    sections = [a["id"] for t, a in parser.tags if t == "section"]
    images = [a["src"] for t, a in parser.tags if t == "img"]
    assert sections == [f"group-{g.gid}" for g in groups]
    assert len(images) == len(set(images)) == 30_000
    assert len(list((tmp_path / "big" / "groups_files").iterdir())) == 30_000
