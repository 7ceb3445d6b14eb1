"""The demo archive generator, checked against references outside it.

References: hashlib's SHA-256 for byte identity; Pillow's decoders and numpy for
pixel identity; the Exif/TIFF 6.0 Orientation tag meaning, applied with numpy.rot90;
ITU-T T.81 Annex K quantisation tables scaled by the IJG quality formula for JPEG
quality; Pearson correlation of 8x8 grayscale thumbnails as a closeness measure
(common practice for near-duplicate screening).
"""

from __future__ import annotations

import hashlib
import io
import json
import subprocess
import sys
from collections import Counter
from itertools import combinations
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageOps

from nearsight.demo_data.generate import MAX_ORIGINALS, ROOT, TRUTH_FILE, generate

ROOT_DIR = Path(__file__).resolve().parent.parent
SMALL = 30
NEAR_KINDS = ("recompressed", "resized", "cropped", "colour-edited", "captioned", "bordered", "rotated", "burst")
ALL_KINDS = {"original", "exact-copy", "same-pixels", "recompressed", "resized", "cropped", "colour-edited",
             "captioned", "bordered", "rotated", "burst", "look-alike", "damaged"}
# Edits that keep the whole frame in place, so a whole-image thumbnail is comparable as is.
FRAME_KEEPING = ("exact-copy", "same-pixels", "recompressed", "resized", "colour-edited", "rotated", "burst")
# Edits that change the frame (crop, added band or mount); compared after undoing the recorded geometry.
REFRAMING = ("cropped", "captioned", "bordered")

# ITU-T T.81 (JPEG) Annex K, table K.1: luminance quantisation table, natural (row-major) order.
ANNEX_K_LUMA = [16, 11, 10, 16, 24, 40, 51, 61, 12, 12, 14, 19, 26, 58, 60, 55, 14, 13, 16, 24, 40, 57, 69, 56,
                14, 17, 22, 29, 51, 87, 80, 62, 18, 22, 37, 56, 68, 109, 103, 77, 24, 35, 55, 64, 81, 104, 113, 92,
                49, 64, 78, 87, 103, 121, 120, 101, 72, 92, 95, 98, 112, 100, 103, 99]


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    """One small archive shared read-only by the checks below: (folder, truth)."""
    out = tmp_path_factory.mktemp("demo") / "archive"
    return out, generate(out, seed=11, originals=SMALL)


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def upright(path: Path) -> Image.Image:
    with Image.open(path) as im:
        return ImageOps.exif_transpose(im).convert("RGB")


def thumb(img: Image.Image, n: int = 8) -> np.ndarray:
    """Zero-mean, unit-length 8x8 grayscale thumbnail; the dot product of two is their Pearson correlation."""
    v = np.asarray(img.convert("L").resize((n, n), Image.Resampling.BOX), np.float64).ravel()
    v = v - v.mean()
    return v / np.linalg.norm(v)


def files_under(out: Path) -> dict[str, str]:
    return {str(p.relative_to(out)): sha256(p) for p in sorted(out.rglob("*")) if p.is_file()}


def by_kind(truth: dict, *kinds: str) -> list[dict]:
    return [e for e in truth["images"] if e["kind"] in kinds]


# --- determinism -----------------------------------------------------------------

def test_same_seed_gives_byte_identical_files_whatever_the_worker_count(tmp_path):
    a = generate(tmp_path / "a", seed=5, originals=12, workers=1)
    b = generate(tmp_path / "b", seed=5, originals=12, workers=2)
    assert a == b
    files_a, files_b = files_under(tmp_path / "a"), files_under(tmp_path / "b")
    assert len(files_a) == len(a["images"]) + 1  # + truth.json
    assert files_a == files_b  # same names, same SHA-256 (hashlib) file by file


def test_different_seeds_give_different_photos(tmp_path):
    a = generate(tmp_path / "a", seed=5, originals=12)
    b = generate(tmp_path / "b", seed=6, originals=12)
    originals_a = {sha256(tmp_path / "a" / e["path"]) for e in by_kind(a, "original")}
    originals_b = {sha256(tmp_path / "b" / e["path"]) for e in by_kind(b, "original")}
    assert len(originals_a) == len(originals_b) == 12
    assert not originals_a & originals_b


