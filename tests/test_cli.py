"""The `nearsight` command end to end, in a subprocess, in a temporary folder."""

import json
import shutil

import numpy as np
import pytest
from PIL import Image

from nearsight.indexer.cli import build_parser
from nearsight.indexer.storage.store import Store


@pytest.fixture
def folder(tmp_path):
    root = tmp_path / "photos"
    root.mkdir()
    rng = np.random.default_rng(1)
    for i in range(3):
        Image.fromarray(rng.integers(0, 256, (40, 60, 3), dtype=np.uint8)).save(root / f"p{i}.png")
    shutil.copy(root / "p0.png", root / "p0-again.png")
    (root / "broken.jpg").write_bytes(b"\xff\xd8\xff\xe0 this is where a JPEG would be")
    return root


def test_index_then_status(run_cli, folder, tmp_path):
    store = tmp_path / "store"
    proc = run_cli("index", folder, "--store", store, "--json", check_exit=0)
    summary = json.loads(proc.stdout)
    assert {k: summary[k] for k in ("new", "changed", "unchanged", "unreadable", "same_bytes")} == {
        "new": 5, "changed": 0, "unchanged": 0, "unreadable": 1, "same_bytes": 1,
    }
    assert "Traceback" not in proc.stderr

    status = json.loads(run_cli("--store", store, "status", "--json", check_exit=0).stdout)
    assert (status["files"], status["ok"], status["unreadable"], status["distinct_contents"]) == (5, 4, 1, 3)
    assert status["source_folders"] == [str(folder.resolve())]

    human = run_cli("status", "--store", store, "--unreadable", check_exit=0).stdout
    assert "broken.jpg" in human and "unreadable" in human

    again = json.loads(run_cli("index", folder, "--store", store, "--json", check_exit=0).stdout)
    assert (again["new"], again["unchanged"]) == (0, 5)


def test_store_from_the_environment(run_cli, folder, tmp_path):
    run_cli("index", folder, "-q", env={"NEARSIGHT_STORE": str(tmp_path / "env-store")}, check_exit=0)
    assert (tmp_path / "env-store" / "catalog.sqlite").is_file()


def test_errors_are_one_line_with_exit_codes(run_cli, folder, tmp_path):
    missing = run_cli("index", tmp_path / "nope", "--store", tmp_path / "s")
    assert missing.returncode == 1
    assert missing.stderr.strip().splitlines()[-1] == f"nearsight index: error: folder not found: {tmp_path / 'nope'}"
    assert "Traceback" not in missing.stderr
    assert not (tmp_path / "s").exists()  # a failed index leaves no store behind

    a_file = run_cli("index", folder / "p0.png", "--store", tmp_path / "s")
    assert a_file.returncode == 2 and "not a folder" in a_file.stderr
    assert not (tmp_path / "s").exists()

    no_store = run_cli("status", "--store", tmp_path / "absent")
    assert no_store.returncode == 1 and "no nearsight store" in no_store.stderr
    file_store = run_cli("status", "--store", folder / "p1.png")  # a store path that is a file
    assert file_store.returncode == 2 and "is a file" in file_store.stderr and "nearsight index" not in file_store.stderr

    usage = run_cli("index")  # FOLDER missing: argparse's usage error, in one line and a pointer to --help
    assert usage.returncode == 2 and "usage:" not in usage.stderr
    assert usage.stderr.splitlines() == ["nearsight index: error: the following arguments are required: FOLDER",
                                         "(see 'nearsight index --help')"]

    bad_setting = run_cli("index", folder, "--store", tmp_path / "s", env={"NEARSIGHT_WORKERS": "lots"})
    assert bad_setting.returncode == 2 and "NEARSIGHT_WORKERS" in bad_setting.stderr

    debug = run_cli("index", tmp_path / "nope", "--store", tmp_path / "s", "--debug")
    assert debug.returncode == 1 and "Traceback" in debug.stderr


def test_a_busy_store_exits_3(run_cli, folder, tmp_path):
    store_dir = tmp_path / "store"
    with Store.open(store_dir, create=True) as store, store.lock():
        busy = run_cli("index", folder, "--store", store_dir)
    assert busy.returncode == 3
    assert "is busy" in busy.stderr


def test_every_command_has_help(run_cli):
    commands = build_parser()._subparsers._group_actions[0].choices
    assert {"index", "train", "similar", "groups", "calibrate", "serve", "status", "demo"} <= set(commands)
    for name in commands:
        proc = run_cli(name, "--help", check_exit=0)
        assert proc.stdout.startswith(f"usage: nearsight {name}")


def test_settings_lists_values_and_sources(run_cli, tmp_path):
    out = json.loads(run_cli("settings", "--store", tmp_path, "--json", env={"NEARSIGHT_THUMB_SIDE": "300"}, check_exit=0).stdout)
    row = next(r for r in out if r["name"] == "thumb_side")
    assert (row["value"], row["source"]) == (300, "NEARSIGHT_THUMB_SIDE")


