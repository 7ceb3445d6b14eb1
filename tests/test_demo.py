"""`nearsight demo` end to end on a small demo archive, checked against its planted truth."""

import json


def test_demo_runs_end_to_end_and_matches_the_planted_truth(run_cli, tmp_path):
    out = tmp_path / "demo"
    # A few seconds of training: this test checks the plumbing, not the encoder's quality.
    proc = run_cli("demo", "--out", out, "--originals", "30", "--train-minutes", "0.1", "--json", "--no-progress",
                   check_exit=0)
    report = json.loads(proc.stdout)
    truth = json.loads((out / "truth.json").read_text())

    assert report["index"]["seen"] == len(truth["images"])
    # Every planted broken file is found unreadable, and nothing else is.
    assert report["unreadable"]["found"] == sorted(truth["damaged"])
    # Byte-identical copies are found exactly (same content hash).
    assert report["same_bytes"]["planted"] > 0
    assert (report["same_bytes"]["precision"], report["same_bytes"]["recall"]) == (1.0, 1.0)

    # The main job ran through: a model, every readable file embedded and indexed, groups scored.
    readable = len(truth["images"]) - len(truth["damaged"])
    assert report["index"]["embedded"] == report["status"]["distinct_contents"]
    assert report["status"]["generation"]["indexed"] == readable
    assert report["duplicates"]["planted"] == sum(len(g) * (len(g) - 1) // 2 for g in truth["duplicate_groups"])

    # A second run reuses the archive and the model, and reads or embeds nothing again.
    again = json.loads(run_cli("demo", "--out", out, "--json", "--no-progress", check_exit=0).stdout)
    assert again["index"]["unchanged"] == len(truth["images"])
    assert (again["index"]["decoded"], again["index"]["embedded"]) == (0, 0)
    assert "trained" not in again["index"]


def test_demo_refuses_a_folder_that_holds_something_else(run_cli, tmp_path):
    out = tmp_path / "mine"
    out.mkdir()
    (out / "holiday.jpg").write_bytes(b"precious")
    proc = run_cli("demo", "--out", out, "--originals", "10")
    assert proc.returncode == 2 and "holds no demo archive" in proc.stderr
    assert (out / "holiday.jpg").read_bytes() == b"precious"
