"""The Python API (nearsight/api.py) on a real store of scikit-image's bundled photos (tests/service_support.py).

References: the photo each query was made from (a crop or a resized JPEG of it must come back first); the
command line's own `--json` output for the same question on the same store (the API is the same work, so
the answers must be equal); SHA-256 (hashlib) of every archive file before and after a dry run.
"""

import hashlib
import json

import pytest
from PIL import Image

import nearsight

from .service_support import COPIED, _train_config, transformed


def _hashes(folder):
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def store_dir(service_store):
    return service_store.copy("api")


@pytest.fixture(scope="module")
def queries(service_store, tmp_path_factory):
    """A 70 %, quality-60 JPEG of each photo the archive holds no planted copy of, named after its photo."""
    folder = tmp_path_factory.mktemp("api-queries")
    return {name: transformed(path, folder / f"{name}.jpg")
            for name, path in service_store.originals.items() if name not in COPIED}


def test_similar_finds_each_photo_from_a_path_from_bytes_and_from_a_pil_image(store_dir, service_store, queries):
    names = sorted(queries)
    with nearsight.open_store(store_dir) as store:
        by_path = store.similar([queries[n] for n in names], k=3)
        by_bytes = store.similar([queries[n].read_bytes() for n in names], k=3)
        by_image = store.similar([Image.open(queries[n]) for n in names], k=3)
    for name, a, b, c in zip(names, by_path, by_bytes, by_image):
        original = str(service_store.originals[name].name)
        assert a.ok and a.query == str(queries[name])
        assert a.matches[0].path.endswith(original), (name, a.matches[0].path)
        assert [m.to_dict() for m in b.matches] == [m.to_dict() for m in a.matches]  # the same bytes
        assert c.matches[0].path.endswith(original)
        assert isinstance(a.matches[0], nearsight.Match) and 0 < a.matches[0].descriptor_similarity <= 1


def test_similar_answers_as_the_command_line_does(store_dir, queries, run_cli):
    paths = [queries[n] for n in sorted(queries)][:4]
    cli = run_cli("similar", *paths, "--store", store_dir, "-k", "5", "--json", check_exit=0)
    expected = [json.loads(line) for line in cli.stdout.splitlines()]
    with nearsight.open_store(store_dir) as store:
        got = [a.to_dict() for a in store.similar(paths, k=5)]
    assert got == expected


def test_one_path_alone_and_a_folder_are_queries_too(store_dir, queries):
    folder = next(iter(queries.values())).parent
    with nearsight.open_store(store_dir) as store:
        alone = store.similar(str(queries["rocket"]), k=2)
        listed = store.similar([queries["rocket"]], k=2)
        whole = store.similar([folder], k=1)
    assert [a.to_dict() for a in alone] == [a.to_dict() for a in listed] and len(alone) == 1
    assert sorted(a.query for a in whole) == sorted(str(p) for p in queries.values())


def test_an_unreadable_input_gets_its_error_and_the_others_their_answers(store_dir, queries, tmp_path):
    good = next(iter(queries.values()))
    with nearsight.open_store(store_dir) as store:
        answers = store.similar([b"not an image at all", tmp_path / "missing.jpg", good], k=2)
    assert [a.ok for a in answers] == [False, False, True]
    assert answers[0].error["error"] == "unreadable_image" and answers[0].query == "<19 bytes>"
    assert answers[1].error["error"] == "not_found" and "missing.jpg" in answers[1].error["message"]
    assert len(answers[2].matches) == 2


def test_groups_and_the_dry_run_plan_equal_the_commands_and_move_nothing(store_dir, service_store, run_cli, tmp_path):
    before = _hashes(service_store.archive)
    groups_cli = json.loads(run_cli("groups", "--store", store_dir, "--format", "json", check_exit=0).stdout)
    plan_cli = json.loads(run_cli("quarantine", "--store", store_dir, "--to", tmp_path / "q", "--json",
                                  check_exit=0).stdout)
    with nearsight.open_store(store_dir) as store:
        groups = store.groups()
        plan = store.plan_quarantine(tmp_path / "q")
        near = store.groups(tier="near-duplicate")
    assert [g.to_dict() for g in groups] == groups_cli["groups"] and groups
    assert {"applied": False, **plan.to_dict()} == plan_cli
    assert near == [g for g in groups if g.tier == "near-duplicate"]
    assert _hashes(service_store.archive) == before and not (tmp_path / "q").exists()


def test_status_reports_the_stores_files(store_dir, service_store):
    files = [p for p in service_store.archive.rglob("*") if p.is_file()]
    with nearsight.open_store(store_dir) as store:
        status = store.status()
    assert status.files == len(files) and status.readable == len(files) and status.unreadable == 0
    assert status.generation and status.model and status.to_dict()["files"] == len(files)


@pytest.mark.parametrize("call, message", [
    (lambda s: s.similar([], k=0), "k must be a whole number from 1 to 100"),
    (lambda s: s.similar([], threshold=2), "threshold must be a number in (0, 1]"),
    (lambda s: s.groups(threshold=-0.5), "threshold must be a number in (0, 1]"),
    (lambda s: s.plan_quarantine(precision=1), "precision must be a number in (0, 1)"),
    (lambda s: s.similar([], threshold=0.5, precision=0.9), "not both"),
])
def test_out_of_range_arguments_are_refused_with_the_commands_words(store_dir, call, message):
    with nearsight.open_store(store_dir) as store, pytest.raises(nearsight.UsageError, match=message.replace("(", r"\(")
                                                                   .replace(")", r"\)").replace("[", r"\[")
                                                                   .replace("]", r"\]")):
        call(store)


def test_opening_a_missing_store_says_so_and_creates_nothing(tmp_path):
    with pytest.raises(nearsight.NotFoundError, match="no nearsight store"):
        nearsight.open_store(tmp_path / "nowhere")
    assert not (tmp_path / "nowhere").exists()


def test_index_builds_a_store_that_then_answers(tmp_path):
    """Ten scikit-image photos and a resized copy of one, indexed with the tests' tiny encoder."""
    from .test_train import skimage_photos

    photos = tmp_path / "photos"
    photos.mkdir()
    for name, im in list(skimage_photos())[:10]:
        im.thumbnail((256, 256))
        im.save(photos / f"{name}.jpg", quality=90)
        last = (name, im)
    name, im = last
    im.resize((im.width // 2, im.height // 2)).save(photos / f"{name}-half.png")
    with nearsight.open_store(tmp_path / "store", create=True, settings={"workers": 1}) as store:
        run = store.index([photos], train=_train_config(), calibrate=False)
        assert (run.new, run.unreadable, run.indexed) == (11, 0, 11) and run.generation
        assert run.to_dict()["generation"] == run.generation
        (answer,) = store.similar([transformed(photos / f"{name}.jpg", tmp_path / "query.jpg")], k=2)
    assert {m.path.rsplit("/", 1)[1] for m in answer.matches} == {f"{name}.jpg", f"{name}-half.png"}
    with nearsight.open_store(tmp_path / "store") as store, pytest.raises(nearsight.UsageError, match="list of folders"):
        store.index(str(photos))
