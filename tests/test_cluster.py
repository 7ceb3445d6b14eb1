"""Embedding over a real Dask cluster (distributed.LocalCluster: worker processes on this machine)
and over a local process pool gives the vectors of the in-process path; a killed worker loses nothing."""

import logging
import os
import signal

import numpy as np
import pytest

from nearsight.indexer.matching.cluster import iter_local, iter_on_client
from nearsight.indexer.learning.embed import embed_files
from nearsight.indexer.learning.models import current_model_dir
from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store

from .test_pipeline import TINY, _scene

distributed = pytest.importorskip("distributed")

N_FILES = 40
BATCH = 6


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    """40 small photos plus one truncated file, and a model trained briefly on them."""
    root = tmp_path_factory.mktemp("cluster")
    folder = root / "photos"
    folder.mkdir()
    for i in range(N_FILES):
        _scene(folder / f"p{i:02d}.jpg", seed=300 + i)
    data = (folder / "p00.jpg").read_bytes()
    (folder / "p99-broken.jpg").write_bytes(data[: len(data) // 3])
    with Store.open(root / "store", create=True, settings=load_settings(environ={})) as store:
        run_index(store, [folder], progress=False, train_config=TINY, calibrate=False)
        model_dir = current_model_dir(store)
    paths = sorted(str(p) for p in folder.iterdir())
    reference = embed_files(paths, model_dir)  # the in-process path
    return paths, model_dir, reference


def _collect(results, n):
    """Vectors by global index, and how many times each index was answered."""
    seen = np.zeros(n, dtype=int)
    vectors = {}
    errors = {}
    for r in results:
        for offset, v in zip(r.ok.tolist(), r.vectors):
            seen[r.start + offset] += 1
            vectors[r.start + offset] = v
        for offset, reason in r.errors.items():
            seen[r.start + offset] += 1
            errors[r.start + offset] = reason
    return vectors, errors, seen


def _assert_same_as_reference(vectors, errors, seen, paths, reference):
    assert (seen == 1).all(), "every file answered exactly once"
    ref = {i: v for i, v in zip(reference.ok, reference.vectors)}
    assert sorted(vectors) == sorted(ref)
    assert set(errors) == set(reference.errors) == {paths.index(next(p for p in paths if "broken" in p))}
    got = np.stack([vectors[i] for i in sorted(ref)])
    want = np.stack([ref[i] for i in sorted(ref)])
    # Float tolerance: the same model and pixels, only thread counts differ (numpy.testing).
    np.testing.assert_allclose(got, want, atol=1e-5)


def test_local_dask_cluster_gives_the_local_vectors_and_survives_a_killed_worker(corpus):
    paths, model_dir, reference = corpus
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                  silence_logs=logging.ERROR) as cluster, distributed.Client(cluster) as client:
        pids = client.run(os.getpid)  # worker address -> its process id
        results = []
        for result in iter_on_client(client, paths, model_dir, batch_files=BATCH):
            results.append(result)
            if len(results) == 1:
                # Kill one worker while batches are queued and running on it (the nanny starts a new one).
                os.kill(next(iter(pids.values())), signal.SIGKILL)
        vectors, errors, seen = _collect(results, len(paths))
    _assert_same_as_reference(vectors, errors, seen, paths, reference)


def test_local_process_pool_runs_the_same_batches(corpus):
    paths, model_dir, reference = corpus
    vectors, errors, seen = _collect(iter_local(paths, model_dir, workers=2, batch_files=BATCH), len(paths))
    _assert_same_as_reference(vectors, errors, seen, paths, reference)


def test_index_with_cluster_stores_the_vectors_of_a_local_run(corpus, tmp_path, run_cli):
    """`nearsight index --cluster ADDRESS` against a LocalCluster's scheduler: the catalog ends with
    the vectors a local run stores, for the same model, and a wrong address is one clear line."""
    from nearsight.indexer.building.build import load_vectors

    paths, model_dir, reference = corpus
    folder = tmp_path / "photos"
    folder.mkdir()
    for p in paths:
        (folder / os.path.basename(p)).write_bytes(open(p, "rb").read())

    def store_with_model(name):
        import shutil

        root = tmp_path / name
        (root / "models").mkdir(parents=True)
        shutil.copytree(model_dir, root / "models" / model_dir.name)
        (root / "models" / "CURRENT").write_text(model_dir.name)
        return root

    local, remote = store_with_model("local"), store_with_model("remote")
    run_cli("index", folder, "--store", local, "--no-calibrate", "--retrain", "never", "--json", check_exit=0)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                  silence_logs=logging.ERROR) as cluster:
        proc = run_cli("index", folder, "--store", remote, "--no-calibrate", "--retrain", "never", "--json",
                       "--cluster", cluster.scheduler_address, check_exit=0)
    summary = __import__("json").loads(proc.stdout)
    assert summary["embedded"] == N_FILES and summary["unreadable"] == 1
    vectors = {}
    for name in ("local", "remote"):
        with Store.open(tmp_path / name, settings=load_settings(environ={})) as store:
            ids, xb = load_vectors(store, model_dir.name)
            paths_by_id = store.catalog.paths_for(ids.tolist())
            vectors[name] = {os.path.basename(paths_by_id[int(i)]): v for i, v in zip(ids, xb)}
    assert sorted(vectors["local"]) == sorted(vectors["remote"]) and len(vectors["local"]) == N_FILES
    for key, v in vectors["local"].items():
        np.testing.assert_allclose(vectors["remote"][key], v, atol=1e-5)
    proc = run_cli("index", folder, "--store", remote, "--cluster", "tcp://127.0.0.1:9", "--retrain", "never",
                   check_exit=2)
    assert "cannot reach the Dask scheduler at tcp://127.0.0.1:9" in proc.stderr
