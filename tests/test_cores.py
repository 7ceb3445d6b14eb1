"""Work shared among the cores by threads (indexer/core/cores.py), and verification of a batch of queries on them.

The reference for order and errors is what Python's own `map` and a plain loop give; the reference for the
verification is the same function called one query at a time, on scikit-image's bundled photos.
"""

import threading

import numpy as np
import pytest
from PIL import Image

from nearsight.indexer.core import cores
from nearsight.indexer.matching.rerank import rerank_all, rerank_more

two_cores = pytest.mark.skipif(cores.usable_cores() < 2, reason="needs 2 usable cores")


def test_results_come_back_in_the_items_order_as_map_gives_them():
    items = list(range(50))
    assert cores.each_on_cores(lambda x: x * x, items) == list(map(lambda x: x * x, items))
    assert cores.each_on_cores(lambda x: x, []) == []


@two_cores
def test_the_items_run_in_several_threads_at_once():
    barrier = threading.Barrier(2, timeout=10)  # only passes when two items run at the same time

    def work(x):
        barrier.wait()
        return threading.current_thread().name

    names = cores.each_on_cores(work, [0, 1])
    assert len(set(names)) == 2 and all(n.startswith("nearsight-cores") for n in names)


def test_an_error_in_one_item_reaches_the_caller():
    def work(x):
        if x == 3:
            raise ValueError("item 3")
        return x

    with pytest.raises(ValueError, match="item 3"):
        cores.each_on_cores(work, list(range(6)))


@two_cores
def test_faiss_runs_one_openmp_thread_in_the_workers_and_the_callers_setting_is_kept():
    import faiss

    before = faiss.omp_get_max_threads()
    inside = cores.each_on_cores(lambda _: faiss.omp_get_max_threads(), [0, 1, 2, 3])
    assert inside == [1, 1, 1, 1]
    assert faiss.omp_get_max_threads() == before


def _photo(name):
    import skimage.data

    return Image.fromarray(getattr(skimage.data, name)()).convert("RGB")


def test_a_batch_verified_on_the_cores_answers_as_one_query_at_a_time_does(tmp_path):
    """Six queries (crops and a mirror image of scikit-image photos, and one photo the candidates lack)
    against five candidates: `rerank_all` gives exactly what `rerank_more` gives query by query."""
    names = ["astronaut", "coffee", "chelsea", "rocket", "brick"]
    candidates = {}
    for i, name in enumerate(names):
        path = tmp_path / f"{name}.png"
        _photo(name).save(path)
        candidates[i] = str(path)
    queries = []
    for name in names[:4]:
        im = _photo(name)
        w, h = im.size
        queries.append(im.crop((w // 10, h // 10, w // 10 + int(0.7 * w), h // 10 + int(0.7 * h))))
    queries += [_photo("coffee").transpose(Image.Transpose.FLIP_LEFT_RIGHT), _photo("camera").convert("RGB")]
    rng = np.random.default_rng(0)

    def answers():
        return [[{"id": int(i), "similarity": round(float(s), 3)}
                 for i, s in zip(order, sorted(rng_scores, reverse=True))]
                for order, rng_scores in plans]

    plans = [(np.random.default_rng(q).permutation(len(names)), rng.uniform(0.2, 0.9, len(names)))
             for q in range(len(queries))]
    together = rerank_all(queries, answers(), candidates, top=2, more=3, fine=1)
    alone = [rerank_more(q, a, candidates, 2, 3, fine=1) for q, a in zip(queries, answers())]
    assert together == alone
    # Not a vacuous comparison: the crops and the mirror image verify, the photo the candidates lack does not.
    originals = [0, 1, 2, 3, 1]  # candidate id of each query's photo; the last query has none
    verified = [{r["id"] for r in results if (r.get("evidence") or {}).get("verified")} for results in together]
    assert verified[:5] == [{i} for i in originals] and verified[5] == set()


@two_cores
def test_work_started_from_inside_the_pool_runs_where_it_is_without_waiting_for_the_pool():
    """A nested call while every pool thread is busy with an outer item: it must not queue behind them."""
    def outer(x):
        return cores.each_on_cores(lambda y: (x, y, threading.current_thread().name), [0, 1, 2])

    results = cores.each_on_cores(outer, list(range(cores.usable_cores())))
    for x, inner in enumerate(results):
        assert [r[:2] for r in inner] == [(x, 0), (x, 1), (x, 2)]
        assert len({r[2] for r in inner}) == 1  # all in the outer item's own thread


def test_a_batch_brought_to_the_input_side_on_the_cores_equals_the_pictures_one_at_a_time():
    # `inputs.square_batch` shares a batch of PARALLEL_BATCH pictures or more among the cores; the reference is
    # Pillow's resize of each picture on its own (`resize_center_crop`), in order.
    from nearsight.indexer.learning.inputs import PARALLEL_BATCH, resize_center_crop, square_batch

    photos = [_photo(name) for name in ("astronaut", "coffee", "chelsea", "rocket")]
    images = [photos[k % 4].rotate(7 * k, expand=True) for k in range(PARALLEL_BATCH + 3)]
    batch = square_batch(images, 96)
    assert batch.shape == (len(images), 96, 96, 3) and batch.dtype == np.uint8
    for row, im in zip(batch, images):
        assert np.array_equal(row, np.asarray(resize_center_crop(im, 96)))


def _in_forked_child(queue):
    queue.put(cores.each_on_cores(lambda x: x + 1, [1, 2, 3]))


def test_a_process_forked_after_the_pool_started_gets_its_own_pool():
    # The pool's threads do not survive fork(); without `_forget_pool` work handed to them in the child waits
    # for ever (Python's documentation of os.fork: only the calling thread survives in the child).
    import multiprocessing

    cores.each_on_cores(lambda x: x, [0, 1])  # the pool exists in this process
    context = multiprocessing.get_context("fork")
    queue = context.Queue()
    child = context.Process(target=_in_forked_child, args=(queue,))
    child.start()
    child.join(60)
    if child.is_alive():
        child.kill()
    assert child.exitcode == 0
    assert queue.get(timeout=5) == [2, 3, 4]


def test_sharing_work_among_the_cores_does_not_load_faiss():
    # Resizing a batch uses the pool in processes that may never search (a fresh interpreter as the reference:
    # the modules it has loaded, sys.modules); FAISS's per-thread setting is made once FAISS is loaded.
    import subprocess
    import sys

    code = ("import sys; from nearsight.indexer.core import cores; "
            "print(cores.each_on_cores(lambda x: x + 1, [1, 2, 3, 4]), 'faiss' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=True)
    assert out.stdout.split() == ["[2,", "3,", "4,", "5]", "False"]