# --- truth file ------------------------------------------------------------------

def test_truth_lists_exactly_the_files_written(archive):
    out, truth = archive
    on_disk = {str(p.relative_to(out)) for p in (out / ROOT).rglob("*") if p.is_file()}
    listed = [e["path"] for e in truth["images"]]
    assert len(listed) == len(set(listed))
    assert set(listed) == on_disk
    assert json.loads((out / TRUTH_FILE).read_text(encoding="utf-8")) == truth
    assert truth["root"] == ROOT and truth["seed"] == 11


def test_groups_pairs_and_damaged_agree_with_the_image_list(archive):
    _, truth = archive
    kind = {e["path"]: e["kind"] for e in truth["images"]}
    original_of = {e["path"]: e["original"] for e in truth["images"]}
    grouped = [p for g in truth["duplicate_groups"] for p in g]
    assert len(grouped) == len(set(grouped)), "groups overlap"
    for group in truth["duplicate_groups"]:
        heads = [p for p in group if kind[p] == "original"]
        assert len(heads) == 1 and len(group) >= 2
        assert all(original_of[p] == heads[0] for p in group if p != heads[0])
    duplicates = {p for p, k in kind.items() if k not in ("original", "look-alike", "damaged")}
    assert duplicates <= set(grouped)
    assert not {p for p, k in kind.items() if k in ("look-alike", "damaged")} & set(grouped)
    for a, b in truth["lookalike_pairs"]:
        assert kind[a] == "original" and kind[b] == "look-alike" and original_of[b] == a
    assert truth["damaged"] == sorted(p for p, k in kind.items() if k == "damaged")
    assert all(original_of[p] is None or kind[original_of[p]] == "original" for p in kind)


def test_every_kind_is_planted_in_the_stated_shares(archive):
    _, truth = archive
    counts = Counter(e["kind"] for e in truth["images"])
    assert set(counts) == ALL_KINDS
    assert counts["original"] == SMALL and counts["damaged"] == 3
    near_per_original = Counter(e["original"] for e in by_kind(truth, *NEAR_KINDS))
    # Shares from the brief: 40 % with 1-3 near-duplicates, 10 % exact copies, 8 % same-pixels, 15 % look-alikes.
    assert len(near_per_original) == round(0.40 * SMALL)
    assert set(near_per_original.values()) <= {1, 2, 3}
    assert counts["exact-copy"] == round(0.10 * SMALL)
    assert counts["same-pixels"] == round(0.08 * SMALL)
    assert counts["look-alike"] == round(0.15 * SMALL)


# --- planted files against reference decoders ------------------------------------

def test_exact_copies_are_byte_identical(archive):
    out, truth = archive
    for e in by_kind(truth, "exact-copy"):
        assert sha256(out / e["path"]) == sha256(out / e["original"])  # hashlib SHA-256


def test_same_pixel_copies_decode_to_identical_arrays_from_different_bytes(archive):
    out, truth = archive
    for e in by_kind(truth, "same-pixels"):
        assert sha256(out / e["path"]) != sha256(out / e["original"])
        with Image.open(out / e["path"]) as copy, Image.open(out / e["original"]) as orig:
            assert copy.format in ("PNG", "TIFF", "BMP")  # Pillow's own reading of the container
            np.testing.assert_array_equal(np.asarray(copy.convert("RGB")), np.asarray(orig.convert("RGB")))


def test_damaged_files_fail_to_decode(archive):
    out, truth = archive
    assert len(truth["damaged"]) == 3
    for path in truth["damaged"]:
        with pytest.raises(OSError):  # Pillow: UnidentifiedImageError (an OSError) or "image file is truncated"
            with Image.open(out / path) as im:
                im.load()
    assert min((out / p).stat().st_size for p in truth["damaged"]) == 0