def test_index_over_good_and_malformed_files_records_every_file(run_cli, tmp_path):
    """The issue's malformed corpus (built by test_images) beside good but unusual images."""
    from .test_images import MALFORMED

    root = tmp_path / "mixed"
    root.mkdir()
    expected = {}
    for name, build, reason in MALFORMED:
        if name == "missing":  # nothing on disk to find
            continue
        folder = root / name
        folder.mkdir()
        path = build(folder)
        if name == "directory":
            # A folder named like an image is a folder: scanned into, not recorded as a file.
            Image.new("RGB", (9, 7), "teal").save(path / "inside.png")
            expected[f"{name}/folder.jpg/inside.png"] = "ok"
            continue
        if name == "symlink-loop":
            expected[f"{name}/b.jpg"] = "symlink-loop"
        # A FIFO is never opened by the scan: it is not a regular file.
        expected[path.relative_to(root).as_posix()] = "not-file" if name == "fifo" else reason
    good = root / "good"
    good.mkdir()
    Image.new("CMYK", (30, 20), (0, 128, 255, 0)).save(good / "cmyk.jpg")
    Image.fromarray(np.arange(600, dtype=np.uint16).reshape(20, 30) * 100).save(good / "deep.png")
    palette = Image.new("P", (10, 10), 1)
    palette.putpalette([0, 0, 0, 255, 0, 0] + [0] * 762)
    palette.save(good / "palette.png", transparency=0)
    frames = [Image.new("RGB", (16, 16), c) for c in ("red", "blue")]
    frames[0].save(good / "anim.gif", save_all=True, append_images=frames[1:])
    Image.new("RGB", (1, 1), "white").save(good / "dot.png")
    Image.new("RGB", (30000, 10), "gray").save(good / "strip.png")
    for path in good.iterdir():
        expected[f"good/{path.name}"] = "ok"

    store_dir = tmp_path / "store"
    run_cli("index", root, "--store", store_dir, "-q", check_exit=0)
    with Store.open(store_dir) as store:
        rows = {r["relpath"]: r for r in store.catalog.files_with_hashes()}
    assert set(rows) == set(expected)
    for relpath, code in expected.items():
        row = rows[relpath]
        if code == "ok":
            assert row["state"] == "ok", (relpath, row["reason"])
        elif code is None:  # scrambled entropy data: corrupt or truncated, both right
            assert row["reason"].split(":")[0] in {"corrupt", "truncated"}
        else:
            assert (row["state"], row["reason"].split(":")[0]) == ("unreadable", code), relpath


def test_similar_and_groups_from_the_command_line(run_cli, tmp_path):
    root = tmp_path / "scenes"
    root.mkdir()
    rng = np.random.default_rng(5)
    for i in range(20):
        small = rng.integers(0, 256, (5, 7, 3), dtype=np.uint8)
        Image.fromarray(small).resize((140, 100), Image.Resampling.BICUBIC).save(root / f"s{i:02d}.png")
    shutil.copy(root / "s00.png", root / "s00-copy.png")
    store = tmp_path / "store"
    tiny = ["--arch", "tiny", "--size", "32", "--dim", "16", "--batch-size", "8", "--epochs", "1"]
    summary = json.loads(run_cli("index", root, "--store", store, "--json", *tiny, check_exit=0).stdout)
    assert summary["indexed"] == 21

    bad = tmp_path / "bad.jpg"
    bad.write_bytes(b"")
    proc = run_cli("similar", root / "s03.png", bad, "--store", store, "-k", "2", "--json", check_exit=0)
    lines = [json.loads(line) for line in proc.stdout.splitlines()]
    assert [line["query"] for line in lines] == [str(root / "s03.png"), str(bad)]
    assert set(lines[0]["results"][0]) == {"id", "path", "similarity", "descriptor_similarity", "evidence", "duplicate",
                                          "probability"}
    assert len(lines[0]["results"]) == 2 and lines[1]["error"]["reason"] == "empty"

    folder_query = run_cli("similar", root, "--store", store, "-k", "1", "--json", check_exit=0)
    assert len(folder_query.stdout.splitlines()) == 21

    groups = json.loads(run_cli("groups", "--store", store, "--format", "json", "--threshold", "0.999", check_exit=0).stdout)
    same = [g for g in groups["groups"] if {m["path"] for m in g["members"]} >= {str(root / "s00.png"), str(root / "s00-copy.png")}]
    assert len(same) == 1 and same[0]["members"][1]["tier"] == "same-bytes"
    csv_text = run_cli("groups", "--store", store, "--format", "csv", "--threshold", "0.999", check_exit=0).stdout
    assert csv_text.splitlines()[0].startswith("gid,")
    run_cli("groups", "--store", store, "--format", "html", "--out", tmp_path / "r.html", check_exit=0)
    assert (tmp_path / "r.html").read_text().startswith("<!DOCTYPE html>")