def test_jpeg_quality_matches_the_annex_k_tables(archive):
    """Each recompressed file's luminance table is Annex K's, scaled by the IJG quality formula (libjpeg jcparam.c)."""
    out, truth = archive
    for e in by_kind(truth, "recompressed"):
        q = e["params"]["quality"]
        assert 30 <= q <= 60
        scale = 5000 // q if q < 50 else 200 - 2 * q
        expected = [min(max((k * scale + 50) // 100, 1), 255) for k in ANNEX_K_LUMA]
        with Image.open(out / e["path"]) as im:
            assert list(im.quantization[0]) == expected


def test_edit_sizes_follow_their_recorded_parameters(archive):
    out, truth = archive
    for e in by_kind(truth, "resized", "cropped", "bordered"):
        w, h = upright(out / e["original"]).size
        vw, vh = upright(out / e["path"]).size
        if e["kind"] == "resized":
            assert 0.5 - 0.01 <= vw / w <= 0.7 + 0.01 and abs(vw / w - vh / h) < 0.01
        elif e["kind"] == "cropped":
            assert 0.7 - 0.01 <= vw * vh / (w * h) <= 0.9 + 0.01
        else:
            assert (vw - w) == (vh - h) == 2 * e["params"]["width"] > 0


def test_exif_oriented_originals_turn_upright_as_the_tag_says(archive):
    """Orientation 3/6/8 (Exif 2.3, TIFF 6.0): display = stored turned 180 / 90 clockwise / 90 anticlockwise."""
    out, truth = archive
    oriented = [e for e in by_kind(truth, "original") if e["params"]["exif_orientation"]]
    assert oriented, "the small archive should hold at least one EXIF-oriented photo"
    turns = {3: 2, 6: -1, 8: 1}  # numpy.rot90 k: positive is anticlockwise
    for e in oriented:
        with Image.open(out / e["path"]) as im:
            assert im.getexif()[0x0112] == e["params"]["exif_orientation"]
            stored = np.asarray(im.convert("RGB"))
            shown = ImageOps.exif_transpose(im).convert("RGB")
        assert list(shown.size) == e["params"]["size"]
        np.testing.assert_array_equal(np.asarray(shown), np.rot90(stored, turns[e["params"]["exif_orientation"]]))


# --- closeness -------------------------------------------------------------------

def test_frame_keeping_near_duplicates_are_closest_to_their_own_original(archive):
    """Whole-image 8x8 thumbnails; used for edits that keep the frame (see REFRAMING for the others)."""
    out, truth = archive
    originals = [e["path"] for e in by_kind(truth, "original")]
    xb = np.stack([thumb(upright(out / p)) for p in originals])
    checked = 0
    for e in by_kind(truth, *FRAME_KEEPING):
        scores = xb @ thumb(upright(out / e["path"]))
        assert originals[int(np.argmax(scores))] == e["original"], (e["path"], e["kind"])
        checked += 1
    assert checked >= 10


def _undo_framing(e: dict, variant: Image.Image, original: Image.Image) -> tuple[Image.Image, tuple]:
    """The variant cut back to the part of the original it shows, and that part's box in the original."""
    w, h = original.size
    p = e["params"]
    if e["kind"] == "cropped":
        return variant, tuple(p["box"])
    if e["kind"] == "bordered":
        b = p["width"]
        return variant.crop((b, b, b + w, b + h)), (0, 0, w, h)
    keep = (0, 0, w, h) if p["style"] == "band" else (0, 0, w, int(h * 0.75))  # the overlay covers < 25 % at the foot
    return variant.crop(keep), keep


def test_reframed_near_duplicates_match_their_original_once_the_frame_is_undone(archive):
    """A crop, caption band or mount changes a whole-image thumbnail, so compare the region the variant shows,
    cut at the same place from every original (scaled box), and require the own original to win."""
    out, truth = archive
    originals = {e["path"]: upright(out / e["path"]) for e in by_kind(truth, "original")}
    for e in by_kind(truth, *REFRAMING):
        own = originals[e["original"]]
        shown, box = _undo_framing(e, upright(out / e["path"]), own)
        xq = thumb(shown)
        scores = {}
        for path, img in originals.items():
            sx, sy = img.width / own.width, img.height / own.height
            scores[path] = float(thumb(img.crop((box[0] * sx, box[1] * sy, box[2] * sx, box[3] * sy))) @ xq)
        assert max(scores, key=scores.get) == e["original"], (e["path"], e["kind"])
        assert scores[e["original"]] > 0.95


def test_lookalikes_are_distinct_photos_farther_than_a_recompression(archive):
    out, truth = archive
    for original, lookalike in truth["lookalike_pairs"]:
        a, b = upright(out / original), upright(out / lookalike)
        assert a.size == b.size  # same recipe, so same frame
        xa, xb = np.asarray(a.convert("L"), np.float64), np.asarray(b.convert("L"), np.float64)
        assert not np.array_equal(xa, xb)
        buf = io.BytesIO()
        a.save(buf, "JPEG", quality=30)  # a heavy recompression made here with Pillow as the yardstick
        recompressed = Image.open(buf).convert("RGB")
        xr = np.asarray(recompressed.convert("L"), np.float64)
        assert np.abs(xa - xb).mean() > 2 * np.abs(xa - xr).mean()
        assert float(thumb(a) @ thumb(b)) < float(thumb(a) @ thumb(recompressed))


def test_originals_are_farther_apart_than_any_copy_from_its_original(archive):
    """Every pair of originals correlates less than any re-encoded, resized or colour-edited copy with its original."""
    out, truth = archive
    originals = [e["path"] for e in by_kind(truth, "original")]
    xb = {p: thumb(upright(out / p)) for p in originals}
    loosest = min(float(xb[e["original"]] @ thumb(upright(out / e["path"])))
                  for e in by_kind(truth, "recompressed", "resized", "colour-edited"))
    closest_pair = max(float(xb[a] @ xb[b]) for a, b in combinations(originals, 2))
    assert closest_pair < loosest


# --- bad input -------------------------------------------------------------------

def test_refuses_a_non_empty_folder_and_leaves_it_alone(tmp_path):
    keep = tmp_path / "notes.txt"
    keep.write_text("minutes of the March meeting\n", encoding="utf-8")
    with pytest.raises(ValueError, match="not empty"):
        generate(tmp_path, originals=2)
    assert [p.name for p in tmp_path.iterdir()] == ["notes.txt"]
    assert keep.read_text(encoding="utf-8") == "minutes of the March meeting\n"


@pytest.mark.parametrize("kwargs, message", [
    ({"originals": 0}, "originals must be between"),
    ({"originals": MAX_ORIGINALS + 1}, "originals must be between"),
    ({"originals": "ten"}, "originals must be an integer"),
    ({"originals": True}, "originals must be an integer"),
    ({"seed": -1}, "seed must be 0 or more"),
    ({"seed": 1.5}, "seed must be an integer"),
])
def test_refuses_bad_arguments_before_writing(tmp_path, kwargs, message):
    with pytest.raises(ValueError, match=message):
        generate(tmp_path / "out", **kwargs)
    assert not (tmp_path / "out").exists()


def test_refuses_a_file_as_output_folder(tmp_path):
    target = tmp_path / "archive.zip"
    target.write_bytes(b"PK")
    with pytest.raises(ValueError, match="not a folder"):
        generate(target, originals=2)
    assert target.read_bytes() == b"PK"


def _cli(*args):
    env = {"PYTHONPATH": str(ROOT_DIR), "PATH": "/usr/bin:/bin"}
    return subprocess.run([sys.executable, "-m", "nearsight.demo_data.generate", *map(str, args)], capture_output=True,
                          text=True, cwd=ROOT_DIR, env=env, timeout=300)


def test_cli_writes_the_archive_and_prints_one_line(tmp_path):
    proc = _cli(tmp_path / "out", "--seed", "3", "--originals", "4")
    assert proc.returncode == 0, proc.stderr
    lines = proc.stdout.strip().splitlines()
    assert len(lines) == 1 and "4 original" in lines[0]
    truth = json.loads((tmp_path / "out" / TRUTH_FILE).read_text(encoding="utf-8"))
    assert truth["seed"] == 3 and sum(e["kind"] == "original" for e in truth["images"]) == 4


def test_cli_reports_bad_input_in_one_line(tmp_path):
    (tmp_path / "taken.txt").write_text("x", encoding="utf-8")
    proc = _cli(tmp_path, "--originals", "4")
    assert proc.returncode == 2
    assert proc.stderr.strip().count("\n") == 0 and proc.stderr.startswith("error:")
    assert proc.stdout == ""
